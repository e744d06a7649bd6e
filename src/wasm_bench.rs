//! WebAssembly export of the engine-speed benchmark (`bench::speed`), for
//! `scripts/bench-wasm.mjs` under Node. Only the clock differs from the native run:
//! `performance.now()` (or `Date.now()` where there is no `performance`), because
//! `std::time::Instant` panics on wasm32-unknown-unknown.
//! Must not: compute anything the native benchmark would not compute the same way.

use wasm_bindgen::prelude::*;
use wasm_bindgen::JsCast;

fn clock() -> impl FnMut() -> f64 {
    let perf = js_sys::Reflect::get(&js_sys::global(), &JsValue::from_str("performance"))
        .ok()
        .filter(|p| p.is_object());
    let now = perf.as_ref().and_then(|p| {
        js_sys::Reflect::get(p, &JsValue::from_str("now"))
            .ok()
            .and_then(|f| f.dyn_into::<js_sys::Function>().ok())
    });
    move || match (&perf, &now) {
        (Some(p), Some(f)) => f
            .call0(p)
            .ok()
            .and_then(|v| v.as_f64())
            .unwrap_or_else(js_sys::Date::now),
        _ => js_sys::Date::now(),
    }
}

/// Runs the engine-speed loops (at least `min_ms` milliseconds per timed loop) and returns the
/// rows as JSON text: `[{energy, dimension, data_rows, tape_ns, hand_ns, ratio, max_difference}]`.
#[wasm_bindgen]
pub fn speed_benchmark(min_ms: f64) -> String {
    let mut now = clock();
    let rows = crate::bench::speed::measure(&mut now, min_ms.max(1.0));
    serde_json::to_string(&rows).unwrap_or_else(|_| "[]".to_string())
}
