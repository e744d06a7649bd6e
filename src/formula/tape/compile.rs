//! Compiling a resolved graph into a tape: slots, specialised and fused instructions, the
//! row loops of sums, and the work measure.
//!
//! Owns: [`SegBuilder`] (one segment's instructions and constants), the [`Compiler`] of the part
//! outside sums, which data-only values are precomputed, and which nodes are replaced.
//! Must not: evaluate the tape (that is `eval`).

use super::eval::eval_row;
use super::rows::RowLoop;
use super::*;
use crate::formula::resolve::{Node, NodeId};
use std::collections::HashMap;

/// Builds a [`Segment`], choosing the specialised instruction for constant operands.
pub(super) struct SegBuilder {
    pub(super) init: Vec<f64>,
    pub(super) consts: HashMap<u64, u32>,
    pub(super) n_inputs: usize,
    pub(super) code: Vec<Op>,
    pub(super) terms: Vec<Term>,
    pub(super) args: Vec<u32>,
}

impl SegBuilder {
    pub(super) fn new(n_inputs: usize) -> SegBuilder {
        SegBuilder {
            init: Vec::new(),
            consts: HashMap::new(),
            n_inputs,
            code: Vec::new(),
            terms: Vec::new(),
            args: Vec::new(),
        }
    }

    pub(super) fn konst(&mut self, v: f64) -> u32 {
        if let Some(&s) = self.consts.get(&v.to_bits()) {
            return s | CONST_TAG;
        }
        let s = self.init.len() as u32;
        self.init.push(v);
        self.consts.insert(v.to_bits(), s);
        s | CONST_TAG
    }

    pub(super) fn input(&self, i: usize) -> u32 {
        i as u32 | INPUT_TAG
    }

    pub(super) fn const_value(&self, s: u32) -> Option<f64> {
        (s & CONST_TAG != 0).then(|| self.init[(s & MASK) as usize])
    }

    pub(super) fn push(&mut self, op: Op) -> u32 {
        self.code.push(op);
        (self.code.len() - 1) as u32
    }

    pub(super) fn unary(&mut self, op: Unary, a: u32) -> u32 {
        self.push(Op::unary(op, a))
    }

    pub(super) fn binary(&mut self, op: Binary, a: u32, b: u32) -> u32 {
        let (ca, cb) = (self.const_value(a), self.const_value(b));
        let ins = match (op, ca, cb) {
            (_, Some(_), Some(_)) => generic(op, a, b),
            (Binary::Add, _, Some(c)) => Op::AddC(a, c),
            (Binary::Add, Some(c), _) => Op::AddC(b, c),
            (Binary::Sub, _, Some(c)) => Op::AddC(a, -c),
            (Binary::Sub, Some(c), _) => Op::CSub(c, b),
            (Binary::Mul, _, Some(c)) => Op::MulC(a, c),
            (Binary::Mul, Some(c), _) => Op::MulC(b, c),
            (Binary::Div, _, Some(c)) => match exact_reciprocal(c) {
                Some(r) => Op::MulC(a, r),
                None => Op::DivC(a, c),
            },
            (Binary::Div, Some(c), _) => Op::CDiv(c, b),
            (Binary::Pow, _, Some(c)) => match small_integer(c) {
                Some(2) => Op::Square(a),
                Some(n) => Op::PowI(a, n),
                None => Op::PowC(a, c),
            },
            _ => generic(op, a, b),
        };
        self.push(ins)
    }

    pub(super) fn log_sum_exp(&mut self, args: &[u32]) -> u32 {
        let start = self.args.len() as u32;
        self.args.extend_from_slice(args);
        self.push(Op::LogSumExp(start, args.len() as u32))
    }

    pub(super) fn lin_comb(&mut self, terms: &[Term]) -> u32 {
        let start = self.terms.len() as u32;
        self.terms.extend_from_slice(terms);
        self.push(Op::LinComb(start, terms.len() as u32))
    }

    /// The final number of a tagged slot (valid once nothing more is added).
    pub(super) fn slot_fixer(&self) -> impl Fn(u32) -> u32 {
        let first_input = self.init.len() as u32;
        let first_code = first_input + self.n_inputs as u32;
        move |s: u32| -> u32 {
            if s & CONST_TAG != 0 {
                s & MASK
            } else if s & INPUT_TAG != 0 {
                (s & MASK) + first_input
            } else {
                s + first_code
            }
        }
    }

