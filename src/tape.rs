//! Stage 3: checked formula → compiled tape with exact gradients.
//!
//! Owns: the flat instruction tape a [`Graph`] compiles to, and [`Evaluator`], which computes a
//! formula's value and its gradient by reverse-mode differentiation with no allocation per
//! call. Each `sum(…)` compiles to a sub-tape run once per data row; parts of its body that do
//! not depend on the row are computed once outside the loop, and parts that depend only on data
//! are precomputed into extra columns at compile time.
//! Must not: know what the formula means (energy or log density, bounds, mixtures): that is
//! `target`.

use crate::check::{Graph, Node, NodeId};
use crate::maths::{powi, Binary, Unary};
use std::collections::HashMap;
use std::sync::Arc;

#[derive(Clone, Copy, Debug)]
enum Ins {
    Un(Unary, u32),
    Bin(Binary, u32, u32),
    /// `a^n` for a small integer constant `n`.
    PowI(u32, i32),
    /// `a^c` for any other constant `c`.
    PowC(u32, f64),
    /// The value of sum number `k` (a sub-tape run over the data rows).
    Sum(u32),
}

/// One straight-line program. Slots: constants, then inputs, then one per instruction.
#[derive(Clone, Debug, Default)]
struct Segment {
    init: Vec<f64>,
    first_input: usize,
    n_inputs: usize,
    code: Vec<Ins>,
    root: u32,
}

impl Segment {
    fn first_code(&self) -> usize {
        self.first_input + self.n_inputs
    }
    fn n_slots(&self) -> usize {
        self.first_code() + self.code.len()
    }
}

#[derive(Clone, Debug)]
struct SumLoop {
    seg: Segment,
    /// Outer slots copied into the sub-tape's first inputs (loop-invariant values).
    outer_inputs: Vec<u32>,
    /// Row-major data: `n_cols` values per row, copied into the inputs after `outer_inputs`.
    data: Vec<f64>,
    n_cols: usize,
    rows: usize,
}

/// A compiled formula over `n_vars` unknowns.
#[derive(Clone, Debug)]
pub struct Tape {
    n_vars: usize,
    outer: Segment,
    sums: Vec<SumLoop>,
}

#[derive(Clone, Copy, Default)]
struct Flags {
    var: bool,
    data: bool,
}

struct SegBuilder {
    init: Vec<f64>,
    consts: HashMap<u64, u32>,
    inputs: Vec<NodeId>,
    code: Vec<Ins>,
    slot_of: HashMap<NodeId, u32>,
}

impl SegBuilder {
    fn new() -> SegBuilder {
        SegBuilder {
            init: Vec::new(),
            consts: HashMap::new(),
            inputs: Vec::new(),
            code: Vec::new(),
            slot_of: HashMap::new(),
        }
    }
}

/// Data columns of the formula: `columns[c][row]`.
pub struct DataTable<'a> {
    pub columns: &'a [Vec<f64>],
    pub rows: usize,
}

impl Tape {
    /// Compiles a checked formula. `data` holds the spec's columns in the order `check` used.
    pub fn compile(graph: &Graph, n_vars: usize, data: &DataTable) -> Tape {
        let nodes = &graph.nodes;
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

        // Values of data-only nodes, row by row, for the nodes that some sum needs.
        let mut data_only_cache: HashMap<NodeId, Vec<f64>> = HashMap::new();
        let eval_data_only = |id: NodeId, cache: &mut HashMap<NodeId, Vec<f64>>| -> Vec<f64> {
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
        };

        // Sums whose body is constant or row-independent become ordinary values.
        let mut replaced: HashMap<NodeId, Replacement> = HashMap::new();
        for (i, n) in nodes.iter().enumerate() {
            if let Node::Sum(b) = *n {
                let f = flags[b as usize];
                if !f.var {
                    let vals = eval_data_only(b, &mut data_only_cache);
                    replaced.insert(i as NodeId, Replacement::Const(vals.iter().sum()));
                } else if !f.data {
                    replaced.insert(i as NodeId, Replacement::Times(data.rows as f64, b));
                }
            }
        }

        let mut outer = SegBuilder::new();
        for v in 0..n_vars {
            let id = nodes
                .iter()
                .position(|n| *n == Node::Var(v as u32))
                .map(|p| p as NodeId);
            outer.inputs.push(id.unwrap_or(NodeId::MAX - v as NodeId));
        }
        let mut sums = Vec::new();
        let root = emit_outer(
            graph.root,
            nodes,
            &flags,
            &replaced,
            &mut outer,
            &mut sums,
            data,
            &mut |id, cache_ref: &mut HashMap<NodeId, Vec<f64>>| eval_data_only(id, cache_ref),
            &mut data_only_cache,
        );
        let outer = finish(outer, root, &mut sums);
        Tape {
            n_vars,
            outer,
            sums,
        }
    }

