//! Calls, picks and ranges while resolving: the ordinary functions, sums over data rows (split
//! into groups of rows where the body picks vector elements by data), sums and log-sum-exps
//! over a range, vector elements (`mu[k]`, `mu[group]`), the built-in densities with the
//! checks of their arguments before any run, and the terms a model adds (priors).
//!
//! Owns: what each call form means and every error about it.
//! Must not: evaluate anything that depends on unknowns.

use super::{
    AddedTerm, Arity, Binding, Builtin, Checker, Node, NodeId, Picks, ALL_ROWS, FUNCTIONS,
};
use crate::common::error::{nearest, KilnError, Location};
use crate::common::maths::{Binary, Unary};
use crate::formula::densities::{self, Whole, DENSITIES, PREFIX};
use crate::formula::syntax::{parse, Expr, ExprKind, Span};
use std::collections::HashMap;

/// Longest range of a `sum(k = a..b, …)` or `logsumexp(k = a..b, …)`.
pub const MAX_RANGE: i64 = 100_000;

/// Adapts the checker's builder to what `densities::expand` needs.
struct Expansion<'c, 'a> {
    c: &'c mut Checker<'a>,
}

impl densities::Graph for Expansion<'_, '_> {
    fn add(&mut self, node: Node) -> NodeId {
        self.c.add(node)
    }
    fn node(&self, id: NodeId) -> Node {
        self.c.builder.nodes[id as usize]
    }
    fn known_positive(&mut self, id: NodeId) -> bool {
        if let Some(v) = self.c.builder.constant(id) {
            return v > 0.0;
        }
        let d = self.c.builder.deps[id as usize];
        d.data && !d.var && self.c.data_values(id).iter().all(|&v| v > 0.0)
    }
}

/// A number as shown in a message.
fn shown(v: f64) -> String {
    format!("{v}")
}

