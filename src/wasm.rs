//! The WebAssembly layer: translates between JavaScript values and the library. No statistics.
//!
//! Owns: the exported functions and the `RunSession` class the page's workers call (see
//! www/ENGINE-API.md), and the shape of errors as they cross into JavaScript
//! (`{kind, message, location: {source, line, column, line_text, width}, hint, rendered}`),
//! never a panic: a panic hook turns any remaining panic into a console error the page shows.
//! Must not: compute anything the native command line would not compute the same way.

use crate::common::error::KilnError;
use crate::run::{self, Overrides, Session};
use crate::sample::{decode_records, encode_records, Step};
use serde::Serialize;
use wasm_bindgen::prelude::*;

#[derive(Serialize)]
struct JsError<'a> {
    #[serde(flatten)]
    error: &'a KilnError,
    rendered: String,
}

fn to_js_error(e: &KilnError) -> JsValue {
    let v = JsError {
        error: e,
        rendered: e.render(),
    };
    let ser = serde_wasm_bindgen::Serializer::json_compatible();
    v.serialize(&ser)
        .unwrap_or_else(|_| JsValue::from_str(&e.render()))
}

fn to_js<T: Serialize>(v: &T) -> Result<JsValue, JsValue> {
    let ser = serde_wasm_bindgen::Serializer::json_compatible();
    v.serialize(&ser).map_err(|e| {
        to_js_error(&KilnError::usage(format!(
            "could not pass the result to the page: {e}"
        )))
    })
}

fn spec_of(json: &str) -> Result<crate::Spec, JsValue> {
    crate::parse_spec("spec", json).map_err(|e| to_js_error(&e))
}

#[derive(serde::Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct JsOverrides {
    seed: Option<u64>,
    chains: Option<usize>,
    draws: Option<usize>,
    warmup: Option<usize>,
    method: Option<String>,
    integrator: Option<String>,
}

fn overrides_of(json: &str) -> Result<Overrides, JsValue> {
    let o: JsOverrides = if json.trim().is_empty() {
        JsOverrides::default()
    } else {
        serde_json::from_str(json).map_err(|e| {
            to_js_error(
                &KilnError::usage(format!("bad run settings: {e}"))
                    .with_hint("seed, chains, draws, warmup, method, integrator"),
            )
        })?
    };
    Ok(Overrides {
        seed: o.seed,
        chains: o.chains,
        draws: o.draws,
        warmup: o.warmup,
        method: o.method,
        integrator: o.integrator,
    })
}

/// Installs the panic hook (called once when the module starts).
#[wasm_bindgen(start)]
pub fn start() {
    std::panic::set_hook(Box::new(|info| {
        let msg = format!("Kiln stopped on an internal error (please report it): {info}");
        web_log(&msg);
    }));
}

#[wasm_bindgen]
extern "C" {
    #[wasm_bindgen(js_namespace = console, js_name = error)]
    fn web_log(s: &str);
}

/// `kiln check` on a spec given as JSON text.
#[wasm_bindgen]
pub fn check_spec(spec_json: &str) -> Result<JsValue, JsValue> {
    let spec = spec_of(spec_json)?;
    let outcome = run::check(&spec).map_err(|e| to_js_error(&e))?;
    to_js(&outcome)
}

/// The user's log density on a grid (one or two unknowns), row-major with y outer.
#[wasm_bindgen]
#[allow(clippy::too_many_arguments)]
pub fn log_density_grid(
    spec_json: &str,
    ix: usize,
    iy: usize,
    xmin: f64,
    xmax: f64,
    ymin: f64,
    ymax: f64,
    nx: usize,
    ny: usize,
) -> Result<Vec<f64>, JsValue> {
    let spec = spec_of(spec_json)?;
    run::log_density_grid(&spec, ix, iy, (xmin, xmax), (ymin, ymax), nx, ny)
        .map_err(|e| to_js_error(&e))
}

/// The log Bayes factor of two finished runs, from each run's result (`log_z`, `log_z_se` and
/// `verdict` are read; other fields are ignored): the one implementation of the comparison.
#[wasm_bindgen]
pub fn compare_runs(a_json: &str, b_json: &str) -> Result<JsValue, JsValue> {
    let read = |json: &str, which: &str| -> Result<run::Evidence, JsValue> {
        serde_json::from_str(json).map_err(|e| {
            to_js_error(&KilnError::usage(format!(
                "could not read run {which}'s result: {e}"
            )))
        })
    };
    to_js(&run::bayes_factor(&read(a_json, "A")?, &read(b_json, "B")?))
}

/// The library's version.
#[wasm_bindgen]
pub fn version() -> String {
    env!("CARGO_PKG_VERSION").to_string()
}

/// One worker's part of a run (www/ENGINE-API.md).
#[wasm_bindgen]
pub struct RunSession {
    session: Session,
    result: Option<run::RunResult>,
}