    pub fn n_vars(&self) -> usize {
        self.n_vars
    }

    /// Number of instructions executed per evaluation (data rows counted), a cost measure.
    pub fn work_per_call(&self) -> usize {
        self.outer.code.len()
            + self
                .sums
                .iter()
                .map(|s| s.rows * s.seg.code.len())
                .sum::<usize>()
    }
}

/// Evaluates a data-only node over every row (memoised in the cache it is given).
type DataOnlyEval<'a> = dyn FnMut(NodeId, &mut HashMap<NodeId, Vec<f64>>) -> Vec<f64> + 'a;

enum Replacement {
    Const(f64),
    Times(f64, NodeId),
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
        // `check` guarantees data-only nodes contain no unknowns and no nested sums.
        Node::Var(_) | Node::Sum(_) => f64::NAN,
    };
    memo.insert(id, v);
    v
}

fn const_slot(seg: &mut SegBuilder, v: f64) -> u32 {
    if let Some(&s) = seg.consts.get(&v.to_bits()) {
        return s | CONST_TAG;
    }
    // Constants are numbered first; inputs and code are offset when the segment is finished.
    let s = seg.init.len() as u32;
    seg.init.push(v);
    seg.consts.insert(v.to_bits(), s);
    s | CONST_TAG
}

// While building, slots are tagged by kind and renumbered in `finish`.
const CONST_TAG: u32 = 1 << 31;
const INPUT_TAG: u32 = 1 << 30;
const MASK: u32 = INPUT_TAG - 1;

fn input_slot(seg: &mut SegBuilder, id: NodeId) -> u32 {
    if let Some(p) = seg.inputs.iter().position(|&i| i == id) {
        return p as u32 | INPUT_TAG;
    }
    seg.inputs.push(id);
    (seg.inputs.len() - 1) as u32 | INPUT_TAG
}

fn push(seg: &mut SegBuilder, ins: Ins) -> u32 {
    seg.code.push(ins);
    (seg.code.len() - 1) as u32
}

/// Emits a binary or power instruction, specialising constant exponents.
fn emit_binary(seg: &mut SegBuilder, op: Binary, a: u32, b: u32, b_const: Option<f64>) -> u32 {
    if op == Binary::Pow {
        if let Some(c) = b_const {
            if c == c.trunc() && c.abs() <= 64.0 {
                return push(seg, Ins::PowI(a, c as i32));
            }
            return push(seg, Ins::PowC(a, c));
        }
    }
    push(seg, Ins::Bin(op, a, b))
}

