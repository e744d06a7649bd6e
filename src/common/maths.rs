//! Scalar mathematics shared by every stage.
//!
//! Owns: the elementary and special functions of the formula language, their derivatives, and
//! the numerically careful helpers (log-sum-exp, softplus, logistic) the statistics use. Every
//! transcendental function goes through `libm`, a pure-Rust implementation, so the native build
//! and the WebAssembly build compute the same bits (`clippy.toml` forbids the `f64` methods).
//! Must not: hold state or know about formulas, targets or samplers.

pub const PI: f64 = std::f64::consts::PI;
pub const E: f64 = std::f64::consts::E;
/// log(2π)
pub const LN_2PI: f64 = 1.837_877_066_409_345_5;

#[inline]
pub fn exp(x: f64) -> f64 {
    libm::exp(x)
}
#[inline]
pub fn ln(x: f64) -> f64 {
    libm::log(x)
}
#[inline]
pub fn ln_1p(x: f64) -> f64 {
    libm::log1p(x)
}
#[inline]
pub fn exp_m1(x: f64) -> f64 {
    libm::expm1(x)
}
#[inline]
pub fn sqrt(x: f64) -> f64 {
    libm::sqrt(x)
}
#[inline]
pub fn pow(x: f64, y: f64) -> f64 {
    libm::pow(x, y)
}

/// `x^n` for an integer `n` by repeated squaring (identical on every platform, unlike `powi`).
#[inline]
pub fn powi(x: f64, n: i32) -> f64 {
    let mut base = if n < 0 { 1.0 / x } else { x };
    let mut k = n.unsigned_abs();
    let mut acc = 1.0;
    while k > 0 {
        if k & 1 == 1 {
            acc *= base;
        }
        base *= base;
        k >>= 1;
    }
    acc
}

/// log(1 + e^x) without overflow.
#[inline]
pub fn softplus(x: f64) -> f64 {
    if x > 0.0 {
        x + ln_1p(exp(-x))
    } else {
        ln_1p(exp(x))
    }
}

/// The logistic function 1 / (1 + e^-x).
#[inline]
pub fn logistic(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + exp(-x))
    } else {
        let e = exp(x);
        e / (1.0 + e)
    }
}

/// log(e^a + e^b), exact for infinities.
#[inline]
pub fn log_add_exp(a: f64, b: f64) -> f64 {
    let m = a.max(b);
    if m == f64::NEG_INFINITY {
        return m;
    }
    if m == f64::INFINITY {
        return m;
    }
    m + ln_1p(exp(-(a - b).abs()))
}

/// log Σ e^{x_i}; −∞ for an empty slice.
pub fn log_sum_exp(xs: &[f64]) -> f64 {
    let m = xs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + ln(xs.iter().map(|&x| exp(x - m)).sum::<f64>())
}

/// log|Γ(x)|.
#[inline]
pub fn lgamma(x: f64) -> f64 {
    libm::lgamma_r(x).0
}

/// The digamma function ψ(x) = d/dx log|Γ(x)|.
pub fn digamma(x: f64) -> f64 {
    if !x.is_finite() {
        return if x == f64::INFINITY { x } else { f64::NAN };
    }
    if x <= 0.0 && x == x.floor() {
        return f64::NAN;
    }
    let mut x = x;
    let mut acc = 0.0;
    if x < 0.0 {
        // Reflection: ψ(1 − x) − ψ(x) = π cot(πx).
        acc -= PI / libm::tan(PI * x);
        x = 1.0 - x;
    }
    while x < 10.0 {
        acc -= 1.0 / x;
        x += 1.0;
    }
    let inv = 1.0 / x;
    let inv2 = inv * inv;
    // Asymptotic series ψ(x) ~ ln x − 1/(2x) − Σ B_{2k}/(2k x^{2k}).
    let series = inv2
        * (1.0 / 12.0
            - inv2
                * (1.0 / 120.0
                    - inv2
                        * (1.0 / 252.0
                            - inv2
                                * (1.0 / 240.0
                                    - inv2
                                        * (1.0 / 132.0
                                            - inv2 * (691.0 / 32760.0 - inv2 / 12.0))))));
    acc + ln(x) - 0.5 * inv - series
}

