//! the spec file (JSON) → a validated [`Spec`].
//!
//! Owns: the one input format of Kiln (command line, page and share links all use it), its
//! shape (unknown keys are errors listing the allowed ones), and every check that needs no
//! formula parsing: names, bounds, data columns, mixture components, settings, size limits.
//! Must not: parse formulas (that is `syntax`) or build densities (that is `target`).

use crate::common::error::{nearest, ErrorKind, KilnError, Location};
use crate::formula::resolve::{is_identifier, reserved_names};
use serde::de::{self, MapAccess, Visitor};
use serde::{Deserialize, Deserializer, Serialize, Serializer};
use std::fmt;

/// Most unknowns a spec may have.
pub const MAX_DIMENSION: usize = 64;
/// Most data cells (rows × columns) a spec may carry.
pub const MAX_DATA_CELLS: usize = 1_000_000;
/// Most mixture components.
pub const MAX_COMPONENTS: usize = 1_000;
/// Largest spec file accepted, in bytes.
pub const MAX_SPEC_BYTES: usize = 64 * 1024 * 1024;

/// The spec exactly as written (and as saved or shared).
#[derive(Clone, Debug, Default, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct RawSpec {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub title: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub notes: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub variables: Option<Vec<RawVariable>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub data: Option<Columns>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub energy: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub log_density: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mixture: Option<Vec<RawComponent>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub settings: Option<Settings>,
}

const SPEC_KEYS: &[&str] = &[
    "title",
    "notes",
    "variables",
    "data",
    "energy",
    "log_density",
    "mixture",
    "settings",
];
const VARIABLE_KEYS: &[&str] = &["name", "lower", "upper"];
const COMPONENT_KEYS: &[&str] = &["weight", "mean", "cov", "sd"];
const SETTINGS_KEYS: &[&str] = &[
    "seed",
    "chains",
    "draws",
    "warmup",
    "method",
    "integrator",
    "starts",
    "target_accept",
];

#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct RawVariable {
    pub name: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub lower: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub upper: Option<f64>,
}

#[derive(Clone, Debug, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct RawComponent {
    pub weight: f64,
    pub mean: Vec<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cov: Option<Vec<Vec<f64>>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sd: Option<Vec<f64>>,
}

/// Run settings; every field is optional and the command line can override it.
#[derive(Clone, Debug, Default, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Settings {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub seed: Option<u64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub chains: Option<usize>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub draws: Option<usize>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub warmup: Option<usize>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub method: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub integrator: Option<String>,
    /// Number of optimiser starts in the mode search.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub starts: Option<usize>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub target_accept: Option<f64>,
}

/// Data columns in the order written.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Columns(pub Vec<(String, Vec<f64>)>);

impl Serialize for Columns {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let mut m = s.serialize_map(Some(self.0.len()))?;
        for (k, v) in &self.0 {
            m.serialize_entry(k, v)?;
        }
        m.end()
    }
}

impl<'de> Deserialize<'de> for Columns {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Columns, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Columns;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("an object mapping column names to arrays of numbers")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Columns, A::Error> {
                let mut out: Vec<(String, Vec<f64>)> = Vec::new();
                while let Some(key) = map.next_key::<String>()? {
                    if out.iter().any(|(k, _)| *k == key) {
                        return Err(de::Error::custom(format!(
                            "data column `{key}` appears twice"
                        )));
                    }
                    let values: Vec<f64> = map.next_value()?;
                    out.push((key, values));
                }
                Ok(Columns(out))
            }
        }
        d.deserialize_map(V)
    }
}

/// How an unknown is bounded; the map to the real line follows from it.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Bounds {
    pub lower: Option<f64>,
    pub upper: Option<f64>,
}

#[derive(Clone, Debug, PartialEq)]
pub struct Variable {
    pub name: String,
    pub bounds: Bounds,
}

