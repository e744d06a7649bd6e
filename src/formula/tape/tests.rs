//! Tests of the tape: hand-derived values, exact identities, and a reference evaluator written
//! here that walks the checked graph directly, row by row for sums, with gradients by
//! forward-mode dual numbers (derivative rules written out below, independently of the tape's).
//! (Longer than the other files: one test per specialisation and rewrite of the compiler, all
//! against the one reference evaluator, which is kept in the same file.)

use super::eval::{powi_small, powi_with_slope};
use super::*;
use crate::common::rng::{Purpose, Stream};
use crate::formula::resolve::resolve;
use crate::formula::syntax::parse;

struct Compiled {
    graph: Graph,
    columns: Vec<Vec<f64>>,
    n_vars: usize,
    ev: Evaluator,
}

fn build(text: &str, vars: &[&str], cols: &[(&str, Vec<f64>)]) -> Compiled {
    let var_names: Vec<String> = vars.iter().map(|s| s.to_string()).collect();
    let names: Vec<String> = cols.iter().map(|c| c.0.to_string()).collect();
    let columns: Vec<Vec<f64>> = cols.iter().map(|c| c.1.clone()).collect();
    let table = DataTable::of(&columns);
    let prog = parse("energy", text).unwrap();
    let inputs = crate::formula::resolve::Inputs::plain(&var_names, &names, &table);
    let graph = resolve("energy", text, &prog, &inputs, &[]).unwrap();
    let tape = Tape::compile(&graph, vars.len(), &table);
    Compiled {
        graph,
        columns,
        n_vars: vars.len(),
        ev: Evaluator::new(Arc::new(tape)),
    }
}

fn compile(text: &str, vars: &[&str], cols: &[(&str, Vec<f64>)]) -> Evaluator {
    build(text, vars, cols).ev
}

// ---------------------------------------------------------------------------------------------
// The reference: a value and its gradient with respect to every unknown.

#[derive(Clone, Debug)]
struct Dual {
    v: f64,
    d: Vec<f64>,
}

impl Dual {
    fn constant(v: f64, n: usize) -> Dual {
        Dual { v, d: vec![0.0; n] }
    }
    /// f(self) with f'(self) = `slope`.
    fn chain(&self, v: f64, slope: f64) -> Dual {
        Dual {
            v,
            d: self.d.iter().map(|&d| slope * d).collect(),
        }
    }
    /// f(self, other) with partial derivatives `da`, `db`.
    fn chain2(&self, other: &Dual, v: f64, da: f64, db: f64) -> Dual {
        Dual {
            v,
            d: self
                .d
                .iter()
                .zip(&other.d)
                .map(|(&x, &y)| da * x + db * y)
                .collect(),
        }
    }
}

fn reference_unary(op: Unary, a: &Dual) -> Dual {
    let x = a.v;
    match op {
        Unary::Neg => a.chain(-x, -1.0),
        Unary::Exp => {
            let e = libm::exp(x);
            a.chain(e, e)
        }
        Unary::Log => a.chain(libm::log(x), 1.0 / x),
        Unary::Log1p => a.chain(libm::log1p(x), 1.0 / (1.0 + x)),
        Unary::Expm1 => a.chain(libm::expm1(x), libm::exp(x)),
        Unary::Sqrt => {
            let r = libm::sqrt(x);
            a.chain(r, 0.5 / r)
        }
        Unary::Abs => a.chain(x.abs(), x.signum() * (x != 0.0) as u8 as f64),
        Unary::Sin => a.chain(libm::sin(x), libm::cos(x)),
        Unary::Cos => a.chain(libm::cos(x), -libm::sin(x)),
        Unary::Tan => {
            let c = libm::cos(x);
            a.chain(libm::tan(x), 1.0 / (c * c))
        }
        Unary::Asin => a.chain(libm::asin(x), 1.0 / libm::sqrt(1.0 - x * x)),
        Unary::Acos => a.chain(libm::acos(x), -1.0 / libm::sqrt(1.0 - x * x)),
        Unary::Atan => a.chain(libm::atan(x), 1.0 / (1.0 + x * x)),
        Unary::Sinh => a.chain(libm::sinh(x), libm::cosh(x)),
        Unary::Cosh => a.chain(libm::cosh(x), libm::sinh(x)),
        Unary::Tanh => {
            let c = libm::cosh(x);
            a.chain(libm::tanh(x), 1.0 / (c * c))
        }
        Unary::Erf => a.chain(
            libm::erf(x),
            2.0 / libm::sqrt(crate::common::maths::PI) * libm::exp(-x * x),
        ),
        Unary::Lgamma => a.chain(libm::lgamma_r(x).0, crate::common::maths::digamma(x)),
        Unary::Softplus => a.chain(
            crate::common::maths::softplus(x),
            crate::common::maths::logistic(x),
        ),
        Unary::LogI0e => {
            let (v, r) = crate::common::maths::bessel_i0_i1_scaled(x);
            a.chain(v, r - 1.0)
        }
    }
}

