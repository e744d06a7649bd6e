//! Choosing the base for the rest of warm-up: candidate bases fitted to the warm-up draws
//! (the Laplace mixture, its components reweighted, per-mode fits, one global Student-t fit;
//! the fits are in `refit`) and judged on held-out draws without new energy evaluations.
//!
//! Owns: which candidates are tried, the held-out variance of the log Z series each would give
//! ([`HeldOut`]), the rule that replaces the base, and the description of the choice.
//! Must not: run chains, or estimate anything for the report.

use super::chain::heavy_tails;
use super::plan::{Plan, Record};
use super::refit::{self, ModeShape};
use super::series::{log_z_from, Series};
use super::tempering::{log_phi, Base, Bias};
use crate::common::error::KilnError;
use crate::common::gaussian::Mixture;
use crate::common::maths::{exp, ln, log_sum_exp, sqrt};
use crate::common::rng::Stream;
use crate::model::target::Target;
use crate::search::modes::mahalanobis2;
use std::sync::Arc;

/// Per-mode candidate bases are tried only when at most this share of the target's weight in
/// the warm-up draws lies far from every known mode (the threshold of the report's warning).
pub const MODE_LIKE_FAR: f64 = 0.01;

/// Per-draw variance of the log Z series above which the base counts as poor: the global fit is
/// then taken without the held-out comparison (see `Plan::refit_base`).
pub const POOR_SPREAD: f64 = 1.0;

/// A candidate base replaces the current one when its held-out per-draw variance of the log Z
/// series is below this share of the current base's (a margin against noise in the check and
/// against the cost of restarting the adaptation).
pub const SWITCH_RATIO: f64 = 0.8;
/// Most draws an EM fit of a candidate base sees in `d` dimensions (a systematic subsample
/// beyond): enough for the components a mode can carry, and a bounded cost.
pub fn max_fit_draws(d: usize) -> usize {
    2000 + 1000 * d
}

impl Plan {
    /// Weighted draws for fitting: every draw of the windows given, weighted by p(1|x) under the
    /// bias it was drawn with, weights normalised within each window (so that each window
    /// counts by its number of draws).
    fn fit_draws(&self, history: &[(Bias, Vec<Record>)]) -> (Vec<Vec<f64>>, Vec<f64>) {
        let d = self.dim();
        let mut points = Vec::new();
        let mut w = Vec::new();
        for (used, records) in history {
            let mut s = vec![0.0; used.knots.len()];
            let mut lw = Vec::new();
            let mut pts = Vec::new();
            for r in records {
                for (i, &delta) in r.delta.iter().enumerate() {
                    let (l1, _) = used.log_p1_p0(delta, &mut s);
                    if l1.is_finite() {
                        pts.push(r.z[i * d..(i + 1) * d].to_vec());
                        lw.push(l1);
                    }
                }
            }
            let m = log_sum_exp(&lw) - ln(lw.len().max(1) as f64);
            w.extend(lw.iter().map(|l| exp(l - m)));
            points.extend(pts);
        }
        let cap = max_fit_draws(d);
        if points.len() > cap {
            // A systematic subsample keeps the fits' cost bounded.
            let step = points.len() as f64 / cap as f64;
            let keep: Vec<usize> = (0..cap)
                .map(|i| ((i as f64 + 0.5) * step) as usize)
                .collect();
            points = keep.iter().map(|&i| points[i].clone()).collect();
            w = keep.iter().map(|&i| w[i]).collect();
        }
        (points, w)
    }

    /// The kinds of candidate base tried at a refit point (see `refit`).
    fn candidate_kinds(&self, n_points: usize, far: f64) -> Vec<Candidate> {
        let mut out = vec![Candidate::Laplace];
        let modes = self.laplace.base.components.len();
        if modes > 1 {
            out.push(Candidate::Reweighted);
        }
        // Per-mode fits describe the target as a set of modes; with much of its weight far from
        // every mode (a ridge, a shell), their light tails along the target's extent would be
        // judged only where the held-out draws reach, which is not where they fail.
        if far <= MODE_LIKE_FAR {
            out.push(Candidate::PerMode);
        }
        // One EM over all draws with extra free components: its cost grows with the number of
        // components, so it is left out when there are very many modes.
        let d = self.dim();
        let cost = n_points as f64
            * global_components(modes) as f64
            * (d * d) as f64
            * refit::GLOBAL_EM_ITERATIONS as f64;
        if cost <= 2e9 {
            out.push(Candidate::Global);
        }
        out
    }