#[allow(clippy::too_many_arguments)]
fn emit_outer(
    id: NodeId,
    nodes: &[Node],
    flags: &[Flags],
    replaced: &HashMap<NodeId, Replacement>,
    seg: &mut SegBuilder,
    sums: &mut Vec<SumLoop>,
    data: &DataTable,
    eval_data_only: &mut DataOnlyEval,
    cache: &mut HashMap<NodeId, Vec<f64>>,
) -> u32 {
    if let Some(&s) = seg.slot_of.get(&id) {
        return s;
    }
    let mut rec = |child: NodeId,
                   seg: &mut SegBuilder,
                   sums: &mut Vec<SumLoop>,
                   cache: &mut HashMap<NodeId, Vec<f64>>| {
        emit_outer(
            child,
            nodes,
            flags,
            replaced,
            seg,
            sums,
            data,
            eval_data_only,
            cache,
        )
    };
    let slot = match (replaced.get(&id), nodes[id as usize]) {
        (Some(Replacement::Const(v)), _) => const_slot(seg, *v),
        (Some(Replacement::Times(n, b)), _) => {
            let bs = rec(*b, seg, sums, cache);
            let ns = const_slot(seg, *n);
            push(seg, Ins::Bin(Binary::Mul, ns, bs))
        }
        (None, Node::Const(v)) => const_slot(seg, v),
        (None, Node::Var(_)) => input_slot(seg, id),
        (None, Node::Data(_)) => const_slot(seg, f64::NAN),
        (None, Node::Unary(op, a)) => {
            let a = rec(a, seg, sums, cache);
            push(seg, Ins::Un(op, a))
        }
        (None, Node::Binary(op, a, b)) => {
            let sa = rec(a, seg, sums, cache);
            let sb = rec(b, seg, sums, cache);
            let bc = match nodes[b as usize] {
                Node::Const(c) => Some(c),
                _ => None,
            };
            emit_binary(seg, op, sa, sb, bc)
        }
        (None, Node::Sum(body)) => {
            // Build the row loop: row-dependent nodes go into the sub-tape; loop-invariant ones
            // are computed here in the outer tape and passed in.
            let mut sub = SegBuilder::new();
            let mut invariant: Vec<NodeId> = Vec::new();
            let mut columns: Vec<NodeId> = Vec::new();
            collect_row_inputs(
                body,
                nodes,
                flags,
                &mut invariant,
                &mut columns,
                &mut Vec::new(),
            );
            // Inputs: invariants first, then data columns, in a fixed order.
            for &n in &invariant {
                input_slot(&mut sub, n);
            }
            for &n in &columns {
                input_slot(&mut sub, n);
            }
            let root = emit_row(body, nodes, flags, &mut sub);
            let sub_seg = finish(sub, root, &mut []);
            let outer_inputs: Vec<u32> = invariant
                .iter()
                .map(|&n| rec(n, seg, sums, cache))
                .collect();
            let col_values: Vec<Vec<f64>> =
                columns.iter().map(|&c| eval_data_only(c, cache)).collect();
            let mut row_major = Vec::with_capacity(columns.len() * data.rows);
            for r in 0..data.rows {
                for c in &col_values {
                    row_major.push(c[r]);
                }
            }
            sums.push(SumLoop {
                seg: sub_seg,
                outer_inputs,
                data: row_major,
                n_cols: columns.len(),
                rows: data.rows,
            });
            push(seg, Ins::Sum((sums.len() - 1) as u32))
        }
    };
    seg.slot_of.insert(id, slot);
    slot
}

/// Finds the loop-invariant values and the data-only columns a row body reads.
fn collect_row_inputs(
    id: NodeId,
    nodes: &[Node],
    flags: &[Flags],
    invariant: &mut Vec<NodeId>,
    columns: &mut Vec<NodeId>,
    seen: &mut Vec<NodeId>,
) {
    if seen.contains(&id) {
        return;
    }
    seen.push(id);
    let f = flags[id as usize];
    match nodes[id as usize] {
        Node::Const(_) => {}
        _ if !f.data => invariant.push(id),
        _ if !f.var => columns.push(id),
        Node::Unary(_, a) => collect_row_inputs(a, nodes, flags, invariant, columns, seen),
        Node::Binary(_, a, b) => {
            collect_row_inputs(a, nodes, flags, invariant, columns, seen);
            collect_row_inputs(b, nodes, flags, invariant, columns, seen);
        }
        Node::Var(_) | Node::Data(_) | Node::Sum(_) => {}
    }
}