fn reference_binary(op: Binary, a: &Dual, b: &Dual, b_const: Option<f64>) -> Dual {
    let (x, y) = (a.v, b.v);
    match op {
        Binary::Add => a.chain2(b, x + y, 1.0, 1.0),
        Binary::Sub => a.chain2(b, x - y, 1.0, -1.0),
        Binary::Mul => a.chain2(b, x * y, y, x),
        Binary::Div => a.chain2(b, x / y, 1.0 / y, -x / (y * y)),
        Binary::Pow => match b_const {
            // The language's integer powers are products (x^3 = x·x·x).
            Some(n) if n == n.trunc() && n.abs() <= 64.0 => {
                let mut v = 1.0;
                for _ in 0..n.abs() as i32 {
                    v *= x;
                }
                let v = if n < 0.0 { 1.0 / v } else { v };
                let slope = if n == 0.0 { 0.0 } else { n * v / x };
                let slope = if x == 0.0 && n >= 1.0 {
                    if n == 1.0 {
                        1.0
                    } else {
                        0.0
                    }
                } else {
                    slope
                };
                a.chain(v, slope)
            }
            _ => {
                let v = libm::pow(x, y);
                let da = if y == 0.0 {
                    0.0
                } else {
                    y * libm::pow(x, y - 1.0)
                };
                let db = if x > 0.0 { v * libm::log(x) } else { 0.0 };
                a.chain2(b, v, da, db)
            }
        },
        Binary::Atan2 => {
            let r2 = x * x + y * y;
            a.chain2(b, libm::atan2(x, y), y / r2, -x / r2)
        }
        Binary::Min => {
            if y < x {
                b.clone()
            } else {
                a.clone()
            }
        }
        Binary::Max => {
            if y > x {
                b.clone()
            } else {
                a.clone()
            }
        }
        Binary::LogAddExp => {
            let m = x.max(y);
            if m.is_infinite() {
                return a.chain2(b, m, 0.5, 0.5);
            }
            let v = m + libm::log1p(libm::exp(-(x - y).abs()));
            a.chain2(b, v, libm::exp(x - v), libm::exp(y - v))
        }
        Binary::XLogY | Binary::XLog1pY | Binary::WherePos | Binary::WhereNonNeg => {
            let v = op.apply(x, y);
            let (da, db) = op.derivatives(x, y, v);
            a.chain2(b, v, da, db)
        }
    }
}

/// The formula at `x`: each node once per row for sum bodies, sums added in row order.
fn reference(c: &Compiled, x: &[f64]) -> Dual {
    fn node(
        g: &Graph,
        cols: &[Vec<f64>],
        x: &[f64],
        id: NodeId,
        row: usize,
        memo: &mut HashMap<(NodeId, usize), Dual>,
    ) -> Dual {
        if let Some(d) = memo.get(&(id, row)) {
            return d.clone();
        }
        let n = x.len();
        let d = match g.nodes[id as usize] {
            Node::Const(v) => Dual::constant(v, n),
            Node::Var(i) => {
                let mut d = Dual::constant(x[i as usize], n);
                d.d[i as usize] = 1.0;
                d
            }
            Node::Data(j) => Dual::constant(cols[j as usize][row], n),
            Node::Unary(op, a) => reference_unary(op, &node(g, cols, x, a, row, memo)),
            Node::Binary(op, a, b) => {
                let da = node(g, cols, x, a, row, memo);
                let db = node(g, cols, x, b, row, memo);
                let bc = match g.nodes[b as usize] {
                    Node::Const(v) => Some(v),
                    _ => None,
                };
                reference_binary(op, &da, &db, bc)
            }
            Node::Sum(body, set) => {
                let rows: Vec<usize> = if set == crate::formula::resolve::ALL_ROWS {
                    (0..cols.first().map_or(0, |c| c.len() - 1)).collect()
                } else {
                    g.row_sets[set as usize]
                        .iter()
                        .map(|&r| r as usize)
                        .collect()
                };
                let mut acc = Dual::constant(0.0, n);
                for r in rows {
                    let t = node(g, cols, x, body, r + 1, memo);
                    acc = acc.chain2(&t, acc.v + t.v, 1.0, 1.0);
                }
                acc
            }
        };
        memo.insert((id, row), d.clone());
        d
    }
    // Row 0 is outside every sum; rows of sum bodies are numbered from 1 (data row r - 1).
    let shifted: Vec<Vec<f64>> = c
        .columns
        .iter()
        .map(|c| std::iter::once(f64::NAN).chain(c.iter().copied()).collect())
        .collect();
    let mut memo = HashMap::new();
    node(&c.graph, &shifted, x, c.graph.root, 0, &mut memo)
}

