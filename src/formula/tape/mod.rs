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

mod rows;
use rows::{LoopScratch, RowLoop};

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

/// Builds a [`Segment`], choosing the specialised instruction for constant operands.
struct SegBuilder {
    init: Vec<f64>,
    consts: HashMap<u64, u32>,
    n_inputs: usize,
    code: Vec<Op>,
    terms: Vec<Term>,
    args: Vec<u32>,
}

impl SegBuilder {
    fn new(n_inputs: usize) -> SegBuilder {
        SegBuilder {
            init: Vec::new(),
            consts: HashMap::new(),
            n_inputs,
            code: Vec::new(),
            terms: Vec::new(),
            args: Vec::new(),
        }
    }

    fn konst(&mut self, v: f64) -> u32 {
        if let Some(&s) = self.consts.get(&v.to_bits()) {
            return s | CONST_TAG;
        }
        let s = self.init.len() as u32;
        self.init.push(v);
        self.consts.insert(v.to_bits(), s);
        s | CONST_TAG
    }

    fn input(&self, i: usize) -> u32 {
        i as u32 | INPUT_TAG
    }

    fn const_value(&self, s: u32) -> Option<f64> {
        (s & CONST_TAG != 0).then(|| self.init[(s & MASK) as usize])
    }

    fn push(&mut self, op: Op) -> u32 {
        self.code.push(op);
        (self.code.len() - 1) as u32
    }

    fn unary(&mut self, op: Unary, a: u32) -> u32 {
        self.push(Op::unary(op, a))
    }

