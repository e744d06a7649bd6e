use super::*;
use crate::formula::syntax::parse;

fn checked_with(text: &str, columns: &[Vec<f64>], vectors: &[Vector]) -> Result<Graph, KilnError> {
    let prog = parse("energy", text)?;
    let mut unknowns: Vec<String> = vec!["x".into(), "y".into()];
    for v in vectors {
        for k in 1..=v.len {
            unknowns.push(format!("{}[{k}]", v.name));
        }
    }
    let names: Vec<String> = ["len", "g", "k"][..columns.len()]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let table = DataTable::of(columns);
    let inputs = Inputs {
        unknowns: &unknowns,
        vectors,
        data_names: &names,
        data: &table,
    };
    resolve("energy", text, &prog, &inputs, &[])
}

fn checked(text: &str) -> Result<Graph, KilnError> {
    checked_with(text, &[vec![1.0, 2.0, 3.0]], &[])
}

fn mu3() -> Vec<Vector> {
    vec![Vector {
        name: "mu".into(),
        first: 2,
        len: 3,
    }]
}

#[test]
fn shared_subexpressions_appear_once_and_constants_fold() {
    let g = checked("let a = x^2; a + a + (x^2) + 2*3").unwrap();
    let pows = g
        .nodes
        .iter()
        .filter(|n| matches!(n, Node::Binary(Binary::Pow, _, _)))
        .count();
    assert_eq!(pows, 1);
    assert!(g.nodes.contains(&Node::Const(6.0)));
}

#[test]
fn names_and_arity_are_checked_with_hints() {
    let e = checked("lgama(x)").unwrap_err();
    assert_eq!(e.message, "unknown function `lgama`");
    assert_eq!(e.hint.as_deref(), Some("did you mean `lgamma`?"));
    let e = checked("xx + y").unwrap_err();
    assert_eq!(e.hint.as_deref(), Some("did you mean `x`?"));
    let e = checked("atan2(x)").unwrap_err();
    assert!(e.message.contains("takes exactly 2 arguments, found 1"));
    let e = checked("len * x").unwrap_err();
    assert_eq!(e.message, "data column `len` used outside sum(…)");
    let e = checked("sum(sum(len))").unwrap_err();
    assert!(e.message.contains("may not contain another sum"));
    let e = checked("let x = 2; x").unwrap_err();
    assert!(e.message.contains("already an unknown"));
    let e = checked("exp + 1").unwrap_err();
    assert!(e.message.contains("is a function"));
    let e = checked("x(2)").unwrap_err();
    assert!(e.hint.unwrap().contains("not a function"));
    assert!(checked("sum((len - x)^2) + max(x, y, 0) + logsumexp(x)").is_ok());
    let e = checked("logd_normal(x, 0)").unwrap_err();
    assert!(
        e.message
            .contains("takes 3 arguments (x, mean, sd), found 2"),
        "{}",
        e.message
    );
    let e = checked("normal(x, 0, 1)").unwrap_err();
    assert!(e.hint.unwrap().contains("logd_normal"));
}

#[test]
fn ranges_unroll_and_vectors_are_picked_by_constants() {
    let g = checked_with(
        "sum(k = 1..3, mu[k]^2) + logsumexp(j = 1..3, mu[j])",
        &[vec![1.0]],
        &mu3(),
    )
    .unwrap();
    let vars: Vec<u32> = g
        .nodes
        .iter()
        .filter_map(|n| match n {
            Node::Var(v) => Some(*v),
            _ => None,
        })
        .collect();
    assert_eq!(vars, vec![2, 3, 4]);
    let e = checked_with("mu[4]", &[vec![1.0]], &mu3()).unwrap_err();
    assert_eq!(e.message, "`mu` has no element 4");
    let e = checked_with("mu[x]", &[vec![1.0]], &mu3()).unwrap_err();
    assert!(e.message.contains("depends on unknowns"));
    let e = checked_with("mu + 1", &[vec![1.0]], &mu3()).unwrap_err();
    assert!(e.message.contains("is a vector of 3 unknowns"));
    let e = checked_with("x[1]", &[vec![1.0]], &mu3()).unwrap_err();
    assert!(e.message.contains("single unknown"));
    let e = checked_with("sum(x = 1..3, mu[x])", &[vec![1.0]], &mu3()).unwrap_err();
    assert!(e.message.contains("already an unknown"));
    let e = checked_with("sum(k = 1..2.5, mu[k])", &[vec![1.0]], &mu3()).unwrap_err();
    assert!(e.message.contains("whole number"));
    let e = checked_with("exp(k = 1..2, x)", &[vec![1.0]], &mu3()).unwrap_err();
    assert!(e.message.contains("does not take a range"));
    // An empty range adds nothing.
    let g = checked_with("x + sum(k = 1..0, mu[k])", &[vec![1.0]], &mu3()).unwrap();
    assert!(matches!(
        g.nodes[g.root as usize],
        Node::Binary(Binary::Add, _, _)
    ));
}

