//! The built-in log densities of the formula language: `logd_<name>(x, parameters…)`, the
//! normalised log density (or log mass, for counts) of a standard distribution at `x`.
//!
//! Owns: the table of densities (function names, argument names, one-line descriptions and
//! examples, which arguments must be whole numbers), each density written as a graph of the
//! language's own operations (so that gradients are exact in every argument, data and unknowns
//! alike, and so that a sum over data rows factors its row-invariant parts out as any formula
//! does), and the support conditions: each density's value is −∞ (never NaN) outside the
//! support of its arguments, through support tests (`Binary::WherePos`, `WhereNonNeg`) that
//! `resolve` either checks before any run (constant and data arguments) or leaves in the graph.
//! Must not: know about the spec, priors or sampling; resolve names (that is `resolve`).
//!
//! The naming scheme: every built-in density is `logd_` ("log density") followed by the
//! distribution's plain name; a prior in a spec names the distribution alone (`normal(0, 10)`).

use crate::common::maths::{Binary, Unary, LN_2PI, PI};
use crate::formula::resolve::{Node, NodeId};

/// The prefix of every built-in density's function name.
pub const PREFIX: &str = "logd_";

/// How an argument must look when it is a constant or data (checked before any run).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Whole {
    /// Any real number (its support is checked by the conditions).
    No,
    /// A whole number (counts, trials); unknowns use the continuous extension (via lgamma).
    Yes,
}

/// One built-in density.
#[derive(Clone, Copy, Debug)]
pub struct Density {
    /// The distribution's name; the function is `logd_<name>`.
    pub name: &'static str,
    pub args: &'static [&'static str],
    /// Which arguments must be whole numbers when given as constants or data.
    pub whole: &'static [Whole],
    pub summary: &'static str,
    pub example: &'static str,
    /// A count distribution (log mass rather than log density).
    pub discrete: bool,
}

const N: Whole = Whole::No;
const W: Whole = Whole::Yes;