fn emit_row(id: NodeId, nodes: &[Node], flags: &[Flags], seg: &mut SegBuilder) -> u32 {
    if let Some(&s) = seg.slot_of.get(&id) {
        return s;
    }
    let f = flags[id as usize];
    let slot = match nodes[id as usize] {
        Node::Const(v) => const_slot(seg, v),
        _ if !f.data || !f.var => input_slot(seg, id),
        Node::Unary(op, a) => {
            let a = emit_row(a, nodes, flags, seg);
            push(seg, Ins::Un(op, a))
        }
        Node::Binary(op, a, b) => {
            let sa = emit_row(a, nodes, flags, seg);
            let sb = emit_row(b, nodes, flags, seg);
            let bc = match nodes[b as usize] {
                Node::Const(c) => Some(c),
                _ => None,
            };
            emit_binary(seg, op, sa, sb, bc)
        }
        // Row nodes hold unknowns and data, so they are never these.
        Node::Var(_) | Node::Data(_) | Node::Sum(_) => const_slot(seg, f64::NAN),
    };
    seg.slot_of.insert(id, slot);
    slot
}

/// Renumbers tagged slots: constants, inputs, then code. `sums` read slots of this segment
/// (their loop-invariant inputs) and are renumbered too.
fn finish(b: SegBuilder, root: u32, sums: &mut [SumLoop]) -> Segment {
    let n_const = b.init.len();
    let first_input = n_const;
    let first_code = n_const + b.inputs.len();
    let fix = |s: u32| -> u32 {
        if s & CONST_TAG != 0 {
            s & MASK
        } else if s & INPUT_TAG != 0 {
            (s & MASK) + first_input as u32
        } else {
            s + first_code as u32
        }
    };
    let code = b
        .code
        .iter()
        .map(|ins| match *ins {
            Ins::Un(op, a) => Ins::Un(op, fix(a)),
            Ins::Bin(op, a, c) => Ins::Bin(op, fix(a), fix(c)),
            Ins::PowI(a, n) => Ins::PowI(fix(a), n),
            Ins::PowC(a, c) => Ins::PowC(fix(a), c),
            Ins::Sum(k) => Ins::Sum(k),
        })
        .collect();
    for lp in sums.iter_mut() {
        for s in lp.outer_inputs.iter_mut() {
            *s = fix(*s);
        }
    }
    Segment {
        init: b.init,
        first_input,
        n_inputs: b.inputs.len(),
        code,
        root: fix(root),
    }
}

#[inline(always)]
fn forward(
    code: &[Ins],
    vals: &mut [f64],
    first_code: usize,
    sums: &mut SumState,
    tape_sums: &[SumLoop],
    grad: bool,
) {
    for (k, ins) in code.iter().enumerate() {
        let v = match *ins {
            Ins::Un(op, a) => op.apply(vals[a as usize]),
            Ins::Bin(op, a, b) => op.apply(vals[a as usize], vals[b as usize]),
            Ins::PowI(a, n) => powi(vals[a as usize], n),
            Ins::PowC(a, c) => crate::maths::pow(vals[a as usize], c),
            Ins::Sum(s) => sums.run(s as usize, &tape_sums[s as usize], vals, grad),
        };
        vals[first_code + k] = v;
    }
}

#[inline(always)]
fn reverse(
    code: &[Ins],
    vals: &[f64],
    adj: &mut [f64],
    first_code: usize,
    sums: &SumState,
    tape_sums: &[SumLoop],
) {
    for k in (0..code.len()).rev() {
        let o = first_code + k;
        let g = adj[o];
        if g == 0.0 {
            continue;
        }
        match code[k] {
            Ins::Un(op, a) => {
                let a = a as usize;
                adj[a] += g * op.derivative(vals[a], vals[o]);
            }
            Ins::Bin(op, a, b) => {
                let (a, b) = (a as usize, b as usize);
                let (da, db) = op.derivatives(vals[a], vals[b], vals[o]);
                adj[a] += g * da;
                adj[b] += g * db;
            }
            Ins::PowI(a, n) => {
                let a = a as usize;
                let d = match n {
                    0 => 0.0,
                    1 => 1.0,
                    2 => 2.0 * vals[a],
                    _ => n as f64 * powi(vals[a], n - 1),
                };
                adj[a] += g * d;
            }
            Ins::PowC(a, c) => {
                let a = a as usize;
                adj[a] += g * c * crate::maths::pow(vals[a], c - 1.0);
            }
            Ins::Sum(s) => {
                let lp = &tape_sums[s as usize];
                for (j, &slot) in lp.outer_inputs.iter().enumerate() {
                    adj[slot as usize] += g * sums.grads[s as usize][j];
                }
            }
        }
    }
}