#[test]
fn a_data_index_splits_the_sum_into_groups_of_rows() {
    let cols = vec![vec![0.5, 1.5, 2.5, 3.5], vec![2.0, 1.0, 2.0, 3.0]];
    let g = checked_with("sum((len - mu[g])^2)", &cols, &mu3()).unwrap();
    assert_eq!(g.row_sets, vec![vec![0, 2], vec![1], vec![3]]);
    let sums: Vec<u32> = g
        .nodes
        .iter()
        .filter_map(|n| match n {
            Node::Sum(_, s) => Some(*s),
            _ => None,
        })
        .collect();
    assert_eq!(sums, vec![0, 1, 2]);
    let bad = vec![vec![0.5, 1.5], vec![1.0, 4.0]];
    let e = checked_with("sum((len - mu[g])^2)", &bad, &mu3()).unwrap_err();
    assert_eq!(
        e.message,
        "data row 2, column `g`: 4 is not an element of `mu`"
    );
    let bad = vec![vec![0.5, 1.5], vec![1.0, 1.5]];
    let e = checked_with("sum((len - mu[g])^2)", &bad, &mu3()).unwrap_err();
    assert!(
        e.message
            .contains("data row 2, column `g`: 1.5 is not a whole number"),
        "{}",
        e.message
    );
    let loc = e.location.unwrap();
    assert_eq!(loc.column, 15);
}

#[test]
fn density_arguments_given_as_constants_or_data_are_checked_before_any_run() {
    let e = checked("logd_normal(x, 0, -1)").unwrap_err();
    assert_eq!(
        e.message,
        "the standard deviation `sd` of logd_normal must be positive; here it is -1"
    );
    assert_eq!(e.location.unwrap().column, 19);
    let cols = vec![vec![3.0, -1.0, 2.0]];
    let e = checked_with("sum(logd_poisson(len, exp(x)))", &cols, &[]).unwrap_err();
    assert_eq!(
        e.message,
        "the count `k` of logd_poisson must not be negative; at data row 2 `k` is -1"
    );
    let cols = vec![vec![3.0, 1.5, 2.0]];
    let e = checked_with("sum(logd_poisson(len, exp(x)))", &cols, &[]).unwrap_err();
    assert!(
        e.message
            .contains("must be a whole number (at data row 2 it is 1.5)"),
        "{}",
        e.message
    );
    let e = checked("logd_uniform(x, 2, 1)").unwrap_err();
    assert!(
        e.message.contains("must be above the lower end"),
        "{}",
        e.message
    );
    let e = checked("sum(logd_binomial(len, 2, y))").unwrap_err();
    assert!(
        e.message.contains("must not exceed the number of trials"),
        "{}",
        e.message
    );
    // Support tests that depend on unknowns stay in the graph; those that passed do not.
    let g = checked("sum(logd_normal(len, x, y))").unwrap();
    assert!(g
        .nodes
        .iter()
        .any(|n| matches!(n, Node::Binary(Binary::WherePos, _, _))));
    let g = checked("sum(logd_normal(len, x, 2))").unwrap();
    assert!(!g.nodes.iter().any(|n| matches!(
        n,
        Node::Binary(Binary::WherePos | Binary::WhereNonNeg, _, _)
    )));
}

#[test]
fn added_terms_are_densities_of_their_subjects() {
    let prog = parse("energy", "x^2").unwrap();
    let unknowns: Vec<String> = vec!["x".into(), "y".into()];
    let table = DataTable::of(&[]);
    let inputs = Inputs::plain(&unknowns, &[], &table);
    let term = |text: &'static str| AddedTerm {
        source: "prior of `y`",
        text,
        subjects: vec![1],
        coefficient: -1.0,
    };
    assert!(resolve(
        "energy",
        "x^2",
        &prog,
        &inputs,
        &[term("gamma(2, x^2 + 1)")]
    )
    .is_ok());
    let e = resolve("energy", "x^2", &prog, &inputs, &[term("logd_gamma(2, 1)")]).unwrap_err();
    assert!(e.hint.unwrap().contains("write gamma(shape, rate)"));
    let e = resolve("energy", "x^2", &prog, &inputs, &[term("gama(2, 1)")]).unwrap_err();
    assert_eq!(e.hint.as_deref(), Some("did you mean `gamma`?"));
    let e = resolve("energy", "x^2", &prog, &inputs, &[term("normal(0)")]).unwrap_err();
    assert!(
        e.message.contains("takes 2 parameters (mean, sd), found 1"),
        "{}",
        e.message
    );
    let e = resolve("energy", "x^2", &prog, &inputs, &[term("normal(0, -2)")]).unwrap_err();
    assert_eq!(e.location.unwrap().source, "prior of `y`");
}

#[test]
fn unrolling_is_bounded_even_when_every_term_coincides() {
    // 2^40 bodies, all the same node: stopped by the count of bodies, not the count of nodes.
    let open: String = (0..40).map(|i| format!("sum(k{i} = 1..2, ")).collect();
    let text = format!("{open}x{}", ")".repeat(40));
    let e = checked(&text).unwrap_err();
    assert!(e.message.contains("expands to more than"), "{}", e.message);
}
