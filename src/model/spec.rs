//! the spec file (JSON) → a validated [`Spec`].
//!
//! Owns: the one input format of Kiln (command line, page and share links all use it), its
//! shape (unknown keys are errors listing the allowed ones), and every check that needs no
//! formula parsing: names, bounds, vector unknowns (a `"size"` or a list of `"elements"`,
//! expanded here into one unknown per element, `mu[1]` or `mu[north]`, so that every later
//! stage sees named scalar unknowns), priors as written, data columns (as JSON arrays, or as
//! CSV text read by `table`), mixture components, settings, size limits.
//! Must not: parse formulas (that is `syntax`) or build densities (that is `target`).

use crate::common::error::{nearest, ErrorKind, KilnError, Location};
use crate::formula::resolve::{is_identifier, reserved_names, Vector};
use serde::de::{self, MapAccess, Visitor};
use serde::{Deserialize, Deserializer, Serialize, Serializer};
use std::fmt;

use super::parts::{finite, validate_mixture, validate_settings, vector_elements};

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
/// Settings that were renamed: the old name is an error that names the new one.
const RENAMED: &[(&str, &str)] = &[("target_accept", "acceptance_goal")];
const VARIABLE_KEYS: &[&str] = &["name", "size", "elements", "lower", "upper", "prior"];
const COMPONENT_KEYS: &[&str] = &["weight", "mean", "cov", "sd"];
const SETTINGS_KEYS: &[&str] = &[
    "seed",
    "chains",
    "draws",
    "warmup",
    "method",
    "integrator",
    "starts",
    "acceptance_goal",
];

#[derive(Clone, Debug, Default, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct RawVariable {
    pub name: String,
    /// A vector of this many unknowns, `name[1]` … `name[size]`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub size: Option<usize>,
    /// A vector with these element names, `name[first]` …; formulas still index it 1, 2, ….
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub elements: Option<Vec<String>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub lower: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub upper: Option<f64>,
    /// A built-in density of the unknown (of each element), its first argument left out:
    /// `"normal(0, 10)"`; added to the log density.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub prior: Option<String>,
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
    /// The average acceptance of the Hamiltonian moves that warm-up tunes the step size to
    /// reach (default 0.8).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub acceptance_goal: Option<f64>,
}

/// Data as written: columns in the order written, or CSV text with a header row.
#[derive(Clone, Debug, PartialEq)]
pub enum Columns {
    Arrays(Vec<(String, Vec<f64>)>),
    Csv(String),
}

impl Default for Columns {
    fn default() -> Columns {
        Columns::Arrays(Vec::new())
    }
}

impl Serialize for Columns {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        match self {
            Columns::Csv(t) => s.serialize_str(t),
            Columns::Arrays(cols) => {
                let mut m = s.serialize_map(Some(cols.len()))?;
                for (k, v) in cols {
                    m.serialize_entry(k, v)?;
                }
                m.end()
            }
        }
    }
}

impl<'de> Deserialize<'de> for Columns {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Columns, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Columns;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("an object mapping column names to arrays of numbers, or CSV text")
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<Columns, E> {
                Ok(Columns::Csv(v.to_string()))
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
                Ok(Columns::Arrays(out))
            }
        }
        d.deserialize_any(V)
    }
}

/// How an unknown is bounded; the map to the real line follows from it.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Bounds {
    pub lower: Option<f64>,
    pub upper: Option<f64>,
}

