//! Tests of the tape: hand-derived values, and a reference evaluator written here that walks
//! the checked graph directly (values, and gradients by forward-mode dual numbers).

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
