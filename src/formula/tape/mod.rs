//! checked formula → compiled tape with exact gradients.
//!
//! Owns: the flat instruction tape a [`Graph`] compiles to, and [`Evaluator`], which computes a
//! formula's value and its gradient by reverse-mode differentiation with no allocation per
//! call. Outside sums the tape is a list of single-level instructions: specialised for constant
//! operands, for integer powers (of an operand shifted by a constant too) and for one-argument
//! functions of a scaled operand; chains of additions of terms (scaled slots, products, shifted
//! squares, constants) and chains of log-add-exps fused into one instruction each. Every fused
//! or specialised instruction performs the operations it replaces, in the same order (a
//! negated chain `-(a + b)` as `(-a) + (-b)`, the same up to the sign of a zero result), except
//! the log-sum-exp of three or more finite arguments, computed as `m + log1p(Σ e^(x_i - m))`.
//! In gradient mode the forward pass keeps what the reverse pass needs (the cosine beside a
//! sine, a power's derivative, the weights of a log-sum-exp). Each `sum(…)` compiles to a row
//! loop (`tape/rows.rs`) evaluated column by column over blocks of data rows; parts of its body
//! that do not depend on the row are computed once outside the loop, parts that depend only on
//! data are precomputed into columns at compile time, and row-invariant terms, factors and
//! divisors are pulled out of the sum where that is exact algebra (with the body as written as
//! the fallback wherever the factored form might not give the same number).
//! Must not: know what the formula means (energy or log density, bounds, mixtures): that is
//! `target`.

use crate::common::maths::{self, powi, Binary, Unary};
use crate::formula::resolve::{Graph, Node, NodeId};
use std::collections::HashMap;
use std::sync::Arc;

mod compile;
mod eval;
mod rows;

use compile::{
    data_only_values, formula_work, node_flags, row_set, Compiler, Replacement, SegBuilder,
};
pub use eval::Evaluator;
use rows::RowLoop;

/// One instruction; its result goes to the slot after the previous instruction's. Operands
/// are slots (`u32`) or constants (`f64`) carried in the instruction.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Op {
    Add(u32, u32),
    Sub(u32, u32),
    Mul(u32, u32),
    Div(u32, u32),
    /// `a + c` (also `a - c` with `c` negated, which is the same operation in IEEE arithmetic).
    AddC(u32, f64),
    /// `a * c` (also `a / c` when `1/c` is exact, which then gives the same bits).
    MulC(u32, f64),
    /// `a / c`.
    DivC(u32, f64),
    /// `c - a`.
    CSub(f64, u32),
    /// `c / a`.
    CDiv(f64, u32),
    /// `a * a` (what `powi(a, 2)` computes).
    Square(u32),
    /// `a^n` for a small integer constant `n`, by repeated squaring.
    PowI(u32, i32),
    /// `(a + m)^n` for a small integer `n` other than 0 and 1: a power of an operand shifted by
    /// a constant, in an addition or subtraction used nowhere else.
    ShiftPowI(u32, i8, f64),
    /// `a^c` for any other constant `c`.
    PowC(u32, f64),
    Pow(u32, u32),
    Neg(u32),
    Exp(u32),
    Log(u32),
    Log1p(u32),
    Expm1(u32),
    Sqrt(u32),
    Abs(u32),
    Sin(u32),
    Cos(u32),
    Tan(u32),
    Asin(u32),
    Acos(u32),
    Atan(u32),
    Sinh(u32),
    Cosh(u32),
    Tanh(u32),
    Erf(u32),
    Lgamma(u32),
    Atan2(u32, u32),
    Min(u32, u32),
    Max(u32, u32),
    LogAddExp(u32, u32),
    /// `t_0 + t_1 + …`, added left to right, over the segment's `terms[start..start+len]`: a
    /// fused chain of additions and subtractions of [`Term`]s (the same operations in the same
    /// order, so the same bits).
    LinComb(u32, u32),
    /// `log(e^x_0 + e^x_1 + …)` over the segment's `args[start..start+len]`: a chain of
    /// log-add-exps (what `logsumexp` with three or more arguments checks to) whose inner links
    /// are used nowhere else. With every argument finite it is computed as
    /// `m + log1p(Σ e^(x_i - m))` (m the largest, left out of the sum), whose exponentials do not
    /// wait for each other; otherwise as the chain, which defines the infinite and NaN cases.
    LogSumExp(u32, u32),
    /// `f(a · c)`: a one-argument function of a scaled operand that is used nowhere else
    /// (`cos(x/2)`, `exp(-x)`), the product computed as its own instruction would.
    ScaledUn(Unary, u32, f64),
    /// The value of row loop number `k`.
    Sum(u32),
    /// Any other one-argument function (`apply` and `derivative` of [`Unary`]).
    Un(Unary, u32),
    /// Any other two-argument operation (`apply` and `derivatives` of [`Binary`]).
    Bin(Binary, u32, u32),
}

