//! Syntax tree → resolved formula graph.
//!
//! Owns: name resolution (unknowns, data columns, `let` definitions, the constants `pi` and
//! `e`), the function table with arities, the rules on `sum(…)` (data columns only inside it,
//! no nesting), and the result: a [`Graph`], a hash-consed expression graph in which shared
//! sub-expressions appear once and constant sub-expressions are already folded.
//! Must not: evaluate anything but constants, or decide evaluation order and memory layout
//! (that is `tape`).

use crate::common::error::{nearest, KilnError};
use crate::common::maths::{Binary, Unary};
use crate::formula::syntax::{error_at, BinaryOp, Expr, ExprKind, Program, Span, UnaryOp};
use std::collections::HashMap;

/// Index of a node in a [`Graph`]. Children always have smaller indices than their parents.
pub type NodeId = u32;

#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Node {
    Const(f64),
    /// The i-th unknown (in the real-line coordinates the formula is written in: the user's).
    Var(u32),
    /// The current row's value of data column i (only inside a `Sum` body).
    Data(u32),
    Unary(Unary, NodeId),
    Binary(Binary, NodeId, NodeId),
    /// Σ over data rows of the body.
    Sum(NodeId),
}

#[derive(Clone, Copy, PartialEq, Eq, Hash)]
enum Key {
    Const(u64),
    Var(u32),
    Data(u32),
    Unary(Unary, NodeId),
    Binary(Binary, NodeId, NodeId),
    Sum(NodeId),
}

/// A checked formula: an expression graph and its root.
#[derive(Clone, Debug)]
pub struct Graph {
    pub nodes: Vec<Node>,
    pub root: NodeId,
}

#[derive(Default)]
struct Builder {
    nodes: Vec<Node>,
    index: HashMap<Key, NodeId>,
}