/// Same class of number: both NaN, both the same infinity, or both finite.
fn same_class(a: f64, b: f64) -> bool {
    (a.is_nan() && b.is_nan()) || (a.is_infinite() && a == b) || (a.is_finite() && b.is_finite())
}

/// Checks the tape against the reference at `x`; `tol` relative to (1 + |reference|).
fn agree(c: &mut Compiled, x: &[f64], tol: f64, context: &str) {
    let n = c.n_vars;
    let mut g = vec![0.0; n];
    let v = c.ev.value_grad(x, &mut g);
    let v2 = c.ev.value(x);
    assert!(
        v.to_bits() == v2.to_bits() || (v.is_nan() && v2.is_nan()),
        "{context}: value {v2} and value with gradient {v} differ at {x:?}"
    );
    let r = reference(c, x);
    assert!(
        same_class(v, r.v),
        "{context}: tape {v}, reference {} at {x:?}",
        r.v
    );
    if !r.v.is_finite() {
        return;
    }
    assert!(
        (v - r.v).abs() <= tol * (1.0 + r.v.abs()),
        "{context}: tape {v}, reference {} at {x:?}",
        r.v
    );
    for i in 0..n {
        if !r.d[i].is_finite() {
            continue;
        }
        assert!(
            (g[i] - r.d[i]).abs() <= 1e3 * tol * (1.0 + r.d[i].abs()),
            "{context}: d/dx{i} tape {}, reference {} at {x:?}",
            g[i],
            r.d[i]
        );
    }
}

// ---------------------------------------------------------------------------------------------
// Hand-derived values.

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
    let s2 = crate::common::maths::exp(2.0 * y);
    let want: f64 = len
        .iter()
        .zip(&w)
        .map(|(l, w)| (l - x) * (l - x) / (2.0 * s2) + crate::common::maths::ln(*w))
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
    // Repeated calls start from clean adjoints (they are cleared as they are used).
    for _ in 0..3 {
        assert_eq!(ev.value_grad(&[1.0, 5.0], &mut g), 5.0);
        assert_eq!(g, [0.0, 1.0]);
    }
}

#[test]
fn work_counts_the_operations_of_the_formula_as_written() {
    let count = |text: &str, rows: usize| {
        let cols: Vec<(&str, Vec<f64>)> = if rows > 0 {
            vec![("u", (0..rows).map(|i| i as f64).collect())]
        } else {
            vec![]
        };
        compile(text, &["x", "y"], &cols).tape().work_per_call()
    };
    // ^, *, -, *, +, ^, /: seven operations however they are fused.
    assert_eq!(count("x^3 * y - 2*x + y^2/4", 0), 7);
    // +, the sum, and per row − and ^.
    assert_eq!(count("sum((u - x)^2) + x", 3), 2 + 3 * 2);
    // A sum of a data-only body is a constant; of a row-independent body, one multiplication.
    assert_eq!(count("3 + sum(u)", 3), 1);
    assert_eq!(count("sum(x*y)", 3), 2);
    // A factored sum costs what the body as written costs: log(y) and the sum outside, and
    // per row −, /, ^, *, + and +.
    assert_eq!(
        count("sum(0.5*((u - x)/y)^2 + log(y) + 0.5*log(2*pi))", 4),
        2 + 4 * 6
    );
}

// ---------------------------------------------------------------------------------------------
// Specialised instructions: the same bits as the operations they replace.

