//! Syntax tree → resolved formula graph.
//!
//! Owns: name resolution (unknowns, vector unknowns and their elements, data columns, `let`
//! definitions, range indices, the constants `pi` and `e`), the function table with arities,
//! the rules on `sum(…)` (data columns only inside it, no nesting), and the result: a
//! [`Graph`], a hash-consed expression graph in which shared sub-expressions appear once and
//! constant sub-expressions are already folded. Ranges (`sum(k = 1..K, …)`,
//! `logsumexp(k = 1..K, …)`) are unrolled here; a sum over data rows whose body picks vector
//! elements by a data column (`mu[group]`) becomes one sum per group of rows with the same
//! picks (`calls`); built-in densities are expanded by `densities` and their support checked
//! here for constant and data arguments, before any run; terms added by the model (priors)
//! are resolved with the formula.
//! Must not: evaluate anything but constants and data-only values, or decide evaluation order
//! and memory layout (that is `tape`).

use crate::common::error::{nearest, KilnError};
use crate::common::maths::{Binary, Unary};
use crate::formula::densities;
use crate::formula::syntax::{error_at, BinaryOp, Expr, ExprKind, Program, Span, UnaryOp};
use crate::formula::tape::DataTable;
use std::collections::HashMap;

mod calls;
mod rows;

/// Index of a node in a [`Graph`]. Children always have smaller indices than their parents.
pub type NodeId = u32;

/// The row set of a sum over every data row.
pub const ALL_ROWS: u32 = u32::MAX;

/// Most nodes a formula may expand to (ranges and groups of rows unrolled).
pub const MAX_NODES: usize = 2_000_000;

#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Node {
    Const(f64),
    /// The i-th unknown (in the real-line coordinates the formula is written in: the user's).
    Var(u32),
    /// The current row's value of data column i (only inside a `Sum` body).
    Data(u32),
    Unary(Unary, NodeId),
    Binary(Binary, NodeId, NodeId),
    /// Σ of the body over data rows: every row ([`ALL_ROWS`]) or the rows of
    /// `Graph::row_sets[set]`.
    Sum(NodeId, u32),
}

#[derive(Clone, Copy, PartialEq, Eq, Hash)]
enum Key {
    Const(u64),
    Var(u32),
    Data(u32),
    Unary(Unary, NodeId),
    Binary(Binary, NodeId, NodeId),
    Sum(NodeId, u32),
}

fn key_of(node: Node) -> Key {
    match node {
        Node::Const(v) => Key::Const(v.to_bits()),
        Node::Var(i) => Key::Var(i),
        Node::Data(i) => Key::Data(i),
        Node::Unary(op, a) => Key::Unary(op, a),
        Node::Binary(op, a, b) => Key::Binary(op, a, b),
        Node::Sum(a, s) => Key::Sum(a, s),
    }
}

/// A checked formula: an expression graph, its root, and the row sets of its sums.
#[derive(Clone, Debug)]
pub struct Graph {
    pub nodes: Vec<Node>,
    pub root: NodeId,
    /// Row indices (0-based, increasing) of the sums over part of the rows.
    pub row_sets: Vec<Vec<u32>>,
}

/// Whether a node depends on unknowns and on data.
#[derive(Clone, Copy, Default)]
pub(crate) struct Deps {
    pub var: bool,
    pub data: bool,
}

#[derive(Default)]
pub(crate) struct Builder {
    pub nodes: Vec<Node>,
    pub deps: Vec<Deps>,
    index: HashMap<Key, NodeId>,
}

impl Builder {
    pub fn add(&mut self, node: Node) -> NodeId {
        // Fold constants with the very functions the tape uses, so folding changes no bits.
        let node = match node {
            Node::Unary(op, a) => match self.nodes[a as usize] {
                Node::Const(x) => Node::Const(op.apply(x)),
                _ => node,
            },
            Node::Binary(op, a, b) => match (self.nodes[a as usize], self.nodes[b as usize]) {
                (Node::Const(x), Node::Const(y)) => Node::Const(op.apply(x, y)),
                _ => node,
            },
            _ => node,
        };
        let key = key_of(node);
        if let Some(&id) = self.index.get(&key) {
            return id;
        }
        let deps = match node {
            Node::Const(_) => Deps::default(),
            Node::Var(_) => Deps {
                var: true,
                data: false,
            },
            Node::Data(_) => Deps {
                var: false,
                data: true,
            },
            Node::Unary(_, a) => self.deps[a as usize],
            Node::Binary(_, a, b) => Deps {
                var: self.deps[a as usize].var || self.deps[b as usize].var,
                data: self.deps[a as usize].data || self.deps[b as usize].data,
            },
            Node::Sum(a, _) => Deps {
                var: self.deps[a as usize].var,
                data: false,
            },
        };
        let id = self.nodes.len() as NodeId;
        self.nodes.push(node);
        self.deps.push(deps);
        self.index.insert(key, id);
        id
    }

