//! Row loops: what a `sum(…)` over data rows compiles to, and how it runs.
//!
//! Owns: the column programs of a sum body (one instruction per row-dependent operation, each
//! run over a block of rows in a tight loop, forward and in reverse), the factored form of a
//! sum (row-invariant terms, factors and divisors pulled out, so that the loop computes only the
//! row-dependent cores), and the rule that decides between the two on each call: the factored
//! form is used only when its pulled-out factors are finite (divisors also non-zero, powers of
//! them normal numbers), its result is finite and its terms do not cancel; otherwise the body as
//! written is evaluated (and where the factored form's gradient is not finite, the body as
//! written gives the gradient). A division of a column by a row-invariant value multiplies by
//! its reciprocal where that is a normal number. Row sums are accumulated in 16 lanes by row
//! index (row mod 16)
//! and the lanes added as a fixed tree, so the order of additions is fixed, whatever the block
//! size and on every platform.
//! Must not: expand products or powers of sums (which would cancel catastrophically), or split
//! a difference of a data value and an unknown; know anything outside one sum.

use super::{
    exact_reciprocal, forward, powi_small, reverse, small_integer, Flags, SegBuilder, Segment,
    CONST_TAG,
};
use crate::common::maths::{self, powi, Binary, Unary};
use crate::formula::resolve::{Node, NodeId};
use std::collections::HashMap;

/// An operand of a column instruction.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Arg {
    Const(f64),
    /// A loop-invariant value, computed outside the loop.
    Inv(u32),
    /// A column that depends on data only, precomputed at compile time.
    Data(u32),
    /// The result column of an earlier instruction.
    Col(u32),
}

#[derive(Clone, Copy, Debug, PartialEq)]
enum COp {
    Un(Unary),
    Bin(Binary),
    Square,
    PowI(i32),
    PowC(f64),
}

#[derive(Clone, Copy, Debug)]
struct CIns {
    op: COp,
    a: Arg,
    /// Unused (a constant) for one-operand instructions.
    b: Arg,
}

const NONE: u32 = u32::MAX;

/// Where the reverse pass sends an operand's share of an instruction's adjoint.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Dest {
    /// Nowhere (data and constants).
    Skip,
    /// The operand's adjoint column, written for the first time.
    Store(u32),
    /// The operand's adjoint column, added to.
    Add(u32),
    /// A set of lanes adding up an invariant's gradient.
    Lanes(u32),
    /// A set of lanes adding up the adjoint itself: the operand is an invariant added or
    /// subtracted (the lanes' sign says which).
    SumLanes(u32),
}

/// A straight-line program over columns; its roots' values are summed over the rows.
#[derive(Clone, Debug, Default)]
struct ColProg {
    code: Vec<CIns>,
    roots: Vec<u32>,
    /// Per instruction: its auxiliary column (sine and cosine keep the other), or `NONE`.
    aux: Vec<u32>,
    n_aux: usize,
    /// Reverse pass: whether a root's seed is the first write to its adjoint column.
    seed_store: Vec<bool>,
    /// Reverse pass, per instruction and operand: where its share of the adjoint goes.
    dest: Vec<[Dest; 2]>,
    /// Per set of lanes: the invariant it belongs to.
    lane_inv: Vec<u32>,
    /// Per set of lanes: −1 where they add up an adjoint that is then negated (an invariant
    /// subtracted or negated, directly or by a pass-through column), else 1.
    lane_sign: Vec<f64>,
    /// Columns no reverse step writes (none in practice): zeroed before each reverse pass.
    unwritten: Vec<u32>,
    /// Per instruction: the root whose seed is its whole adjoint (a constant over the rows, so
    /// never written out), or `NONE`.
    seed_only: Vec<u32>,
}

#[derive(Clone, Copy, Debug, PartialEq)]
enum Guard {
    /// Finite.
    Finite,
    /// Finite and non-zero.
    NonZero,
    /// A normal number (finite, non-zero, not subnormal).
    Normal,
}

/// The factored form of a sum: `combine(invariants, Σ root_1, Σ root_2, …)`.
#[derive(Clone, Debug)]
struct Factored {
    prog: ColProg,
    /// Inputs: the loop's invariants, then the root sums.
    combine: Segment,
    /// Combine slots that must pass their guard for the factored form to be used.
    guards: Vec<(u32, Guard)>,
    /// Combine slots of the terms (for the cancellation check).
    terms: Vec<u32>,
}

/// A compiled `sum(…)`.
#[derive(Clone, Debug)]
pub(super) struct RowLoop {
    /// Outer slots of the loop-invariant values, in the order the programs number them.
    pub(super) inputs: Vec<u32>,
    rows: usize,
    /// Rows per block (a multiple of [`LANES`]).
    block: usize,
    /// Data-only columns, column after column (`rows` values each).
    data: Vec<f64>,
    /// The body as written.
    exact: ColProg,
    factored: Option<Factored>,
}

/// Most column cells of one program's values per block (the adjoints take as many).
const BLOCK_CELLS: usize = 16384;

/// The factored form is used only where its total is at least 1/CANCELLATION of the sum of
/// its terms' magnitudes: splitting a sum into sums of its terms moves the rounding of each
/// row's terms into the rounding of each term's sum, which is harmless unless they cancel.
const CANCELLATION: f64 = 64.0;

/// The slot of `id` in `list`, appending it the first time it is seen.
fn intern(list: &mut Vec<NodeId>, index: &mut HashMap<NodeId, u32>, id: NodeId) -> u32 {
    *index.entry(id).or_insert_with(|| {
        list.push(id);
        (list.len() - 1) as u32
    })
}

struct Ctx<'a> {
    nodes: &'a [Node],
    flags: &'a [Flags],
    inv: Vec<NodeId>,
    inv_index: HashMap<NodeId, u32>,
    data_nodes: Vec<NodeId>,
    data_index: HashMap<NodeId, u32>,
}

