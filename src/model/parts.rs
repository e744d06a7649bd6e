//! Parts of a spec checked on their own: a vector entry's elements, the components of a
//! mixture, the run settings, finite numbers.
//!
//! Owns: [`vector_elements`], [`validate_mixture`], [`validate_settings`] and their messages.
//! Must not: know about formulas or build densities (see `spec` for the whole spec).

use super::spec::{Component, RawComponent, RawVariable, Settings, MAX_COMPONENTS, MAX_DIMENSION};
use crate::common::error::KilnError;

pub(super) fn finite(what: &str, v: f64) -> Result<f64, KilnError> {
    if v.is_finite() {
        Ok(v)
    } else {
        Err(KilnError::spec(format!("{what} is not a finite number"))
            .with_hint("use a finite number"))
    }
}

/// Most elements of one vector (every element is an unknown).
const MAX_SIZE: usize = MAX_DIMENSION;

/// The element labels of a vector entry (`1`, `2`, … for a size), or `None` for a scalar.
pub(super) fn vector_elements(v: &RawVariable) -> Result<Option<Vec<String>>, KilnError> {
    let name = &v.name;
    match (&v.size, &v.elements) {
        (None, None) => Ok(None),
        (Some(_), Some(_)) => Err(KilnError::spec(format!(
            "variable `{name}` gives both \"size\" and \"elements\""
        ))
        .with_hint("keep one: \"size\": 3 for elements 1 to 3, or \"elements\": [\"a\", \"b\"] to name them")),
        (Some(k), None) => {
            if *k == 0 || *k > MAX_SIZE {
                return Err(KilnError::spec(format!(
                    "variable `{name}` has size {k}; a vector has 1 to {MAX_SIZE} elements"
                ))
                .with_hint("give the number of elements, as in \"size\": 3"));
            }
            Ok(Some((1..=*k).map(|i| i.to_string()).collect()))
        }
        (None, Some(labels)) => {
            if labels.is_empty() || labels.len() > MAX_SIZE {
                return Err(KilnError::spec(format!(
                    "variable `{name}` lists {} elements; a vector has 1 to {MAX_SIZE}",
                    labels.len()
                ))
                .with_hint("name each element, as in \"elements\": [\"north\", \"south\"]"));
            }
            for (i, l) in labels.iter().enumerate() {
                let ok = !l.is_empty()
                    && l.chars().all(|c| c.is_ascii_alphanumeric() || "_-.".contains(c));
                if !ok {
                    return Err(KilnError::spec(format!(
                        "element name `{l}` of `{name}` is not a valid element name"
                    ))
                    .with_hint("use letters, digits, `_`, `-` and `.`, as in \"site_2\""));
                }
                if labels[..i].contains(l) {
                    return Err(KilnError::spec(format!(
                        "element name `{l}` of `{name}` appears twice"
                    ))
                    .with_hint("give every element its own name"));
                }
            }
            Ok(Some(labels.clone()))
        }
    }
}