/// Every built-in density, in the order the documentation lists them.
pub const DENSITIES: &[Density] = &[
    Density {
        name: "normal",
        args: &["x", "mean", "sd"],
        whole: &[N, N, N],
        summary: "normal (Gaussian) log density; sd > 0",
        example: "sum(logd_normal(y, mu, sigma))",
        discrete: false,
    },
    Density {
        name: "student",
        args: &["x", "df", "loc", "scale"],
        whole: &[N, N, N, N],
        summary: "Student-t log density with df degrees of freedom; df > 0, scale > 0",
        example: "sum(logd_student(y, 4, mu, s))",
        discrete: false,
    },
    Density {
        name: "cauchy",
        args: &["x", "loc", "scale"],
        whole: &[N, N, N],
        summary: "Cauchy log density; scale > 0",
        example: "logd_cauchy(slope, 0, 2.5)",
        discrete: false,
    },
    Density {
        name: "laplace",
        args: &["x", "loc", "scale"],
        whole: &[N, N, N],
        summary: "Laplace (double exponential) log density; scale > 0",
        example: "sum(logd_laplace(y, mu, b))",
        discrete: false,
    },
    Density {
        name: "logistic",
        args: &["x", "loc", "scale"],
        whole: &[N, N, N],
        summary: "logistic log density; scale > 0",
        example: "sum(logd_logistic(y, mu, s))",
        discrete: false,
    },
    Density {
        name: "exponential",
        args: &["x", "rate"],
        whole: &[N, N],
        summary: "exponential log density (mean 1/rate); x ≥ 0, rate > 0",
        example: "sum(logd_exponential(wait, lambda))",
        discrete: false,
    },
    Density {
        name: "gamma",
        args: &["x", "shape", "rate"],
        whole: &[N, N, N],
        summary: "gamma log density (mean shape/rate); x ≥ 0, shape > 0, rate > 0",
        example: "logd_gamma(tau, 2, 0.5)",
        discrete: false,
    },
    Density {
        name: "invgamma",
        args: &["x", "shape", "scale"],
        whole: &[N, N, N],
        summary: "inverse-gamma log density; x > 0, shape > 0, scale > 0",
        example: "logd_invgamma(v, 3, 2)",
        discrete: false,
    },
    Density {
        name: "beta",
        args: &["x", "a", "b"],
        whole: &[N, N, N],
        summary: "beta log density on [0, 1]; a > 0, b > 0",
        example: "logd_beta(p, 2, 5)",
        discrete: false,
    },
    Density {
        name: "lognormal",
        args: &["x", "meanlog", "sdlog"],
        whole: &[N, N, N],
        summary: "log-normal log density (log x is normal); x > 0, sdlog > 0",
        example: "sum(logd_lognormal(size, m, s))",
        discrete: false,
    },
    Density {
        name: "vonmises",
        args: &["x", "loc", "kappa"],
        whole: &[N, N, N],
        summary: "von Mises log density of an angle in radians (over one turn); kappa ≥ 0",
        example: "sum(logd_vonmises(bearing, mu, kappa))",
        discrete: false,
    },
    Density {
        name: "uniform",
        args: &["x", "lower", "upper"],
        whole: &[N, N, N],
        summary: "uniform log density on [lower, upper]; lower < upper",
        example: "logd_uniform(c, 0, 10)",
        discrete: false,
    },
    Density {
        name: "poisson",
        args: &["k", "rate"],
        whole: &[W, N],
        summary: "Poisson log mass of the count k ≥ 0; rate ≥ 0",
        example: "sum(logd_poisson(count, exp(a + b*x)))",
        discrete: true,
    },
    Density {
        name: "binomial",
        args: &["k", "n", "p"],
        whole: &[W, W, N],
        summary: "binomial log mass of k successes in n trials; 0 ≤ k ≤ n, 0 ≤ p ≤ 1",
        example: "sum(logd_binomial(hits, trials, p))",
        discrete: true,
    },
    Density {
        name: "negbinomial",
        args: &["k", "mean", "size"],
        whole: &[W, N, N],
        summary: "negative binomial log mass with variance mean + mean²/size; mean ≥ 0, size > 0",
        example: "sum(logd_negbinomial(count, m, phi))",
        discrete: true,
    },
    Density {
        name: "bernoulli",
        args: &["y", "p"],
        whole: &[W, N],
        summary: "Bernoulli log mass of y ∈ {0, 1} with P(y = 1) = p; 0 ≤ p ≤ 1",
        example: "sum(logd_bernoulli(success, p))",
        discrete: true,
    },
    Density {
        name: "bernoulli_logodds",
        args: &["y", "logodds"],
        whole: &[W, N],
        summary: "Bernoulli log mass of y ∈ {0, 1} with P(y = 1) = 1/(1 + e^−logodds)",
        example: "sum(logd_bernoulli_logodds(passed, a + b*dose))",
        discrete: true,
    },
];

/// The density whose function name is `name` (with the prefix).
pub fn by_function(name: &str) -> Option<(usize, &'static Density)> {
    let short = name.strip_prefix(PREFIX)?;
    by_name(short)
}

/// The density called `name` (without the prefix), as a prior names it.
pub fn by_name(name: &str) -> Option<(usize, &'static Density)> {
    DENSITIES.iter().enumerate().find(|(_, d)| d.name == name)
}

/// The function names of every density.
pub fn function_names() -> impl Iterator<Item = String> {
    DENSITIES.iter().map(|d| format!("{PREFIX}{}", d.name))
}

/// A support condition of a density: `node` > 0 (`strict`) or ≥ 0 must hold.
#[derive(Clone, Debug)]
pub struct Condition {
    pub node: NodeId,
    pub strict: bool,
    /// The argument the message is about (for the caret).
    pub arg: usize,
    pub message: String,
}