impl Ctx<'_> {
    fn invariant(&mut self, id: NodeId) -> u32 {
        intern(&mut self.inv, &mut self.inv_index, id)
    }
    fn data(&mut self, id: NodeId) -> u32 {
        intern(&mut self.data_nodes, &mut self.data_index, id)
    }
    /// Depends on unknowns and data: computed per row.
    fn is_row(&self, id: NodeId) -> bool {
        let f = self.flags[id as usize];
        f.var && f.data
    }
    /// Does not depend on the row.
    fn is_inv(&self, id: NodeId) -> bool {
        !self.flags[id as usize].data
    }
    fn constant(&self, id: NodeId) -> Option<f64> {
        match self.nodes[id as usize] {
            Node::Const(c) => Some(c),
            _ => None,
        }
    }
}

#[derive(Default)]
struct ColBuilder {
    code: Vec<CIns>,
    memo: HashMap<NodeId, Arg>,
    pow_memo: HashMap<(NodeId, i32), Arg>,
}

impl ColBuilder {
    fn push(&mut self, op: COp, a: Arg, b: Arg) -> Arg {
        self.code.push(CIns { op, a, b });
        Arg::Col((self.code.len() - 1) as u32)
    }

    fn unary(&mut self, op: COp, a: Arg) -> Arg {
        self.push(op, a, Arg::Const(0.0))
    }

    /// The same specialisations as the scalar tape: small integer powers by repeated squaring,
    /// division by a power of two as multiplication by its exact reciprocal.
    fn binary(&mut self, op: Binary, a: Arg, b: Arg) -> Arg {
        match (op, b) {
            (Binary::Pow, Arg::Const(c)) => match small_integer(c) {
                Some(2) => self.unary(COp::Square, a),
                Some(n) => self.unary(COp::PowI(n), a),
                None => self.unary(COp::PowC(c), a),
            },
            (Binary::Div, Arg::Const(c)) => match exact_reciprocal(c) {
                Some(r) => self.push(COp::Bin(Binary::Mul), a, Arg::Const(r)),
                None => self.push(COp::Bin(op), a, b),
            },
            _ => self.push(COp::Bin(op), a, b),
        }
    }

    fn lower(&mut self, ctx: &mut Ctx, id: NodeId) -> Arg {
        if let Some(&a) = self.memo.get(&id) {
            return a;
        }
        let f = ctx.flags[id as usize];
        let arg = match ctx.nodes[id as usize] {
            Node::Const(c) => Arg::Const(c),
            _ if !f.data => Arg::Inv(ctx.invariant(id)),
            _ if !f.var => Arg::Data(ctx.data(id)),
            Node::Unary(op, a) => {
                let a = self.lower(ctx, a);
                self.unary(COp::Un(op), a)
            }
            Node::Binary(op, a, b) => {
                let a = self.lower(ctx, a);
                let b = self.lower(ctx, b);
                self.binary(op, a, b)
            }
            // A node with unknowns and data is an operation (`resolve` allows no nested sums).
            Node::Var(_) | Node::Data(_) | Node::Sum(_) => Arg::Const(f64::NAN),
        };
        self.memo.insert(id, arg);
        arg
    }

    /// `u^k`, computed as the tape computes a constant integer power.
    fn pow(&mut self, ctx: &mut Ctx, u: NodeId, k: i32) -> Arg {
        if let Some(&a) = self.pow_memo.get(&(u, k)) {
            return a;
        }
        let a = self.lower(ctx, u);
        let p = self.binary(Binary::Pow, a, Arg::Const(k as f64));
        self.pow_memo.insert((u, k), p);
        p
    }

    /// The program summing `roots` (which must be columns; anything else is copied into one).
    fn finish(mut self, roots: &[Arg]) -> ColProg {
        let roots: Vec<u32> = roots
            .iter()
            .map(|&r| match r {
                Arg::Col(j) => j,
                other => match self.push(COp::Bin(Binary::Add), other, Arg::Const(0.0)) {
                    Arg::Col(j) => j,
                    _ => 0,
                },
            })
            .collect();
        let n = self.code.len();
        let mut aux = vec![NONE; n];
        let mut n_aux = 0;
        for (k, ins) in self.code.iter().enumerate() {
            if matches!(ins.op, COp::Un(Unary::Sin) | COp::Un(Unary::Cos)) {
                aux[k] = n_aux as u32;
                n_aux += 1;
            }
        }
        let mut written = vec![false; n];
        let seed_store = roots
            .iter()
            .map(|&r| !std::mem::replace(&mut written[r as usize], true))
            .collect();
        let mut lane_inv = Vec::new();
        let mut lane_sign = Vec::new();
        // A column that only adds an invariant to (or subtracts it from) data or a constant
        // passes its adjoint on unchanged: whatever its users send it goes straight into the
        // invariant's lanes (negated at the end for a subtracted invariant), and its own
        // reverse step does nothing.
        let mut through = vec![NONE; n];
        for (j, ins) in self.code.iter().enumerate() {
            let inert = |a: Arg| matches!(a, Arg::Data(_) | Arg::Const(_));
            let inv = match (ins.op, ins.a, ins.b) {
                (COp::Bin(Binary::Add), Arg::Inv(i), b) if inert(b) => Some((i, 1.0)),
                (COp::Bin(Binary::Add | Binary::Sub), a, Arg::Inv(i)) if inert(a) => Some((
                    i,
                    if ins.op == COp::Bin(Binary::Sub) {
                        -1.0
                    } else {
                        1.0
                    },
                )),
                (COp::Bin(Binary::Sub), Arg::Inv(i), b) if inert(b) => Some((i, 1.0)),
                _ => None,
            };
            if let (Some((i, sign)), false) = (inv, roots.contains(&(j as u32))) {
                through[j] = lane_inv.len() as u32;
                lane_inv.push(i);
                lane_sign.push(sign);
                written[j] = true;
            }
        }
        let mut dest = vec![[Dest::Skip; 2]; n];
        for k in (0..n).rev() {
            if through[k] != NONE {
                continue;
            }
            let ins = self.code[k];
            for (w, arg) in [ins.a, ins.b].into_iter().enumerate() {
                dest[k][w] = match arg {
                    Arg::Col(j) if through[j as usize] != NONE => Dest::Lanes(through[j as usize]),
                    Arg::Col(j) => {
                        if std::mem::replace(&mut written[j as usize], true) {
                            Dest::Add(j)
                        } else {
                            Dest::Store(j)
                        }
                    }
                    Arg::Inv(i) => {
                        lane_inv.push(i);
                        let negated = matches!(
                            (ins.op, w),
                            (COp::Bin(Binary::Sub), 1) | (COp::Un(Unary::Neg), _)
                        );
                        lane_sign.push(if negated { -1.0 } else { 1.0 });
                        let l = lane_inv.len() as u32 - 1;
                        let additive = matches!(
                            ins.op,
                            COp::Bin(Binary::Add | Binary::Sub) | COp::Un(Unary::Neg)
                        );
                        if additive {
                            Dest::SumLanes(l)
                        } else {
                            Dest::Lanes(l)
                        }
                    }
                    Arg::Const(_) | Arg::Data(_) => Dest::Skip,
                };
            }
        }
        let unwritten = (0..n as u32).filter(|&j| !written[j as usize]).collect();
        let mut seed_only = vec![NONE; n];
        for (t, &r) in roots.iter().enumerate() {
            let once = roots.iter().filter(|&&q| q == r).count() == 1;
            let used = self
                .code
                .iter()
                .any(|ins| ins.a == Arg::Col(r) || ins.b == Arg::Col(r));
            if once && !used {
                seed_only[r as usize] = t as u32;
            }
        }
        ColProg {
            code: self.code,
            roots,
            aux,
            n_aux,
            seed_store,
            dest,
            lane_inv,
            lane_sign,
            unwritten,
            seed_only,
        }
    }
}