    /// Fits one kind of candidate base to weighted draws.
    fn fit_candidate(
        &self,
        kind: Candidate,
        points: &[Vec<f64>],
        w: &[f64],
        mode_of: &[usize],
        shapes: &[ModeShape],
        rng: &mut Stream,
    ) -> Option<Mixture> {
        let laplace = &self.laplace.base;
        match kind {
            Candidate::Laplace => Some(laplace.clone()),
            Candidate::Reweighted => refit::reweight(w, mode_of, laplace),
            Candidate::PerMode => refit::per_mode(points, w, mode_of, laplace, shapes),
            Candidate::Global => {
                let seeds = &laplace.components;
                refit::refit(points, w, seeds, global_components(seeds.len()), rng)
            }
        }
    }

    /// Share of the weighted draws' weight far from every known mode (squared Mahalanobis
    /// distance under the mode's Hessian above 30 + 4D, as in the report's warning).
    fn far_share(&self, points: &[Vec<f64>], w: &[f64]) -> f64 {
        let d = self.dim();
        let limit = 30.0 + 4.0 * d as f64;
        let total: f64 = w.iter().sum();
        if !(total > 0.0) {
            return 0.0;
        }
        let far: f64 = points
            .iter()
            .zip(w)
            .filter(|(z, _)| {
                self.modes
                    .iter()
                    .all(|m| mahalanobis2(z, &m.z, &m.hessian) > limit)
            })
            .map(|(_, wi)| wi)
            .sum();
        if far > 0.0 {
            far / total
        } else {
            0.0
        }
    }

    /// Chooses the base for the rest of warm-up from candidates fitted to the windows since the
    /// last change, checked on held-out draws (the last window), and re-estimates log ζ.
    /// Returns a description of the change, or `None` when the base stays.
    pub(super) fn refit_base(
        &mut self,
        _target: &Target,
        history: &[(Bias, Vec<Record>)],
        must_change: bool,
        rng: &mut Stream,
    ) -> Result<Option<String>, KilnError> {
        // `must_change`: the current base is not a candidate (new modes, or a forced refit).
        let Some((last_bias, last_records)) = history.last() else {
            return Ok(None);
        };
        let log_zeta = log_z_from(last_bias, &self.base, last_records);
        if !log_zeta.is_finite() {
            return Ok(None);
        }
        let held = HeldOut::new(&self.base, last_bias, last_records);
        // Fit on the earlier windows, judge on the last one; the winner is then refitted to all.
        let train = if history.len() > 1 {
            &history[..history.len() - 1]
        } else {
            history
        };
        let current = if must_change {
            f64::INFINITY
        } else {
            held.variance(&self.base.q, log_zeta)
                .unwrap_or(f64::INFINITY)
        };
        let (points, w) = self.fit_draws(train);
        if points.len() < 10 {
            return Ok(None);
        }
        let mode_of = refit::assign_modes(&points, &self.laplace.base);
        // Each mode's shape (components, tails) by the likelihood of its held-out draws.
        let (valid, valid_w) = self.fit_draws(&history[history.len() - 1..]);
        let valid_mode = refit::assign_modes(&valid, &self.laplace.base);
        let shapes = refit::choose_shapes(
            &points,
            &w,
            &mode_of,
            &valid,
            &valid_w,
            &valid_mode,
            &self.laplace.base,
        );
        let far = self.far_share(&points, &w);
        let kinds = self.candidate_kinds(points.len(), far);
        // A poor base (its own series, measured directly on the last window, varies by more
        // than POOR_SPREAD per draw) makes the reweighted comparison unreliable: held-out draws
        // made under it cover the candidates' regions badly. Then the free-form global fit is
        // taken, as it is for targets that are not a set of modes, when it can be afforded.
        let own = Series::new(last_bias, last_records).variance();
        let poor = own > POOR_SPREAD || far > MODE_LIKE_FAR;
        let (kind, v) = if poor && kinds.contains(&Candidate::Global) {
            (Candidate::Global, f64::NAN)
        } else {
            let mut best: Option<(Candidate, f64)> = None;
            for kind in kinds {
                let Some(q) = self.fit_candidate(kind, &points, &w, &mode_of, &shapes, rng) else {
                    continue;
                };
                if let Some(v) = held.variance(&q, log_zeta) {
                    if best.is_none_or(|b| v < b.1) {
                        best = Some((kind, v));
                    }
                }
            }
            let Some((kind, v)) = best else {
                return Ok(None);
            };
            if !(v < SWITCH_RATIO * current) && !must_change {
                return Ok(None);
            }
            (kind, v)
        };
        let (points, w) = self.fit_draws(history);
        let mode_of = refit::assign_modes(&points, &self.laplace.base);
        let Some(fit) = self.fit_candidate(kind, &points, &w, &mode_of, &shapes, rng) else {
            return Ok(None);
        };
        let name = kind.describe(fit.components.len(), &shapes);
        self.base = Base {
            q: Arc::new(fit),
            log_zeta,
        };
        self.heavy = Arc::new(heavy_tails(&self.base.q));
        self.bias = Bias::flat(self.options.knots);
        self.metric = Plan::metric_of(&self.base.q)?;
        self.refitted = true;
        if v.is_nan() {
            return Ok(Some(format!(
                "{name} (the base was poor: variance of the log Z series per draw {own:.2e}, {:.1}% of the target's weight far from every mode)",
                100.0 * far
            )));
        }
        let before = if current.is_finite() {
            format!("{current:.2e} → ")
        } else {
            String::new()
        };
        Ok(Some(format!(
            "{name}; held-out variance of the log Z series per draw (estimate + 2 SE) {before}{v:.2e}"
        )))
    }
}