    fn binary(&mut self, op: Binary, a: u32, b: u32) -> u32 {
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

    fn log_sum_exp(&mut self, args: &[u32]) -> u32 {
        let start = self.args.len() as u32;
        self.args.extend_from_slice(args);
        self.push(Op::LogSumExp(start, args.len() as u32))
    }

    fn lin_comb(&mut self, terms: &[Term]) -> u32 {
        let start = self.terms.len() as u32;
        self.terms.extend_from_slice(terms);
        self.push(Op::LinComb(start, terms.len() as u32))
    }

    /// The final number of a tagged slot (valid once nothing more is added).
    fn slot_fixer(&self) -> impl Fn(u32) -> u32 {
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
    fn finish(self, root: u32, loops: &mut [RowLoop]) -> Segment {
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

fn generic(op: Binary, a: u32, b: u32) -> Op {
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
    }
}

/// A term of a chain of additions while compiling (nodes not yet emitted).
#[derive(Clone, Copy, Debug)]
enum ChainTerm {
    /// coefficient · node (`None`: the constant one).
    Lin(f64, Option<NodeId>),
    Prod(f64, NodeId, NodeId),
    Sq(f64, NodeId, f64),
}

/// Fuse a chain of additions into one instruction when it absorbs at least this many.
const MIN_FUSED: usize = 3;

/// Constant exponents that are computed by repeated squaring.
fn small_integer(c: f64) -> Option<i32> {
    (c == c.trunc() && c.abs() <= 64.0).then_some(c as i32)
}

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

enum Replacement {
    Const(f64),
    Times(f64, NodeId),
}

/// Compiles the part of a graph outside sums, and builds the row loops of its sums.
struct Compiler<'a> {
    nodes: &'a [Node],
    flags: Vec<Flags>,
    /// Number of parents of each node (its uses), the root counted once.
    uses: Vec<u32>,
    data: &'a DataTable<'a>,
    data_only: HashMap<NodeId, Vec<f64>>,
    replaced: HashMap<NodeId, Replacement>,
    slot_of: HashMap<NodeId, u32>,
    seg: SegBuilder,
    loops: Vec<RowLoop>,
}

impl Tape {
    /// Compiles a checked formula. `data` holds the spec's columns in the order `resolve` used.
    pub fn compile(graph: &Graph, n_vars: usize, data: &DataTable) -> Tape {
        let nodes = &graph.nodes;
        let flags = node_flags(nodes);
        let mut uses = vec![0u32; nodes.len()];
        for n in nodes {
            match *n {
                Node::Unary(_, a) | Node::Sum(a) => uses[a as usize] += 1,
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
            data_only: HashMap::new(),
            replaced: HashMap::new(),
            slot_of: HashMap::new(),
            seg: SegBuilder::new(n_vars),
            loops: Vec::new(),
        };
        // Sums whose body is constant or row-independent become ordinary values.
        for (i, n) in nodes.iter().enumerate() {
            if let Node::Sum(b) = *n {
                let f = c.flags[b as usize];
                if !f.var {
                    let total = data_only_values(nodes, data, &mut c.data_only, b)
                        .iter()
                        .sum();
                    c.replaced.insert(i as NodeId, Replacement::Const(total));
                } else if !f.data {
                    c.replaced
                        .insert(i as NodeId, Replacement::Times(data.rows as f64, b));
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
        let work = formula_work(nodes, &c.flags, graph.root, data.rows);
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

fn node_flags(nodes: &[Node]) -> Vec<Flags> {
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
            Node::Sum(b) => Flags {
                var: flags[b as usize].var,
                data: false,
            },
        };
    }
    flags
}

/// The work measure: operations outside sums once, a row body's operations once per row; a
/// sum of a constant body costs nothing, a sum of a row-independent body one multiplication.
fn formula_work(nodes: &[Node], flags: &[Flags], root: NodeId, rows: usize) -> usize {
    fn row_ops(id: NodeId, nodes: &[Node], flags: &[Flags], seen: &mut Vec<bool>) -> usize {
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
    fn invariants(
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
            Node::Sum(b) => {
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
    fn constant(&self, id: NodeId) -> Option<f64> {
        match self.nodes[id as usize] {
            Node::Const(c) => Some(c),
            _ => None,
        }
    }

    fn fusable(&self, id: NodeId) -> bool {
        self.uses[id as usize] == 1
            && !self.slot_of.contains_key(&id)
            && !self.replaced.contains_key(&id)
    }

    /// A chain `((t0 ± t1) ± t2) ± …` of additions and subtractions rooted at `id` whose inner
    /// additions and terms are used nowhere else, as terms; `None` when fusing would not save an
    /// instruction.
    fn chain(&self, id: NodeId) -> Option<Vec<ChainTerm>> {
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
    fn term(&self, id: NodeId, sign: f64, absorbed: &mut usize) -> ChainTerm {
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
    fn scaled(&self, x: NodeId, coef: f64, absorbed: &mut usize) -> ChainTerm {
        if self.fusable(x) {
            if let Some(t) = self.square(x, coef, absorbed) {
                return t;
            }
        }
        ChainTerm::Lin(coef, Some(x))
    }

    /// `coef · (x + m)^2` when `id` is a square (exponent 2) of an operand, shifted by a
    /// constant in an addition or subtraction used only here.
    fn square(&self, id: NodeId, coef: f64, absorbed: &mut usize) -> Option<ChainTerm> {
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
    fn emit_chain(&mut self, terms: &[ChainTerm], scale: f64) -> u32 {
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
    fn shifted_power(&self, base: NodeId, e: NodeId) -> Option<(NodeId, f64, i8)> {
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
    fn negated(&self, a: NodeId, b: NodeId, op: Binary) -> Option<(NodeId, NodeId, Binary)> {
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
    fn lse_chain(&self, id: NodeId) -> Vec<NodeId> {
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
    fn scaled_operand(&self, a: NodeId) -> Option<(NodeId, f64)> {
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

    fn emit(&mut self, id: NodeId) -> u32 {
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
            (None, Node::Sum(body)) => {
                let (nodes, data, flags) = (self.nodes, self.data, &self.flags);
                let cache = &mut self.data_only;
                let mut values = |n: NodeId| data_only_values(nodes, data, cache, n);
                let (mut lp, invariants) =
                    RowLoop::build(nodes, flags, body, data.rows, &mut values);
                lp.inputs = invariants.iter().map(|&n| self.emit(n)).collect();
                self.loops.push(lp);
                self.seg.push(Op::Sum((self.loops.len() - 1) as u32))
            }
        };
        self.slot_of.insert(id, slot);
        slot
    }
}

/// Values of a data-only node over every row (memoised in `cache`).
fn data_only_values(
    nodes: &[Node],
    data: &DataTable,
    cache: &mut HashMap<NodeId, Vec<f64>>,
    id: NodeId,
) -> Vec<f64> {
    if let Some(v) = cache.get(&id) {
        return v.clone();
    }
    let mut out = Vec::with_capacity(data.rows);
    let mut memo: HashMap<NodeId, f64> = HashMap::new();
    for row in 0..data.rows {
        memo.clear();
        out.push(eval_row(nodes, id, data, row, &mut memo));
    }
    cache.insert(id, out.clone());
    out
}

fn eval_row(
    nodes: &[Node],
    id: NodeId,
    data: &DataTable,
    row: usize,
    memo: &mut HashMap<NodeId, f64>,
) -> f64 {
    if let Some(&v) = memo.get(&id) {
        return v;
    }
    let v = match nodes[id as usize] {
        Node::Const(c) => c,
        Node::Data(c) => data.columns[c as usize][row],
        Node::Unary(op, a) => op.apply(eval_row(nodes, a, data, row, memo)),
        Node::Binary(op, a, b) => {
            let x = eval_row(nodes, a, data, row, memo);
            let y = eval_row(nodes, b, data, row, memo);
            op.apply(x, y)
        }
        // `resolve` guarantees data-only nodes contain no unknowns and no nested sums.
        Node::Var(_) | Node::Sum(_) => f64::NAN,
    };
    memo.insert(id, v);
    v
}

/// `log_add_exp(a, b)`, and in gradient mode the weight `e^-|a-b|` its derivatives need
/// (NaN where the value is infinite and the derivatives take the general route).
#[inline(always)]
fn log_add_exp_aux(a: f64, b: f64) -> (f64, f64) {
    // The steps of `maths::log_add_exp`, so value and gradient modes give the same bits.
    let m = a.max(b);
    if m.is_infinite() {
        return (m, f64::NAN);
    }
    let e = maths::exp(-(a - b).abs());
    (m + maths::ln_1p(e), e)
}

/// The chain `log_add_exp(log_add_exp(x0, x1), x2)…` of the values in order.
fn lae_fold(mut xs: impl Iterator<Item = f64>) -> f64 {
    let first = xs.next().unwrap_or(f64::NEG_INFINITY);
    xs.fold(first, maths::log_add_exp)
}

/// Runs a segment forward. In gradient mode (`GRAD`) it also fills `aux` with what the
/// reverse pass reuses; `sum(k, vals)` evaluates row loop `k` given the slots computed so far.
#[inline(always)]
fn forward<const GRAD: bool>(
    seg: &Segment,
    vals: &mut [f64],
    aux: &mut [f64],
    mut sum: impl FnMut(usize, &[f64]) -> f64,
) {
    let first = seg.first_code();
    let mask = seg.mask;
    let vals = &mut vals[..=mask];
    let (aux, wts) = aux.split_at_mut(mask + 1);
    for (k, op) in seg.code.iter().enumerate() {
        let o = (first + k) & mask;
        let v = |s: u32| vals[s as usize & mask];
        let out = match *op {
            Op::Add(a, b) => v(a) + v(b),
            Op::Sub(a, b) => v(a) - v(b),
            Op::Mul(a, b) => v(a) * v(b),
            Op::Div(a, b) => v(a) / v(b),
            Op::AddC(a, c) => v(a) + c,
            Op::MulC(a, c) => v(a) * c,
            Op::DivC(a, c) => v(a) / c,
            Op::CSub(c, a) => c - v(a),
            Op::CDiv(c, a) => c / v(a),
            Op::Square(a) => {
                let x = v(a);
                x * x
            }
            Op::PowI(a, n) => {
                let (p, slope) = powi_with_slope(v(a), n);
                if GRAD {
                    // The derivative, computed beside the power rather than after it.
                    aux[o] = slope;
                }
                p
            }
            Op::ShiftPowI(a, n, m) => {
                let (p, slope) = powi_with_slope(v(a) + m, n as i32);
                if GRAD {
                    aux[o] = slope;
                }
                p
            }
            Op::PowC(a, c) => maths::pow(v(a), c),
            Op::Pow(a, b) => maths::pow(v(a), v(b)),
            Op::Neg(a) => -v(a),
            Op::Exp(a) => maths::exp(v(a)),
            Op::Log(a) => maths::ln(v(a)),
            Op::Log1p(a) => maths::ln_1p(v(a)),
            Op::Expm1(a) => maths::exp_m1(v(a)),
            Op::Sqrt(a) => maths::sqrt(v(a)),
            Op::Abs(a) => v(a).abs(),
            Op::Sin(a) => {
                if GRAD {
                    let (s, c) = libm::sincos(v(a));
                    aux[o] = c;
                    s
                } else {
                    libm::sin(v(a))
                }
            }
            Op::Cos(a) => {
                if GRAD {
                    let (s, c) = libm::sincos(v(a));
                    aux[o] = -s;
                    c
                } else {
                    libm::cos(v(a))
                }
            }
            Op::Tan(a) => libm::tan(v(a)),
            Op::Asin(a) => libm::asin(v(a)),
            Op::Acos(a) => libm::acos(v(a)),
            Op::Atan(a) => libm::atan(v(a)),
            Op::Sinh(a) => libm::sinh(v(a)),
            Op::Cosh(a) => libm::cosh(v(a)),
            Op::Tanh(a) => libm::tanh(v(a)),
            Op::Erf(a) => libm::erf(v(a)),
            Op::Lgamma(a) => maths::lgamma(v(a)),
            Op::Atan2(a, b) => libm::atan2(v(a), v(b)),
            Op::Min(a, b) => Binary::Min.apply(v(a), v(b)),
            Op::Max(a, b) => Binary::Max.apply(v(a), v(b)),
            Op::LogAddExp(a, b) => {
                if GRAD {
                    let (r, e) = log_add_exp_aux(v(a), v(b));
                    aux[o] = e;
                    r
                } else {
                    maths::log_add_exp(v(a), v(b))
                }
            }
            Op::LinComb(s, n) => {
                let mut acc = 0.0;
                for (j, t) in seg.terms[s as usize..(s + n) as usize].iter().enumerate() {
                    let x = match *t {
                        Term::Const(c) => c,
                        Term::Lin(c, x) => c * v(x),
                        Term::Prod(c, x, y) => c * (v(x) * v(y)),
                        Term::Sq(c, x, m) => {
                            let t = v(x) + m;
                            c * (t * t)
                        }
                    };
                    // The first term starts the sum (0 + x would turn -0 into +0).
                    acc = if j == 0 { x } else { acc + x };
                }
                acc
            }
            Op::LogSumExp(s, n) => {
                let (s, n) = (s as usize, n as usize);
                let xs = &seg.args[s..s + n];
                let (mut m, mut top, mut finite) = (f64::NEG_INFINITY, 0, true);
                for (i, &x) in xs.iter().enumerate() {
                    let xv = v(x);
                    finite &= xv.is_finite();
                    if xv > m {
                        (m, top) = (xv, i);
                    }
                }
                if finite {
                    let mut r = 0.0;
                    for (i, &x) in xs.iter().enumerate() {
                        if i != top {
                            let e = maths::exp(v(x) - m);
                            r += e;
                            if GRAD {
                                wts[s + i] = e;
                            }
                        }
                    }
                    if GRAD {
                        wts[s + top] = 1.0;
                        aux[o] = r;
                    }
                    m + maths::ln_1p(r)
                } else {
                    if GRAD {
                        aux[o] = f64::NAN;
                    }
                    lae_fold(xs.iter().map(|&x| v(x)))
                }
            }
            Op::ScaledUn(u, a, c) => {
                let t = v(a) * c;
                match u {
                    Unary::Sin | Unary::Cos if GRAD => {
                        let (sn, cs) = libm::sincos(t);
                        if u == Unary::Sin {
                            aux[o] = cs;
                            sn
                        } else {
                            aux[o] = -sn;
                            cs
                        }
                    }
                    _ => u.apply(t),
                }
            }
            Op::Sum(s) => sum(s as usize, &vals[..first + k]),
        };
        vals[o] = out;
    }
}

/// Runs a segment backward from the adjoints already in `adj` (which it adds to), leaving
/// every instruction's adjoint zero (the inputs' and constants' hold the result).
/// `sum_grads(k)` gives row loop `k`'s input slots and the gradient of its value with respect
/// to each. An instruction whose adjoint is zero passes nothing on (so that a zero adjoint
/// times an infinite derivative contributes nothing).
#[inline(always)]
fn reverse<'a>(
    seg: &Segment,
    vals: &[f64],
    aux: &[f64],
    adj: &mut [f64],
    sum_grads: impl Fn(usize) -> (&'a [u32], &'a [f64]),
) {
    let first = seg.first_code();
    let mask = seg.mask;
    let (vals, adj) = (&vals[..=mask], &mut adj[..=mask]);
    let (aux, wts) = aux.split_at(mask + 1);
    for k in (0..seg.code.len()).rev() {
        let o = (first + k) & mask;
        let g = adj[o];
        if g == 0.0 {
            continue;
        }
        adj[o] = 0.0;
        let v = |s: u32| vals[s as usize & mask];
        macro_rules! add {
            ($s:expr, $d:expr) => {{
                let s = $s as usize & mask;
                adj[s] += $d;
            }};
        }
        match seg.code[k] {
            Op::Add(a, b) => {
                add!(a, g);
                add!(b, g);
            }
            Op::Sub(a, b) => {
                add!(a, g);
                add!(b, -g);
            }
            Op::Mul(a, b) => {
                let (x, y) = (v(a), v(b));
                add!(a, g * y);
                add!(b, g * x);
            }
            Op::Div(a, b) => {
                let y = v(b);
                add!(a, g * (1.0 / y));
                add!(b, g * (-vals[o] / y));
            }
            Op::AddC(a, _) => add!(a, g),
            Op::MulC(a, c) => add!(a, g * c),
            Op::DivC(a, c) => add!(a, g * (1.0 / c)),
            Op::CSub(_, a) => add!(a, -g),
            Op::CDiv(_, a) => add!(a, g * (-vals[o] / v(a))),
            Op::Square(a) => add!(a, g * (2.0 * v(a))),
            Op::PowI(a, _) | Op::ShiftPowI(a, _, _) => add!(a, g * aux[o]),
            Op::PowC(a, c) => add!(a, g * c * maths::pow(v(a), c - 1.0)),
            Op::Pow(a, b) => {
                let (da, db) = Binary::Pow.derivatives(v(a), v(b), vals[o]);
                add!(a, g * da);
                add!(b, g * db);
            }
            Op::Neg(a) => add!(a, -g),
            Op::Exp(a) => add!(a, g * vals[o]),
            Op::Sin(a) | Op::Cos(a) => add!(a, g * aux[o]),
            Op::Log(a) => add!(a, g * Unary::Log.derivative(v(a), vals[o])),
            Op::Log1p(a) => add!(a, g * Unary::Log1p.derivative(v(a), vals[o])),
            Op::Expm1(a) => add!(a, g * Unary::Expm1.derivative(v(a), vals[o])),
            Op::Sqrt(a) => add!(a, g * Unary::Sqrt.derivative(v(a), vals[o])),
            Op::Abs(a) => add!(a, g * Unary::Abs.derivative(v(a), vals[o])),
            Op::Tan(a) => add!(a, g * Unary::Tan.derivative(v(a), vals[o])),
            Op::Asin(a) => add!(a, g * Unary::Asin.derivative(v(a), vals[o])),
            Op::Acos(a) => add!(a, g * Unary::Acos.derivative(v(a), vals[o])),
            Op::Atan(a) => add!(a, g * Unary::Atan.derivative(v(a), vals[o])),
            Op::Sinh(a) => add!(a, g * Unary::Sinh.derivative(v(a), vals[o])),
            Op::Cosh(a) => add!(a, g * Unary::Cosh.derivative(v(a), vals[o])),
            Op::Tanh(a) => add!(a, g * Unary::Tanh.derivative(v(a), vals[o])),
            Op::Erf(a) => add!(a, g * Unary::Erf.derivative(v(a), vals[o])),
            Op::Lgamma(a) => add!(a, g * Unary::Lgamma.derivative(v(a), vals[o])),
            Op::Atan2(a, b) | Op::Min(a, b) | Op::Max(a, b) => {
                let op = match seg.code[k] {
                    Op::Atan2(..) => Binary::Atan2,
                    Op::Min(..) => Binary::Min,
                    _ => Binary::Max,
                };
                let (da, db) = op.derivatives(v(a), v(b), vals[o]);
                add!(a, g * da);
                add!(b, g * db);
            }
            Op::LogAddExp(a, b) => {
                let (x, y) = (v(a), v(b));
                let e = aux[o];
                let (da, db) = if vals[o].is_finite() {
                    // d/da = e^(a - v): 1/(1 + e) for the larger argument, e/(1 + e) for the other.
                    let p = 1.0 / (1.0 + e);
                    let q = e * p;
                    if x >= y {
                        (p, q)
                    } else {
                        (q, p)
                    }
                } else {
                    Binary::LogAddExp.derivatives(x, y, vals[o])
                };
                add!(a, g * da);
                add!(b, g * db);
            }
            Op::LinComb(s, n) => {
                for t in &seg.terms[s as usize..(s + n) as usize] {
                    match *t {
                        Term::Const(_) => {}
                        Term::Lin(c, x) => add!(x, g * c),
                        // The product's and the square's own adjoint, g·c, passes nothing on
                        // when zero, as their instructions would.
                        Term::Prod(c, x, y) => {
                            let gc = g * c;
                            if gc != 0.0 {
                                let (vx, vy) = (v(x), v(y));
                                add!(x, gc * vy);
                                add!(y, gc * vx);
                            }
                        }
                        Term::Sq(c, x, m) => {
                            let gc = g * c;
                            if gc != 0.0 {
                                add!(x, gc * (2.0 * (v(x) + m)));
                            }
                        }
                    }
                }
            }
            Op::LogSumExp(s, n) => {
                let (s, n) = (s as usize, n as usize);
                let xs = &seg.args[s..s + n];
                let r = aux[o];
                if !r.is_nan() {
                    // d/dx_i = e^(x_i - v) = e^(x_i - m) / (1 + r).
                    let p = 1.0 / (1.0 + r);
                    for (i, &x) in xs.iter().enumerate() {
                        add!(x, g * (wts[s + i] * p));
                    }
                } else {
                    // Back through the chain it replaces, its links' values recomputed.
                    let mut ga = g;
                    for k in (1..n).rev() {
                        let before = lae_fold(xs[..k].iter().map(|&x| v(x)));
                        let xk = v(xs[k]);
                        let after = maths::log_add_exp(before, xk);
                        let (da, db) = Binary::LogAddExp.derivatives(before, xk, after);
                        add!(xs[k], ga * db);
                        if k == 1 {
                            add!(xs[0], ga * da);
                        } else {
                            ga *= da;
                            if ga == 0.0 {
                                break;
                            }
                        }
                    }
                }
            }
            Op::ScaledUn(u, a, c) => {
                let d = match u {
                    Unary::Sin | Unary::Cos => aux[o],
                    Unary::Exp => vals[o],
                    _ => u.derivative(v(a) * c, vals[o]),
                };
                let gd = g * d;
                if gd != 0.0 {
                    add!(a, gd * c);
                }
            }
            Op::Sum(s) => {
                let (inputs, grads) = sum_grads(s as usize);
                for (&slot, &d) in inputs.iter().zip(grads) {
                    add!(slot, g * d);
                }
            }
        }
    }
}

/// Evaluates one [`Tape`]; owns the scratch memory, so each thread or chain keeps its own.
#[derive(Clone)]
pub struct Evaluator {
    tape: Arc<Tape>,
    vals: Vec<f64>,
    aux: Vec<f64>,
    adj: Vec<f64>,
    loops: Vec<LoopScratch>,
}

impl Evaluator {
    pub fn new(tape: Arc<Tape>) -> Evaluator {
        let vals = tape.outer.new_vals();
        let aux = tape.outer.new_aux();
        let adj = tape.outer.new_zeros();
        let loops = tape.loops.iter().map(LoopScratch::new).collect();
        Evaluator {
            tape,
            vals,
            aux,
            adj,
            loops,
        }
    }

    pub fn tape(&self) -> &Tape {
        &self.tape
    }

    fn load(&mut self, x: &[f64]) {
        let seg = &self.tape.outer;
        let vals = &mut self.vals[..=seg.mask];
        for (i, &xi) in x[..self.tape.n_vars].iter().enumerate() {
            // Masked like every slot (a no-op): it also keeps the copy a few plain moves.
            vals[(seg.first_input + i) & seg.mask] = xi;
        }
    }

    /// The formula's value at `x`.
    pub fn value(&mut self, x: &[f64]) -> f64 {
        self.load(x);
        let t = &*self.tape;
        let scratch = &mut self.loops;
        forward::<false>(&t.outer, &mut self.vals, &mut self.aux, |k, vals| {
            t.loops[k].run(&mut scratch[k], vals, false)
        });
        self.vals[t.outer.root as usize]
    }

    /// The formula's value at `x`; its gradient is written to `grad`.
    pub fn value_grad(&mut self, x: &[f64], grad: &mut [f64]) -> f64 {
        self.load(x);
        let t = &*self.tape;
        let scratch = &mut self.loops;
        forward::<true>(&t.outer, &mut self.vals, &mut self.aux, |k, vals| {
            t.loops[k].run(&mut scratch[k], vals, true)
        });
        // The adjoints are all zero between calls: the reverse pass clears each instruction's
        // as it uses it, and the inputs' and constants' are cleared below.
        let root = t.outer.root as usize;
        self.adj[root] = 1.0;
        let scratch = &self.loops;
        reverse(&t.outer, &self.vals, &self.aux, &mut self.adj, |k| {
            (&t.loops[k].inputs[..], scratch[k].grads())
        });
        let (first, mask) = (t.outer.first_input, t.outer.mask);
        t.outer.clear_constants(&mut self.adj);
        let adj = &mut self.adj[..=mask];
        for (i, g) in grad[..t.n_vars].iter_mut().enumerate() {
            // One value at a time: the reverse pass has just stored them one by one, and a
            // wider load of two such stores waits for both to reach the cache.
            let s = (first + i) & mask;
            *g = adj[s];
            adj[s] = 0.0;
        }
        self.vals[root]
    }
}

/// `(x^n, n·x^(n-1))`: the power exactly as [`powi_small`] computes it, and its derivative
/// from the same intermediate powers.
#[inline(always)]
fn powi_with_slope(x: f64, n: i32) -> (f64, f64) {
    match n {
        0 => (1.0, 0.0),
        1 => (x, 1.0),
        2 => (x * x, 2.0 * x),
        3 => {
            let x2 = x * x;
            (x * x2, 3.0 * x2)
        }
        4 => {
            let x2 = x * x;
            (x2 * x2, 4.0 * (x * x2))
        }
        5 => {
            let x2 = x * x;
            let x4 = x2 * x2;
            (x * x4, 5.0 * x4)
        }
        6 => {
            let x2 = x * x;
            let x4 = x2 * x2;
            (x2 * x4, 6.0 * (x * x4))
        }
        _ => (powi_small(x, n), n as f64 * powi_small(x, n - 1)),
    }
}

/// [`powi`], the same operations in the same order, written out for small exponents (repeated
/// squaring: `x^5 = x · (x²)²`, `x^6 = x² · (x²)²`, `x^7 = (x · x²) · (x²)²`).
#[inline(always)]
fn powi_small(x: f64, n: i32) -> f64 {
    match n {
        1 => x,
        2 => x * x,
        3 => x * (x * x),
        4 => {
            let x2 = x * x;
            x2 * x2
        }
        5 => {
            let x2 = x * x;
            x * (x2 * x2)
        }
        6 => {
            let x2 = x * x;
            x2 * (x2 * x2)
        }
        7 => {
            let x2 = x * x;
            (x * x2) * (x2 * x2)
        }
        8 => {
            let x2 = x * x;
            let x4 = x2 * x2;
            x4 * x4
        }
        _ => powi(x, n),
    }
}

#[cfg(test)]
mod tests;