/// A factor pulled out of a sum, applied to the sum of the term's core.
#[derive(Clone, Copy, Debug)]
enum Factor {
    /// × b
    Mul(NodeId),
    /// ÷ b
    Div(NodeId),
    /// × b^k: from (u b)^k = u^k b^k.
    MulPow(NodeId, i32),
    /// ÷ b^k: from (u / b)^k = u^k / b^k.
    DivPow(NodeId, i32),
}

#[derive(Clone, Copy, Debug)]
enum Core {
    /// Σ over rows of the node.
    Rows(NodeId),
    /// Σ over rows of the node to the power k.
    RowsPow(NodeId, i32),
    /// rows × the (row-invariant) node.
    Invariant(NodeId),
    /// Σ over rows of a data-only node: a constant.
    Data(NodeId),
}

/// ± factors × core; the factors outermost first.
#[derive(Clone, Debug)]
struct Term {
    neg: bool,
    factors: Vec<Factor>,
    core: Core,
}

/// Splits a sum body into terms: Σ (a ± b) = Σ a ± Σ b where one of them depends on unknowns
/// and data (a difference of a data value and an invariant stays whole: split, it would
/// cancel); Σ (c·a) = c Σ a and Σ (a/c) = (Σ a)/c for an invariant c; Σ (u/c)^k = Σ u^k / c^k
/// and Σ (c·u)^k = c^k Σ u^k for a small positive integer k. Constant factors that would
/// never pass the guards (infinite, or a zero divisor) are left in place.
fn split(ctx: &Ctx, id: NodeId, neg: bool, factors: &mut Vec<Factor>, out: &mut Vec<Term>) {
    let mut push = |core: Core, factors: &Vec<Factor>| {
        out.push(Term {
            neg,
            factors: factors.clone(),
            core,
        })
    };
    if ctx.is_inv(id) {
        return push(Core::Invariant(id), factors);
    }
    if !ctx.is_row(id) {
        return push(Core::Data(id), factors);
    }
    let finite = |b: NodeId| ctx.constant(b).is_none_or(f64::is_finite);
    let divisor = |b: NodeId| ctx.constant(b).is_none_or(|c| c.is_finite() && c != 0.0);
    let pow_ok = |b: NodeId, k: i32| ctx.constant(b).is_none_or(|c| powi(c, k).is_normal());
    match ctx.nodes[id as usize] {
        Node::Binary(op @ (Binary::Add | Binary::Sub), a, b) if ctx.is_row(a) || ctx.is_row(b) => {
            split(ctx, a, neg, factors, out);
            split(ctx, b, neg != (op == Binary::Sub), factors, out);
        }
        Node::Unary(Unary::Neg, a) => split(ctx, a, !neg, factors, out),
        Node::Binary(Binary::Mul, a, b) if ctx.is_inv(b) && finite(b) => {
            factors.push(Factor::Mul(b));
            split(ctx, a, neg, factors, out);
            factors.pop();
        }
        Node::Binary(Binary::Mul, a, b) if ctx.is_inv(a) && finite(a) => {
            factors.push(Factor::Mul(a));
            split(ctx, b, neg, factors, out);
            factors.pop();
        }
        Node::Binary(Binary::Div, a, b) if ctx.is_inv(b) && divisor(b) => {
            factors.push(Factor::Div(b));
            split(ctx, a, neg, factors, out);
            factors.pop();
        }
        Node::Binary(Binary::Pow, base, e) => {
            let k = ctx.constant(e).and_then(small_integer).filter(|&k| k >= 1);
            let pulled = k.and_then(|k| match ctx.nodes[base as usize] {
                Node::Binary(Binary::Div, u, b) if ctx.is_row(u) && ctx.is_inv(b) => {
                    pow_ok(b, k).then_some((u, Factor::DivPow(b, k)))
                }
                Node::Binary(Binary::Mul, u, b) if ctx.is_row(u) && ctx.is_inv(b) => {
                    pow_ok(b, k).then_some((u, Factor::MulPow(b, k)))
                }
                Node::Binary(Binary::Mul, b, u) if ctx.is_row(u) && ctx.is_inv(b) => {
                    pow_ok(b, k).then_some((u, Factor::MulPow(b, k)))
                }
                _ => None,
            });
            match (pulled, k) {
                (Some((u, f)), Some(k)) => {
                    factors.push(f);
                    push(Core::RowsPow(u, k), factors);
                    factors.pop();
                }
                _ => push(Core::Rows(id), factors),
            }
        }
        _ => push(Core::Rows(id), factors),
    }
}