impl Builder {
    fn add(&mut self, node: Node) -> NodeId {
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
        let key = match node {
            Node::Const(v) => Key::Const(v.to_bits()),
            Node::Var(i) => Key::Var(i),
            Node::Data(i) => Key::Data(i),
            Node::Unary(op, a) => Key::Unary(op, a),
            Node::Binary(op, a, b) => Key::Binary(op, a, b),
            Node::Sum(a) => Key::Sum(a),
        };
        if let Some(&id) = self.index.get(&key) {
            return id;
        }
        let id = self.nodes.len() as NodeId;
        self.nodes.push(node);
        self.index.insert(key, id);
        id
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

/// The functions of the formula language: name, arity, meaning.
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

/// Names a user may not give to an unknown, a data column or a definition.
pub fn reserved_names() -> impl Iterator<Item = &'static str> {
    FUNCTIONS.iter().map(|f| f.0).chain(["pi", "e", "let"])
}

/// Is `name` a valid identifier of the formula language?
pub fn is_identifier(name: &str) -> bool {
    let mut chars = name.chars();
    chars
        .next()
        .is_some_and(|c| c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

#[derive(Clone, Copy)]
enum Binding {
    Var(u32),
    Data(u32),
    /// A definition, and whether its value uses data (only possible through `sum`, so never).
    Let(NodeId),
    Const(f64),
}

struct Checker<'a> {
    source: &'a str,
    text: &'a str,
    builder: Builder,
    scope: HashMap<String, Binding>,
    data_rows: usize,
    data_names: &'a [String],
}

impl<'a> Checker<'a> {
    fn err(&self, span: Span, message: impl Into<String>) -> KilnError {
        error_at(self.source, self.text, span, message)
    }

    fn known_names(&self) -> Vec<&str> {
        self.scope.keys().map(|s| s.as_str()).collect()
    }

    /// `inside_sum`: the span of the enclosing `sum`, if any.
    fn expr(&mut self, e: &Expr, inside_sum: Option<Span>) -> Result<NodeId, KilnError> {
        match &e.kind {
            ExprKind::Number(v) => Ok(self.builder.add(Node::Const(*v))),
            ExprKind::Name(name) => self.name(name, e.span, inside_sum),
            ExprKind::Unary(UnaryOp::Neg, a) => {
                let a = self.expr(a, inside_sum)?;
                Ok(self.builder.add(Node::Unary(Unary::Neg, a)))
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
                Ok(self.builder.add(Node::Binary(op, a, b)))
            }
            ExprKind::Call {
                name,
                name_span,
                args,
            } => self.call(name, *name_span, args, e.span, inside_sum),
        }
    }

    fn name(
        &mut self,
        name: &str,
        span: Span,
        inside_sum: Option<Span>,
    ) -> Result<NodeId, KilnError> {
        match self.scope.get(name).copied() {
            Some(Binding::Var(i)) => Ok(self.builder.add(Node::Var(i))),
            Some(Binding::Const(v)) => Ok(self.builder.add(Node::Const(v))),
            Some(Binding::Let(id)) => Ok(id),
            Some(Binding::Data(i)) => {
                if inside_sum.is_none() {
                    return Err(self
                        .err(span, format!("data column `{name}` used outside sum(…)"))
                        .with_hint(format!(
                            "a data column has one value per row; wrap the term that uses it in sum(…), which adds it over the {} rows",
                            self.data_rows
                        )));
                }
                Ok(self.builder.add(Node::Data(i)))
            }
            None => {
                if FUNCTIONS.iter().any(|f| f.0 == name) {
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

    fn call(
        &mut self,
        name: &str,
        name_span: Span,
        args: &[Expr],
        span: Span,
        inside_sum: Option<Span>,
    ) -> Result<NodeId, KilnError> {
        let Some(&(_, arity, builtin)) = FUNCTIONS.iter().find(|f| f.0 == name) else {
            let hint = if self.scope.contains_key(name) {
                format!("`{name}` is a value, not a function; to multiply write `{name} * (…)`")
            } else {
                match nearest(name, FUNCTIONS.iter().map(|f| f.0)) {
                    Some(n) => format!("did you mean `{n}`?"),
                    None => format!(
                        "the functions are {}",
                        FUNCTIONS.iter().map(|f| f.0).collect::<Vec<_>>().join(", ")
                    ),
                }
            };
            return Err(self
                .err(name_span, format!("unknown function `{name}`"))
                .with_hint(hint));
        };
        let ok = match arity {
            Arity::Exactly(n) => args.len() == n,
            Arity::AtLeast(n) => args.len() >= n,
        };
        if !ok {
            let wanted = match arity {
                Arity::Exactly(1) => "exactly 1 argument".to_string(),
                Arity::Exactly(n) => format!("exactly {n} arguments"),
                Arity::AtLeast(n) => format!("at least {n} arguments"),
            };
            let example = match name {
                "atan2" => " as in atan2(y, x)",
                "pow" => " as in pow(x, 2)",
                "sum" => ": the expression to add over the data rows",
                _ => "",
            };
            return Err(self
                .err(
                    span,
                    format!("`{name}` takes {wanted}, found {}", args.len()),
                )
                .with_hint(format!("give `{name}` {wanted}{example}")));
        }
        match builtin {
            Builtin::Unary(op) => {
                let a = self.expr(&args[0], inside_sum)?;
                Ok(self.builder.add(Node::Unary(op, a)))
            }
            Builtin::Binary(op) => {
                let a = self.expr(&args[0], inside_sum)?;
                let b = self.expr(&args[1], inside_sum)?;
                Ok(self.builder.add(Node::Binary(op, a, b)))
            }
            Builtin::Fold(op) => {
                let mut acc = self.expr(&args[0], inside_sum)?;
                for a in &args[1..] {
                    let b = self.expr(a, inside_sum)?;
                    acc = self.builder.add(Node::Binary(op, acc, b));
                }
                Ok(acc)
            }
            Builtin::Sum => {
                if let Some(outer) = inside_sum {
                    let col = crate::common::error::Location::in_text(
                        self.source,
                        self.text,
                        outer.start,
                        outer.end,
                    )
                    .column;
                    return Err(self
                        .err(name_span, "sum(…) may not contain another sum(…)")
                        .with_hint(format!("the enclosing sum starts at column {col}; a sum already runs over every data row, so add the terms inside one sum")));
                }
                if self.data_names.is_empty() {
                    return Err(self
                        .err(
                            name_span,
                            "sum(…) adds over data rows, but the spec has no data",
                        )
                        .with_hint("add columns under \"data\" in the spec, or remove the sum"));
                }
                let body = self.expr(&args[0], Some(span))?;
                Ok(self.builder.add(Node::Sum(body)))
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

/// Checks a parsed formula against the unknowns and data columns of the spec.
pub fn resolve(
    source: &str,
    text: &str,
    program: &Program,
    unknowns: &[String],
    data_names: &[String],
    data_rows: usize,
) -> Result<Graph, KilnError> {
    let mut scope = HashMap::new();
    scope.insert("pi".to_string(), Binding::Const(crate::common::maths::PI));
    scope.insert("e".to_string(), Binding::Const(crate::common::maths::E));
    for (i, n) in unknowns.iter().enumerate() {
        scope.insert(n.clone(), Binding::Var(i as u32));
    }
    for (i, n) in data_names.iter().enumerate() {
        scope.insert(n.clone(), Binding::Data(i as u32));
    }
    let mut c = Checker {
        source,
        text,
        builder: Builder::default(),
        scope,
        data_rows,
        data_names,
    };
    for def in &program.lets {
        if let Some(existing) = c.scope.get(&def.name) {
            let what = match existing {
                Binding::Var(_) => "an unknown",
                Binding::Data(_) => "a data column",
                Binding::Let(_) => "an earlier definition",
                Binding::Const(_) => "a built-in constant",
            };
            return Err(c
                .err(def.name_span, format!("`{}` is already {what}", def.name))
                .with_hint("choose another name for this definition"));
        }
        if FUNCTIONS.iter().any(|f| f.0 == def.name) {
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
    let root = c.expr(&program.body, None)?;
    Ok(Graph {
        nodes: c.builder.nodes,
        root,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::formula::syntax::parse;

    fn checked(text: &str) -> Result<Graph, KilnError> {
        let prog = parse("energy", text)?;
        resolve(
            "energy",
            text,
            &prog,
            &["x".into(), "y".into()],
            &["len".into()],
            3,
        )
    }

    #[test]
    fn shared_subexpressions_appear_once_and_constants_fold() {
        let g = checked("let a = x^2; a + a + (x^2) + 2*3").unwrap();
        let pows = g
            .nodes
            .iter()
            .filter(|n| matches!(n, Node::Binary(Binary::Pow, _, _)))
            .count();
        assert_eq!(pows, 1);
        assert!(g.nodes.contains(&Node::Const(6.0)));
    }

    #[test]
    fn names_and_arity_are_checked_with_hints() {
        let e = checked("lgama(x)").unwrap_err();
        assert_eq!(e.message, "unknown function `lgama`");
        assert_eq!(e.hint.as_deref(), Some("did you mean `lgamma`?"));
        let e = checked("xx + y").unwrap_err();
        assert_eq!(e.hint.as_deref(), Some("did you mean `x`?"));
        let e = checked("atan2(x)").unwrap_err();
        assert!(e.message.contains("takes exactly 2 arguments, found 1"));
        let e = checked("len * x").unwrap_err();
        assert_eq!(e.message, "data column `len` used outside sum(…)");
        let e = checked("sum(sum(len))").unwrap_err();
        assert!(e.message.contains("may not contain another sum"));
        let e = checked("let x = 2; x").unwrap_err();
        assert!(e.message.contains("already an unknown"));
        let e = checked("exp + 1").unwrap_err();
        assert!(e.message.contains("is a function"));
        let e = checked("x(2)").unwrap_err();
        assert!(e.hint.unwrap().contains("not a function"));
        assert!(checked("sum((len - x)^2) + max(x, y, 0) + logsumexp(x)").is_ok());
    }
}