/// The modified Bessel functions I0 and I1 at `x ≥ 0`, exponentially scaled: returns
/// (log(I0(x)) − x, I1(x)/I0(x)). Below 20 by their power series (all terms positive), above by
/// the asymptotic expansion for large arguments, each summed until a term no longer changes the
/// sum (M. Abramowitz and I. A. Stegun, 1964, Handbook of Mathematical Functions, eqs. 9.6.10
/// and 9.7.1). NaN for negative or NaN `x`.
pub fn bessel_i0_i1_scaled(x: f64) -> (f64, f64) {
    if !(x >= 0.0) {
        return (f64::NAN, f64::NAN);
    }
    if x == f64::INFINITY {
        return (f64::NEG_INFINITY, 1.0);
    }
    if x <= 20.0 {
        // I0 = Σ (x²/4)^k / (k!)², I1 = (x/2) Σ (x²/4)^k / (k! (k+1)!).
        let q = 0.25 * x * x;
        let (mut t0, mut s0) = (1.0, 1.0);
        let (mut t1, mut s1) = (1.0, 1.0);
        for k in 1..200 {
            let kf = k as f64;
            t0 *= q / (kf * kf);
            t1 *= q / (kf * (kf + 1.0));
            let (n0, n1) = (s0 + t0, s1 + t1);
            if n0 == s0 && n1 == s1 {
                break;
            }
            s0 = n0;
            s1 = n1;
        }
        return (ln(s0) - x, 0.5 * x * s1 / s0);
    }
    // I_ν(x) ~ e^x / √(2πx) · Σ c_k, c_0 = 1, c_k = c_{k−1} ((2k−1)² − 4ν²) / (8kx).
    let (mut c0, mut s0) = (1.0, 1.0);
    let (mut c1, mut s1) = (1.0, 1.0);
    for k in 1..60 {
        let kf = k as f64;
        let odd = (2.0 * kf - 1.0) * (2.0 * kf - 1.0);
        let n0 = c0 * odd / (8.0 * kf * x);
        let n1 = c1 * (odd - 4.0) / (8.0 * kf * x);
        // Stop where the (divergent) series' terms stop falling.
        if n0.abs() >= c0.abs() {
            break;
        }
        c0 = n0;
        c1 = n1;
        let (a, b) = (s0 + c0, s1 + c1);
        if a == s0 && b == s1 {
            break;
        }
        s0 = a;
        s1 = b;
    }
    (ln(s0) - 0.5 * ln(2.0 * PI * x), s1 / s0)
}

/// x · log(y), zero where x is zero (and y is not NaN), as the limit gives it.
#[inline]
pub fn xlogy(x: f64, y: f64) -> f64 {
    if x == 0.0 && !y.is_nan() {
        0.0
    } else {
        x * ln(y)
    }
}

/// x · log(1 + y), zero where x is zero (and y is not NaN).
#[inline]
pub fn xlog1py(x: f64, y: f64) -> f64 {
    if x == 0.0 && !y.is_nan() {
        0.0
    } else {
        x * ln_1p(y)
    }
}

/// The one-argument functions of the formula language. `Softplus` and `LogI0e` are used by the
/// built-in densities only (the language has no name for them).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Unary {
    Neg,
    Exp,
    Log,
    Log1p,
    Expm1,
    Sqrt,
    Abs,
    Sin,
    Cos,
    Tan,
    Asin,
    Acos,
    Atan,
    Sinh,
    Cosh,
    Tanh,
    Erf,
    Lgamma,
    /// log(1 + e^x).
    Softplus,
    /// log(I0(x)) − x, the log of the exponentially scaled modified Bessel function I0.
    LogI0e,
}

/// The two-argument operations of the formula language (variadic calls fold onto these).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Binary {
    Add,
    Sub,
    Mul,
    Div,
    Pow,
    Atan2,
    Min,
    Max,
    LogAddExp,
    /// x · log(y), zero where x is zero.
    XLogY,
    /// x · log(1 + y), zero where x is zero.
    XLog1pY,
    /// `where_pos(c, v)`: v where c > 0, else −∞ (outside the support of a density).
    WherePos,
    /// `where_nonneg(c, v)`: v where c ≥ 0, else −∞.
    WhereNonNeg,
}