impl RowLoop {
    /// Builds the loop of `sum(body)`; `values(n)` gives a data-only node's value on every row.
    /// Returns the loop (its `inputs` not yet filled) and the invariant nodes it reads, whose
    /// outer slots become its `inputs` in that order.
    pub(super) fn build(
        nodes: &[Node],
        flags: &[Flags],
        body: NodeId,
        rows: usize,
        values: &mut dyn FnMut(NodeId) -> Vec<f64>,
    ) -> (RowLoop, Vec<NodeId>) {
        let mut ctx = Ctx {
            nodes,
            flags,
            inv: Vec::new(),
            inv_index: HashMap::new(),
            data_nodes: Vec::new(),
            data_index: HashMap::new(),
        };
        let mut ex = ColBuilder::default();
        let root = ex.lower(&mut ctx, body);
        let exact = ex.finish(&[root]);
        let factored = if rows > 0 {
            factor(&mut ctx, body, rows, values)
        } else {
            None
        };
        let mut data = Vec::with_capacity(ctx.data_nodes.len() * rows);
        for &n in &ctx.data_nodes {
            let v = values(n);
            data.extend_from_slice(&v[..rows.min(v.len())]);
            data.resize(data.len() + rows - rows.min(v.len()), f64::NAN);
        }
        let widest = exact
            .code
            .len()
            .max(factored.as_ref().map_or(0, |f| f.prog.code.len()))
            .max(1);
        let per_column = (BLOCK_CELLS / widest).max(64) / LANES * LANES;
        let block = if rows <= per_column {
            rows.div_ceil(LANES).max(1) * LANES
        } else {
            per_column
        };
        let lp = RowLoop {
            inputs: Vec::new(),
            rows,
            block,
            data,
            exact,
            factored,
        };
        (lp, ctx.inv)
    }
}

/// The factored form of `sum(body)`, or `None` when splitting finds nothing to pull out.
fn factor(
    ctx: &mut Ctx,
    body: NodeId,
    rows: usize,
    values: &mut dyn FnMut(NodeId) -> Vec<f64>,
) -> Option<Factored> {
    let mut terms = Vec::new();
    split(ctx, body, false, &mut Vec::new(), &mut terms);
    if let [t] = &terms[..] {
        if !t.neg && t.factors.is_empty() && matches!(t.core, Core::Rows(b) if b == body) {
            return None;
        }
    }
    // The loop: one root per distinct row core.
    let mut fb = ColBuilder::default();
    let mut roots: Vec<Arg> = Vec::new();
    let mut root_of = vec![0usize; terms.len()];
    for (t, term) in terms.iter().enumerate() {
        let arg = match term.core {
            Core::Rows(n) => fb.lower(ctx, n),
            Core::RowsPow(u, k) => fb.pow(ctx, u, k),
            Core::Invariant(_) | Core::Data(_) => continue,
        };
        if !matches!(arg, Arg::Col(_)) {
            return None;
        }
        root_of[t] = match roots.iter().position(|&r| r == arg) {
            Some(p) => p,
            None => {
                roots.push(arg);
                roots.len() - 1
            }
        };
    }
    // Every invariant the combination reads, registered before the inputs are numbered.
    for term in &terms {
        for f in &term.factors {
            let (Factor::Mul(b) | Factor::Div(b) | Factor::MulPow(b, _) | Factor::DivPow(b, _)) =
                *f;
            if ctx.constant(b).is_none() {
                ctx.invariant(b);
            }
        }
        if let Core::Invariant(n) = term.core {
            if ctx.constant(n).is_none() {
                ctx.invariant(n);
            }
        }
    }
    let n_inv = ctx.inv.len();
    let mut cb = SegBuilder::new(n_inv + roots.len());
    let value_of = |cb: &mut SegBuilder, ctx: &Ctx, n: NodeId| -> u32 {
        match ctx.constant(n) {
            Some(c) => cb.konst(c),
            None => cb.input(ctx.inv_index[&n] as usize),
        }
    };
    let mut guards: Vec<(u32, Guard)> = Vec::new();
    let mut guard = |s: u32, g: Guard| {
        if s & CONST_TAG == 0 {
            guards.push((s, g));
        }
    };
    let mut acc: Option<u32> = None;
    let mut term_slots = Vec::new();
    for (t, term) in terms.iter().enumerate() {
        let mut x = match term.core {
            Core::Rows(_) | Core::RowsPow(..) => cb.input(n_inv + root_of[t]),
            Core::Invariant(n) => {
                let v = value_of(&mut cb, ctx, n);
                let count = cb.konst(rows as f64);
                cb.binary(Binary::Mul, v, count)
            }
            Core::Data(n) => {
                let total: f64 = values(n).iter().sum();
                cb.konst(total)
            }
        };
        for f in term.factors.iter().rev() {
            x = match *f {
                Factor::Mul(b) => {
                    let s = value_of(&mut cb, ctx, b);
                    guard(s, Guard::Finite);
                    cb.binary(Binary::Mul, x, s)
                }
                Factor::Div(b) => {
                    let s = value_of(&mut cb, ctx, b);
                    guard(s, Guard::NonZero);
                    cb.binary(Binary::Div, x, s)
                }
                Factor::MulPow(b, k) | Factor::DivPow(b, k) => {
                    let p = match ctx.constant(b) {
                        Some(c) => cb.konst(powi(c, k)),
                        None => {
                            let s = value_of(&mut cb, ctx, b);
                            let e = cb.konst(k as f64);
                            cb.binary(Binary::Pow, s, e)
                        }
                    };
                    guard(p, Guard::Normal);
                    let op = if matches!(f, Factor::MulPow(..)) {
                        Binary::Mul
                    } else {
                        Binary::Div
                    };
                    cb.binary(op, x, p)
                }
            };
        }
        term_slots.push(x);
        acc = Some(match acc {
            None if term.neg => cb.unary(Unary::Neg, x),
            None => x,
            Some(a) => cb.binary(if term.neg { Binary::Sub } else { Binary::Add }, a, x),
        });
    }
    let root = acc?;
    let fix = cb.slot_fixer();
    let guards = guards.into_iter().map(|(s, g)| (fix(s), g)).collect();
    let terms = term_slots.into_iter().map(&fix).collect();
    let combine = cb.finish(root, &mut []);
    Some(Factored {
        prog: fb.finish(&roots),
        combine,
        guards,
        terms,
    })
}

/// Scratch memory of one row loop (one per evaluator).
#[derive(Clone)]
pub(super) struct LoopScratch {
    inv: Vec<f64>,
    grads: Vec<f64>,
    vals: Vec<f64>,
    adj: Vec<f64>,
    aux: Vec<f64>,
    lanes: Vec<Lanes>,
    root_lanes: Vec<Lanes>,
    seeds: Vec<f64>,
    sums: Vec<f64>,
    comb_vals: Vec<f64>,
    comb_aux: Vec<f64>,
    comb_adj: Vec<f64>,
    tmp: Vec<f64>,
}