impl<'a> Checker<'a> {
    pub(super) fn call(
        &mut self,
        name: &str,
        name_span: Span,
        args: &[Expr],
        span: Span,
        inside_sum: Option<Span>,
    ) -> Result<NodeId, KilnError> {
        if let Some(first) = args.first() {
            if let ExprKind::Range { .. } = first.kind {
                return self.range_call(name, name_span, args, span, inside_sum);
            }
        }
        if let Some((which, d)) = densities::by_function(name) {
            if args.len() != d.args.len() {
                return Err(self
                    .err(
                        span,
                        format!(
                            "`{name}` takes {} arguments ({}), found {}",
                            d.args.len(),
                            d.args.join(", "),
                            args.len()
                        ),
                    )
                    .with_hint(format!("for example {}", d.example)));
            }
            let mut ids = Vec::with_capacity(args.len());
            let mut spans = Vec::with_capacity(args.len());
            for a in args {
                ids.push(self.expr(a, inside_sum)?);
                spans.push(a.span);
            }
            return self.density(which, &ids, &spans);
        }
        let Some(&(_, arity, builtin)) = FUNCTIONS.iter().find(|f| f.0 == name) else {
            let hint = if self.scope.contains_key(name) {
                format!("`{name}` is a value, not a function; to multiply write `{name} * (…)`")
            } else {
                let all: Vec<String> = FUNCTIONS
                    .iter()
                    .map(|f| f.0.to_string())
                    .chain(densities::function_names())
                    .collect();
                match nearest(name, all.iter().map(|s| s.as_str())) {
                    Some(n) => format!("did you mean `{n}`?"),
                    None if densities::by_name(name).is_some() => {
                        format!("the built-in densities are named `{PREFIX}…`: `{PREFIX}{name}`")
                    }
                    None => format!(
                        "the functions are {}, and the densities {PREFIX}normal, {PREFIX}poisson and the others listed in the README",
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
                "sum" => ": the expression to add over the data rows, or a range and a body as in sum(k = 1..3, mu[k])",
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
                Ok(self.add(Node::Unary(op, a)))
            }
            Builtin::Binary(op) => {
                let a = self.expr(&args[0], inside_sum)?;
                let b = self.expr(&args[1], inside_sum)?;
                Ok(self.add(Node::Binary(op, a, b)))
            }
            Builtin::Fold(op) => {
                let mut acc = self.expr(&args[0], inside_sum)?;
                for a in &args[1..] {
                    let b = self.expr(a, inside_sum)?;
                    acc = self.add(Node::Binary(op, acc, b));
                }
                Ok(acc)
            }
            Builtin::Sum => self.row_sum(&args[0], name_span, span, inside_sum),
        }
    }

    /// `sum(body)`: the body over every data row, or, where it picks vector elements by data,
    /// over each group of rows with the same picks.
    fn row_sum(
        &mut self,
        body: &Expr,
        name_span: Span,
        span: Span,
        inside_sum: Option<Span>,
    ) -> Result<NodeId, KilnError> {
        if let Some(outer) = inside_sum {
            let col = Location::in_text(self.source, self.text, outer.start, outer.end).column;
            return Err(self
                .err(name_span, "sum(…) may not contain another sum(…) over the data rows")
                .with_hint(format!("the enclosing sum starts at column {col}; a sum already runs over every data row, so add the terms inside one sum (a sum over a range, sum(k = 1..K, …), may stand inside)")));
        }
        if self.inputs.data_names.is_empty() {
            return Err(self
                .err(
                    name_span,
                    "sum(…) adds over data rows, but the spec has no data",
                )
                .with_hint("add columns under \"data\" in the spec, or remove the sum; to add over a range write sum(k = 1..3, …)"));
        }
        let mark = self.builder.mark();
        let saved = std::mem::replace(&mut self.picks, Picks::Collect(Vec::new()));
        let first = self.expr(body, Some(span));
        let picks = std::mem::replace(&mut self.picks, saved);
        let first = first?;
        let collected = match picks {
            Picks::Collect(c) if !c.is_empty() => c,
            _ => return Ok(self.add(Node::Sum(first, ALL_ROWS))),
        };
        // Group the rows by the elements they pick, in the order the groups first appear.
        self.builder.rollback(mark);
        self.data_cache.clear();
        let rows = self.inputs.data.rows;
        let mut groups: Vec<(Vec<i64>, Vec<u32>)> = Vec::new();
        let mut group_of: HashMap<Vec<i64>, usize> = HashMap::new();
        for r in 0..rows {
            let tuple: Vec<i64> = collected.iter().map(|p| p[r]).collect();
            let g = *group_of.entry(tuple.clone()).or_insert_with(|| {
                groups.push((tuple, Vec::new()));
                groups.len() - 1
            });
            groups[g].1.push(r as u32);
        }
        let mut total: Option<NodeId> = None;
        for (values, rows) in groups {
            let set = self.row_sets.len() as u32;
            self.row_sets.push(rows.clone());
            let saved = std::mem::replace(&mut self.picks, Picks::Fixed { values, next: 0 });
            let saved_rows = self.set_rows(Some(rows));
            let part = self.expr(body, Some(span));
            self.picks = saved;
            self.set_rows(saved_rows);
            let part = part?;
            let s = self.add(Node::Sum(part, set));
            total = Some(match total {
                None => s,
                Some(t) => self.add(Node::Binary(Binary::Add, t, s)),
            });
            self.budget(span)?;
        }
        Ok(total.unwrap_or_else(|| self.add(Node::Const(0.0))))
    }

    /// A constant whole number (a range's end).
    fn whole_constant(&mut self, e: &Expr, what: &str) -> Result<i64, KilnError> {
        let id = self.expr(e, None)?;
        match self.builder.constant(id) {
            Some(v) if v == v.trunc() && v.abs() <= 1e15 => Ok(v as i64),
            Some(v) => Err(self
                .err(e.span, format!("the {what} of a range must be a whole number, not {}", shown(v)))
                .with_hint("write whole numbers, as in `k = 1..3`")),
            None => Err(self
                .err(e.span, format!("the {what} of a range must be a constant"))
                .with_hint("a range runs over numbers fixed before the run, as in `k = 1..3` or `k = 1..K` with `let K = 3;`")),
        }
    }

    /// `sum(k = a..b, body)` and `logsumexp(k = a..b, body)`, unrolled.
    fn range_call(
        &mut self,
        name: &str,
        name_span: Span,
        args: &[Expr],
        span: Span,
        inside_sum: Option<Span>,
    ) -> Result<NodeId, KilnError> {
        let ExprKind::Range {
            var,
            var_span,
            from,
            to,
        } = &args[0].kind
        else {
            return Err(self.err(span, "expected a range"));
        };
        let op = match name {
            "sum" => Binary::Add,
            "logsumexp" => Binary::LogAddExp,
            _ => {
                return Err(self
                    .err(args[0].span, format!("`{name}` does not take a range"))
                    .with_hint(
                        "a range starts sum(…) or logsumexp(…), as in sum(k = 1..3, mu[k])",
                    ))
            }
        };
        if args.len() != 2 {
            return Err(self
                .err(
                    span,
                    format!(
                        "`{name}` over a range takes the range and one body, found {} arguments",
                        args.len()
                    ),
                )
                .with_hint(format!(
                    "write {name}({var} = 1..3, body), the body using `{var}`"
                )));
        }
        if let Some(b) = self.scope.get(var) {
            let what = match b {
                Binding::Var(_) | Binding::Vector { .. } => "an unknown",
                Binding::Data(_) => "a data column",
                Binding::Let(_) => "a definition",
                Binding::Const(_) => "a constant or the index of an enclosing range",
            };
            return Err(self
                .err(*var_span, format!("`{var}` is already {what}"))
                .with_hint("give the range's index a name of its own, such as `k` or `j`"));
        }
        let lo = self.whole_constant(from, "start")?;
        let hi = self.whole_constant(to, "end")?;
        if hi >= lo && hi - lo >= MAX_RANGE {
            return Err(self
                .err(args[0].span, format!("the range has {} values; the limit is {MAX_RANGE}", hi - lo + 1))
                .with_hint("a range unrolls into one term per value; add over data rows with sum(…) instead"));
        }
        let mut acc: Option<NodeId> = None;
        for k in lo..=hi {
            self.scope.insert(var.clone(), Binding::Const(k as f64));
            let t = self.expr(&args[1], inside_sum);
            let t = match t {
                Ok(t) => t,
                Err(e) => {
                    self.scope.remove(var);
                    return Err(e);
                }
            };
            acc = Some(match acc {
                None => t,
                Some(a) => self.add(Node::Binary(op, a, t)),
            });
            if let Err(e) = self.budget(name_span) {
                self.scope.remove(var);
                return Err(e);
            }
        }
        self.scope.remove(var);
        Ok(acc.unwrap_or_else(|| {
            let empty = if op == Binary::Add {
                0.0
            } else {
                f64::NEG_INFINITY
            };
            self.add(Node::Const(empty))
        }))
    }

    /// `name[index]`: element `index` (1-based) of a vector unknown.
    pub(super) fn pick(
        &mut self,
        name: &str,
        name_span: Span,
        index: &Expr,
        inside_sum: Option<Span>,
    ) -> Result<NodeId, KilnError> {
        let (first, len) = match self.scope.get(name).copied() {
            Some(Binding::Vector { first, len }) => (first, len),
            Some(Binding::Var(_)) => {
                return Err(self
                    .err(name_span, format!("`{name}` is a single unknown, not a vector"))
                    .with_hint(format!("give `{name}` a \"size\" under \"variables\" to make it a vector, or drop the `[…]`")))
            }
            Some(Binding::Data(_)) => {
                return Err(self
                    .err(name_span, format!("data column `{name}` cannot be indexed"))
                    .with_hint("inside sum(…) a data column already stands for the current row's value; `[…]` picks an element of a vector unknown"))
            }
            Some(_) => {
                return Err(self
                    .err(name_span, format!("`{name}` is not a vector"))
                    .with_hint("`[…]` picks an element of a vector unknown (a variable with a \"size\")"))
            }
            None => {
                let vectors: Vec<&str> = self.inputs.vectors.iter().map(|v| v.name.as_str()).collect();
                let hint = match nearest(name, vectors.iter().copied()) {
                    Some(n) => format!("did you mean `{n}`?"),
                    None => "declare a vector under \"variables\" with a \"size\", as in {\"name\": \"mu\", \"size\": 3}".to_string(),
                };
                return Err(self
                    .err(name_span, format!("unknown vector `{name}`"))
                    .with_hint(hint));
            }
        };
        let idx = self.expr(index, inside_sum)?;
        let range_hint = format!("the elements of `{name}` are 1 to {len}");
        if let Some(v) = self.builder.constant(idx) {
            if v != v.trunc() || v < 1.0 || v > len as f64 {
                return Err(self
                    .err(index.span, format!("`{name}` has no element {}", shown(v)))
                    .with_hint(range_hint));
            }
            return Ok(self.add(Node::Var(first + v as u32 - 1)));
        }
        if self.builder.deps[idx as usize].var {
            return Err(self
                .err(index.span, format!("the index of `{name}` depends on unknowns"))
                .with_hint("an index is fixed before the run: a whole number, the index of a range, or a data column of whole numbers"));
        }
        // A data-dependent index (only possible inside a sum over rows).
        let column = match &index.kind {
            ExprKind::Name(n) => format!("column `{n}`"),
            _ => "the index".to_string(),
        };
        match &mut self.picks {
            Picks::Fixed { values, next } => {
                let v = values.get(*next).copied().unwrap_or(1);
                *next += 1;
                Ok(self.add(Node::Var(first + v as u32 - 1)))
            }
            Picks::Off => Err(self
                .err(
                    index.span,
                    format!("the index of `{name}` uses data outside sum(…)"),
                )
                .with_hint("wrap the term in sum(…)")),
            Picks::Collect(_) => {
                let values = self.data_values(idx);
                let mut picked = Vec::with_capacity(values.len());
                for (r, &v) in values.iter().enumerate() {
                    if v != v.trunc() || v < 1.0 || v > len as f64 {
                        let what = if v == v.trunc() {
                            format!("{} is not an element of `{name}`", shown(v))
                        } else {
                            format!("{} is not a whole number, so it cannot pick an element of `{name}`", shown(v))
                        };
                        return Err(self
                            .err(index.span, format!("data row {}, {column}: {what}", r + 1))
                            .with_hint(format!(
                                "{range_hint}; an index column holds whole numbers from 1 to {len}"
                            )));
                    }
                    picked.push(v as i64);
                }
                if let Picks::Collect(list) = &mut self.picks {
                    list.push(picked);
                }
                Ok(self.add(Node::Var(first)))
            }
        }
    }

    /// A built-in density of resolved arguments: its expansion with the support tests that
    /// depend on unknowns; constant and data arguments are checked here (an error names the
    /// argument and, for data, the row).
    pub(super) fn density(
        &mut self,
        which: usize,
        ids: &[NodeId],
        spans: &[Span],
    ) -> Result<NodeId, KilnError> {
        let d = &DENSITIES[which];
        let fname = format!("{PREFIX}{}", d.name);
        for (i, w) in d.whole.iter().enumerate() {
            if *w != Whole::Yes || self.builder.deps[ids[i] as usize].var {
                continue;
            }
            let (values, data) = match self.builder.constant(ids[i]) {
                Some(v) => (vec![v], false),
                None => (self.data_values(ids[i]), true),
            };
            if let Some((r, v)) = values.iter().enumerate().find(|(_, v)| **v != v.trunc()) {
                let at = if data {
                    format!(" (at data row {} it is {})", self.data_row(r), shown(*v))
                } else {
                    format!(" (it is {})", shown(*v))
                };
                return Err(self
                    .err(spans[i], format!("the `{}` of {fname} must be a whole number{at}", d.args[i]))
                    .with_hint(format!("{fname} is a distribution of whole numbers; round the data, or use a continuous density")));
            }
        }
        let (value, conditions) = densities::expand(which, &mut Expansion { c: self }, ids);
        let mut v = value;
        for c in conditions.iter().rev() {
            let passes = |x: f64| if c.strict { x > 0.0 } else { x >= 0.0 };
            let deps = self.builder.deps[c.node as usize];
            // An exponential is never negative, and positive wherever it is not 0 by underflow
            // (where the density's value is its limit): no test needed.
            if matches!(
                self.builder.nodes[c.node as usize],
                Node::Unary(Unary::Exp, _)
            ) {
                continue;
            }
            if deps.var {
                let op = if c.strict {
                    Binary::WherePos
                } else {
                    Binary::WhereNonNeg
                };
                v = self.add(Node::Binary(op, c.node, v));
                continue;
            }
            let (cond_values, arg_values, data) = match self.builder.constant(c.node) {
                Some(x) => (
                    vec![x],
                    vec![self.builder.constant(ids[c.arg]).unwrap_or(f64::NAN)],
                    false,
                ),
                None => (self.data_values(c.node), self.data_values(ids[c.arg]), true),
            };
            if let Some(r) = cond_values.iter().position(|&x| !passes(x)) {
                let arg_value = arg_values.get(r).copied().unwrap_or(f64::NAN);
                let at = if data {
                    format!(
                        "; at data row {} `{}` is {}",
                        self.data_row(r),
                        d.args[c.arg],
                        shown(arg_value)
                    )
                } else {
                    format!("; here it is {}", shown(arg_value))
                };
                return Err(self
                    .err(spans[c.arg], format!("{}{at}", c.message))
                    .with_hint(format!("{fname}({}): {}", d.args.join(", "), d.summary)));
            }
        }
        Ok(v)
    }

    /// The 1-based data row of position `r` among the rows in view.
    fn data_row(&self, r: usize) -> usize {
        match &self.rows {
            Some(rows) => rows.get(r).map_or(r, |&x| x as usize) + 1,
            None => r + 1,
        }
    }

    /// `root` plus the model's added term (the density of each of its subjects).
    pub(super) fn added_term(
        &mut self,
        root: NodeId,
        term: &AddedTerm<'a>,
    ) -> Result<NodeId, KilnError> {
        let saved = (self.source, self.text);
        (self.source, self.text) = (term.source, term.text);
        let out = self.added_term_here(root, term);
        (self.source, self.text) = saved;
        out
    }

    fn added_term_here(&mut self, root: NodeId, term: &AddedTerm) -> Result<NodeId, KilnError> {
        let program = parse(self.source, self.text)?;
        let example = "write a density's name and its parameters, as in normal(0, 10) or gamma(2, 0.5); the unknown itself is the first argument";
        if let Some(l) = program.lets.first() {
            return Err(self
                .err(l.name_span, "a prior has no `let` definitions")
                .with_hint(example));
        }
        let ExprKind::Call {
            name,
            name_span,
            args,
        } = &program.body.kind
        else {
            return Err(self
                .err(
                    program.body.span,
                    "a prior is one density with its parameters",
                )
                .with_hint(example));
        };
        let Some((which, d)) = densities::by_name(name) else {
            let hint = if let Some((_, d)) = densities::by_function(name) {
                format!(
                    "in a prior, leave out `{PREFIX}` and the unknown: write {}({})",
                    d.name,
                    d.args[1..].join(", ")
                )
            } else {
                match nearest(name, DENSITIES.iter().map(|d| d.name)) {
                    Some(n) => format!("did you mean `{n}`?"),
                    None => format!(
                        "the densities are {}",
                        DENSITIES
                            .iter()
                            .map(|d| d.name)
                            .collect::<Vec<_>>()
                            .join(", ")
                    ),
                }
            };
            return Err(self
                .err(*name_span, format!("`{name}` is not a built-in density"))
                .with_hint(hint));
        };
        if args.len() + 1 != d.args.len() {
            return Err(self
                .err(
                    program.body.span,
                    format!(
                        "the prior `{name}` takes {} parameter{} ({}), found {}",
                        d.args.len() - 1,
                        if d.args.len() == 2 { "" } else { "s" },
                        d.args[1..].join(", "),
                        args.len()
                    ),
                )
                .with_hint("the unknown is the density's first argument and is left out"));
        }
        let mut params = Vec::new();
        let mut spans = vec![*name_span];
        for a in args {
            params.push(self.expr(a, None)?);
            spans.push(a.span);
        }
        let mut total: Option<NodeId> = None;
        for &s in &term.subjects {
            let x = self.add(Node::Var(s));
            let mut ids = vec![x];
            ids.extend(&params);
            let v = self.density(which, &ids, &spans)?;
            total = Some(match total {
                None => v,
                Some(t) => self.add(Node::Binary(Binary::Add, t, v)),
            });
        }
        let Some(total) = total else { return Ok(root) };
        let op = if term.coefficient < 0.0 {
            Binary::Sub
        } else {
            Binary::Add
        };
        Ok(self.add(Node::Binary(op, root, total)))
    }
}