/// One Gaussian component of a mixture target.
#[derive(Clone, Debug, PartialEq)]
pub struct Component {
    pub weight: f64,
    pub mean: Vec<f64>,
    pub cov: Vec<Vec<f64>>,
}

#[derive(Clone, Debug, PartialEq)]
pub enum Model {
    /// Density ∝ exp(−formula).
    Energy(String),
    /// Density ∝ exp(formula).
    LogDensity(String),
    Mixture(Vec<Component>),
}

impl Model {
    /// The spec field the model came from, for messages.
    pub fn field(&self) -> &'static str {
        match self {
            Model::Energy(_) => "energy",
            Model::LogDensity(_) => "log_density",
            Model::Mixture(_) => "mixture",
        }
    }
}

/// A validated spec.
#[derive(Clone, Debug, PartialEq)]
pub struct Spec {
    pub title: String,
    pub notes: String,
    pub variables: Vec<Variable>,
    pub data: Vec<(String, Vec<f64>)>,
    pub data_rows: usize,
    pub model: Model,
    pub settings: Settings,
    /// The spec as written, for saving and sharing.
    pub raw: RawSpec,
}

impl Spec {
    pub fn dimension(&self) -> usize {
        self.variables.len()
    }
    pub fn names(&self) -> Vec<String> {
        self.variables.iter().map(|v| v.name.clone()).collect()
    }
}

fn allowed_keys_for(message: &str) -> &'static [&'static str] {
    // serde lists the expected fields; pick the matching key set to suggest from.
    if message.contains("`name`") && message.contains("`lower`") {
        VARIABLE_KEYS
    } else if message.contains("`weight`") {
        COMPONENT_KEYS
    } else if message.contains("`seed`") {
        SETTINGS_KEYS
    } else {
        SPEC_KEYS
    }
}

/// Reads a spec from JSON text. `source` names the file, for messages.
pub fn parse_spec(source: &str, text: &str) -> Result<Spec, KilnError> {
    if text.len() > MAX_SPEC_BYTES {
        return Err(KilnError::limit(format!(
            "the spec is {} bytes; the limit is {MAX_SPEC_BYTES}",
            text.len()
        ))
        .with_hint("keep data below 10^6 cells"));
    }
    // A byte-order mark is invisible in editors; accept it.
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let first = text.trim_start().chars().next();
    if first != Some('{') {
        let shown = match first {
            None => "the file is empty".to_string(),
            Some('[') => "it is a JSON array".to_string(),
            Some(_) => format!(
                "it starts with `{}`",
                text.trim_start()
                    .chars()
                    .take_while(|c| !c.is_whitespace())
                    .take(12)
                    .collect::<String>()
            ),
        };
        let offset = text.len() - text.trim_start().len();
        let mut e = KilnError::spec(format!("the spec must be a JSON object, but {shown}"))
            .with_hint(
                "a spec looks like {\"variables\": [{\"name\": \"x\"}], \"energy\": \"x^2/2\"}",
            );
        if first.is_some() {
            e = e.at(Location::in_text(source, text, offset, offset + 1));
        }
        return Err(e);
    }
    let raw: RawSpec = serde_json::from_str(text).map_err(|e| json_error(source, text, &e))?;
    validate(raw)
}