impl LoopScratch {
    pub(super) fn new(lp: &RowLoop) -> LoopScratch {
        let progs: Vec<&ColProg> = std::iter::once(&lp.exact)
            .chain(lp.factored.as_ref().map(|f| &f.prog))
            .collect();
        let widest = |f: fn(&ColProg) -> usize| progs.iter().map(|p| f(p)).max().unwrap_or(0);
        let n_code = widest(|p| p.code.len());
        let n_aux = widest(|p| p.n_aux);
        let n_lanes = widest(|p| p.lane_inv.len());
        let n_roots = widest(|p| p.roots.len());
        let (comb_vals, comb_aux, comb_adj) = match &lp.factored {
            Some(f) => (
                f.combine.new_vals(),
                f.combine.new_aux(),
                f.combine.new_zeros(),
            ),
            None => (Vec::new(), Vec::new(), Vec::new()),
        };
        LoopScratch {
            inv: vec![0.0; lp.inputs.len()],
            grads: vec![0.0; lp.inputs.len()],
            vals: vec![0.0; n_code * lp.block],
            adj: vec![0.0; n_code * lp.block],
            aux: vec![0.0; n_aux * lp.block],
            lanes: vec![[0.0; LANES]; n_lanes],
            root_lanes: vec![[0.0; LANES]; n_roots],
            seeds: vec![0.0; n_roots],
            sums: vec![0.0; n_roots],
            comb_vals,
            comb_aux,
            comb_adj,
            tmp: vec![0.0; lp.block],
        }
    }

    /// The gradient of the loop's last value with respect to each of its inputs.
    pub(super) fn grads(&self) -> &[f64] {
        &self.grads
    }
}

fn passes(g: Guard, x: f64) -> bool {
    match g {
        Guard::Finite => x.is_finite(),
        Guard::NonZero => x.is_finite() && x != 0.0,
        Guard::Normal => x.is_normal(),
    }
}

/// Row sums are kept in this many partial sums, row `r` going to lane `r mod LANES`: enough
/// independent additions to keep the processor busy, in an order fixed on every platform.
const LANES: usize = 16;

type Lanes = [f64; LANES];

/// The lanes added as a tree: lane i and lane i + 8, then i and i + 4, i and i + 2, 0 and 1.
#[inline]
fn lane_total(l: &Lanes) -> f64 {
    let w: [f64; 8] = std::array::from_fn(|i| l[i] + l[i + 8]);
    let w: [f64; 4] = std::array::from_fn(|i| w[i] + w[i + 4]);
    (w[0] + w[2]) + (w[1] + w[3])
}

impl RowLoop {
    /// The sum's value given the outer slots computed so far; in gradient mode its gradient
    /// with respect to the inputs is left in the scratch ([`LoopScratch::grads`]).
    pub(super) fn run(&self, s: &mut LoopScratch, outer: &[f64], grad: bool) -> f64 {
        for (v, &slot) in s.inv.iter_mut().zip(&self.inputs) {
            *v = outer.get(slot as usize).copied().unwrap_or(f64::NAN);
        }
        s.grads.fill(0.0);
        if let Some(f) = &self.factored {
            let total = if grad {
                self.run_factored::<true>(f, s)
            } else {
                self.run_factored::<false>(f, s)
            };
            if let Some(t) = total {
                // Where a gradient of the factored form is not finite, the body as written
                // gives the gradient (the value stays the one `value` computes).
                if grad && !s.grads.iter().all(|g| g.is_finite()) {
                    s.grads.fill(0.0);
                    s.seeds[0] = 1.0;
                    self.run_prog::<true>(&self.exact, s);
                }
                return t;
            }
            s.grads.fill(0.0);
        }
        s.seeds[0] = 1.0;
        if grad {
            self.run_prog::<true>(&self.exact, s);
        } else {
            self.run_prog::<false>(&self.exact, s);
        }
        s.sums[0]
    }

    /// Runs the combination forward on the invariants and the root sums in `s.sums`.
    fn combine_forward(f: &Factored, s: &mut LoopScratch) {
        let c = &f.combine;
        let first = c.first_input;
        let (n_inv, n_roots) = (s.inv.len(), f.prog.roots.len());
        s.comb_vals[first..first + n_inv].copy_from_slice(&s.inv);
        s.comb_vals[first + n_inv..first + n_inv + n_roots].copy_from_slice(&s.sums[..n_roots]);
        // In gradient mode (for the auxiliary values `combine_reverse` reads): it is small.
        forward::<true>(c, &mut s.comb_vals, &mut s.comb_aux, |_, _| f64::NAN);
    }

    /// Whether the factored form may stand for the body as written: every pulled-out factor
    /// passes its guard, the total is finite, and its terms do not cancel (the total is at
    /// least 1/64 of the sum of their magnitudes; the body as written adds row by row).
    fn combine_ok(f: &Factored, s: &LoopScratch, check_total: bool) -> bool {
        let v = &s.comb_vals;
        if !f
            .guards
            .iter()
            .all(|&(slot, g)| passes(g, v[slot as usize]))
        {
            return false;
        }
        if !check_total {
            return true;
        }
        let total = v[f.combine.root as usize];
        let magnitude: f64 = f.terms.iter().map(|&t| v[t as usize].abs()).sum();
        total.is_finite() && total.abs() * CANCELLATION >= magnitude
    }

    /// Runs the combination backward: the root sums' weights go to `s.seeds`, the gradient
    /// with respect to the invariants is added to `s.grads`.
    fn combine_reverse(f: &Factored, s: &mut LoopScratch, invariants: bool) {
        let c = &f.combine;
        let first = c.first_input;
        let (n_inv, n_roots) = (s.inv.len(), f.prog.roots.len());
        // The adjoints are zero between uses (see `Evaluator::value_grad`).
        s.comb_adj[c.root as usize] = 1.0;
        reverse(c, &s.comb_vals, &s.comb_aux, &mut s.comb_adj, |_| {
            (&[][..], &[][..])
        });
        s.seeds[..n_roots].copy_from_slice(&s.comb_adj[first + n_inv..first + n_inv + n_roots]);
        if invariants {
            for (g, &a) in s.grads.iter_mut().zip(&s.comb_adj[first..first + n_inv]) {
                *g += a;
            }
        }
        c.clear_leaves(&mut s.comb_adj);
    }