    /// The number of nodes, to [`Builder::rollback`] to.
    pub fn mark(&self) -> usize {
        self.nodes.len()
    }

    /// Forgets every node added since `mark`.
    pub fn rollback(&mut self, mark: usize) {
        for id in mark..self.nodes.len() {
            let key = key_of(self.nodes[id]);
            if self.index.get(&key) == Some(&(id as NodeId)) {
                self.index.remove(&key);
            }
        }
        self.nodes.truncate(mark);
        self.deps.truncate(mark);
    }

    pub fn constant(&self, id: NodeId) -> Option<f64> {
        match self.nodes[id as usize] {
            Node::Const(c) => Some(c),
            _ => None,
        }
    }
}

#[derive(Clone, Copy)]
enum Arity {
    Exactly(usize),
    AtLeast(usize),
}

#[derive(Clone, Copy)]
enum Builtin {
    Unary(Unary),
    Binary(Binary),
    /// min, max, logsumexp: folded pairwise.
    Fold(Binary),
    Sum,
}

/// The functions of the formula language: name, arity, meaning. The built-in densities
/// (`densities`) come on top of these.
const FUNCTIONS: &[(&str, Arity, Builtin)] = &[
    ("exp", Arity::Exactly(1), Builtin::Unary(Unary::Exp)),
    ("log", Arity::Exactly(1), Builtin::Unary(Unary::Log)),
    ("log1p", Arity::Exactly(1), Builtin::Unary(Unary::Log1p)),
    ("expm1", Arity::Exactly(1), Builtin::Unary(Unary::Expm1)),
    ("sqrt", Arity::Exactly(1), Builtin::Unary(Unary::Sqrt)),
    ("abs", Arity::Exactly(1), Builtin::Unary(Unary::Abs)),
    ("sin", Arity::Exactly(1), Builtin::Unary(Unary::Sin)),
    ("cos", Arity::Exactly(1), Builtin::Unary(Unary::Cos)),
    ("tan", Arity::Exactly(1), Builtin::Unary(Unary::Tan)),
    ("asin", Arity::Exactly(1), Builtin::Unary(Unary::Asin)),
    ("acos", Arity::Exactly(1), Builtin::Unary(Unary::Acos)),
    ("atan", Arity::Exactly(1), Builtin::Unary(Unary::Atan)),
    ("sinh", Arity::Exactly(1), Builtin::Unary(Unary::Sinh)),
    ("cosh", Arity::Exactly(1), Builtin::Unary(Unary::Cosh)),
    ("tanh", Arity::Exactly(1), Builtin::Unary(Unary::Tanh)),
    ("erf", Arity::Exactly(1), Builtin::Unary(Unary::Erf)),
    ("lgamma", Arity::Exactly(1), Builtin::Unary(Unary::Lgamma)),
    ("atan2", Arity::Exactly(2), Builtin::Binary(Binary::Atan2)),
    ("pow", Arity::Exactly(2), Builtin::Binary(Binary::Pow)),
    ("min", Arity::AtLeast(2), Builtin::Fold(Binary::Min)),
    ("max", Arity::AtLeast(2), Builtin::Fold(Binary::Max)),
    (
        "logsumexp",
        Arity::AtLeast(1),
        Builtin::Fold(Binary::LogAddExp),
    ),
    ("sum", Arity::Exactly(1), Builtin::Sum),
];

/// The names of the ordinary functions (without the built-in densities).
pub fn function_names() -> impl Iterator<Item = &'static str> {
    FUNCTIONS.iter().map(|f| f.0)
}

/// Names a user may not give to an unknown, a data column or a definition.
pub fn reserved_names() -> impl Iterator<Item = String> {
    FUNCTIONS
        .iter()
        .map(|f| f.0.to_string())
        .chain(densities::function_names())
        .chain(["pi", "e", "let"].map(String::from))
}