#[test]
fn exact_reciprocals_are_powers_of_two() {
    assert_eq!(exact_reciprocal(2.0), Some(0.5));
    assert_eq!(exact_reciprocal(-0.25), Some(-4.0));
    assert_eq!(exact_reciprocal(1.0), Some(1.0));
    assert_eq!(exact_reciprocal(3.0), None);
    assert_eq!(exact_reciprocal(0.0), None);
    assert_eq!(exact_reciprocal(f64::INFINITY), None);
    // 2^1023: its reciprocal 2^-1023 is subnormal, still exact.
    let big = f64::from_bits(0x7fe0_0000_0000_0000);
    assert_eq!(exact_reciprocal(big).map(|r| r * big), Some(1.0));
    let mut rng = Stream::new(3, Purpose::Check, 10);
    for _ in 0..1000 {
        let x = (rng.uniform() - 0.5) * 1e6;
        for c in [2.0, 0.5, -8.0, 1024.0] {
            let r = exact_reciprocal(c).unwrap();
            assert_eq!((x / c).to_bits(), (x * r).to_bits());
        }
    }
}

#[test]
fn written_out_powers_are_repeated_squaring() {
    let mut rng = Stream::new(3, Purpose::Check, 11);
    for _ in 0..2000 {
        let x = (rng.uniform() - 0.5) * 20.0;
        for n in -3..=12 {
            assert_eq!(powi_small(x, n).to_bits(), powi(x, n).to_bits(), "{x}^{n}");
        }
    }
    for x in [0.0, -0.0, f64::INFINITY, f64::NEG_INFINITY, 1e300, -1e-300] {
        for n in 1..=8 {
            let (a, b) = (powi_small(x, n), powi(x, n));
            assert!(a.to_bits() == b.to_bits() || (a.is_nan() && b.is_nan()));
        }
    }
}

#[test]
fn powers_with_their_derivatives() {
    let mut rng = Stream::new(3, Purpose::Check, 20);
    for _ in 0..2000 {
        let x = (rng.uniform() - 0.5) * 20.0;
        for n in -3..=12 {
            let (p, d) = powi_with_slope(x, n);
            assert_eq!(p.to_bits(), powi(x, n).to_bits(), "{x}^{n}");
            let want = if n == 0 {
                0.0
            } else {
                n as f64 * powi(x, n - 1)
            };
            assert!(
                (d - want).abs() <= 1e-14 * want.abs(),
                "{x}^{n}: {d} vs {want}"
            );
        }
    }
}

#[test]
fn sine_and_cosine_together_are_the_same_bits() {
    // Gradient mode computes both at once (libm's sincos); value mode calls sin and cos.
    let mut rng = Stream::new(3, Purpose::Check, 12);
    for k in 0..20000 {
        let x = match k % 4 {
            0 => (rng.uniform() - 0.5) * 1e-7,
            1 => (rng.uniform() - 0.5) * 10.0,
            2 => (rng.uniform() - 0.5) * 1e6,
            _ => (rng.uniform() - 0.5) * 1e300,
        };
        let (s, c) = libm::sincos(x);
        assert_eq!(s.to_bits(), libm::sin(x).to_bits(), "sin {x}");
        assert_eq!(c.to_bits(), libm::cos(x).to_bits(), "cos {x}");
    }
    let mut c = build("cos(x/2)*sin(y) - sin(-x)*cos(3*y)", &["x", "y"], &[]);
    for k in 0..200 {
        let x = [0.37 * k as f64 - 30.0, 1.3 - 0.05 * k as f64];
        agree(&mut c, &x, 1e-14, "trigonometry");
    }
}

#[test]
fn fused_chains_of_additions_give_the_bits_of_the_operations_they_replace() {
    // Chains of scaled terms, constants, negations, products and shifted squares, each
    // compared bit for bit with the same operations done one at a time here.
    let mut c = build(
        "2*x - y/4 + 3 - x*y + (x - 1.5)^2*0.5 - (2 - y)^2 + z",
        &["x", "y", "z"],
        &[],
    );
    let mut rng = Stream::new(3, Purpose::Check, 13);
    for _ in 0..500 {
        let (x, y, z) = (
            (rng.uniform() - 0.5) * 8.0,
            (rng.uniform() - 0.5) * 8.0,
            (rng.uniform() - 0.5) * 8.0,
        );
        let t1 = x - 1.5;
        let t2 = 2.0 - y;
        let want =
            ((((((2.0 * x) - (y / 4.0)) + 3.0) - (x * y)) + ((t1 * t1) * 0.5)) - (t2 * t2)) + z;
        assert_eq!(c.ev.value(&[x, y, z]).to_bits(), want.to_bits());
        agree(&mut c, &[x, y, z], 1e-14, "chain");
    }
    // -(a + b) as (-a) + (-b): the same number.
    let mut c = build("-(x + 2*y - 3)", &["x", "y"], &[]);
    assert_eq!(c.ev.value(&[1.25, -0.5]), -(1.25 + 2.0 * -0.5 - 3.0));
    agree(&mut c, &[1.25, -0.5], 1e-15, "negated chain");
}