    /// The factored form's value, or `None` where it may differ from the body as written.
    fn run_factored<const GRAD: bool>(&self, f: &Factored, s: &mut LoopScratch) -> Option<f64> {
        let p = &f.prog;
        if self.rows <= self.block {
            // One block: its values are still there after the combination has run.
            begin(p, s);
            self.block_forward::<GRAD>(p, s, 0);
            finish_sums(p, s);
            Self::combine_forward(f, s);
            if !Self::combine_ok(f, s, true) {
                return None;
            }
            if GRAD {
                Self::combine_reverse(f, s, true);
                self.block_reverse(p, s, 0);
                finish_grads(p, s);
            }
            return Some(s.comb_vals[f.combine.root as usize]);
        }
        // Several blocks: the factors do not depend on the root sums, so the guards and the
        // roots' weights are found first, with the sums set to zero.
        s.sums[..p.roots.len()].fill(0.0);
        Self::combine_forward(f, s);
        if !Self::combine_ok(f, s, false) {
            return None;
        }
        if GRAD {
            Self::combine_reverse(f, s, false);
        }
        self.run_prog::<GRAD>(p, s);
        Self::combine_forward(f, s);
        if !Self::combine_ok(f, s, true) {
            return None;
        }
        if GRAD {
            Self::combine_reverse(f, s, true);
        }
        Some(s.comb_vals[f.combine.root as usize])
    }

    /// Runs a column program over every row: the roots' sums go to `s.sums`; in gradient mode
    /// the roots' adjoints are `s.seeds` and the invariants' gradients are added to `s.grads`.
    fn run_prog<const GRAD: bool>(&self, p: &ColProg, s: &mut LoopScratch) {
        begin(p, s);
        let mut start = 0;
        while start < self.rows {
            self.block_forward::<GRAD>(p, s, start);
            if GRAD {
                self.block_reverse(p, s, start);
            }
            start += self.block;
        }
        finish_sums(p, s);
        if GRAD {
            finish_grads(p, s);
        }
    }

    fn block<'a>(&'a self, s: &'a [f64], start: usize) -> Block<'a> {
        Block {
            inv: s,
            data: &self.data,
            rows: self.rows,
            start,
            len: self.block.min(self.rows - start),
            b: self.block,
        }
    }

    /// The instructions forward over the block starting at row `start`; the roots' values are
    /// added to their lanes.
    fn block_forward<const GRAD: bool>(&self, p: &ColProg, s: &mut LoopScratch, start: usize) {
        let b = self.block;
        let blk = self.block(&s.inv, start);
        let len = blk.len;
        for (k, ins) in p.code.iter().enumerate() {
            let (done, rest) = s.vals.split_at_mut(k * b);
            let out = &mut rest[..len];
            let aux = match p.aux[k] {
                NONE => &mut [][..],
                x => &mut s.aux[x as usize * b..x as usize * b + len],
            };
            col_forward::<GRAD>(ins.op, blk.src(ins.a, done), blk.src(ins.b, done), out, aux);
        }
        for (t, &r) in p.roots.iter().enumerate() {
            let col = &s.vals[r as usize * b..r as usize * b + len];
            add_lanes(&mut s.root_lanes[t], col);
        }
    }

    /// The instructions backward over the block starting at row `start` (whose values
    /// `block_forward` left), from the roots' adjoints `s.seeds`.
    fn block_reverse(&self, p: &ColProg, s: &mut LoopScratch, start: usize) {
        let b = self.block;
        let blk = self.block(&s.inv, start);
        let len = blk.len;
        for &j in &p.unwritten {
            s.adj[j as usize * b..j as usize * b + len].fill(0.0);
        }
        for (t, &r) in p.roots.iter().enumerate() {
            if p.seed_only[r as usize] != NONE {
                continue;
            }
            let col = &mut s.adj[r as usize * b..r as usize * b + len];
            let w = s.seeds[t];
            if p.seed_store[t] {
                col.fill(w);
            } else {
                col.iter_mut().for_each(|x| *x += w);
            }
        }
        let vals = &s.vals[..];
        for k in (0..p.code.len()).rev() {
            let ins = p.code[k];
            let (lo, hi) = s.adj.split_at_mut(k * b);
            let g = match p.seed_only[k] {
                NONE => Src::Col(&hi[..len]),
                t => Src::Val(s.seeds[t as usize]),
            };
            let v = &vals[k * b..k * b + len];
            let aux = match p.aux[k] {
                NONE => &[][..],
                x => &s.aux[x as usize * b..x as usize * b + len],
            };
            let (a, bb) = (blk.src(ins.a, vals), blk.src(ins.b, vals));
            for (w, d) in p.dest[k].into_iter().enumerate() {
                let sink = match d {
                    Dest::Skip => continue,
                    Dest::Store(j) => Sink::Store(&mut lo[j as usize * b..j as usize * b + len]),
                    Dest::Add(j) => Sink::Add(&mut lo[j as usize * b..j as usize * b + len]),
                    Dest::Lanes(l) => Sink::Lanes(&mut s.lanes[l as usize]),
                    Dest::SumLanes(l) => {
                        let lanes = &mut s.lanes[l as usize];
                        match g {
                            Src::Col(g) => add_lanes(lanes, g),
                            Src::Val(w) => {
                                let t = &mut s.tmp[..len];
                                t.fill(w);
                                add_lanes(lanes, t);
                            }
                        }
                        continue;
                    }
                };
                col_partial(ins.op, w, g, a, bb, v, aux, sink, &mut s.tmp);
            }
        }
    }
}

/// Clears a program's lanes before its first block.
fn begin(p: &ColProg, s: &mut LoopScratch) {
    for l in s.lanes[..p.lane_inv.len()].iter_mut() {
        *l = [0.0; LANES];
    }
    for l in s.root_lanes[..p.roots.len()].iter_mut() {
        *l = [0.0; LANES];
    }
}

/// The roots' sums from their lanes, into `s.sums`.
fn finish_sums(p: &ColProg, s: &mut LoopScratch) {
    for (t, l) in s.root_lanes[..p.roots.len()].iter().enumerate() {
        s.sums[t] = lane_total(l);
    }
}