/// A kind of candidate base (see `refit`).
#[derive(Clone, Copy, Debug, PartialEq)]
enum Candidate {
    /// The Laplace approximation at the known modes.
    Laplace,
    /// The Laplace components with weights from the draws.
    Reweighted,
    /// Per mode, the shape its held-out draws chose (see `refit::choose_shapes`).
    PerMode,
    /// One Student-t EM over all draws, with extra free components.
    Global,
}

impl Candidate {
    fn describe(self, components: usize, shapes: &[ModeShape]) -> String {
        match self {
            Candidate::Laplace => "the Laplace approximation at the known modes".into(),
            Candidate::Reweighted => "the Laplace components with weights from the draws".into(),
            Candidate::PerMode => {
                let refitted = shapes.iter().filter(|s| s.components > 0).count();
                let most = shapes.iter().map(|s| s.components).max().unwrap_or(0);
                let tails: Vec<String> = {
                    let mut v: Vec<f64> = shapes
                        .iter()
                        .filter(|s| s.components > 0)
                        .map(|s| s.nu)
                        .collect();
                    v.sort_by(|a, b| a.total_cmp(b));
                    v.dedup();
                    v.iter()
                        .map(|nu| {
                            if nu.is_finite() {
                                format!("{nu}")
                            } else {
                                "∞".into()
                            }
                        })
                        .collect()
                };
                format!(
                    "per-mode fits ({refitted} of {} modes refitted, up to {most} component(s) each, ν ∈ {{{}}}; {components} components in all)",
                    shapes.len(),
                    tails.join(", ")
                )
            }
            Candidate::Global => {
                format!("{components} Student-t components fitted to all draws")
            }
        }
    }
}

/// Components of the global fit for `modes` known modes.
fn global_components(modes: usize) -> usize {
    (2 * modes).max(16).min(modes + 32)
}

/// Draws held out to judge a candidate base: for each, its position, its energy and the log
/// of the (unnormalised) density it was drawn from.
///
/// A draw of a window run with base q and bias g has the marginal density
/// m(x) ∝ q(x) C(x). A candidate base q′ with log ζ′ and a flat bias would draw from
/// m′(x) ∝ q′(x) φ(Δ′(x)), φ(a) = (1 − e^{−a})/a. Weighting the held-out draws by m′/m gives
/// the per-draw variance of the log Z series under q′, var(p1/E p1 − p0/E p0), without a single
/// new energy evaluation (E is recovered from the recorded Δ).
struct HeldOut {
    z: Vec<Vec<f64>>,
    e: Vec<f64>,
    log_m: Vec<f64>,
}

impl HeldOut {
    fn new(base: &Base, bias: &Bias, records: &[Record]) -> HeldOut {
        let d = base.q.dim;
        let mut scratch = base.q.scratch();
        let mut s = vec![0.0; bias.knots.len()];
        let mut out = HeldOut {
            z: Vec::new(),
            e: Vec::new(),
            log_m: Vec::new(),
        };
        for r in records {
            for (i, &delta) in r.delta.iter().enumerate() {
                if !delta.is_finite() {
                    continue;
                }
                let z = &r.z[i * d..(i + 1) * d];
                let log_q = base.q.log_density(z, &mut scratch);
                out.e.push(delta - base.log_zeta - log_q);
                out.log_m.push(log_q + bias.log_c(delta, &mut s));
                out.z.push(z.to_vec());
            }
        }
        out
    }