#[test]
fn scaled_and_shifted_operands() {
    let mut c = build(
        "exp(-x) + cos(y/2) + log(4*x) + (x + 2)^5 + (1 - y)^3 + (y - 0.5)^2",
        &["x", "y"],
        &[],
    );
    let mut rng = Stream::new(3, Purpose::Check, 14);
    for _ in 0..300 {
        let x = [0.1 + 3.0 * rng.uniform(), (rng.uniform() - 0.5) * 6.0];
        agree(&mut c, &x, 1e-13, "scaled and shifted");
    }
    // The power of a shifted operand is the power of the sum: (x + 2)^5 at x = 1 is 3^5.
    let mut ev = compile("(x + 2)^5", &["x"], &[]);
    let mut g = [0.0];
    assert_eq!(ev.value_grad(&[1.0], &mut g), 243.0);
    assert_eq!(g, [5.0 * 81.0]);
}

#[test]
fn log_sum_exp_of_many_arguments() {
    // Finite arguments: log Σ e^x_i, with gradient the softmax (exact for these values).
    let mut ev = compile("logsumexp(x, y, z, 0)", &["x", "y", "z"], &[]);
    let l3 = crate::common::maths::ln(3.0);
    let mut g = [0.0; 3];
    let v = ev.value_grad(&[l3, l3, l3], &mut g);
    // e^x = 3 for each: log(3 + 3 + 3 + 1) = log 10; weights 3/10 each.
    assert!((v - crate::common::maths::ln(10.0)).abs() < 1e-15, "{v}");
    for gi in g {
        assert!((gi - 0.3).abs() < 1e-15, "{g:?}");
    }
    // With an infinite or NaN argument it is the chain of log-add-exps, bit for bit.
    let chain = |xs: &[f64]| xs[1..].iter().fold(xs[0], |a, &b| log_add_exp(a, b));
    use crate::common::maths::log_add_exp;
    let mut c = build("logsumexp(x, y, z, 1)", &["x", "y", "z"], &[]);
    for xs in [
        [f64::NEG_INFINITY, 0.5, 2.0],
        [f64::NEG_INFINITY, f64::NEG_INFINITY, f64::NEG_INFINITY],
        [f64::INFINITY, 0.5, f64::NAN],
        [f64::NAN, f64::NEG_INFINITY, 2.0],
        [f64::NAN, f64::INFINITY, 2.0],
        [f64::INFINITY, f64::NEG_INFINITY, 0.0],
    ] {
        let want = chain(&[xs[0], xs[1], xs[2], 1.0]);
        let mut g = [0.0; 3];
        let v = c.ev.value_grad(&xs, &mut g);
        assert!(
            v.to_bits() == want.to_bits() || (v.is_nan() && want.is_nan()),
            "{xs:?}: {v} vs {want}"
        );
        agree(&mut c, &xs, 1e-14, "logsumexp with infinities");
    }
    let mut rng = Stream::new(3, Purpose::Check, 15);
    for _ in 0..300 {
        let x: Vec<f64> = (0..3).map(|_| (rng.uniform() - 0.5) * 60.0).collect();
        agree(&mut c, &x, 1e-14, "logsumexp");
    }
}

// ---------------------------------------------------------------------------------------------
// Factored sums: exact algebra, and the body as written wherever the factored form may differ.

fn data(n: usize, seed: u64) -> Vec<f64> {
    let mut rng = Stream::new(seed, Purpose::Check, 16);
    (0..n).map(|_| 3.0 * rng.uniform() - 1.0).collect()
}

#[test]
fn gaussian_likelihood_by_hand() {
    // Σ ((y - μ)/σ)²/2 + log σ + log(2π)/2 = S/(2σ²) + n log σ + n log(2π)/2 with
    // S = Σ (y - μ)², and gradient (-Σ(y - μ)/σ², -S/σ³ + n/σ).
    let y = data(300, 1);
    let mut ev = compile(
        "sum(0.5*((y - mu)/sigma)^2 + log(sigma) + 0.5*log(2*pi))",
        &["mu", "sigma"],
        &[("y", y.clone())],
    );
    let n = y.len() as f64;
    for &(mu, sigma) in &[(0.3, 1.2), (-1.0, 0.05), (2.0, 30.0)] {
        let s: f64 = y.iter().map(|v| (v - mu) * (v - mu)).sum();
        let d: f64 = y.iter().map(|v| v - mu).sum();
        let want = s / (2.0 * sigma * sigma)
            + n * crate::common::maths::ln(sigma)
            + n * 0.5 * crate::common::maths::LN_2PI;
        let mut g = [0.0; 2];
        let v = ev.value_grad(&[mu, sigma], &mut g);
        assert!((v - want).abs() <= 1e-12 * want.abs(), "{v} vs {want}");
        let g0 = -d / (sigma * sigma);
        let g1 = -s / (sigma * sigma * sigma) + n / sigma;
        assert!((g[0] - g0).abs() <= 1e-11 * (1.0 + g0.abs()), "{g:?} {g0}");
        assert!(
            (g[1] - g1).abs() <= 1e-11 * (s / (sigma * sigma * sigma)),
            "{g:?} {g1}"
        );
    }
}