/// The invariants' gradients from their lanes, added to `s.grads`.
fn finish_grads(p: &ColProg, s: &mut LoopScratch) {
    for ((l, &i), &sign) in s.lanes.iter().zip(&p.lane_inv).zip(&p.lane_sign) {
        s.grads[i as usize] += sign * lane_total(l);
    }
}

/// Where a block's operands are.
struct Block<'a> {
    inv: &'a [f64],
    data: &'a [f64],
    rows: usize,
    start: usize,
    len: usize,
    /// Rows per block: the stride of the computed columns.
    b: usize,
}

impl<'a> Block<'a> {
    /// An operand over the block; `cols` holds the computed columns.
    #[inline(always)]
    fn src<'c>(&self, arg: Arg, cols: &'c [f64]) -> Src<'c>
    where
        'a: 'c,
    {
        match arg {
            Arg::Const(c) => Src::Val(c),
            Arg::Inv(j) => Src::Val(self.inv[j as usize]),
            Arg::Data(j) => {
                let at = j as usize * self.rows + self.start;
                Src::Col(&self.data[at..at + self.len])
            }
            Arg::Col(j) => {
                let at = j as usize * self.b;
                Src::Col(&cols[at..at + self.len])
            }
        }
    }
}

/// An operand over the rows of a block: a column, or one value for every row.
#[derive(Clone, Copy)]
enum Src<'a> {
    Col(&'a [f64]),
    Val(f64),
}

impl Src<'_> {
    #[inline(always)]
    fn at(self, r: usize) -> f64 {
        match self {
            Src::Col(c) => c[r],
            Src::Val(v) => v,
        }
    }
}

