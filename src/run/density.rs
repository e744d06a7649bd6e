//! The user's log density on a grid of cell centres, for the page's density map.
//!
//! Owns: [`log_density_grid`].
//! Must not: integrate or sample (the grid check is `estimate::quadrature`).

use crate::common::error::KilnError;
use crate::model::spec::Spec;

/// The user's log density on a grid of cell centres (row-major, y outer), for one or two
/// unknowns: `ix`, `iy` pick the unknowns (iy ignored for one unknown).
#[allow(clippy::too_many_arguments)]
pub fn log_density_grid(
    spec: &Spec,
    ix: usize,
    iy: usize,
    xr: (f64, f64),
    yr: (f64, f64),
    nx: usize,
    ny: usize,
) -> Result<Vec<f64>, KilnError> {
    let target = crate::model::target::Target::from_spec(spec)?;
    let d = target.dim();
    if d > 2 {
        return Err(KilnError::usage("a density map needs one or two unknowns")
            .with_hint("for more unknowns, plot the draws of a pair"));
    }
    if ix >= d || (d == 2 && (iy >= d || iy == ix)) {
        return Err(KilnError::usage(
            "choose two different unknowns for the density map",
        ));
    }
    let (nx, ny) = (
        nx.clamp(1, 1024),
        if d == 1 { 1 } else { ny.clamp(1, 1024) },
    );
    let mut ev = target.evaluator();
    let mut out = Vec::with_capacity(nx * ny);
    let mut x = vec![0.0; d];
    for j in 0..ny {
        for i in 0..nx {
            x[ix] = xr.0 + (i as f64 + 0.5) * (xr.1 - xr.0) / nx as f64;
            if d == 2 {
                x[iy] = yr.0 + (j as f64 + 0.5) * (yr.1 - yr.0) / ny as f64;
            }
            out.push(-ev.user_energy(&x));
        }
    }
    Ok(out)
}
