//! The WebAssembly layer: translates between JavaScript values and the library. No statistics.
//!
//! Owns: the exported functions the page's workers call, and the shape of errors as they cross
//! into JavaScript (`{kind, message, location: {source, line, column, line_text, width}, hint,
//! rendered}`), never a panic.
//! Must not: compute anything the native command line would not compute the same way.

use crate::error::KilnError;
use crate::pipeline;
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
    serde_wasm_bindgen::to_value(&v).unwrap_or_else(|_| JsValue::from_str(&e.render()))
}

fn to_js<T: Serialize>(v: &T) -> Result<JsValue, JsValue> {
    let ser = serde_wasm_bindgen::Serializer::json_compatible();
    v.serialize(&ser)
        .map_err(|e| JsValue::from_str(&format!("could not pass the result to the page: {e}")))
}

/// `kiln check` on a spec given as JSON text.
#[wasm_bindgen]
pub fn check_spec(spec_json: &str) -> Result<JsValue, JsValue> {
    let spec = crate::parse_spec("spec", spec_json).map_err(|e| to_js_error(&e))?;
    let outcome = pipeline::check(&spec).map_err(|e| to_js_error(&e))?;
    to_js(&outcome)
}

/// The library's version.
#[wasm_bindgen]
pub fn version() -> String {
    env!("CARGO_PKG_VERSION").to_string()
}