fn json_error(source: &str, text: &str, e: &serde_json::Error) -> KilnError {
    let full = e.to_string();
    // serde_json appends " at line L column C"; the caret shows that, so drop it.
    let message = match full.rfind(" at line ") {
        Some(i) => full[..i].to_string(),
        None => full.clone(),
    };
    let mut hint = match e.classify() {
        serde_json::error::Category::Syntax => {
            "check for a missing comma, quote or bracket just before the caret".to_string()
        }
        serde_json::error::Category::Eof => {
            "the file ends early: close every `{`, `[` and string".to_string()
        }
        serde_json::error::Category::Data => "see the spec format in the README".to_string(),
        serde_json::error::Category::Io => "the file could not be read".to_string(),
    };
    let mut location =
        (e.line() > 0).then(|| Location::at_line_column(source, text, e.line(), e.column()));
    // What follows the reported position, for recognising NaN and Infinity.
    let rest_of_line: String = location
        .as_ref()
        .map(|l| {
            l.line_text
                .chars()
                .skip(l.column.saturating_sub(1))
                .collect()
        })
        .unwrap_or_default();
    if let Some(rest) = message.strip_prefix("unknown field `") {
        if let Some(end) = rest.find('`') {
            let key = &rest[..end];
            // serde reports the position after the key; put the caret under the key itself.
            if let Some(loc) = location.as_mut() {
                let quoted = format!("\"{key}\"");
                let upto: String = loc.line_text.chars().take(loc.column).collect();
                if let Some(byte) = upto.rfind(&quoted) {
                    loc.column = upto[..byte].chars().count() + 1;
                    loc.width = quoted.chars().count();
                }
            }
            let allowed = allowed_keys_for(&message);
            hint = match nearest(key, allowed.iter().copied()) {
                Some(n) => format!("did you mean `{n}`?"),
                None => format!("allowed keys here: {}", allowed.join(", ")),
            };
        }
    } else if ["NaN", "Infinity", "-Infinity", "inf", "nan"]
        .iter()
        .any(|w| rest_of_line.trim_start().starts_with(w))
    {
        hint =
            "JSON has no NaN or Infinity: give a finite number, or leave the key out".to_string();
    } else if message.contains("number out of range") {
        hint = "numbers must be finite, below about 1.8e308".to_string();
    } else if message.contains("invalid type") && message.contains("expected f64") {
        hint = "write numbers without quotes; JSON has no NaN or Infinity".to_string();
    }
    let mut err = KilnError::new(ErrorKind::Spec, format!("the spec is not valid: {message}"));
    if let Some(loc) = location {
        err = err.at(loc);
    }
    err.with_hint(hint)
}

fn check_name(kind: &str, name: &str) -> Result<(), KilnError> {
    if !is_identifier(name) {
        return Err(
            KilnError::spec(format!("{kind} name `{name}` is not a valid name")).with_hint(
                "use letters, digits and `_`, starting with a letter or `_`, as in `x_1`",
            ),
        );
    }
    if reserved_names().any(|r| r == name) {
        return Err(KilnError::spec(format!(
            "{kind} name `{name}` is reserved: it is a built-in function or constant"
        ))
        .with_hint(format!("rename it, for example `{name}_`")));
    }
    Ok(())
}

fn finite(what: &str, v: f64) -> Result<f64, KilnError> {
    if v.is_finite() {
        Ok(v)
    } else {
        Err(KilnError::spec(format!("{what} is not a finite number"))
            .with_hint("use a finite number"))
    }
}