    /// Renumbers tagged slots: constants, inputs, then code. `loops` read slots of this
    /// segment (their loop-invariant inputs) and are renumbered too.
    pub(super) fn finish(self, root: u32, loops: &mut [RowLoop]) -> Segment {
        let first_input = self.init.len();
        let fix = self.slot_fixer();
        let code: Vec<Op> = self.code.iter().map(|op| op.map_slots(&fix)).collect();
        let terms: Vec<Term> = self.terms.iter().map(|t| t.map_slots(&fix)).collect();
        let args: Vec<u32> = self.args.iter().map(|&a| fix(a)).collect();
        for lp in loops.iter_mut() {
            for s in lp.inputs.iter_mut() {
                *s = fix(*s);
            }
        }
        let n_slots = first_input + self.n_inputs + self.code.len();
        let reads_const = std::cell::Cell::new(false);
        let note = |s: u32| {
            if (s as usize) < first_input {
                reads_const.set(true);
            }
            s
        };
        for op in &code {
            let _ = op.map_slots(note);
        }
        for t in &terms {
            let _ = t.map_slots(note);
        }
        for &a in &args {
            note(a);
        }
        Segment {
            init: self.init,
            first_input,
            n_inputs: self.n_inputs,
            code,
            terms,
            args,
            root: fix(root),
            const_adjoints: reads_const.get(),
            mask: n_slots.next_power_of_two() - 1,
        }
    }
}

pub(super) fn generic(op: Binary, a: u32, b: u32) -> Op {
    match op {
        Binary::Add => Op::Add(a, b),
        Binary::Sub => Op::Sub(a, b),
        Binary::Mul => Op::Mul(a, b),
        Binary::Div => Op::Div(a, b),
        Binary::Pow => Op::Pow(a, b),
        Binary::Atan2 => Op::Atan2(a, b),
        Binary::Min => Op::Min(a, b),
        Binary::Max => Op::Max(a, b),
        Binary::LogAddExp => Op::LogAddExp(a, b),
        Binary::XLogY | Binary::XLog1pY | Binary::WherePos | Binary::WhereNonNeg => {
            Op::Bin(op, a, b)
        }
    }
}

/// A term of a chain of additions while compiling (nodes not yet emitted).
#[derive(Clone, Copy, Debug)]
pub(super) enum ChainTerm {
    /// coefficient · node (`None`: the constant one).
    Lin(f64, Option<NodeId>),
    Prod(f64, NodeId, NodeId),
    Sq(f64, NodeId, f64),
}

/// Fuse a chain of additions into one instruction when it absorbs at least this many.
pub(super) const MIN_FUSED: usize = 3;

/// Constant exponents that are computed by repeated squaring.
pub(super) fn small_integer(c: f64) -> Option<i32> {
    (c == c.trunc() && c.abs() <= 64.0).then_some(c as i32)
}

pub(super) enum Replacement {
    Const(f64),
    Times(f64, NodeId),
}

/// Compiles the part of a graph outside sums, and builds the row loops of its sums.
pub(super) struct Compiler<'a> {
    pub(super) nodes: &'a [Node],
    pub(super) flags: Vec<Flags>,
    /// Number of parents of each node (its uses), the root counted once.
    pub(super) uses: Vec<u32>,
    pub(super) data: &'a DataTable<'a>,
    pub(super) row_sets: &'a [Vec<u32>],
    /// Data-only values by node and row set.
    pub(super) data_only: HashMap<(NodeId, u32), Vec<f64>>,
    pub(super) replaced: HashMap<NodeId, Replacement>,
    pub(super) slot_of: HashMap<NodeId, u32>,
    pub(super) seg: SegBuilder,
    pub(super) loops: Vec<RowLoop>,
}

pub(super) fn node_flags(nodes: &[Node]) -> Vec<Flags> {
    let mut flags = vec![Flags::default(); nodes.len()];
    for (i, n) in nodes.iter().enumerate() {
        flags[i] = match *n {
            Node::Const(_) => Flags::default(),
            Node::Var(_) => Flags {
                var: true,
                data: false,
            },
            Node::Data(_) => Flags {
                var: false,
                data: true,
            },
            Node::Unary(_, a) => flags[a as usize],
            Node::Binary(_, a, b) => Flags {
                var: flags[a as usize].var || flags[b as usize].var,
                data: flags[a as usize].data || flags[b as usize].data,
            },
            Node::Sum(b, _) => Flags {
                var: flags[b as usize].var,
                data: false,
            },
        };
    }
    flags
}