/// What the expansion needs from the graph being built.
pub trait Graph {
    fn add(&mut self, node: Node) -> NodeId;
    fn node(&self, id: NodeId) -> Node;
    /// Whether `id` is known to be positive on every row (a positive constant, or data whose
    /// every row is positive): then `x · log(id)` needs no zero test.
    fn known_positive(&mut self, id: NodeId) -> bool;
}

struct Ops<'a, G: Graph + ?Sized> {
    g: &'a mut G,
}

impl<G: Graph + ?Sized> Ops<'_, G> {
    fn c(&mut self, v: f64) -> NodeId {
        self.g.add(Node::Const(v))
    }
    fn bin(&mut self, op: Binary, a: NodeId, b: NodeId) -> NodeId {
        self.g.add(Node::Binary(op, a, b))
    }
    fn un(&mut self, op: Unary, a: NodeId) -> NodeId {
        self.g.add(Node::Unary(op, a))
    }
    fn add(&mut self, a: NodeId, b: NodeId) -> NodeId {
        self.bin(Binary::Add, a, b)
    }
    fn sub(&mut self, a: NodeId, b: NodeId) -> NodeId {
        self.bin(Binary::Sub, a, b)
    }
    fn mul(&mut self, a: NodeId, b: NodeId) -> NodeId {
        self.bin(Binary::Mul, a, b)
    }
    fn div(&mut self, a: NodeId, b: NodeId) -> NodeId {
        self.bin(Binary::Div, a, b)
    }
    fn sq(&mut self, a: NodeId) -> NodeId {
        let two = self.c(2.0);
        self.bin(Binary::Pow, a, two)
    }
    fn subc(&mut self, a: NodeId, c: f64) -> NodeId {
        let c = self.c(c);
        self.sub(a, c)
    }
    fn mulc(&mut self, c: f64, a: NodeId) -> NodeId {
        let c = self.c(c);
        self.mul(c, a)
    }
    /// log(a), with log(exp(e)) written as e (exact, and it cannot overflow).
    fn log(&mut self, a: NodeId) -> NodeId {
        match self.g.node(a) {
            Node::Unary(Unary::Exp, e) => e,
            _ => self.un(Unary::Log, a),
        }
    }
    fn lgamma(&mut self, a: NodeId) -> NodeId {
        self.un(Unary::Lgamma, a)
    }
    /// x · log(y): a plain product where y is known to be positive or is an exponential.
    fn xlogy(&mut self, x: NodeId, y: NodeId) -> NodeId {
        if matches!(self.g.node(y), Node::Unary(Unary::Exp, _)) || self.g.known_positive(y) {
            let l = self.log(y);
            self.mul(x, l)
        } else {
            self.bin(Binary::XLogY, x, y)
        }
    }
    /// x · log(1 + y) where y is −p for a probability p (or another value ≥ −1).
    fn xlog1py(&mut self, x: NodeId, y: NodeId) -> NodeId {
        self.bin(Binary::XLog1pY, x, y)
    }
}

fn cond(node: NodeId, strict: bool, arg: usize, message: String) -> Condition {
    Condition {
        node,
        strict,
        arg,
        message,
    }
}

