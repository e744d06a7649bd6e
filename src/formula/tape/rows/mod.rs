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

use super::compile::{small_integer, SegBuilder};
use super::eval::{forward, powi_small, reverse};
use super::{exact_reciprocal, Flags, Segment, CONST_TAG};
use crate::common::maths::{self, powi, Binary, Unary};
use crate::formula::resolve::{Node, NodeId};
use std::collections::HashMap;

mod run;

use run::{Lanes, LANES};

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
            Node::Var(_) | Node::Data(_) | Node::Sum(..) => Arg::Const(f64::NAN),
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
    /// A support test on a row-invariant condition `b`: Σ where(b, v) = where(b, Σ v).
    Where(Binary, NodeId),
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
        Node::Binary(op @ (Binary::WherePos | Binary::WhereNonNeg), c, v) if ctx.is_inv(c) => {
            factors.push(Factor::Where(op, c));
            split(ctx, v, neg, factors, out);
            factors.pop();
        }
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
            let (Factor::Mul(b)
            | Factor::Div(b)
            | Factor::MulPow(b, _)
            | Factor::DivPow(b, _)
            | Factor::Where(_, b)) = *f;
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
                Factor::Where(op, c) => {
                    // Outside the support the term is −∞, the total is not finite, and the
                    // body as written (which tests every row) gives the value.
                    let s = value_of(&mut cb, ctx, c);
                    cb.binary(op, s, x)
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