impl Unary {
    #[inline]
    pub fn apply(self, a: f64) -> f64 {
        match self {
            Unary::Neg => -a,
            Unary::Exp => exp(a),
            Unary::Log => ln(a),
            Unary::Log1p => ln_1p(a),
            Unary::Expm1 => exp_m1(a),
            Unary::Sqrt => sqrt(a),
            Unary::Abs => a.abs(),
            Unary::Sin => libm::sin(a),
            Unary::Cos => libm::cos(a),
            Unary::Tan => libm::tan(a),
            Unary::Asin => libm::asin(a),
            Unary::Acos => libm::acos(a),
            Unary::Atan => libm::atan(a),
            Unary::Sinh => libm::sinh(a),
            Unary::Cosh => libm::cosh(a),
            Unary::Tanh => libm::tanh(a),
            Unary::Erf => libm::erf(a),
            Unary::Lgamma => lgamma(a),
            Unary::Softplus => softplus(a),
            Unary::LogI0e => bessel_i0_i1_scaled(a).0,
        }
    }

    /// d/da of `apply(a)`, given `a` and the value `v = apply(a)`.
    #[inline]
    pub fn derivative(self, a: f64, v: f64) -> f64 {
        match self {
            Unary::Neg => -1.0,
            Unary::Exp => v,
            Unary::Log => 1.0 / a,
            Unary::Log1p => 1.0 / (1.0 + a),
            Unary::Expm1 => v + 1.0,
            Unary::Sqrt => 0.5 / v,
            Unary::Abs => {
                if a > 0.0 {
                    1.0
                } else if a < 0.0 {
                    -1.0
                } else {
                    0.0
                }
            }
            Unary::Sin => libm::cos(a),
            Unary::Cos => -libm::sin(a),
            Unary::Tan => 1.0 + v * v,
            Unary::Asin => 1.0 / sqrt(1.0 - a * a),
            Unary::Acos => -1.0 / sqrt(1.0 - a * a),
            Unary::Atan => 1.0 / (1.0 + a * a),
            Unary::Sinh => libm::cosh(a),
            Unary::Cosh => libm::sinh(a),
            Unary::Tanh => 1.0 - v * v,
            Unary::Erf => std::f64::consts::FRAC_2_SQRT_PI * exp(-a * a),
            Unary::Lgamma => digamma(a),
            Unary::Softplus => logistic(a),
            Unary::LogI0e => bessel_i0_i1_scaled(a).1 - 1.0,
        }
    }
}

impl Binary {
    #[inline]
    pub fn apply(self, a: f64, b: f64) -> f64 {
        match self {
            Binary::Add => a + b,
            Binary::Sub => a - b,
            Binary::Mul => a * b,
            Binary::Div => a / b,
            Binary::Pow => pow(a, b),
            Binary::Atan2 => libm::atan2(a, b),
            Binary::Min => {
                if b < a {
                    b
                } else {
                    a
                }
            }
            Binary::Max => {
                if b > a {
                    b
                } else {
                    a
                }
            }
            Binary::LogAddExp => log_add_exp(a, b),
            Binary::XLogY => xlogy(a, b),
            Binary::XLog1pY => xlog1py(a, b),
            Binary::WherePos => {
                if a > 0.0 {
                    b
                } else {
                    f64::NEG_INFINITY
                }
            }
            Binary::WhereNonNeg => {
                if a >= 0.0 {
                    b
                } else {
                    f64::NEG_INFINITY
                }
            }
        }
    }

