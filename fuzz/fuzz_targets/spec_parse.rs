//! Fuzzes spec parsing and validation, then the whole `kiln check` on what parses: never a
//! panic, and every error renders.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    match kiln::parse_spec("fuzz.json", text) {
        Ok(spec) => {
            // Keep each case quick under instrumentation: small mode searches, scans and grids only.
            if spec.dimension() <= 3 && spec.data_rows <= 64 {
                let mut spec = spec;
                spec.settings.starts = Some(4);
                match kiln::run::check_with_grid_budget(&spec, 2e6) {
                    Ok(_) => {}
                    Err(e) => {
                        let _ = e.render();
                    }
                }
            }
        }
        Err(e) => {
            assert!(!e.render().is_empty());
        }
    }
});