impl Op {
    fn unary(op: Unary, a: u32) -> Op {
        match op {
            Unary::Neg => Op::Neg(a),
            Unary::Exp => Op::Exp(a),
            Unary::Log => Op::Log(a),
            Unary::Log1p => Op::Log1p(a),
            Unary::Expm1 => Op::Expm1(a),
            Unary::Sqrt => Op::Sqrt(a),
            Unary::Abs => Op::Abs(a),
            Unary::Sin => Op::Sin(a),
            Unary::Cos => Op::Cos(a),
            Unary::Tan => Op::Tan(a),
            Unary::Asin => Op::Asin(a),
            Unary::Acos => Op::Acos(a),
            Unary::Atan => Op::Atan(a),
            Unary::Sinh => Op::Sinh(a),
            Unary::Cosh => Op::Cosh(a),
            Unary::Tanh => Op::Tanh(a),
            Unary::Erf => Op::Erf(a),
            Unary::Lgamma => Op::Lgamma(a),
            Unary::Softplus | Unary::LogI0e => Op::Un(op, a),
        }
    }

    /// The same instruction with every slot operand mapped by `f`.
    fn map_slots(self, f: impl Fn(u32) -> u32) -> Op {
        match self {
            Op::Add(a, b) => Op::Add(f(a), f(b)),
            Op::Sub(a, b) => Op::Sub(f(a), f(b)),
            Op::Mul(a, b) => Op::Mul(f(a), f(b)),
            Op::Div(a, b) => Op::Div(f(a), f(b)),
            Op::AddC(a, c) => Op::AddC(f(a), c),
            Op::MulC(a, c) => Op::MulC(f(a), c),
            Op::DivC(a, c) => Op::DivC(f(a), c),
            Op::CSub(c, a) => Op::CSub(c, f(a)),
            Op::CDiv(c, a) => Op::CDiv(c, f(a)),
            Op::Square(a) => Op::Square(f(a)),
            Op::PowI(a, n) => Op::PowI(f(a), n),
            Op::ShiftPowI(a, n, m) => Op::ShiftPowI(f(a), n, m),
            Op::PowC(a, c) => Op::PowC(f(a), c),
            Op::Pow(a, b) => Op::Pow(f(a), f(b)),
            Op::Neg(a) => Op::Neg(f(a)),
            Op::Exp(a) => Op::Exp(f(a)),
            Op::Log(a) => Op::Log(f(a)),
            Op::Log1p(a) => Op::Log1p(f(a)),
            Op::Expm1(a) => Op::Expm1(f(a)),
            Op::Sqrt(a) => Op::Sqrt(f(a)),
            Op::Abs(a) => Op::Abs(f(a)),
            Op::Sin(a) => Op::Sin(f(a)),
            Op::Cos(a) => Op::Cos(f(a)),
            Op::Tan(a) => Op::Tan(f(a)),
            Op::Asin(a) => Op::Asin(f(a)),
            Op::Acos(a) => Op::Acos(f(a)),
            Op::Atan(a) => Op::Atan(f(a)),
            Op::Sinh(a) => Op::Sinh(f(a)),
            Op::Cosh(a) => Op::Cosh(f(a)),
            Op::Tanh(a) => Op::Tanh(f(a)),
            Op::Erf(a) => Op::Erf(f(a)),
            Op::Lgamma(a) => Op::Lgamma(f(a)),
            Op::Atan2(a, b) => Op::Atan2(f(a), f(b)),
            Op::Min(a, b) => Op::Min(f(a), f(b)),
            Op::Max(a, b) => Op::Max(f(a), f(b)),
            Op::LogAddExp(a, b) => Op::LogAddExp(f(a), f(b)),
            Op::LinComb(s, n) => Op::LinComb(s, n),
            Op::LogSumExp(s, n) => Op::LogSumExp(s, n),
            Op::ScaledUn(u, a, c) => Op::ScaledUn(u, f(a), c),
            Op::Sum(k) => Op::Sum(k),
            Op::Un(u, a) => Op::Un(u, f(a)),
            Op::Bin(op, a, b) => Op::Bin(op, f(a), f(b)),
        }
    }
}