/// The work measure: operations outside sums once, a row body's operations once per row; a
/// sum of a constant body costs nothing, a sum of a row-independent body one multiplication.
pub(super) fn formula_work(
    nodes: &[Node],
    flags: &[Flags],
    root: NodeId,
    all_rows: usize,
    row_sets: &[Vec<u32>],
) -> usize {
    pub(super) fn row_ops(
        id: NodeId,
        nodes: &[Node],
        flags: &[Flags],
        seen: &mut Vec<bool>,
    ) -> usize {
        let f = flags[id as usize];
        if seen[id as usize] || !f.var || !f.data {
            return 0;
        }
        seen[id as usize] = true;
        match nodes[id as usize] {
            Node::Unary(_, a) => 1 + row_ops(a, nodes, flags, seen),
            Node::Binary(_, a, b) => {
                1 + row_ops(a, nodes, flags, seen) + row_ops(b, nodes, flags, seen)
            }
            _ => 0,
        }
    }
    /// Loop-invariant nodes a row body reads (computed outside the loop).
    pub(super) fn invariants(
        id: NodeId,
        nodes: &[Node],
        flags: &[Flags],
        seen: &mut Vec<bool>,
        out: &mut Vec<NodeId>,
    ) {
        if seen[id as usize] {
            return;
        }
        seen[id as usize] = true;
        let f = flags[id as usize];
        match nodes[id as usize] {
            Node::Const(_) => {}
            _ if !f.data => out.push(id),
            _ if !f.var => {}
            Node::Unary(_, a) => invariants(a, nodes, flags, seen, out),
            Node::Binary(_, a, b) => {
                invariants(a, nodes, flags, seen, out);
                invariants(b, nodes, flags, seen, out);
            }
            _ => {}
        }
    }
    let mut seen = vec![false; nodes.len()];
    let mut stack = vec![root];
    let mut work = 0;
    while let Some(id) = stack.pop() {
        if seen[id as usize] {
            continue;
        }
        seen[id as usize] = true;
        match nodes[id as usize] {
            Node::Const(_) | Node::Var(_) | Node::Data(_) => {}
            Node::Unary(_, a) => {
                work += 1;
                stack.push(a);
            }
            Node::Binary(_, a, b) => {
                work += 1;
                stack.push(b);
                stack.push(a);
            }
            Node::Sum(b, set) => {
                let rows = row_set(row_sets, set).map_or(all_rows, |r| r.len());
                let f = flags[b as usize];
                if !f.var {
                } else if !f.data {
                    work += 1;
                    stack.push(b);
                } else {
                    let mut body_seen = vec![false; nodes.len()];
                    work += 1 + rows * row_ops(b, nodes, flags, &mut body_seen);
                    let mut inv = Vec::new();
                    let mut inv_seen = vec![false; nodes.len()];
                    invariants(b, nodes, flags, &mut inv_seen, &mut inv);
                    stack.extend(inv.into_iter().rev());
                }
            }
        }
    }
    work
}