#[test]
fn factored_sums_agree_with_the_body_as_written() {
    let u = data(37, 2);
    let v: Vec<f64> = data(37, 3).iter().map(|x| x + 2.0).collect();
    let cols = [("u", u), ("v", v)];
    for text in [
        "sum(0.5*((u - x)/y)^2 + log(y) + 0.5*log(2*pi))",
        "sum(x*u + z)",
        "sum(3*(u*x)^3 - (y*u)^2/4)",
        "sum(-(x - u)) + sum(u - y)",
        "sum(log(v) + x*v - exp(x)*u/y)",
        "sum(((u - x)/(y*y + 1))^4 * 2 + z)",
        "sum(lgamma(v + x*x) - lgamma(x*x + 1))",
        "sum(u*y + (x + u)^2)",
        "sum(min(u, x) - 2*z)",
        "sum(exp(1 - (z - u)))",
        "sum(exp(-(u - z)) * v + cos(2 + u - x))",
        "sum((x*(u + 1))^3 + ((u - z)/(1 + y))^5)",
    ] {
        let mut c = build(text, &["x", "y", "z"], &cols);
        let mut rng = Stream::new(4, Purpose::Check, 17);
        for _ in 0..50 {
            let x: Vec<f64> = (0..3).map(|_| 0.2 + 2.0 * rng.uniform()).collect();
            agree(&mut c, &x, 1e-12, text);
        }
    }
}

#[test]
fn factored_sums_keep_the_meaning_of_infinities_and_nan() {
    let u = vec![1.0, 0.0, -2.0, 3.0];
    let cols = [("u", u)];
    // exp(x) overflows: rows with u = z are inf·0 = NaN as written (not ±inf from inf·Σ).
    let mut c = build("sum(exp(x) * (u - z))", &["x", "z"], &cols);
    agree(&mut c, &[800.0, 0.0], 0.0, "infinite factor");
    assert!(c.ev.value(&[800.0, 0.0]).is_nan());
    agree(&mut c, &[800.0, 0.5], 0.0, "infinite factor, no zero row");
    agree(&mut c, &[1.0, 0.5], 1e-14, "finite factor");
    // Dividing by zero: u/0 is ±inf or NaN row by row, never (Σu)/0.
    let mut c = build("sum(u / x)", &["x"], &cols);
    agree(&mut c, &[0.0], 0.0, "zero divisor");
    assert!(c.ev.value(&[0.0]).is_nan());
    // (u/σ)^2 with σ^2 overflowing: finite as written, so finite here.
    let mut c = build("sum(((u - x)/y)^2)", &["x", "y"], &cols);
    agree(&mut c, &[1e200, 1e200], 1e-14, "overflowing divisor");
    assert!(c.ev.value(&[1e200, 1e200]).is_finite());
    // (u - x)^2 overflows while ((u - x)/y)^2 does not: the body as written decides.
    agree(&mut c, &[1e160, 1e10], 1e-14, "overflowing core");
    assert!(c.ev.value(&[1e160, 1e10]).is_finite());
    // log(σ) of a negative σ: NaN.
    let mut c = build("sum(0.5*((u - x)/y)^2 + log(y))", &["x", "y"], &cols);
    assert!(c.ev.value(&[0.0, -1.0]).is_nan());
    agree(&mut c, &[0.0, -1.0], 0.0, "negative sd");
    // An infinite invariant term.
    let mut c = build("sum(u + exp(x))", &["x"], &cols);
    assert_eq!(c.ev.value(&[800.0]), f64::INFINITY);
    agree(&mut c, &[800.0], 0.0, "infinite term");
}