/// Is `name` a valid identifier of the formula language?
pub fn is_identifier(name: &str) -> bool {
    let mut chars = name.chars();
    chars
        .next()
        .is_some_and(|c| c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

/// A vector unknown: the unknowns `first .. first + len` (elements 1 to len).
#[derive(Clone, Debug, PartialEq)]
pub struct Vector {
    pub name: String,
    pub first: u32,
    pub len: u32,
}

/// What a formula may refer to.
pub struct Inputs<'a> {
    /// The unknowns, one name each (a vector's elements named as shown, e.g. `mu[1]`).
    pub unknowns: &'a [String],
    pub vectors: &'a [Vector],
    pub data_names: &'a [String],
    pub data: &'a DataTable<'a>,
}

impl<'a> Inputs<'a> {
    /// Scalar unknowns and data only (no vectors).
    pub fn plain(
        unknowns: &'a [String],
        data_names: &'a [String],
        data: &'a DataTable<'a>,
    ) -> Inputs<'a> {
        Inputs {
            unknowns,
            vectors: &[],
            data_names,
            data,
        }
    }
}

/// A term the model adds to the formula: the density written in `text` (a call such as
/// `normal(0, 10)`, its first argument left out) of each of the unknowns `subjects`, times
/// `coefficient`. Priors of a spec are such terms.
pub struct AddedTerm<'a> {
    pub source: &'a str,
    pub text: &'a str,
    pub subjects: Vec<u32>,
    pub coefficient: f64,
}

#[derive(Clone, Copy)]
enum Binding {
    Var(u32),
    Data(u32),
    Let(NodeId),
    Const(f64),
    Vector { first: u32, len: u32 },
}

/// How picks of vector elements by data (`mu[group]`) resolve.
enum Picks {
    /// Not inside a sum over rows.
    Off,
    /// First pass over a sum's body: each pick's values on every row, in the order met.
    Collect(Vec<Vec<i64>>),
    /// Later passes, one per group of rows: the picks' values for the group, in order.
    Fixed { values: Vec<i64>, next: usize },
}

pub(crate) struct Checker<'a> {
    source: &'a str,
    text: &'a str,
    builder: Builder,
    scope: HashMap<String, Binding>,
    inputs: &'a Inputs<'a>,
    picks: Picks,
    row_sets: Vec<Vec<u32>>,
    /// The rows data-only values are evaluated on: every row, or a group's.
    rows: Option<Vec<u32>>,
    /// Data-only values on `rows`, by node.
    data_cache: HashMap<NodeId, Vec<f64>>,
    /// Bodies resolved so far by ranges and groups of rows (bounded like the nodes, so that
    /// nested ranges whose terms all coincide cannot run for ever).
    unrolled: usize,
}

impl<'a> Checker<'a> {
    fn err(&self, span: Span, message: impl Into<String>) -> KilnError {
        error_at(self.source, self.text, span, message)
    }

    fn add(&mut self, node: Node) -> NodeId {
        self.builder.add(node)
    }

    fn known_names(&self) -> Vec<&str> {
        self.scope.keys().map(|s| s.as_str()).collect()
    }

    /// An error if the graph has grown past [`MAX_NODES`], or as many bodies were unrolled.
    fn budget(&mut self, span: Span) -> Result<(), KilnError> {
        self.unrolled += 1;
        if self.builder.nodes.len() > MAX_NODES || self.unrolled > MAX_NODES {
            return Err(self
                .err(
                    span,
                    format!("the formula expands to more than {MAX_NODES} operations"),
                )
                .with_hint("shorten the ranges, or move repeated terms into data and sum(…)"));
        }
        Ok(())
    }

    /// `inside_sum`: the span of the enclosing sum over rows, if any.
    fn expr(&mut self, e: &Expr, inside_sum: Option<Span>) -> Result<NodeId, KilnError> {
        match &e.kind {
            ExprKind::Number(v) => Ok(self.add(Node::Const(*v))),
            ExprKind::Name(name) => self.name(name, e.span, inside_sum),
            ExprKind::Unary(UnaryOp::Neg, a) => {
                let a = self.expr(a, inside_sum)?;
                Ok(self.add(Node::Unary(Unary::Neg, a)))
            }
            ExprKind::Binary(op, a, b) => {
                let a = self.expr(a, inside_sum)?;
                let b = self.expr(b, inside_sum)?;
                let op = match op {
                    BinaryOp::Add => Binary::Add,
                    BinaryOp::Sub => Binary::Sub,
                    BinaryOp::Mul => Binary::Mul,
                    BinaryOp::Div => Binary::Div,
                    BinaryOp::Pow => Binary::Pow,
                };
                Ok(self.add(Node::Binary(op, a, b)))
            }
            ExprKind::Call {
                name,
                name_span,
                args,
            } => self.call(name, *name_span, args, e.span, inside_sum),
            ExprKind::Index {
                name,
                name_span,
                index,
            } => self.pick(name, *name_span, index, inside_sum),
            ExprKind::Range { var, .. } => Err(self
                .err(
                    e.span,
                    format!("the range of `{var}` stands where a value is expected"),
                )
                .with_hint("a range starts sum(…) or logsumexp(…), as in sum(k = 1..3, mu[k])")),
        }
    }