impl Compiler<'_> {
    pub(super) fn constant(&self, id: NodeId) -> Option<f64> {
        match self.nodes[id as usize] {
            Node::Const(c) => Some(c),
            _ => None,
        }
    }

    pub(super) fn fusable(&self, id: NodeId) -> bool {
        self.uses[id as usize] == 1
            && !self.slot_of.contains_key(&id)
            && !self.replaced.contains_key(&id)
    }

    /// A chain `((t0 ± t1) ± t2) ± …` of additions and subtractions rooted at `id` whose inner
    /// additions and terms are used nowhere else, as terms; `None` when fusing would not save an
    /// instruction.
    pub(super) fn chain(&self, id: NodeId) -> Option<Vec<ChainTerm>> {
        let mut absorbed = 0;
        let mut rev_terms = Vec::new();
        let mut cur = id;
        loop {
            match self.nodes[cur as usize] {
                Node::Binary(op @ (Binary::Add | Binary::Sub), l, r)
                    if cur == id || self.fusable(cur) =>
                {
                    let sign = if op == Binary::Sub { -1.0 } else { 1.0 };
                    rev_terms.push(self.term(r, sign, &mut absorbed));
                    absorbed += 1;
                    cur = l;
                }
                _ => {
                    rev_terms.push(self.term(cur, 1.0, &mut absorbed));
                    break;
                }
            }
        }
        if absorbed < MIN_FUSED {
            return None;
        }
        rev_terms.reverse();
        Some(rev_terms)
    }

    /// A chain term, each the same operation as the ones it replaces (counted in `absorbed`):
    /// a constant `c` is (±c)·1; `-x` used only here flips the sign; `c * x`, `x * c`, or `x / c`
    /// with `1/c` exact, used only here, is (±c)·x (`(-c)·x = -(c·x)`); `x * y` used only here
    /// is ±(x·y); `(x + m)^2`, `(x - m)^2` or `(m - x)^2` (the same square) used only here is a
    /// shifted square; anything else is (±1)·it.
    pub(super) fn term(&self, id: NodeId, sign: f64, absorbed: &mut usize) -> ChainTerm {
        if !self.fusable(id) {
            return match self.constant(id) {
                Some(c) => ChainTerm::Lin(sign * c, None),
                None => ChainTerm::Lin(sign, Some(id)),
            };
        }
        match self.nodes[id as usize] {
            Node::Const(c) => ChainTerm::Lin(sign * c, None),
            Node::Unary(Unary::Neg, a) => {
                *absorbed += 1;
                self.term(a, -sign, absorbed)
            }
            Node::Binary(Binary::Mul, a, b) => {
                *absorbed += 1;
                match (self.constant(a), self.constant(b)) {
                    (Some(c), _) => self.scaled(b, sign * c, absorbed),
                    (_, Some(c)) => self.scaled(a, sign * c, absorbed),
                    _ => ChainTerm::Prod(sign, a, b),
                }
            }
            Node::Binary(Binary::Div, a, b) => match self.constant(b).and_then(exact_reciprocal) {
                Some(r) => {
                    *absorbed += 1;
                    self.scaled(a, sign * r, absorbed)
                }
                None => ChainTerm::Lin(sign, Some(id)),
            },
            Node::Binary(Binary::Pow, _, _) => match self.square(id, sign, absorbed) {
                Some(t) => t,
                None => ChainTerm::Lin(sign, Some(id)),
            },
            _ => ChainTerm::Lin(sign, Some(id)),
        }
    }

    /// `coef · x` as a term: a shifted square if `x` is one used only here.
    pub(super) fn scaled(&self, x: NodeId, coef: f64, absorbed: &mut usize) -> ChainTerm {
        if self.fusable(x) {
            if let Some(t) = self.square(x, coef, absorbed) {
                return t;
            }
        }
        ChainTerm::Lin(coef, Some(x))
    }

    /// `coef · (x + m)^2` when `id` is a square (exponent 2) of an operand, shifted by a
    /// constant in an addition or subtraction used only here.
    pub(super) fn square(&self, id: NodeId, coef: f64, absorbed: &mut usize) -> Option<ChainTerm> {
        let Node::Binary(Binary::Pow, base, e) = self.nodes[id as usize] else {
            return None;
        };
        if self.constant(e) != Some(2.0) {
            return None;
        }
        *absorbed += 1;
        if self.fusable(base) {
            let shifted = match self.nodes[base as usize] {
                Node::Binary(op @ (Binary::Add | Binary::Sub), x, y) => {
                    // x - m = x + (-m); m - x = -(x - m), whose square is the same.
                    let sign = if op == Binary::Sub { -1.0 } else { 1.0 };
                    match (self.constant(x), self.constant(y)) {
                        (None, Some(m)) => Some((x, sign * m)),
                        (Some(m), None) => Some((y, sign * m)),
                        _ => None,
                    }
                }
                _ => None,
            };
            if let Some((x, m)) = shifted {
                *absorbed += 1;
                return Some(ChainTerm::Sq(coef, x, m));
            }
        }
        Some(ChainTerm::Sq(coef, base, 0.0))
    }

    /// Emits the terms of a chain, each coefficient times `scale` (±1), as one instruction.
    pub(super) fn emit_chain(&mut self, terms: &[ChainTerm], scale: f64) -> u32 {
        let terms: Vec<Term> = terms
            .iter()
            .map(|&t| match t {
                ChainTerm::Lin(c, Some(n)) => Term::Lin(scale * c, self.emit(n)),
                ChainTerm::Lin(c, None) => Term::Const(scale * c),
                ChainTerm::Prod(c, x, y) => {
                    let (x, y) = (self.emit(x), self.emit(y));
                    Term::Prod(scale * c, x, y)
                }
                ChainTerm::Sq(c, x, m) => Term::Sq(scale * c, self.emit(x), m),
            })
            .collect();
        self.seg.lin_comb(&terms)
    }

    /// `(x + m)^n` with `x + m` (or `x - m`, `m + x`) used only here and `n` a small integer
    /// other than 0 and 1: (x, m, n).
    pub(super) fn shifted_power(&self, base: NodeId, e: NodeId) -> Option<(NodeId, f64, i8)> {
        let n = self.constant(e).and_then(small_integer)?;
        if n == 0 || n == 1 || !self.fusable(base) {
            return None;
        }
        let (x, m) = match self.nodes[base as usize] {
            Node::Binary(Binary::Add, x, y) => match (self.constant(x), self.constant(y)) {
                (None, Some(m)) => (x, m),
                (Some(m), None) => (y, m),
                _ => return None,
            },
            Node::Binary(Binary::Sub, x, y) => (x, -self.constant(y)?),
            _ => return None,
        };
        (self.constant(x).is_none()).then_some((x, m, n as i8))
    }

    /// `a ± b` with a negation used only here as an operand, rewritten without it: returns
    /// (the other operand, the negated one, the operation that replaces the pair).
    pub(super) fn negated(
        &self,
        a: NodeId,
        b: NodeId,
        op: Binary,
    ) -> Option<(NodeId, NodeId, Binary)> {
        let neg = |n: NodeId| match self.nodes[n as usize] {
            Node::Unary(Unary::Neg, x) if self.fusable(n) => Some(x),
            _ => None,
        };
        match (op, neg(a), neg(b)) {
            (Binary::Add, _, Some(x)) => Some((a, x, Binary::Sub)),
            (Binary::Sub, _, Some(x)) => Some((a, x, Binary::Add)),
            (Binary::Add, Some(x), None) => Some((b, x, Binary::Sub)),
            _ => None,
        }
    }

    /// The arguments of a chain `lae(lae(lae(x0, x1), x2), x3)…` rooted at `id` whose inner links
    /// are used nowhere else, in order.
    pub(super) fn lse_chain(&self, id: NodeId) -> Vec<NodeId> {
        let mut rev = Vec::new();
        let mut cur = id;
        while let Node::Binary(Binary::LogAddExp, l, r) = self.nodes[cur as usize] {
            if cur != id && !self.fusable(cur) {
                break;
            }
            rev.push(r);
            cur = l;
        }
        rev.push(cur);
        rev.reverse();
        rev
    }

    /// `f(x · c)` for a one-argument function of a scaled operand used only here.
    pub(super) fn scaled_operand(&self, a: NodeId) -> Option<(NodeId, f64)> {
        if !self.fusable(a) {
            return None;
        }
        match self.nodes[a as usize] {
            Node::Unary(Unary::Neg, x) => Some((x, -1.0)),
            Node::Binary(Binary::Mul, x, y) => match (self.constant(x), self.constant(y)) {
                (Some(c), None) => Some((y, c)),
                (None, Some(c)) => Some((x, c)),
                _ => None,
            },
            Node::Binary(Binary::Div, x, y) => {
                let r = self.constant(y).and_then(exact_reciprocal)?;
                self.constant(x).is_none().then_some((x, r))
            }
            _ => None,
        }
    }

    pub(super) fn emit(&mut self, id: NodeId) -> u32 {
        if let Some(&s) = self.slot_of.get(&id) {
            return s;
        }
        let slot = match (self.replaced.get(&id), self.nodes[id as usize]) {
            (Some(Replacement::Const(v)), _) => {
                let v = *v;
                self.seg.konst(v)
            }
            (Some(Replacement::Times(n, b)), _) => {
                let (n, b) = (*n, *b);
                let bs = self.emit(b);
                let ns = self.seg.konst(n);
                self.seg.binary(Binary::Mul, ns, bs)
            }
            (None, Node::Const(v)) => self.seg.konst(v),
            // Unknowns the tape was not told about, and data outside sums, cannot occur in a
            // checked formula; NaN keeps the tape total.
            (None, Node::Var(_)) | (None, Node::Data(_)) => self.seg.konst(f64::NAN),
            // -(t0 + t1 + …) = (-t0) + (-t1) + … (rounding is symmetric; only a zero result
            // may change sign).
            (None, Node::Unary(Unary::Neg, a))
                if self.fusable(a)
                    && matches!(
                        self.nodes[a as usize],
                        Node::Binary(Binary::Add | Binary::Sub, ..)
                    ) =>
            {
                match self.chain(a) {
                    Some(terms) => self.emit_chain(&terms, -1.0),
                    None => {
                        let a = self.emit(a);
                        self.seg.unary(Unary::Neg, a)
                    }
                }
            }
            (None, Node::Unary(op, a)) => match self.scaled_operand(a) {
                Some((x, c)) if !matches!(op, Unary::Neg | Unary::Abs) => {
                    let x = self.emit(x);
                    self.seg.push(Op::ScaledUn(op, x, c))
                }
                _ => {
                    let a = self.emit(a);
                    self.seg.unary(op, a)
                }
            },
            (None, Node::Binary(Binary::Pow, base, e)) if self.shifted_power(base, e).is_some() => {
                let (x, m, n) = self.shifted_power(base, e).unwrap_or((base, 0.0, 2));
                let x = self.emit(x);
                self.seg.push(Op::ShiftPowI(x, n, m))
            }
            (None, Node::Binary(Binary::LogAddExp, _, _)) if self.lse_chain(id).len() >= 3 => {
                let args: Vec<u32> = self
                    .lse_chain(id)
                    .into_iter()
                    .map(|n| self.emit(n))
                    .collect();
                self.seg.log_sum_exp(&args)
            }
            // c + (-x) = c - x, (-x) + y = y - x, y - (-x) = y + x: the same operations.
            (None, Node::Binary(op @ (Binary::Add | Binary::Sub), a, b))
                if self.chain(id).is_none() && self.negated(a, b, op).is_some() =>
            {
                let (keep, negated, op) = self.negated(a, b, op).unwrap_or((a, b, op));
                let (k, n) = (self.emit(keep), self.emit(negated));
                self.seg.binary(op, k, n)
            }
            (None, Node::Binary(op, a, b)) => match self.chain(id) {
                Some(terms) => self.emit_chain(&terms, 1.0),
                None => {
                    let sa = self.emit(a);
                    let sb = self.emit(b);
                    self.seg.binary(op, sa, sb)
                }
            },
            (None, Node::Sum(body, set)) => {
                let (nodes, data, flags) = (self.nodes, self.data, &self.flags);
                let rows = row_set(self.row_sets, set);
                let n_rows = rows.map_or(data.rows, |r| r.len());
                let cache = &mut self.data_only;
                let mut values = |n: NodeId| data_only_values(nodes, data, cache, n, set, rows);
                let (mut lp, invariants) = RowLoop::build(nodes, flags, body, n_rows, &mut values);
                lp.inputs = invariants.iter().map(|&n| self.emit(n)).collect();
                self.loops.push(lp);
                self.seg.push(Op::Sum((self.loops.len() - 1) as u32))
            }
        };
        self.slot_of.insert(id, slot);
        slot
    }
}

/// The rows of row set `set` (`None`: every row).
pub(super) fn row_set(row_sets: &[Vec<u32>], set: u32) -> Option<&[u32]> {
    if set == crate::formula::resolve::ALL_ROWS {
        None
    } else {
        row_sets.get(set as usize).map(|r| &r[..])
    }
}

/// Values of a data-only node over the rows of row set `set` (`rows`; `None`: every row),
/// memoised in `cache`.
pub(super) fn data_only_values(
    nodes: &[Node],
    data: &DataTable,
    cache: &mut HashMap<(NodeId, u32), Vec<f64>>,
    id: NodeId,
    set: u32,
    rows: Option<&[u32]>,
) -> Vec<f64> {
    if let Some(v) = cache.get(&(id, set)) {
        return v.clone();
    }
    let mut out = Vec::with_capacity(rows.map_or(data.rows, |r| r.len()));
    let mut memo: HashMap<NodeId, f64> = HashMap::new();
    let mut at = |row: usize| {
        memo.clear();
        out.push(eval_row(nodes, id, data, row, &mut memo));
    };
    match rows {
        Some(r) => r.iter().for_each(|&row| at(row as usize)),
        None => (0..data.rows).for_each(at),
    }
    cache.insert((id, set), out.clone());
    out
}
