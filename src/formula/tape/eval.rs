//! Evaluating a tape: the forward pass (value, and what the reverse pass needs) and the
//! reverse pass (the gradient), with [`Evaluator`], which owns the scratch memory so that no
//! call allocates.
//!
//! Owns: `forward`, `reverse`, [`Evaluator`], the evaluation of data-only nodes row by row, and
//! the integer powers with their slopes.
//! Must not: change the tape.

use super::rows::LoopScratch;
use super::*;

pub(super) fn eval_row(
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
        Node::Var(_) | Node::Sum(..) => f64::NAN,
    };
    memo.insert(id, v);
    v
}

/// `log_add_exp(a, b)`, and in gradient mode the weight `e^-|a-b|` its derivatives need
/// (NaN where the value is infinite and the derivatives take the general route).
#[inline(always)]
pub(super) fn log_add_exp_aux(a: f64, b: f64) -> (f64, f64) {
    // The steps of `maths::log_add_exp`, so value and gradient modes give the same bits.
    let m = a.max(b);
    if m.is_infinite() {
        return (m, f64::NAN);
    }
    let e = maths::exp(-(a - b).abs());
    (m + maths::ln_1p(e), e)
}

/// The chain `log_add_exp(log_add_exp(x0, x1), x2)…` of the values in order.
pub(super) fn lae_fold(mut xs: impl Iterator<Item = f64>) -> f64 {
    let first = xs.next().unwrap_or(f64::NEG_INFINITY);
    xs.fold(first, maths::log_add_exp)
}

/// Runs a segment forward. In gradient mode (`GRAD`) it also fills `aux` with what the
/// reverse pass reuses; `sum(k, vals)` evaluates row loop `k` given the slots computed so far.
#[inline(always)]
pub(super) fn forward<const GRAD: bool>(
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
            Op::Un(u, a) => u.apply(v(a)),
            Op::Bin(op, a, b) => op.apply(v(a), v(b)),
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
pub(super) fn reverse<'a>(
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
            Op::Un(u, a) => add!(a, g * u.derivative(v(a), vals[o])),
            Op::Bin(op, a, b) => {
                let (da, db) = op.derivatives(v(a), v(b), vals[o]);
                // A zero slope passes nothing on (a failed support test, an x·log y at x = 0).
                if da != 0.0 {
                    add!(a, g * da);
                }
                if db != 0.0 {
                    add!(b, g * db);
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

    pub(super) fn load(&mut self, x: &[f64]) {
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
pub(super) fn powi_with_slope(x: f64, n: i32) -> (f64, f64) {
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
pub(super) fn powi_small(x: f64, n: i32) -> f64 {
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