/// Checks a spec as written and turns it into a [`Spec`].
pub fn validate(raw: RawSpec) -> Result<Spec, KilnError> {
    let given: Vec<&str> = [
        raw.energy.as_ref().map(|_| "energy"),
        raw.log_density.as_ref().map(|_| "log_density"),
        raw.mixture.as_ref().map(|_| "mixture"),
    ]
    .into_iter()
    .flatten()
    .collect();
    if given.is_empty() {
        return Err(KilnError::spec("the spec has no target")
            .with_hint("give exactly one of \"energy\", \"log_density\" or \"mixture\""));
    }
    if given.len() > 1 {
        return Err(KilnError::spec(format!(
            "the spec has more than one target: {}",
            given
                .iter()
                .map(|g| format!("\"{g}\""))
                .collect::<Vec<_>>()
                .join(" and ")
        ))
        .with_hint("keep exactly one of \"energy\", \"log_density\" or \"mixture\""));
    }

    // Data columns.
    let data = raw.data.clone().map(|c| c.0).unwrap_or_default();
    let mut data_rows = 0;
    let mut cells = 0usize;
    for (i, (name, col)) in data.iter().enumerate() {
        check_name("data column", name)?;
        if col.is_empty() {
            return Err(KilnError::spec(format!("data column `{name}` is empty"))
                .with_hint("give at least one value, or remove the column"));
        }
        if i == 0 {
            data_rows = col.len();
        } else if col.len() != data_rows {
            return Err(KilnError::spec(format!(
                "data column `{name}` has {} values but `{}` has {data_rows}",
                col.len(),
                data[0].0
            ))
            .with_hint("every data column needs one value per row, the same number of rows"));
        }
        for (r, v) in col.iter().enumerate() {
            finite(&format!("data column `{name}`, row {}", r + 1), *v)?;
        }
        cells += col.len();
    }
    if cells > MAX_DATA_CELLS {
        return Err(KilnError::limit(format!(
            "the data has {cells} cells; the limit is {MAX_DATA_CELLS}"
        ))
        .with_hint("thin or aggregate the data (for example into counts per bin)"));
    }

    let model = if let Some(f) = &raw.energy {
        Model::Energy(f.clone())
    } else if let Some(f) = &raw.log_density {
        Model::LogDensity(f.clone())
    } else {
        let comps = raw.mixture.as_deref().unwrap_or_default();
        Model::Mixture(validate_mixture(comps)?)
    };

    // Unknowns.
    let raw_vars = raw.variables.clone().unwrap_or_default();
    let variables: Vec<Variable> = match &model {
        Model::Mixture(comps) => {
            if !data.is_empty() {
                return Err(KilnError::spec("a mixture target takes no data")
                    .with_hint("remove \"data\", or write the model as an \"energy\" formula"));
            }
            let d = comps[0].mean.len();
            if raw_vars.is_empty() {
                (1..=d)
                    .map(|i| Variable {
                        name: format!("x{i}"),
                        bounds: Bounds {
                            lower: None,
                            upper: None,
                        },
                    })
                    .collect()
            } else {
                if raw_vars.len() != d {
                    return Err(KilnError::spec(format!(
                        "the mixture has dimension {d} but {} variables are named",
                        raw_vars.len()
                    ))
                    .with_hint(
                        "name one variable per mean coordinate, or leave \"variables\" out",
                    ));
                }
                if let Some(v) = raw_vars
                    .iter()
                    .find(|v| v.lower.is_some() || v.upper.is_some())
                {
                    return Err(KilnError::spec(format!(
                        "variable `{}` has bounds, but a mixture target is unbounded",
                        v.name
                    ))
                    .with_hint(
                        "remove the bounds: a mixture's exact answers are over the whole space",
                    ));
                }
                raw_vars
                    .iter()
                    .map(|v| Variable {
                        name: v.name.clone(),
                        bounds: Bounds {
                            lower: None,
                            upper: None,
                        },
                    })
                    .collect()
            }
        }
        _ => {
            if raw_vars.is_empty() {
                return Err(KilnError::spec("the spec has no unknowns")
                    .with_hint("list them under \"variables\", as in [{\"name\": \"x\"}]"));
            }
            let mut out = Vec::new();
            for v in &raw_vars {
                let b = Bounds {
                    lower: v.lower,
                    upper: v.upper,
                };
                if let Some(l) = b.lower {
                    finite(&format!("the lower bound of `{}`", v.name), l)?;
                }
                if let Some(u) = b.upper {
                    finite(&format!("the upper bound of `{}`", v.name), u)?;
                }
                if let (Some(l), Some(u)) = (b.lower, b.upper) {
                    if l >= u {
                        return Err(KilnError::spec(format!(
                            "variable `{}`: the lower bound {l} is not below the upper bound {u}",
                            v.name
                        ))
                        .with_hint("swap them, or widen the interval"));
                    }
                }
                out.push(Variable {
                    name: v.name.clone(),
                    bounds: b,
                });
            }
            out
        }
    };
    if variables.len() > MAX_DIMENSION {
        return Err(KilnError::limit(format!(
            "the spec has {} unknowns; the limit is {MAX_DIMENSION}",
            variables.len()
        ))
        .with_hint("Kiln is built for models with a handful of unknowns"));
    }
    for (i, v) in variables.iter().enumerate() {
        check_name("variable", &v.name)?;
        if variables[..i].iter().any(|w| w.name == v.name) {
            return Err(
                KilnError::spec(format!("variable `{}` is listed twice", v.name))
                    .with_hint("give every unknown its own name"),
            );
        }
        if data.iter().any(|(c, _)| *c == v.name) {
            return Err(KilnError::spec(format!(
                "`{}` is both a variable and a data column",
                v.name
            ))
            .with_hint("rename one of them"));
        }
    }

    let settings = raw.settings.clone().unwrap_or_default();
    validate_settings(&settings)?;
    Ok(Spec {
        title: raw.title.clone().unwrap_or_default(),
        notes: raw.notes.clone().unwrap_or_default(),
        variables,
        data,
        data_rows,
        model,
        settings,
        raw,
    })
}