/// One term of a `LinComb`, with the operations of the instructions it replaces.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Term {
    /// The constant `c` (a constant added in the chain; `c · 1` before fusing).
    Const(f64),
    /// `c · x`.
    Lin(f64, u32),
    /// `c · (x · y)`, `c` = ±1.
    Prod(f64, u32, u32),
    /// `c · ((x + m) · (x + m))`: the square of an operand shifted by a constant.
    Sq(f64, u32, f64),
}

impl Term {
    fn map_slots(self, f: impl Fn(u32) -> u32) -> Term {
        match self {
            Term::Const(c) => Term::Const(c),
            Term::Lin(c, x) => Term::Lin(c, f(x)),
            Term::Prod(c, x, y) => Term::Prod(c, f(x), f(y)),
            Term::Sq(c, x, m) => Term::Sq(c, f(x), m),
        }
    }
}

/// `Some(1/c)` when multiplying by it gives exactly what dividing by `c` gives: `c` a power of
/// two whose reciprocal is representable (both results are the correctly rounded `x/c`).
fn exact_reciprocal(c: f64) -> Option<f64> {
    let mantissa = c.to_bits() & ((1u64 << 52) - 1);
    let r = 1.0 / c;
    (c.is_normal() && mantissa == 0 && r.is_finite() && r != 0.0 && 1.0 / r == c).then_some(r)
}

/// One straight-line program. Slots: constants, then inputs, then one per instruction.
#[derive(Clone, Debug, Default)]
struct Segment {
    init: Vec<f64>,
    first_input: usize,
    n_inputs: usize,
    code: Vec<Op>,
    /// The terms of the `LinComb` instructions.
    terms: Vec<Term>,
    /// The argument slots of the `LogSumExp` instructions.
    args: Vec<u32>,
    root: u32,
    /// Whether the reverse pass may add to a constant's adjoint (an instruction reads a
    /// constant slot); if not, those adjoints stay zero without being cleared.
    const_adjoints: bool,
    /// One less than the length of the value, adjoint and auxiliary arrays: the number of
    /// slots rounded up to a power of two. Every slot is below it, so `slot & mask` is the slot,
    /// and indexing with it into a slice of length `mask + 1` needs no bounds check.
    mask: usize,
}

impl Segment {
    fn first_code(&self) -> usize {
        self.first_input + self.n_inputs
    }
    /// Fresh value slots: constants in place, the rest zero.
    fn new_vals(&self) -> Vec<f64> {
        let mut v = self.init.clone();
        v.resize(self.mask + 1, 0.0);
        v
    }
    /// Zeroes the adjoints of the inputs and constants (after `reverse`, all are then zero).
    fn clear_leaves(&self, adj: &mut [f64]) {
        self.clear_constants(adj);
        let adj = &mut adj[..=self.mask];
        for i in self.first_input..self.first_code() {
            // Masked like every slot (a no-op): a few plain stores rather than a call.
            adj[i & self.mask] = 0.0;
        }
    }
    /// Zeroes the adjoints of the constants, if any instruction adds to them.
    fn clear_constants(&self, adj: &mut [f64]) {
        if self.const_adjoints {
            let adj = &mut adj[..=self.mask];
            for i in 0..self.first_input {
                adj[i & self.mask] = 0.0;
            }
        }
    }
    /// Fresh adjoint slots.
    fn new_zeros(&self) -> Vec<f64> {
        vec![0.0; self.mask + 1]
    }
    /// Fresh auxiliary slots: one per slot, then one per `LogSumExp` argument.
    fn new_aux(&self) -> Vec<f64> {
        vec![0.0; self.mask + 1 + self.args.len()]
    }
}