#[test]
fn factored_sums_that_cancel_are_added_row_by_row() {
    // Σ lgamma(u + x) − n lgamma(x) cancels to a few digits for large x; row by row the
    // difference keeps its relative accuracy. The reference adds row by row.
    let u: Vec<f64> = (0..272).map(|i| (i % 7) as f64).collect();
    let mut c = build("sum(lgamma(u + x) - lgamma(x))", &["x"], &[("u", u)]);
    for x in [1e6, 3.5e7] {
        agree(&mut c, &[x], 1e-13, "cancelling terms");
    }
    // A difference of a data value and an unknown is never split into Σu − n·x.
    let u: Vec<f64> = (0..272).map(|i| 1e8 + (i % 5) as f64).collect();
    let mut c = build("sum(u - x)", &["x"], &[("u", u)]);
    agree(&mut c, &[1e8 + 2.0], 1e-15, "data minus unknown");
}

#[test]
fn sums_over_many_blocks() {
    // More rows than a block holds: the same numbers, block boundaries included.
    let n = 20_011;
    let u = data(n, 5);
    let v: Vec<f64> = data(n, 6).iter().map(|x| x.abs() + 0.5).collect();
    for text in [
        "sum(0.5*((u - x)/y)^2 + log(y))",
        "sum(log(v) * sin(x*u) + cos(y*v)^2 + logsumexp(u*x, v, y, 0.5)/(1 + v))",
        "sum(atan2(u, v + x*x) * tanh(y - u) - sqrt(v + y*y))",
    ] {
        let mut c = build(text, &["x", "y"], &[("u", u.clone()), ("v", v.clone())]);
        for x in [[0.3, 1.2], [-1.1, 0.7]] {
            agree(&mut c, &x, 1e-12, text);
        }
    }
}

#[test]
fn division_by_a_row_invariant_value() {
    // Each row is divided by the same value, computed as a multiplication by its reciprocal
    // where that is a normal number; at the edges the division itself.
    let u = data(40, 7);
    let mut c = build("sum(atan(u / y) + x*u)", &["x", "y"], &[("u", u)]);
    for y in [3.0, 1e-300, 1e300, 5e-324, 0.0, -0.0, f64::INFINITY] {
        agree(&mut c, &[0.1, y], 1e-14, "reciprocal");
    }
}

// ---------------------------------------------------------------------------------------------
// Random formulas against the reference.

/// A random formula over x, y, z (and data u, v inside sums); well-conditioned by construction.
fn random_formula(rng: &mut Stream, depth: usize, data: bool) -> String {
    let names: &[&str] = if data {
        &["x", "y", "z", "u", "v", "u"]
    } else {
        &["x", "y", "z"]
    };
    if depth == 0 {
        return match rng.below(4) {
            0 => format!("{:.3}", 4.0 * rng.uniform() - 2.0),
            _ => names[rng.below(names.len())].to_string(),
        };
    }
    let a = random_formula(rng, depth - 1, data);
    let b = random_formula(rng, depth - 1, data);
    match rng.below(33) {
        0 | 1 => format!("({a} + {b})"),
        2 | 3 => format!("({a} - {b})"),
        4 | 5 => format!("({a} * {b})"),
        6 => format!("({a} / (1.5 + ({b})^2))"),
        7 => format!("({a} - 1.25)^2"),
        8 => format!("(2 - {a})^3 * 0.125"),
        9 => format!("exp(-0.3 * {a})"),
        10 => format!("log(1 + ({a})^2)"),
        11 => format!("cos(({a})/2)"),
        12 => format!("sin(0.5 * {a})"),
        13 => format!("atan({a})"),
        14 => format!("tanh({a})"),
        15 => format!("logsumexp({a}, {b}, 0.5, -({a}))"),
        16 => format!("logsumexp({a}, {b})"),
        17 => format!("sqrt(2 + ({a})^2)"),
        18 => format!("erf({a})"),
        19 => format!("-(({a}) + 2*({b}) - 1)"),
        20 => format!("min({a}, {b})"),
        21 => format!("max({a}, 0.25)"),
        22 => format!("atan2({a}, 2 + ({b})^2)"),
        23 => format!("pow(1.2 + ({a})^2, 0.7)"),
        24 => format!("(3*({a}) - ({b})/4 + 1)"),
        25 => format!("-({a})"),
        26 => format!("log1p(({a})^2)"),
        27 => format!("(({a}) + 0.5)^4 / 16"),
        28 => format!("lgamma(2 + ({a})^2)"),
        29 => format!("((z + 1) * ({a}))^3"),
        30 => format!("(({a}) / (2 + y*y))^3"),
        31 => format!("(1 - ({a} - {b}))"),
        _ => format!("expm1(0.2 * {a})"),
    }
}