fn validate_mixture(comps: &[RawComponent]) -> Result<Vec<Component>, KilnError> {
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

fn validate_settings(s: &Settings) -> Result<(), KilnError> {
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
    if let Some(a) = s.target_accept {
        if !(a > 0.05 && a < 0.999) {
            return Err(KilnError::spec(format!("setting \"target_accept\" is {a}"))
                .with_hint("use a value between 0.05 and 0.999, typically 0.8"));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_full_spec_parses() {
        let s = parse_spec(
            "t.json",
            r#"{"title": "t", "variables": [{"name": "x", "lower": 0, "upper": 31.4}, {"name": "y"}],
                "data": {"len": [4.1, 3.9], "w": [1, 2]}, "energy": "x + y",
                "settings": {"seed": 7}}"#,
        )
        .unwrap();
        assert_eq!(s.dimension(), 2);
        assert_eq!(s.data_rows, 2);
        assert_eq!(s.data[1].0, "w");
        assert_eq!(s.settings.seed, Some(7));
        assert_eq!(
            s.variables[0].bounds,
            Bounds {
                lower: Some(0.0),
                upper: Some(31.4)
            }
        );
    }

    #[test]
    fn unknown_keys_name_the_nearest_allowed_key() {
        let e = parse_spec(
            "t.json",
            "{\"variables\": [{\"name\": \"x\"}],\n \"energi\": \"x^2\"}",
        )
        .unwrap_err();
        assert!(
            e.message.contains("unknown field `energi`"),
            "{}",
            e.message
        );
        assert_eq!(e.hint.as_deref(), Some("did you mean `energy`?"));
        assert_eq!(e.location.unwrap().line, 2);
        let e = parse_spec(
            "t.json",
            r#"{"variables": [{"name": "x", "low": 0}], "energy": "x"}"#,
        )
        .unwrap_err();
        assert_eq!(e.hint.as_deref(), Some("did you mean `lower`?"));
    }

    #[test]
    fn mixture_components_are_validated() {
        let ok = r#"{"mixture": [{"weight": 2, "mean": [0, 1], "sd": [1, 2]}]}"#;
        assert_eq!(parse_spec("m", ok).unwrap().dimension(), 2);
        let bad = r#"{"mixture": [{"weight": 1, "mean": [0, 1], "cov": [[1, 2], [2, 1]]}]}"#;
        assert!(parse_spec("m", bad)
            .unwrap_err()
            .message
            .contains("not positive definite"));
        let bad = r#"{"mixture": [{"weight": 0, "mean": [0], "sd": [1]}]}"#;
        assert!(parse_spec("m", bad)
            .unwrap_err()
            .message
            .contains("weights must be positive"));
        let bad = r#"{"mixture": [{"weight": 1, "mean": [0], "sd": [1]}, {"weight": 1, "mean": [0, 1], "sd": [1, 1]}]}"#;
        assert!(parse_spec("m", bad)
            .unwrap_err()
            .message
            .contains("mean of length 2"));
    }
}