    /// (d/da, d/db) of `apply(a, b)`, given the value `v`.
    #[inline]
    pub fn derivatives(self, a: f64, b: f64, v: f64) -> (f64, f64) {
        match self {
            Binary::Add => (1.0, 1.0),
            Binary::Sub => (1.0, -1.0),
            Binary::Mul => (b, a),
            Binary::Div => (1.0 / b, -v / b),
            Binary::Pow => {
                let da = if b == 0.0 { 0.0 } else { b * pow(a, b - 1.0) };
                let db = if a > 0.0 { v * ln(a) } else { 0.0 };
                (da, db)
            }
            Binary::Atan2 => {
                // atan2(y = a, x = b)
                let r2 = a * a + b * b;
                (b / r2, -a / r2)
            }
            Binary::Min => {
                if b < a {
                    (0.0, 1.0)
                } else {
                    (1.0, 0.0)
                }
            }
            Binary::Max => {
                if b > a {
                    (0.0, 1.0)
                } else {
                    (1.0, 0.0)
                }
            }
            Binary::LogAddExp => {
                if v == f64::NEG_INFINITY {
                    (0.5, 0.5)
                } else {
                    (exp(a - v), exp(b - v))
                }
            }
            Binary::XLogY => (ln(b), if a == 0.0 { 0.0 } else { a / b }),
            Binary::XLog1pY => (ln_1p(b), if a == 0.0 { 0.0 } else { a / (1.0 + b) }),
            // A support test passes the value's slope on where it holds, nothing elsewhere.
            Binary::WherePos => (0.0, if a > 0.0 { 1.0 } else { 0.0 }),
            Binary::WhereNonNeg => (0.0, if a >= 0.0 { 1.0 } else { 0.0 }),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn digamma_matches_known_values() {
        // ψ(1) = −γ (Euler–Mascheroni constant); ψ(1/2) = −γ − 2 ln 2 (exact identities).
        let gamma = 0.577_215_664_901_532_9;
        assert!((digamma(1.0) + gamma).abs() < 1e-14);
        assert!((digamma(0.5) + gamma + 2.0 * std::f64::consts::LN_2).abs() < 1e-14);
        // Recurrence ψ(x+1) = ψ(x) + 1/x, and reflection, at awkward points.
        for &x in &[0.013, 0.7, 3.3, 17.5, -0.4, -2.7] {
            assert!(
                (digamma(x + 1.0) - digamma(x) - 1.0 / x).abs() < 1e-11,
                "{x}"
            );
        }
    }

    #[test]
    fn bessel_functions_meet_their_identities() {
        // I0(0) = 1, I1(0) = 0; the Wronskian-type recurrence I0'(x) = I1(x) checked by central
        // differences on either side of the switch between series and expansion.
        assert_eq!(bessel_i0_i1_scaled(0.0), (0.0, 0.0));
        for &x in &[0.3f64, 2.0, 7.5, 19.9, 20.1, 35.0, 300.0, 1e5] {
            let h = 1e-5 * x.max(1.0);
            let f = |t: f64| bessel_i0_i1_scaled(t).0 + t;
            let fd = (f(x + h) - f(x - h)) / (2.0 * h);
            let ratio = bessel_i0_i1_scaled(x).1;
            assert!(
                (fd - ratio).abs() < 1e-7 * ratio.max(1e-3),
                "{x}: {fd} vs {ratio}"
            );
        }
        // The two methods meet at 20.
        let a = bessel_i0_i1_scaled(20.0);
        let b = bessel_i0_i1_scaled(20.0 + 1e-12);
        assert!(
            (a.0 - b.0).abs() < 1e-13 && (a.1 - b.1).abs() < 1e-13,
            "{a:?} {b:?}"
        );
        assert!(bessel_i0_i1_scaled(-1.0).0.is_nan());
        assert_eq!(xlogy(0.0, 0.0), 0.0);
        assert_eq!(xlog1py(0.0, -1.0), 0.0);
        assert!(xlogy(1.0, 0.0) == f64::NEG_INFINITY);
    }

    #[test]
    fn powi_and_helpers() {
        assert_eq!(powi(-2.0, 3), -8.0);
        assert_eq!(powi(2.0, -2), 0.25);
        assert_eq!(powi(5.0, 0), 1.0);
        assert!((log_add_exp(1000.0, 1000.0) - (1000.0 + std::f64::consts::LN_2)).abs() < 1e-12);
        assert_eq!(log_add_exp(f64::NEG_INFINITY, 2.0), 2.0);
        assert!((softplus(-800.0)).abs() < 1e-300);
        assert!((softplus(800.0) - 800.0).abs() < 1e-12);
        assert!((logistic(0.0) - 0.5).abs() < 1e-16);
        assert!((log_sum_exp(&[0.0, 0.0]) - std::f64::consts::LN_2).abs() < 1e-15);
    }
}
