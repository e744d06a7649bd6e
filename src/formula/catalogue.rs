//! What the page's formula editor offers while typing: every function of the language with its
//! argument names, a one-line description and an example.
//!
//! Owns: the descriptions of the ordinary functions and forms (`sum`, `logsumexp`), and
//! [`catalogue`], which lists them with the built-in densities of `densities`.
//! Must not: decide arities or meanings (that is `resolve`); a test checks that the two agree.

use crate::formula::densities::{DENSITIES, PREFIX};
use serde::Serialize;

/// One entry of the function list.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct FunctionDoc {
    pub name: String,
    pub args: Vec<String>,
    pub summary: String,
    pub example: String,
    /// "function", "density" or "form" (sum and logsumexp).
    pub kind: String,
}

/// (name, arguments, summary, example) of the ordinary functions and forms.
const ORDINARY: &[(&str, &[&str], &str, &str)] = &[
    ("exp", &["x"], "e to the power x", "exp(-x^2)"),
    ("log", &["x"], "natural logarithm; x > 0", "log(sigma)"),
    (
        "log1p",
        &["x"],
        "log(1 + x), exact for small x",
        "log1p(x^2)",
    ),
    (
        "expm1",
        &["x"],
        "e^x − 1, exact for small x",
        "expm1(0.01*t)",
    ),
    ("sqrt", &["x"], "square root; x ≥ 0", "sqrt(x^2 + y^2)"),
    ("abs", &["x"], "absolute value", "abs(x - 3)"),
    ("sin", &["x"], "sine (radians)", "sin(theta)"),
    ("cos", &["x"], "cosine (radians)", "cos(x/2)"),
    ("tan", &["x"], "tangent (radians)", "tan(a)"),
    ("asin", &["x"], "inverse sine; −1 ≤ x ≤ 1", "asin(0.5*x)"),
    ("acos", &["x"], "inverse cosine; −1 ≤ x ≤ 1", "acos(c)"),
    ("atan", &["x"], "inverse tangent", "atan(x)"),
    (
        "atan2",
        &["y", "x"],
        "angle of the point (x, y), in (−π, π]",
        "atan2(y, x)",
    ),
    ("sinh", &["x"], "hyperbolic sine", "sinh(x)"),
    ("cosh", &["x"], "hyperbolic cosine", "log(cosh(x))"),
    ("tanh", &["x"], "hyperbolic tangent", "tanh(x)"),
    ("erf", &["x"], "error function", "erf(x/sqrt(2))"),
    (
        "lgamma",
        &["x"],
        "log of the absolute value of the gamma function",
        "lgamma(k + 1)",
    ),
    (
        "pow",
        &["x", "y"],
        "x to the power y (the same as x^y)",
        "pow(x, 1.5)",
    ),
    (
        "min",
        &["a", "b", "…"],
        "smallest of its arguments",
        "min(x, y, 0)",
    ),
    (
        "max",
        &["a", "b", "…"],
        "largest of its arguments",
        "max(x, 0)",
    ),
    (
        "logsumexp",
        &["a", "…"],
        "log(e^a + e^b + …) without overflow; also logsumexp(k = 1..K, body) over a range",
        "logsumexp(k = 1..3, log(w[k]) + logd_normal(y, m[k], s))",
    ),
    (
        "sum",
        &["body"],
        "adds body over the data rows; also sum(k = 1..K, body) over a range of k",
        "sum(logd_normal(y, mu[group], sigma))",
    ),
];

/// Every function of the language: the ordinary ones, then the built-in densities.
pub fn catalogue() -> Vec<FunctionDoc> {
    let mut out: Vec<FunctionDoc> = ORDINARY
        .iter()
        .map(|&(name, args, summary, example)| FunctionDoc {
            name: name.to_string(),
            args: args.iter().map(|a| a.to_string()).collect(),
            summary: summary.to_string(),
            example: example.to_string(),
            kind: if matches!(name, "sum" | "logsumexp") {
                "form"
            } else {
                "function"
            }
            .to_string(),
        })
        .collect();
    out.extend(DENSITIES.iter().map(|d| FunctionDoc {
        name: format!("{PREFIX}{}", d.name),
        args: d.args.iter().map(|a| a.to_string()).collect(),
        summary: d.summary.to_string(),
        example: d.example.to_string(),
        kind: "density".to_string(),
    }));
    out
}