pub(super) fn validate_mixture(comps: &[RawComponent]) -> Result<Vec<Component>, KilnError> {
    if comps.is_empty() {
        return Err(KilnError::spec("the mixture has no components")
            .with_hint("give at least one {\"weight\": …, \"mean\": […], \"cov\": [[…]]}"));
    }
    if comps.len() > MAX_COMPONENTS {
        return Err(KilnError::limit(format!(
            "the mixture has {} components; the limit is {MAX_COMPONENTS}",
            comps.len()
        ))
        .with_hint("merge components that overlap, or write the model as an \"energy\" formula with logsumexp"));
    }
    let d = comps[0].mean.len();
    if d == 0 {
        return Err(KilnError::spec("mixture component 1 has an empty mean")
            .with_hint("give one mean value per unknown"));
    }
    let mut out = Vec::new();
    for (k, c) in comps.iter().enumerate() {
        let n = k + 1;
        if !(c.weight.is_finite() && c.weight > 0.0) {
            return Err(KilnError::spec(format!(
                "mixture component {n} has weight {}; weights must be positive",
                c.weight
            ))
            .with_hint("use a positive weight, or remove the component"));
        }
        if c.mean.len() != d {
            return Err(KilnError::spec(format!(
                "mixture component {n} has a mean of length {} but component 1 has {d}",
                c.mean.len()
            ))
            .with_hint("every component needs one mean value per unknown"));
        }
        for v in &c.mean {
            finite(&format!("a mean value of mixture component {n}"), *v)?;
        }
        let cov = match (&c.cov, &c.sd) {
            (Some(_), Some(_)) => {
                return Err(KilnError::spec(format!(
                    "mixture component {n} gives both \"cov\" and \"sd\""
                ))
                .with_hint("keep one: \"cov\" for a full covariance, \"sd\" for a diagonal one"))
            }
            (None, None) => {
                return Err(KilnError::spec(format!(
                    "mixture component {n} has neither \"cov\" nor \"sd\""
                ))
                .with_hint(
                    "add \"sd\": [...] (one standard deviation per unknown) or \"cov\": [[...]]",
                ))
            }
            (None, Some(sd)) => {
                if sd.len() != d {
                    return Err(KilnError::spec(format!(
                        "mixture component {n} has {} standard deviations for dimension {d}",
                        sd.len()
                    ))
                    .with_hint("give one standard deviation per unknown"));
                }
                if let Some(s) = sd.iter().find(|s| !(s.is_finite() && **s > 0.0)) {
                    return Err(KilnError::spec(format!(
                        "mixture component {n} has standard deviation {s}"
                    ))
                    .with_hint("standard deviations must be positive"));
                }
                (0..d)
                    .map(|i| {
                        (0..d)
                            .map(|j| if i == j { sd[i] * sd[i] } else { 0.0 })
                            .collect()
                    })
                    .collect()
            }
            (Some(cov), None) => {
                if cov.len() != d || cov.iter().any(|r| r.len() != d) {
                    return Err(KilnError::spec(format!(
                        "mixture component {n}: the covariance must be {d} × {d}"
                    ))
                    .with_hint("give one row of d numbers per unknown"));
                }
                for i in 0..d {
                    for j in 0..d {
                        finite(
                            &format!("a covariance entry of mixture component {n}"),
                            cov[i][j],
                        )?;
                        let (a, b) = (cov[i][j], cov[j][i]);
                        if (a - b).abs() > 1e-12 * (a.abs() + b.abs()).max(1e-300) {
                            return Err(KilnError::spec(format!(
                                "mixture component {n}: the covariance is not symmetric (entry {},{} is {a}, entry {},{} is {b})",
                                i + 1, j + 1, j + 1, i + 1
                            ))
                            .with_hint("make cov[i][j] equal cov[j][i]"));
                        }
                    }
                }
                cov.clone()
            }
        };
        if crate::common::gaussian::Gaussian::new(&c.mean, &cov).is_none() {
            return Err(KilnError::spec(format!(
                "mixture component {n}: the covariance is not positive definite"
            ))
            .with_hint(
                "every variance must be positive and every correlation strictly between −1 and 1",
            ));
        }
        out.push(Component {
            weight: c.weight,
            mean: c.mean.clone(),
            cov,
        });
    }
    Ok(out)
}

pub(super) fn validate_settings(s: &Settings) -> Result<(), KilnError> {
    let range = |what: &str, v: Option<usize>, lo: usize, hi: usize| -> Result<(), KilnError> {
        match v {
            Some(n) if n < lo || n > hi => Err(KilnError::spec(format!(
                "setting \"{what}\" is {n}; it must be between {lo} and {hi}"
            ))
            .with_hint(format!("choose a value in {lo}..={hi}"))),
            _ => Ok(()),
        }
    };
    range("chains", s.chains, 1, 64)?;
    range("draws", s.draws, 10, 1_000_000)?;
    range("warmup", s.warmup, 10, 1_000_000)?;
    range("starts", s.starts, 1, 10_000)?;
    if let Some(m) = &s.method {
        if m != "joint" && m != "alternating" {
            return Err(KilnError::spec(format!("setting \"method\" is \"{m}\""))
                .with_hint("use \"joint\" or \"alternating\""));
        }
    }
    if let Some(m) = &s.integrator {
        if m != "nuts" && m != "hmc" {
            return Err(
                KilnError::spec(format!("setting \"integrator\" is \"{m}\""))
                    .with_hint("use \"nuts\" or \"hmc\""),
            );
        }
    }
    if let Some(a) = s.acceptance_goal {
        if !(a > 0.05 && a < 0.999) {
            return Err(
                KilnError::spec(format!("setting \"acceptance_goal\" is {a}"))
                    .with_hint("use a value between 0.05 and 0.999, typically 0.8"),
            );
        }
    }
    Ok(())
}