/// Where one operand's share of the adjoint goes.
enum Sink<'a> {
    /// The operand's adjoint column, written for the first time.
    Store(&'a mut [f64]),
    /// The operand's adjoint column, added to.
    Add(&'a mut [f64]),
    /// An invariant's gradient, added up by row lanes.
    Lanes(&'a mut Lanes),
}

/// Sends `f(r)` for each row `r` of the block to the sink; `tmp` is scratch of the block's
/// length.
#[inline(always)]
fn sink(s: Sink, n: usize, tmp: &mut [f64], f: impl Fn(usize) -> f64) {
    match s {
        Sink::Store(o) => {
            for (r, x) in o[..n].iter_mut().enumerate() {
                *x = f(r);
            }
        }
        Sink::Add(o) => {
            for (r, x) in o[..n].iter_mut().enumerate() {
                *x += f(r);
            }
        }
        Sink::Lanes(l) => {
            // Into scratch, then into the lanes: two loops the compiler vectorises.
            let t = &mut tmp[..n];
            for (r, x) in t.iter_mut().enumerate() {
                *x = f(r);
            }
            add_lanes(l, t);
        }
    }
}

/// Adds `x[r]` to lane `r mod LANES` (a block starts at a multiple of [`LANES`]).
#[inline(always)]
fn add_lanes(l: &mut Lanes, x: &[f64]) {
    let mut acc = *l;
    let mut chunks = x.chunks_exact(LANES);
    for c in &mut chunks {
        for i in 0..LANES {
            acc[i] += c[i];
        }
    }
    for (i, &y) in chunks.remainder().iter().enumerate() {
        acc[i] += y;
    }
    *l = acc;
}

/// Whether `x * (1/d)` may stand for `x / d`: the reciprocal is a normal number (so it is
/// within half an ulp), or `d` is zero, infinite or NaN (where the two agree exactly).
#[inline(always)]
fn reciprocal_ok(d: f64) -> bool {
    let r = 1.0 / d;
    r.is_normal() || !d.is_finite() || d == 0.0
}

#[inline(always)]
fn map1(a: Src, out: &mut [f64], f: impl Fn(f64) -> f64) {
    match a {
        Src::Col(x) => {
            for (o, &x) in out.iter_mut().zip(x) {
                *o = f(x);
            }
        }
        Src::Val(x) => out.fill(f(x)),
    }
}

#[inline(always)]
fn map2(a: Src, b: Src, out: &mut [f64], f: impl Fn(f64, f64) -> f64) {
    match (a, b) {
        (Src::Col(x), Src::Col(y)) => {
            for ((o, &x), &y) in out.iter_mut().zip(x).zip(y) {
                *o = f(x, y);
            }
        }
        (Src::Col(x), Src::Val(y)) => {
            for (o, &x) in out.iter_mut().zip(x) {
                *o = f(x, y);
            }
        }
        (Src::Val(x), Src::Col(y)) => {
            for (o, &y) in out.iter_mut().zip(y) {
                *o = f(x, y);
            }
        }
        (Src::Val(x), Src::Val(y)) => out.fill(f(x, y)),
    }
}

/// One instruction over a block of rows. In gradient mode sine and cosine also leave their
/// derivative in `aux`.
#[inline(never)]
fn col_forward<const GRAD: bool>(op: COp, a: Src, b: Src, out: &mut [f64], aux: &mut [f64]) {
    match op {
        COp::Bin(Binary::Add) => map2(a, b, out, |x, y| x + y),
        COp::Bin(Binary::Sub) => map2(a, b, out, |x, y| x - y),
        COp::Bin(Binary::Mul) => map2(a, b, out, |x, y| x * y),
        COp::Bin(Binary::Div) => match b {
            Src::Val(d) if reciprocal_ok(d) => map2(a, Src::Val(1.0 / d), out, |x, r| x * r),
            _ => map2(a, b, out, |x, y| x / y),
        },
        COp::Bin(Binary::Pow) => map2(a, b, out, maths::pow),
        COp::Bin(op) => map2(a, b, out, |x, y| op.apply(x, y)),
        COp::Un(Unary::Neg) => map1(a, out, |x| -x),
        COp::Un(Unary::Abs) => map1(a, out, f64::abs),
        COp::Un(Unary::Exp) => map1(a, out, maths::exp),
        COp::Un(Unary::Log) => map1(a, out, maths::ln),
        COp::Un(u @ (Unary::Sin | Unary::Cos)) if GRAD => {
            for (r, (o, d)) in out.iter_mut().zip(aux.iter_mut()).enumerate() {
                let (s, c) = libm::sincos(a.at(r));
                (*o, *d) = if u == Unary::Sin { (s, c) } else { (c, -s) };
            }
        }
        COp::Un(u) => map1(a, out, |x| u.apply(x)),
        COp::Square => map1(a, out, |x| x * x),
        COp::PowI(n) => map1(a, out, |x| powi_small(x, n)),
        COp::PowC(c) => map1(a, out, |x| maths::pow(x, c)),
    }
}

/// A zero adjoint passes nothing on, even through an infinite or NaN derivative.
#[inline(always)]
fn mask(g: f64, d: f64) -> f64 {
    if g == 0.0 {
        0.0
    } else {
        g * d
    }
}

/// Sends operand `w`'s share of the adjoint `g` of one instruction (operands `a`, `b`, value
/// `v`, auxiliary column `aux`) to its sink. Each kind of derivative is a small function of
/// its own (`drive_*`), so that the compiler inlines its arithmetic into the row loops.
#[allow(clippy::too_many_arguments)]
#[inline(never)]
fn col_partial(
    op: COp,
    w: usize,
    g: Src,
    a: Src,
    b: Src,
    v: &[f64],
    aux: &[f64],
    s: Sink,
    tmp: &mut [f64],
) {
    let n = v.len();
    let vs = Src::Col(v);
    match (op, w) {
        (COp::Bin(Binary::Add), _) | (COp::Bin(Binary::Sub), 0) => drive_g(s, n, tmp, g, |g| g),
        (COp::Bin(Binary::Sub), _) | (COp::Un(Unary::Neg), _) => drive_g(s, n, tmp, g, |g| -g),
        (COp::Bin(Binary::Mul), 0) => drive_ga(s, n, tmp, g, b, mask),
        (COp::Bin(Binary::Mul), _) => drive_ga(s, n, tmp, g, a, mask),
        (COp::Bin(Binary::Div), w) => match b {
            // A divisor the same on every row is applied as its reciprocal, as in
            // `col_forward`.
            Src::Val(d) if reciprocal_ok(d) => {
                let q = 1.0 / d;
                if w == 0 {
                    drive_g(s, n, tmp, g, move |g| mask(g, q))
                } else {
                    drive_ga(s, n, tmp, g, vs, move |g, v| mask(g, -v * q))
                }
            }
            _ if w == 0 => drive_ga(s, n, tmp, g, b, |g, b| mask(g, 1.0 / b)),
            _ => drive_gab(s, n, tmp, g, vs, b, |g, v, b| mask(g, -v / b)),
        },
        (COp::Bin(op), w) => {
            let k = move |g: f64, x: f64, y: f64, v: f64| {
                let (da, db) = op.derivatives(x, y, v);
                mask(g, if w == 0 { da } else { db })
            };
            drive_gabv(s, n, tmp, g, a, b, vs, k)
        }
        (COp::Un(Unary::Sin | Unary::Cos), _) => drive_ga(s, n, tmp, g, Src::Col(aux), mask),
        (COp::Un(Unary::Exp), _) => drive_ga(s, n, tmp, g, vs, mask),
        (COp::Un(u), _) => drive_gab(s, n, tmp, g, a, vs, move |g, x, v| {
            mask(g, u.derivative(x, v))
        }),
        (COp::Square, _) => drive_ga(s, n, tmp, g, a, |g, x| mask(g, 2.0 * x)),
        (COp::PowI(k), _) => drive_ga(s, n, tmp, g, a, move |g, x| {
            let d = match k {
                0 => 0.0,
                1 => 1.0,
                2 => 2.0 * x,
                _ => k as f64 * powi_small(x, k - 1),
            };
            mask(g, d)
        }),
        (COp::PowC(c), _) => drive_ga(s, n, tmp, g, a, move |g, x| {
            mask(g, c * maths::pow(x, c - 1.0))
        }),
    }
}

/// A row loop over `n` rows reading one operand: `f(r)` from a column or a value.
macro_rules! reader {
    ($src:expr, $n:expr, |$f:ident| $body:expr) => {
        match $src {
            Src::Col(c) => {
                let c = &c[..$n];
                let $f = move |r: usize| c[r];
                $body
            }
            Src::Val(x) => {
                let $f = move |_: usize| x;
                $body
            }
        }
    };
}

/// The contribution `k(g)` of every row.
#[inline(never)]
fn drive_g(s: Sink, n: usize, tmp: &mut [f64], g: Src, k: impl Fn(f64) -> f64 + Copy) {
    reader!(g, n, |gf| sink(s, n, tmp, move |r| k(gf(r))))
}

/// The contribution `k(g, x)` of every row.
#[inline(never)]
fn drive_ga(
    s: Sink,
    n: usize,
    tmp: &mut [f64],
    g: Src,
    x: Src,
    k: impl Fn(f64, f64) -> f64 + Copy,
) {
    reader!(g, n, |gf| reader!(x, n, |xf| sink(s, n, tmp, move |r| k(
        gf(r),
        xf(r)
    ))))
}

/// The contribution `k(g, x, y)` of every row.
#[allow(clippy::too_many_arguments)]
#[inline(never)]
fn drive_gab(
    s: Sink,
    n: usize,
    tmp: &mut [f64],
    g: Src,
    x: Src,
    y: Src,
    k: impl Fn(f64, f64, f64) -> f64 + Copy,
) {
    reader!(g, n, |gf| reader!(x, n, |xf| reader!(y, n, |yf| sink(
        s,
        n,
        tmp,
        move |r| k(gf(r), xf(r), yf(r))
    ))))
}

/// The contribution `k(g, x, y, v)` of every row (`v` a column).
#[allow(clippy::too_many_arguments)]
#[inline(never)]
fn drive_gabv(
    s: Sink,
    n: usize,
    tmp: &mut [f64],
    g: Src,
    x: Src,
    y: Src,
    v: Src,
    k: impl Fn(f64, f64, f64, f64) -> f64 + Copy,
) {
    let v = match v {
        Src::Col(v) => &v[..n],
        Src::Val(_) => &[][..],
    };
    reader!(g, n, |gf| reader!(x, n, |xf| reader!(y, n, |yf| sink(
        s,
        n,
        tmp,
        move |r| k(gf(r), xf(r), yf(r), v[r])
    ))))
}