    fn name(
        &mut self,
        name: &str,
        span: Span,
        inside_sum: Option<Span>,
    ) -> Result<NodeId, KilnError> {
        match self.scope.get(name).copied() {
            Some(Binding::Var(i)) => Ok(self.add(Node::Var(i))),
            Some(Binding::Const(v)) => Ok(self.add(Node::Const(v))),
            Some(Binding::Let(id)) => Ok(id),
            Some(Binding::Vector { len, .. }) => Err(self
                .err(span, format!("`{name}` is a vector of {len} unknowns"))
                .with_hint(format!(
                    "pick one element with `{name}[k]` (1 to {len}), or add them with sum(k = 1..{len}, {name}[k])"
                ))),
            Some(Binding::Data(i)) => {
                if inside_sum.is_none() {
                    return Err(self
                        .err(span, format!("data column `{name}` used outside sum(…)"))
                        .with_hint(format!(
                            "a data column has one value per row; wrap the term that uses it in sum(…), which adds it over the {} rows",
                            self.inputs.data.rows
                        )));
                }
                Ok(self.add(Node::Data(i)))
            }
            None => {
                if FUNCTIONS.iter().any(|f| f.0 == name) || densities::by_function(name).is_some()
                {
                    return Err(self
                        .err(span, format!("`{name}` is a function and needs arguments"))
                        .with_hint(format!("call it as `{name}(…)`")));
                }
                let known = self.known_names();
                let hint = match nearest(name, known.iter().copied()) {
                    Some(n) => format!("did you mean `{n}`?"),
                    None if known.is_empty() => {
                        "declare it under \"variables\" in the spec".to_string()
                    }
                    None => format!(
                        "known names are {}; declare new unknowns under \"variables\"",
                        list_names(&known)
                    ),
                };
                Err(self
                    .err(span, format!("unknown name `{name}`"))
                    .with_hint(hint))
            }
        }
    }
}

fn list_names(names: &[&str]) -> String {
    let mut v: Vec<&str> = names.to_vec();
    v.sort_unstable();
    v.iter()
        .map(|n| format!("`{n}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// Checks a parsed formula against the unknowns and data columns of the spec, and adds the
/// model's `added` terms.
pub fn resolve<'a>(
    source: &'a str,
    text: &'a str,
    program: &Program,
    inputs: &'a Inputs<'a>,
    added: &[AddedTerm<'a>],
) -> Result<Graph, KilnError> {
    let mut scope = HashMap::new();
    scope.insert("pi".to_string(), Binding::Const(crate::common::maths::PI));
    scope.insert("e".to_string(), Binding::Const(crate::common::maths::E));
    for (i, n) in inputs.unknowns.iter().enumerate() {
        if is_identifier(n) {
            scope.insert(n.clone(), Binding::Var(i as u32));
        }
    }
    for v in inputs.vectors {
        scope.insert(
            v.name.clone(),
            Binding::Vector {
                first: v.first,
                len: v.len,
            },
        );
    }
    for (i, n) in inputs.data_names.iter().enumerate() {
        scope.insert(n.clone(), Binding::Data(i as u32));
    }
    let mut c = Checker {
        source,
        text,
        builder: Builder::default(),
        scope,
        inputs,
        picks: Picks::Off,
        row_sets: Vec::new(),
        rows: None,
        data_cache: HashMap::new(),
        unrolled: 0,
    };
    for def in &program.lets {
        if let Some(existing) = c.scope.get(&def.name) {
            let what = match existing {
                Binding::Var(_) => "an unknown",
                Binding::Vector { .. } => "a vector of unknowns",
                Binding::Data(_) => "a data column",
                Binding::Let(_) => "an earlier definition",
                Binding::Const(_) => "a built-in constant",
            };
            return Err(c
                .err(def.name_span, format!("`{}` is already {what}", def.name))
                .with_hint("choose another name for this definition"));
        }
        if FUNCTIONS.iter().any(|f| f.0 == def.name) || densities::by_function(&def.name).is_some()
        {
            return Err(c
                .err(
                    def.name_span,
                    format!("`{}` is a built-in function", def.name),
                )
                .with_hint("choose another name for this definition"));
        }
        let id = c.expr(&def.value, None)?;
        c.scope.insert(def.name.clone(), Binding::Let(id));
    }
    let mut root = c.expr(&program.body, None)?;
    for term in added {
        root = c.added_term(root, term)?;
    }
    Ok(Graph {
        nodes: c.builder.nodes,
        root,
        row_sets: c.row_sets,
    })
}

#[cfg(test)]
mod tests;