// While building, slots are tagged by kind and renumbered in `finish`.
const CONST_TAG: u32 = 1 << 31;
const INPUT_TAG: u32 = 1 << 30;
const MASK: u32 = INPUT_TAG - 1;

/// A compiled formula over `n_vars` unknowns.
#[derive(Clone, Debug)]
pub struct Tape {
    n_vars: usize,
    outer: Segment,
    loops: Vec<RowLoop>,
    work: usize,
}

#[derive(Clone, Copy, Default)]
struct Flags {
    var: bool,
    data: bool,
}

/// Data columns of the formula: `columns[c][row]`.
pub struct DataTable<'a> {
    pub columns: &'a [Vec<f64>],
    pub rows: usize,
}

impl<'a> DataTable<'a> {
    /// A table of equally long columns (no columns: no rows).
    pub fn of(columns: &'a [Vec<f64>]) -> DataTable<'a> {
        DataTable {
            columns,
            rows: columns.first().map_or(0, |c| c.len()),
        }
    }
}

impl Tape {
    /// Compiles a checked formula. `data` holds the spec's columns in the order `resolve` used.
    pub fn compile(graph: &Graph, n_vars: usize, data: &DataTable) -> Tape {
        let nodes = &graph.nodes;
        let flags = node_flags(nodes);
        let mut uses = vec![0u32; nodes.len()];
        for n in nodes {
            match *n {
                Node::Unary(_, a) | Node::Sum(a, _) => uses[a as usize] += 1,
                Node::Binary(_, a, b) => {
                    uses[a as usize] += 1;
                    uses[b as usize] += 1;
                }
                Node::Const(_) | Node::Var(_) | Node::Data(_) => {}
            }
        }
        uses[graph.root as usize] += 1;
        let mut c = Compiler {
            nodes,
            flags,
            uses,
            data,
            row_sets: &graph.row_sets,
            data_only: HashMap::new(),
            replaced: HashMap::new(),
            slot_of: HashMap::new(),
            seg: SegBuilder::new(n_vars),
            loops: Vec::new(),
        };
        // Sums whose body is constant or row-independent become ordinary values.
        for (i, n) in nodes.iter().enumerate() {
            if let Node::Sum(b, set) = *n {
                let f = c.flags[b as usize];
                let rows = row_set(&graph.row_sets, set);
                if !f.var {
                    let total = data_only_values(nodes, data, &mut c.data_only, b, set, rows)
                        .iter()
                        .sum();
                    c.replaced.insert(i as NodeId, Replacement::Const(total));
                } else if !f.data {
                    let n = rows.map_or(data.rows, |r| r.len());
                    c.replaced
                        .insert(i as NodeId, Replacement::Times(n as f64, b));
                }
            }
        }
        for (i, n) in nodes.iter().enumerate() {
            if let Node::Var(v) = *n {
                if (v as usize) < n_vars {
                    let s = c.seg.input(v as usize);
                    c.slot_of.insert(i as NodeId, s);
                }
            }
        }
        let root = c.emit(graph.root);
        let work = formula_work(nodes, &c.flags, graph.root, data.rows, &graph.row_sets);
        let mut loops = c.loops;
        let outer = c.seg.finish(root, &mut loops);
        Tape {
            n_vars,
            outer,
            loops,
            work,
        }
    }

    pub fn n_vars(&self) -> usize {
        self.n_vars
    }

    /// Operations per evaluation of the formula as written (each data row of a sum counted),
    /// a cost measure: one per function or operator application of the checked formula,
    /// independent of how the tape fuses or factors them.
    pub fn work_per_call(&self) -> usize {
        self.work
    }
}

#[cfg(test)]
mod tests;