/// Per-evaluator buffers of the sum loops.
#[derive(Clone)]
struct SumState {
    vals: Vec<Vec<f64>>,
    adj: Vec<Vec<f64>>,
    grads: Vec<Vec<f64>>,
}

impl SumState {
    fn run(&mut self, s: usize, lp: &SumLoop, outer_vals: &[f64], grad: bool) -> f64 {
        let seg = &lp.seg;
        let vals = &mut self.vals[s];
        let adj = &mut self.adj[s];
        let grads = &mut self.grads[s];
        let first = seg.first_input;
        let n_inv = lp.outer_inputs.len();
        for (j, &slot) in lp.outer_inputs.iter().enumerate() {
            vals[first + j] = outer_vals[slot as usize];
        }
        grads.iter_mut().for_each(|g| *g = 0.0);
        let first_code = seg.first_code();
        let root = seg.root as usize;
        let mut total = 0.0;
        let mut no_sums = SumState {
            vals: Vec::new(),
            adj: Vec::new(),
            grads: Vec::new(),
        };
        for r in 0..lp.rows {
            let row = &lp.data[r * lp.n_cols..(r + 1) * lp.n_cols];
            vals[first + n_inv..first + n_inv + lp.n_cols].copy_from_slice(row);
            forward(&seg.code, vals, first_code, &mut no_sums, &[], false);
            total += vals[root];
            if grad {
                adj[first..].iter_mut().for_each(|a| *a = 0.0);
                adj[root] = 1.0;
                reverse(&seg.code, vals, adj, first_code, &no_sums, &[]);
                for j in 0..n_inv {
                    grads[j] += adj[first + j];
                }
            }
        }
        total
    }
}

/// Evaluates one [`Tape`]; owns the scratch memory, so each thread or chain keeps its own.
#[derive(Clone)]
pub struct Evaluator {
    tape: Arc<Tape>,
    vals: Vec<f64>,
    adj: Vec<f64>,
    sums: SumState,
}

impl Evaluator {
    pub fn new(tape: Arc<Tape>) -> Evaluator {
        let mut vals = tape.outer.init.clone();
        vals.resize(tape.outer.n_slots(), 0.0);
        let adj = vec![0.0; tape.outer.n_slots()];
        let sums = SumState {
            vals: tape
                .sums
                .iter()
                .map(|s| {
                    let mut v = s.seg.init.clone();
                    v.resize(s.seg.n_slots(), 0.0);
                    v
                })
                .collect(),
            adj: tape
                .sums
                .iter()
                .map(|s| vec![0.0; s.seg.n_slots()])
                .collect(),
            grads: tape
                .sums
                .iter()
                .map(|s| vec![0.0; s.outer_inputs.len()])
                .collect(),
        };
        Evaluator {
            tape,
            vals,
            adj,
            sums,
        }
    }

    pub fn tape(&self) -> &Tape {
        &self.tape
    }

    fn load(&mut self, x: &[f64]) {
        let first = self.tape.outer.first_input;
        self.vals[first..first + self.tape.n_vars].copy_from_slice(&x[..self.tape.n_vars]);
    }

    /// The formula's value at `x`.
    pub fn value(&mut self, x: &[f64]) -> f64 {
        self.load(x);
        let t = &*self.tape;
        forward(
            &t.outer.code,
            &mut self.vals,
            t.outer.first_code(),
            &mut self.sums,
            &t.sums,
            false,
        );
        self.vals[t.outer.root as usize]
    }