/// The log density `which` of `args` (as many as the density has), written in the graph, and
/// the conditions its arguments must meet (outside them the value is −∞).
pub fn expand<G: Graph + ?Sized>(
    which: usize,
    g: &mut G,
    args: &[NodeId],
) -> (NodeId, Vec<Condition>) {
    let d = &DENSITIES[which];
    let f = format!("{PREFIX}{}", d.name);
    let mut o = Ops { g };
    let positive = |i: usize, what: &str| {
        cond(
            args[i],
            true,
            i,
            format!("the {what} `{}` of {f} must be positive", d.args[i]),
        )
    };
    let non_negative = |i: usize, what: &str| {
        cond(
            args[i],
            false,
            i,
            format!("the {what} `{}` of {f} must not be negative", d.args[i]),
        )
    };
    let a = |i: usize| args[i];
    match d.name {
        "normal" => {
            // −(x − m)²/(2 s²) − log s − log(2π)/2
            let z = o.sub(a(0), a(1));
            let z = o.div(z, a(2));
            let q = o.sq(z);
            let q = o.mulc(-0.5, q);
            let ls = o.log(a(2));
            let v = o.sub(q, ls);
            let v = o.subc(v, 0.5 * LN_2PI);
            (v, vec![positive(2, "standard deviation")])
        }
        "student" => {
            // lgamma((ν+1)/2) − lgamma(ν/2) − log(νπ)/2 − log s − (ν+1)/2 · log1p((x−m)²/(ν s²))
            let (nu, s) = (a(1), a(3));
            let one = o.c(1.0);
            let nu1 = o.add(nu, one);
            let half = o.c(0.5);
            let h1 = o.mul(nu1, half);
            let h0 = o.mul(nu, half);
            let g1 = o.lgamma(h1);
            let g0 = o.lgamma(h0);
            let norm = o.sub(g1, g0);
            let nupi = o.mulc(PI, nu);
            let lnupi = o.log(nupi);
            let lnupi = o.mulc(0.5, lnupi);
            let norm = o.sub(norm, lnupi);
            let ls = o.log(s);
            let norm = o.sub(norm, ls);
            let r = o.sub(a(0), a(2));
            let r2 = o.sq(r);
            let s2 = o.sq(s);
            let den = o.mul(nu, s2);
            let t = o.div(r2, den);
            let l = o.un(Unary::Log1p, t);
            let tail = o.mul(h1, l);
            let v = o.sub(norm, tail);
            (
                v,
                vec![positive(1, "degrees of freedom"), positive(3, "scale")],
            )
        }
        "cauchy" => {
            // −log π − log s − log1p(((x − m)/s)²)
            let z = o.sub(a(0), a(1));
            let z = o.div(z, a(2));
            let q = o.sq(z);
            let l = o.un(Unary::Log1p, q);
            let ls = o.log(a(2));
            let v = o.add(l, ls);
            let c = o.c(-crate::common::maths::ln(PI));
            let v = o.sub(c, v);
            (v, vec![positive(2, "scale")])
        }
        "laplace" => {
            // −log 2 − log s − |x − m|/s
            let r = o.sub(a(0), a(1));
            let r = o.un(Unary::Abs, r);
            let r = o.div(r, a(2));
            let ls = o.log(a(2));
            let v = o.add(r, ls);
            let c = o.c(-std::f64::consts::LN_2);
            let v = o.sub(c, v);
            (v, vec![positive(2, "scale")])
        }
        "logistic" => {
            // −z − 2 softplus(−z) − log s, z = (x − m)/s
            let z = o.sub(a(0), a(1));
            let z = o.div(z, a(2));
            let nz = o.un(Unary::Neg, z);
            let sp = o.un(Unary::Softplus, nz);
            let sp = o.mulc(2.0, sp);
            let v = o.sub(nz, sp);
            let ls = o.log(a(2));
            let v = o.sub(v, ls);
            (v, vec![positive(2, "scale")])
        }
        "exponential" => {
            // log r − r x
            let lr = o.log(a(1));
            let rx = o.mul(a(1), a(0));
            let v = o.sub(lr, rx);
            (v, vec![non_negative(0, "value"), positive(1, "rate")])
        }
        "gamma" => {
            // a log r − lgamma(a) + (a − 1) log x − r x
            let (x, k, r) = (a(0), a(1), a(2));
            let lr = o.log(r);
            let t = o.mul(k, lr);
            let lg = o.lgamma(k);
            let t = o.sub(t, lg);
            let km1 = o.subc(k, 1.0);
            let xl = o.xlogy(km1, x);
            let t = o.add(t, xl);
            let rx = o.mul(r, x);
            let v = o.sub(t, rx);
            (
                v,
                vec![
                    non_negative(0, "value"),
                    positive(1, "shape"),
                    positive(2, "rate"),
                ],
            )
        }
        "invgamma" => {
            // a log s − lgamma(a) − (a + 1) log x − s/x
            let (x, k, sc) = (a(0), a(1), a(2));
            let ls = o.log(sc);
            let t = o.mul(k, ls);
            let lg = o.lgamma(k);
            let t = o.sub(t, lg);
            let one = o.c(1.0);
            let k1 = o.add(k, one);
            let lx = o.log(x);
            let kl = o.mul(k1, lx);
            let t = o.sub(t, kl);
            let q = o.div(sc, x);
            let v = o.sub(t, q);
            (
                v,
                vec![
                    positive(0, "value"),
                    positive(1, "shape"),
                    positive(2, "scale"),
                ],
            )
        }
        "beta" => {
            // (a − 1) log x + (b − 1) log(1 − x) − lbeta(a, b)
            let (x, p, q) = (a(0), a(1), a(2));
            let am1 = o.subc(p, 1.0);
            let t = o.xlogy(am1, x);
            let bm1 = o.subc(q, 1.0);
            let nx = o.un(Unary::Neg, x);
            let u = o.xlog1py(bm1, nx);
            let t = o.add(t, u);
            let ga = o.lgamma(p);
            let gb = o.lgamma(q);
            let ab = o.add(p, q);
            let gab = o.lgamma(ab);
            let lb = o.add(ga, gb);
            let lb = o.sub(lb, gab);
            let v = o.sub(t, lb);
            let one = o.c(1.0);
            let upper = o.sub(one, x);
            (
                v,
                vec![
                    non_negative(0, "value"),
                    cond(
                        upper,
                        false,
                        0,
                        format!("the value `x` of {f} must not exceed 1"),
                    ),
                    positive(1, "shape"),
                    positive(2, "shape"),
                ],
            )
        }
        "lognormal" => {
            // −log x − log s − log(2π)/2 − (log x − m)²/(2 s²)
            let lx = o.log(a(0));
            let z = o.sub(lx, a(1));
            let z = o.div(z, a(2));
            let q = o.sq(z);
            let q = o.mulc(-0.5, q);
            let ls = o.log(a(2));
            let t = o.add(lx, ls);
            let v = o.sub(q, t);
            let v = o.subc(v, 0.5 * LN_2PI);
            (v, vec![positive(0, "value"), positive(2, "log-scale sd")])
        }
        "vonmises" => {
            // κ cos(x − m) − log(2π I0(κ)) = −2κ sin²((x − m)/2) − log 2π − (log I0(κ) − κ)
            let r = o.sub(a(0), a(1));
            let h = o.mulc(0.5, r);
            let sn = o.un(Unary::Sin, h);
            let s2 = o.sq(sn);
            let t = o.mul(a(2), s2);
            let t = o.mulc(-2.0, t);
            let li = o.un(Unary::LogI0e, a(2));
            let t = o.sub(t, li);
            let v = o.subc(t, LN_2PI);
            (v, vec![non_negative(2, "concentration")])
        }
        "uniform" => {
            // −log(b − a) on [a, b]
            let w = o.sub(a(2), a(1));
            let lw = o.log(w);
            let v = o.un(Unary::Neg, lw);
            let lo = o.sub(a(0), a(1));
            let hi = o.sub(a(2), a(0));
            (
                v,
                vec![
                    cond(
                        w,
                        true,
                        2,
                        format!("the upper end `upper` of {f} must be above the lower end `lower`"),
                    ),
                    cond(
                        lo,
                        false,
                        0,
                        format!("the value `x` of {f} is below the lower end `lower`"),
                    ),
                    cond(
                        hi,
                        false,
                        0,
                        format!("the value `x` of {f} is above the upper end `upper`"),
                    ),
                ],
            )
        }
        "poisson" => {
            // k log λ − λ − lgamma(k + 1)
            let (k, lam) = (a(0), a(1));
            let t = o.xlogy(k, lam);
            let t = o.sub(t, lam);
            let one = o.c(1.0);
            let k1 = o.add(k, one);
            let lg = o.lgamma(k1);
            let v = o.sub(t, lg);
            (v, vec![non_negative(0, "count"), non_negative(1, "rate")])
        }
        "binomial" => {
            // lgamma(n+1) − lgamma(k+1) − lgamma(n−k+1) + k log p + (n − k) log(1 − p)
            let (k, n, p) = (a(0), a(1), a(2));
            let one = o.c(1.0);
            let n1 = o.add(n, one);
            let k1 = o.add(k, one);
            let nk = o.sub(n, k);
            let nk1 = o.add(nk, one);
            let g = o.lgamma(n1);
            let gk = o.lgamma(k1);
            let gnk = o.lgamma(nk1);
            let t = o.sub(g, gk);
            let t = o.sub(t, gnk);
            let kp = o.xlogy(k, p);
            let t = o.add(t, kp);
            let np = o.un(Unary::Neg, p);
            let rest = o.xlog1py(nk, np);
            let v = o.add(t, rest);
            let q = o.sub(one, p);
            (
                v,
                vec![
                    non_negative(0, "count"),
                    cond(
                        nk,
                        false,
                        0,
                        format!("the count `k` of {f} must not exceed the number of trials `n`"),
                    ),
                    non_negative(2, "probability"),
                    cond(
                        q,
                        false,
                        2,
                        format!("the probability `p` of {f} must not exceed 1"),
                    ),
                ],
            )
        }
        "negbinomial" => {
            // lgamma(k+φ) − lgamma(φ) − lgamma(k+1) + k log(μ/(μ+φ)) − φ log1p(μ/φ)
            let (k, mu, phi) = (a(0), a(1), a(2));
            let one = o.c(1.0);
            let kphi = o.add(k, phi);
            let g = o.lgamma(kphi);
            let gp = o.lgamma(phi);
            let k1 = o.add(k, one);
            let gk = o.lgamma(k1);
            let t = o.sub(g, gp);
            let t = o.sub(t, gk);
            let tot = o.add(mu, phi);
            let frac = o.div(mu, tot);
            let kl = o.bin(Binary::XLogY, k, frac);
            let t = o.add(t, kl);
            let ratio = o.div(mu, phi);
            let l = o.un(Unary::Log1p, ratio);
            let pl = o.mul(phi, l);
            let v = o.sub(t, pl);
            (
                v,
                vec![
                    non_negative(0, "count"),
                    non_negative(1, "mean"),
                    positive(2, "size"),
                ],
            )
        }
        "bernoulli" => {
            // y log p + (1 − y) log(1 − p)
            let (y, p) = (a(0), a(1));
            let t = o.xlogy(y, p);
            let one = o.c(1.0);
            let ny = o.sub(one, y);
            let np = o.un(Unary::Neg, p);
            let u = o.xlog1py(ny, np);
            let v = o.add(t, u);
            let q = o.sub(one, p);
            (
                v,
                vec![
                    non_negative(0, "outcome"),
                    cond(
                        ny,
                        false,
                        0,
                        format!("the outcome `y` of {f} must be 0 or 1"),
                    ),
                    non_negative(1, "probability"),
                    cond(
                        q,
                        false,
                        1,
                        format!("the probability `p` of {f} must not exceed 1"),
                    ),
                ],
            )
        }
        "bernoulli_logodds" => {
            // y η − softplus(η)
            let (y, eta) = (a(0), a(1));
            let t = o.mul(y, eta);
            let sp = o.un(Unary::Softplus, eta);
            let v = o.sub(t, sp);
            let one = o.c(1.0);
            let ny = o.sub(one, y);
            (
                v,
                vec![
                    non_negative(0, "outcome"),
                    cond(
                        ny,
                        false,
                        0,
                        format!("the outcome `y` of {f} must be 0 or 1"),
                    ),
                ],
            )
        }
        // Every name of the table has its case above (a test calls each one).
        _ => (o.c(f64::NAN), Vec::new()),
    }
}