#[wasm_bindgen]
impl RunSession {
    #[wasm_bindgen(constructor)]
    pub fn new(
        spec_json: &str,
        overrides_json: &str,
        owned_chains: Vec<u32>,
    ) -> Result<RunSession, JsValue> {
        let spec = spec_of(spec_json)?;
        let o = overrides_of(overrides_json)?;
        let owned: Vec<usize> = owned_chains.iter().map(|c| *c as usize).collect();
        let session = Session::new(&spec, &o, Some(&owned)).map_err(|e| to_js_error(&e))?;
        Ok(RunSession {
            session,
            result: None,
        })
    }

    pub fn chains(&self) -> usize {
        self.session.settings().chains
    }

    pub fn settings(&self) -> Result<JsValue, JsValue> {
        to_js(self.session.settings())
    }

    pub fn step_count(&self) -> usize {
        self.session.step_count()
    }

    pub fn step_index(&self) -> usize {
        self.session.step_index()
    }

    pub fn step_kind(&self) -> String {
        match self.session.step() {
            Some(Step::Warmup { .. }) => "warmup".into(),
            Some(Step::Sample { .. }) => "sampling".into(),
            None => "done".into(),
        }
    }

    pub fn step_iterations(&self) -> usize {
        match self.session.step() {
            Some(Step::Warmup { iterations, .. }) | Some(Step::Sample { iterations, .. }) => {
                iterations
            }
            None => 0,
        }
    }

    /// A session for the given chains that takes the leading worker's modes (its `modes()`)
    /// instead of searching again; it runs and absorbs steps but does not summarise.
    pub fn follow(
        spec_json: &str,
        overrides_json: &str,
        owned_chains: Vec<u32>,
        modes_json: &str,
    ) -> Result<RunSession, JsValue> {
        let spec = spec_of(spec_json)?;
        let o = overrides_of(overrides_json)?;
        let owned: Vec<usize> = owned_chains.iter().map(|c| *c as usize).collect();
        let session =
            Session::follow(&spec, &o, &owned, modes_json).map_err(|e| to_js_error(&e))?;
        Ok(RunSession {
            session,
            result: None,
        })
    }

    /// The modes a leading session found, as JSON for `follow` (undefined for a follower).
    pub fn modes(&self) -> Option<String> {
        self.session.modes_json()
    }

    /// Runs this worker's chains through the current step; returns their records as one
    /// Float64Array (see `sample::encode_records`).
    pub fn run_step(&mut self) -> Vec<f64> {
        encode_records(&self.session.run_step())
    }

    /// Takes every worker's `run_step()` arrays, concatenated in worker order, and advances.
    pub fn absorb(&mut self, all_records: &[f64]) -> Result<(), JsValue> {
        let records = decode_records(all_records).map_err(|e| to_js_error(&e))?;
        self.session.absorb(records).map_err(|e| to_js_error(&e))?;
        if self.session.step().is_none() && self.session.leads() {
            self.result = Some(self.session.finish().map_err(|e| to_js_error(&e))?);
        }
        Ok(())
    }

    pub fn progress(&self) -> Result<JsValue, JsValue> {
        to_js(&self.session.progress())
    }

    fn done(&self) -> Result<&run::RunResult, JsValue> {
        self.result.as_ref().ok_or_else(|| {
            to_js_error(
                &KilnError::usage("the run has not finished yet")
                    .with_hint("absorb every step first"),
            )
        })
    }

    pub fn result(&self) -> Result<JsValue, JsValue> {
        to_js(&self.done()?.outcome)
    }

    pub fn plot_draws(&self, max_points: usize) -> Result<JsValue, JsValue> {
        to_js(&self.done()?.plot_draws(max_points))
    }

    pub fn draws_csv(&self) -> Result<String, JsValue> {
        Ok(crate::report::run_draws_csv(self.done()?))
    }
}

/// What the page shows of a data table: its column names and number of rows.
#[derive(Serialize)]
struct DataShape {
    names: Vec<String>,
    rows: usize,
}

/// Reads CSV data as a spec's `"data"` would be read (the same reader, the same errors):
/// `{names, rows}`, or the error with its row, line and column.
#[wasm_bindgen]
pub fn read_data_csv(text: &str) -> Result<JsValue, JsValue> {
    let cols = crate::model::table::read_csv(text, crate::model::spec::MAX_DATA_CELLS)
        .map_err(|e| to_js_error(&e))?;
    to_js(&DataShape {
        rows: cols.first().map_or(0, |c| c.1.len()),
        names: cols.into_iter().map(|c| c.0).collect(),
    })
}

/// Every function of the formula language, for the editor's suggestions: `[{name, args,
/// summary, example, kind}]` (kind: "function", "density" or "form").
#[wasm_bindgen]
pub fn formula_functions() -> Result<JsValue, JsValue> {
    to_js(&crate::formula::catalogue::catalogue())
}