/// One scalar unknown (a vector's element is one too, named `mu[2]` or `mu[north]`).
#[derive(Clone, Debug, PartialEq)]
pub struct Variable {
    pub name: String,
    pub bounds: Bounds,
    /// The prior as written in the spec (the vector's, for an element).
    pub prior: Option<String>,
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
    /// The vector unknowns: which of `variables` are their elements.
    pub vectors: Vec<Vector>,
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
    if message.contains("`name`") && message.contains("`lower`") && message.contains("`prior`") {
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
            if let Some((_, new)) = RENAMED.iter().find(|(old, _)| *old == key) {
                let mut err = KilnError::spec(format!("the setting `{key}` is now called `{new}`"));
                if let Some(loc) = location {
                    err = err.at(loc);
                }
                return err.with_hint(format!(
                    "rename \"{key}\" to \"{new}\"; the meaning and the value are the same"
                ));
            }
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
    let data = match raw.data.clone() {
        None => Vec::new(),
        Some(Columns::Arrays(c)) => c,
        Some(Columns::Csv(text)) => crate::model::table::read_csv(&text, MAX_DATA_CELLS)?,
    };
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
    let mut vectors: Vec<Vector> = Vec::new();
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
                        prior: None,
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
                    .find(|v| v.size.is_some() || v.elements.is_some() || v.prior.is_some())
                {
                    return Err(KilnError::spec(format!(
                        "variable `{}` has a size, elements or a prior, but a mixture target takes none",
                        v.name
                    ))
                    .with_hint("write the model as a \"log_density\" formula to use vectors and priors"));
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
                        prior: None,
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
                check_name("variable", &v.name)?;
                let elements = vector_elements(v)?;
                if let Some(labels) = &elements {
                    if out.len() + labels.len() > MAX_DIMENSION {
                        return Err(KilnError::limit(format!(
                            "the spec has more than {MAX_DIMENSION} unknowns (counting every element of `{}`)",
                            v.name
                        ))
                        .with_hint("Kiln is built for models with a handful of unknowns"));
                    }
                    vectors.push(Vector {
                        name: v.name.clone(),
                        first: out.len() as u32,
                        len: labels.len() as u32,
                    });
                }
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
                if let Some(p) = &v.prior {
                    if p.trim().is_empty() {
                        return Err(KilnError::spec(format!("the prior of `{}` is empty", v.name))
                            .with_hint("write a density and its parameters, as in \"normal(0, 10)\", or leave \"prior\" out"));
                    }
                }
                match elements {
                    None => out.push(Variable {
                        name: v.name.clone(),
                        bounds: b,
                        prior: v.prior.clone(),
                    }),
                    Some(labels) => out.extend(labels.iter().map(|l| Variable {
                        name: format!("{}[{l}]", v.name),
                        bounds: b,
                        prior: v.prior.clone(),
                    })),
                }
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
        if !v.name.contains('[') {
            check_name("variable", &v.name)?;
        }
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

    for (i, vec) in vectors.iter().enumerate() {
        let scalar = variables.iter().any(|v| v.name == vec.name);
        if scalar || vectors[..i].iter().any(|w| w.name == vec.name) {
            return Err(
                KilnError::spec(format!("variable `{}` is listed twice", vec.name))
                    .with_hint("give every unknown its own name"),
            );
        }
        if data.iter().any(|(c, _)| *c == vec.name) {
            return Err(KilnError::spec(format!(
                "`{}` is both a variable and a data column",
                vec.name
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
        vectors,
        data,
        data_rows,
        model,
        settings,
        raw,
    })
}

/// The spec with its data replaced by CSV text (the command line's `--data FILE.csv`).
pub fn with_data_csv(spec: &Spec, csv_text: &str) -> Result<Spec, KilnError> {
    let mut raw = spec.raw.clone();
    raw.data = Some(Columns::Csv(csv_text.to_string()));
    validate(raw)
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
    fn vectors_expand_into_named_elements_with_shared_bounds_and_priors() {
        let s = parse_spec(
            "t.json",
            r#"{"variables": [{"name": "a"}, {"name": "mu", "size": 3, "lower": 0, "prior": "normal(0, 5)"},
                {"name": "site", "elements": ["north", "south"]}],
                "data": "y,g\r\n1,2\r\n", "log_density": "a"}"#,
        )
        .unwrap();
        let names = s.names();
        assert_eq!(
            names,
            ["a", "mu[1]", "mu[2]", "mu[3]", "site[north]", "site[south]"]
        );
        assert_eq!(
            s.vectors[0],
            Vector {
                name: "mu".into(),
                first: 1,
                len: 3
            }
        );
        assert_eq!(s.vectors[1].first, 4);
        assert_eq!(s.variables[3].bounds.lower, Some(0.0));
        assert_eq!(s.variables[2].prior.as_deref(), Some("normal(0, 5)"));
        assert_eq!(s.data[1], ("g".to_string(), vec![2.0]));
        // The raw spec keeps what was written, CSV text included.
        let back = serde_json::to_string(&s.raw).unwrap();
        assert!(back.contains(r#""data":"y,g\r\n1,2\r\n""#), "{back}");
        for (bad, what) in [
            (r#"{"name": "m", "size": 0}"#, "has size 0"),
            (
                r#"{"name": "m", "size": 2, "elements": ["a", "b"]}"#,
                "both",
            ),
            (r#"{"name": "m", "elements": ["a", "a"]}"#, "appears twice"),
            (
                r#"{"name": "m", "elements": ["a b"]}"#,
                "not a valid element name",
            ),
            (r#"{"name": "m", "size": 65}"#, "1 to 64"),
            (r#"{"name": "m", "prior": " "}"#, "is empty"),
        ] {
            let text = format!(r#"{{"variables": [{bad}], "energy": "0"}}"#);
            let e = parse_spec("t", &text).unwrap_err();
            assert!(e.message.contains(what), "{bad}: {}", e.message);
        }
        let e = parse_spec(
            "t",
            r#"{"variables": [{"name": "m", "size": 2}, {"name": "m"}], "energy": "0"}"#,
        )
        .unwrap_err();
        assert!(e.message.contains("listed twice"));
        let e = parse_spec(
            "t",
            r#"{"variables": [{"name": "m", "sise": 2}], "energy": "0"}"#,
        )
        .unwrap_err();
        assert_eq!(e.hint.as_deref(), Some("did you mean `size`?"));
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