    /// The per-draw variance of the log Z series with base `q` and log ζ, flat bias, plus two
    /// standard errors of that estimate: candidates are judged pessimistically, so that one whose
    /// reweighted draws are few or uneven does not win on a lucky estimate.
    fn variance(&self, q: &Mixture, log_zeta: f64) -> Option<f64> {
        self.estimate(q, log_zeta)
            .map(|(v, se)| v + 2.0 * se)
            .filter(|u| u.is_finite())
    }

    /// The per-draw variance of the log Z series with base `q` and log ζ, flat bias, and the
    /// standard error of that estimate (self-normalised importance sampling); `None` when the
    /// reweighted draws are too few to say (effective size below 5 % or 20).
    fn estimate(&self, q: &Mixture, log_zeta: f64) -> Option<(f64, f64)> {
        let n = self.z.len();
        if n < 20 {
            return None;
        }
        let mut scratch = q.scratch();
        let mut lv = Vec::with_capacity(n);
        let mut p = Vec::with_capacity(n);
        for i in 0..n {
            let log_q = q.log_density(&self.z[i], &mut scratch);
            let delta = self.e[i] + log_zeta + log_q;
            if !delta.is_finite() {
                continue;
            }
            let lphi = log_phi(delta);
            lv.push(log_q + lphi - self.log_m[i]);
            p.push((exp(-delta - lphi), exp(-lphi)));
        }
        let top = lv.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        if !top.is_finite() {
            return None;
        }
        let v: Vec<f64> = lv.iter().map(|l| exp(l - top)).collect();
        let sv: f64 = v.iter().sum();
        let sv2: f64 = v.iter().map(|x| x * x).sum();
        let ess = sv * sv / sv2;
        if ess < 20.0 || ess < 0.05 * n as f64 {
            return None;
        }
        let m1 = v.iter().zip(&p).map(|(a, b)| a * b.0).sum::<f64>() / sv;
        let m0 = v.iter().zip(&p).map(|(a, b)| a * b.1).sum::<f64>() / sv;
        if !(m1 > 0.0 && m0 > 0.0) {
            return None;
        }
        let z2: Vec<f64> = p
            .iter()
            .map(|b| {
                let z = b.0 / m1 - b.1 / m0;
                z * z
            })
            .collect();
        let var = v.iter().zip(&z2).map(|(a, g)| a * g).sum::<f64>() / sv;
        let se2 = v
            .iter()
            .zip(&z2)
            .map(|(a, g)| a * a * (g - var) * (g - var))
            .sum::<f64>()
            / (sv * sv);
        (var.is_finite() && se2.is_finite()).then_some((var, sqrt(se2)))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::common::gaussian::Gaussian;
    use crate::common::rng::Purpose;

    /// Records of `n` draws per chain from a 1-D target with the given Δ at each draw.
    fn records_1d(deltas: &[Vec<f64>], zs: &[Vec<f64>]) -> Vec<Record> {
        deltas
            .iter()
            .zip(zs)
            .enumerate()
            .map(|(c, (d, z))| Record {
                chain: c,
                z: z.clone(),
                beta: vec![0.5; d.len()],
                delta: d.clone(),
                iterations: d.len(),
                ..Record::default()
            })
            .collect()
    }

    #[test]
    fn held_out_variance_of_the_current_base_is_the_series_variance() {
        // With a flat bias and the candidate equal to the base the draws were made with, the
        // reweighting is the identity (m′/m = φ(Δ)/C(Δ) = 1), so the held-out variance must equal
        // the plain per-draw variance of the series (an identity).
        let g = Gaussian::new(&[0.0], &[vec![1.0]]).unwrap();
        let q = Mixture::new(vec![g], &[1.0]);
        let base = Base {
            q: Arc::new(q.clone()),
            log_zeta: 0.3,
        };
        let bias = Bias::flat(16);
        let mut rng = Stream::new(4, Purpose::Check, 0);
        let mut zs = vec![Vec::new(), Vec::new()];
        let mut ds = vec![Vec::new(), Vec::new()];
        for c in 0..2 {
            for _ in 0..500 {
                let x = 1.3 * rng.normal();
                zs[c].push(x);
                // Δ of a made-up energy 0.6 x² + 0.1 x⁴ against this base.
                let e = 0.6 * x * x + 0.1 * x * x * x * x;
                let mut s = q.scratch();
                ds[c].push(e + base.log_zeta + q.log_density(&[x], &mut s));
            }
        }
        let recs = records_1d(&ds, &zs);
        let held = HeldOut::new(&base, &bias, &recs);
        let (v, _) = held.estimate(&q, base.log_zeta).unwrap();
        let direct = Series::new(&bias, &recs).variance();
        assert!(
            (v - direct).abs() < 1e-9 * direct.max(1.0),
            "{v} vs {direct}"
        );
    }
}