#[test]
fn random_formulas_agree_with_the_reference() {
    let mut rng = Stream::new(2026, Purpose::Check, 18);
    for case in 0..600 {
        let text = random_formula(&mut rng, 1 + case % 4, false);
        let mut c = build(&text, &["x", "y", "z"], &[]);
        for _ in 0..3 {
            let x: Vec<f64> = (0..3).map(|_| 3.0 * rng.uniform() - 1.5).collect();
            agree(&mut c, &x, 1e-12, &text);
        }
    }
}

#[test]
fn random_sums_agree_with_the_reference() {
    let mut rng = Stream::new(2026, Purpose::Check, 19);
    for case in 0..300 {
        let rows = [1, 5, 40, 333][case % 4];
        let u = data(rows, 100 + case as u64);
        let v = data(rows, 200 + case as u64);
        let inner = random_formula(&mut rng, 1 + case % 3, true);
        let outer = random_formula(&mut rng, 1, false);
        let text = match case % 3 {
            0 => format!("sum({inner})"),
            1 => format!("{outer} + 0.1 * sum({inner}) - sum((u - x)^2 * v)"),
            _ => format!("sum(0.5*((u - x)/(1 + y*y))^2 + log(1 + y*y) + {inner})"),
        };
        let mut c = build(&text, &["x", "y", "z"], &[("u", u), ("v", v)]);
        for _ in 0..3 {
            let x: Vec<f64> = (0..3).map(|_| 2.0 * rng.uniform() - 1.0).collect();
            agree(&mut c, &x, 1e-11, &text);
        }
    }
}

#[test]
fn the_fuzz_corpus_evaluates_as_the_reference_does() {
    // Every formula kept by fuzzing (the fuzz target's unknowns and data): value and gradient
    // agree, and value with and without gradient give the same bits. Formulas whose value is
    // sensitive to the last bit of an intermediate (a huge argument of a periodic function)
    // are compared by class only.
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("fuzz/corpus/formula");
    let Ok(entries) = std::fs::read_dir(&dir) else {
        return;
    };
    let mut files: Vec<_> = entries.filter_map(|e| e.ok()).map(|e| e.path()).collect();
    files.sort();
    let mut checked = 0;
    for f in files {
        let Ok(bytes) = std::fs::read(&f) else {
            continue;
        };
        if bytes.len() < 16 {
            continue;
        }
        let (nums, rest) = bytes.split_at(16);
        let Ok(text) = std::str::from_utf8(rest) else {
            continue;
        };
        let x = f64::from(i16::from_le_bytes([nums[0], nums[1]])) / 1000.0;
        let y = f64::from(i16::from_le_bytes([nums[2], nums[3]])) / 1000.0;
        let vars: Vec<String> = vec!["x".into(), "y".into()];
        let names: Vec<String> = vec!["d".into()];
        let Ok(prog) = parse("energy", text) else {
            continue;
        };
        let columns = vec![vec![0.5, -1.0, 2.0]];
        let table = DataTable::of(&columns);
        let inputs = crate::formula::resolve::Inputs::plain(&vars, &names, &table);
        let Ok(graph) = resolve("energy", text, &prog, &inputs, &[]) else {
            continue;
        };
        let tape = Tape::compile(
            &graph,
            2,
            &DataTable {
                columns: &columns,
                rows: 3,
            },
        );
        let mut c = Compiled {
            graph,
            columns,
            n_vars: 2,
            ev: Evaluator::new(Arc::new(tape)),
        };
        for p in [[x, y], [0.3, -0.7], [1.7, 2.2], [0.0, 0.0]] {
            let mut g = [0.0; 2];
            let v = c.ev.value_grad(&p, &mut g);
            let v2 = c.ev.value(&p);
            assert!(
                v.to_bits() == v2.to_bits() || (v.is_nan() && v2.is_nan()),
                "{text:?}"
            );
            let r = reference(&c, &p);
            let sensitive = text.contains("sin") || text.contains("cos") || text.contains("tan");
            if !sensitive || !r.v.is_finite() || r.v.abs() < 1e6 {
                assert!(same_class(v, r.v), "{text:?} at {p:?}: {v} vs {}", r.v);
            }
            if r.v.is_finite() && !sensitive {
                assert!(
                    (v - r.v).abs() <= 1e-9 * (1.0 + r.v.abs()),
                    "{text:?} at {p:?}: {v} vs {}",
                    r.v
                );
            }
        }
        checked += 1;
    }
    assert!(
        checked > 100 || checked == 0,
        "only {checked} corpus formulas"
    );
}
