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

/// The one-argument functions of the formula language.
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