    /// The formula's value at `x`; its gradient is written to `grad`.
    pub fn value_grad(&mut self, x: &[f64], grad: &mut [f64]) -> f64 {
        self.load(x);
        let t = &*self.tape;
        let first_code = t.outer.first_code();
        forward(
            &t.outer.code,
            &mut self.vals,
            first_code,
            &mut self.sums,
            &t.sums,
            true,
        );
        self.adj.iter_mut().for_each(|a| *a = 0.0);
        let root = t.outer.root as usize;
        self.adj[root] = 1.0;
        reverse(
            &t.outer.code,
            &self.vals,
            &mut self.adj,
            first_code,
            &self.sums,
            &t.sums,
        );
        let first = t.outer.first_input;
        grad[..t.n_vars].copy_from_slice(&self.adj[first..first + t.n_vars]);
        self.vals[root]
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::check::check;
    use crate::syntax::parse;

    fn compile(text: &str, vars: &[&str], cols: &[(&str, Vec<f64>)]) -> Evaluator {
        let vars: Vec<String> = vars.iter().map(|s| s.to_string()).collect();
        let names: Vec<String> = cols.iter().map(|c| c.0.to_string()).collect();
        let columns: Vec<Vec<f64>> = cols.iter().map(|c| c.1.clone()).collect();
        let rows = columns.first().map_or(0, |c| c.len());
        let prog = parse("energy", text).unwrap();
        let g = check("energy", text, &prog, &vars, &names, rows).unwrap();
        let tape = Tape::compile(
            &g,
            vars.len(),
            &DataTable {
                columns: &columns,
                rows,
            },
        );
        Evaluator::new(Arc::new(tape))
    }

    #[test]
    fn value_and_gradient_of_a_polynomial() {
        let mut ev = compile("x^3 * y - 2*x + y^2/4", &["x", "y"], &[]);
        let mut g = [0.0; 2];
        let v = ev.value_grad(&[2.0, 3.0], &mut g);
        assert_eq!(v, 8.0 * 3.0 - 4.0 + 9.0 / 4.0);
        assert_eq!(g, [3.0 * 4.0 * 3.0 - 2.0, 8.0 + 1.5]);
        assert_eq!(ev.value(&[2.0, 3.0]), v);
    }

    #[test]
    fn sums_over_rows_with_invariant_and_data_only_parts() {
        // Σ_i (len_i − x)^2 / (2 s^2) + log(w_i) with s = exp(y): gradient by hand.
        let len = vec![1.0, 2.5, 4.0];
        let w = vec![0.5, 1.0, 2.0];
        let mut ev = compile(
            "let s = exp(y); sum((len - x)^2 / (2*s^2) + log(w)) + sum(x)",
            &["x", "y"],
            &[("len", len.clone()), ("w", w.clone())],
        );
        let (x, y) = (1.7, 0.3);
        let s2 = crate::maths::exp(2.0 * y);
        let want: f64 = len
            .iter()
            .zip(&w)
            .map(|(l, w)| (l - x) * (l - x) / (2.0 * s2) + crate::maths::ln(*w))
            .sum::<f64>()
            + 3.0 * x;
        let gx: f64 = len.iter().map(|l| -(l - x) / s2).sum::<f64>() + 3.0;
        let gy: f64 = len.iter().map(|l| -(l - x) * (l - x) / s2).sum();
        let mut g = [0.0; 2];
        let v = ev.value_grad(&[x, y], &mut g);
        assert!((v - want).abs() < 1e-12, "{v} {want}");
        assert!(
            (g[0] - gx).abs() < 1e-12 && (g[1] - gy).abs() < 1e-12,
            "{g:?} {gx} {gy}"
        );
    }

    #[test]
    fn constants_and_unused_unknowns() {
        let mut ev = compile("3", &["x"], &[]);
        let mut g = [9.0];
        assert_eq!(ev.value_grad(&[1.0], &mut g), 3.0);
        assert_eq!(g, [0.0]);
        let mut ev = compile("y", &["x", "y"], &[]);
        let mut g = [9.0, 9.0];
        assert_eq!(ev.value_grad(&[1.0, 5.0], &mut g), 5.0);
        assert_eq!(g, [0.0, 1.0]);
    }
}
