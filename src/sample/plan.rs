//! The plan all chains share in a phase, and the records chains make under it.
//!
//! Owns: [`Plan`] (base, bias, whitening metric, the known modes and their Laplace mixture, the
//! probability of a Hamiltonian move, the base's mass on the target's support, notes), the
//! changes a plan undergoes at synchronisation points that are not the choice of a new base
//! (bias update, modes found by the chains, the support measurement), and [`Record`], one
//! chain's draws and counters for a step.
//! Must not: run chains or estimate anything for the report.

use super::chain::heavy_tails;
use super::options::SamplerOptions;
use super::series::log_marginal_at_knots;
use super::tempering::{Base, Bias};
use crate::common::error::KilnError;
use crate::common::gaussian::{Mixture, Whitening};
use crate::common::maths::{ln, sqrt};
use crate::common::rng::{Purpose, Stream};
use crate::model::target::Target;
use crate::search::laplace::Laplace;
use crate::search::modes::{mahalanobis2, merge_mode, mode_from, FoundBy, Mode};
use std::sync::Arc;

/// What all chains share in a phase; changed only at synchronisation points.
#[derive(Clone, Debug)]
pub struct Plan {
    pub base: Base,
    /// The heavy-tailed part of the independence proposal (see [`heavy_tails`]).
    pub heavy: Arc<Mixture>,
    pub bias: Bias,
    /// The dense metric: z = L q with L Lᵀ the base's within-mode covariance.
    pub metric: Whitening,
    pub u_scale: f64,
    pub options: SamplerOptions,
    /// Known modes (the optimiser's, and any the chains found).
    pub modes: Vec<Mode>,
    /// The Laplace approximation at the known modes (for assigning draws to modes).
    pub laplace: Laplace,
    pub refitted: bool,
    /// Modes the chains found that the optimiser had not.
    pub new_modes: usize,
    /// Gradient evaluations spent optimising from draws.
    pub discovery_evaluations: u64,
    /// Probability that an iteration makes a Hamiltonian move before the independence move
    /// and the β draw (1 until warm-up has measured the moves; see [`gradient_probability`]).
    pub p_gradient: f64,
    /// Q₊ = the base's mass where the target's density is not zero, and its standard error,
    /// measured from base draws when warm-up ends (see [`Plan::measure_support`]).
    pub support: (f64, f64),
    pub notes: Vec<String>,
}

/// One chain's record of a phase.
#[derive(Clone, Debug, Default, serde::Serialize, serde::Deserialize)]
pub struct Record {
    /// Which chain (0-based).
    pub chain: usize,
    /// The chain's energy evaluations so far (a running total, not per phase).
    pub evaluations: u64,
    /// The step size the chain used in this phase.
    pub eps: f64,
    /// Unconstrained positions, `dim` per iteration.
    pub z: Vec<f64>,
    pub beta: Vec<f64>,
    pub delta: Vec<f64>,
    pub accept: f64,
    pub divergences: usize,
    pub leapfrogs: u64,
    pub max_depth_hits: usize,
    pub independence_accepted: usize,
    pub iterations: usize,
    /// Iterations that made a Hamiltonian move (the others made only the independence move and
    /// the β draw); `accept` is the mean over these.
    #[serde(default)]
    pub transitions: usize,
    /// Per iteration, log f(x′) − log q′(x′) of the independence proposal x′ ~ q′ that the
    /// iteration drew (f = e^{−E}; −∞ where f is zero or the energy is not a number): an
    /// importance-sampling estimate of Z from draws that cost nothing extra (see
    /// `estimate::log_z::combine_with_proposals`). Empty where no independence move was made.
    #[serde(default)]
    pub proposal_log_w: Vec<f64>,
}

/// Numbers in one encoded record besides its three arrays.
const RECORD_SCALARS: usize = 11;

/// Encodes records as one flat array of numbers, the form in which the page's workers pass
/// them to each other (a typed array, no text): per record `[chain, evaluations, eps, accept,
/// divergences, leapfrogs, max_depth_hits, independence_accepted, iterations, transitions,
/// len(z), z…, len(β), β…, δ…, len(w), w…]` (δ has β's length; w: `proposal_log_w`). Every
/// count is below 2⁵³, so the round trip through f64 is exact, and so are the floats:
/// [`decode_records`] gives back the same bits.
pub fn encode_records(records: &[Record]) -> Vec<f64> {
    let mut out = Vec::with_capacity(
        records
            .iter()
            .map(|r| RECORD_SCALARS + r.z.len() + 2 * r.beta.len() + 1 + r.proposal_log_w.len())
            .sum(),
    );
    for r in records {
        out.extend_from_slice(&[
            r.chain as f64,
            r.evaluations as f64,
            r.eps,
            r.accept,
            r.divergences as f64,
            r.leapfrogs as f64,
            r.max_depth_hits as f64,
            r.independence_accepted as f64,
            r.iterations as f64,
            r.transitions as f64,
            r.z.len() as f64,
        ]);
        out.extend_from_slice(&r.z);
        out.push(r.beta.len() as f64);
        out.extend_from_slice(&r.beta);
        out.extend_from_slice(&r.delta);
        out.push(r.proposal_log_w.len() as f64);
        out.extend_from_slice(&r.proposal_log_w);
    }
    out
}

/// Reads what [`encode_records`] wrote (several workers' arrays may be concatenated); an array
/// that is not such an encoding is an error, never a panic.
pub fn decode_records(data: &[f64]) -> Result<Vec<Record>, KilnError> {
    let bad = |what: &str| {
        KilnError::usage(format!(
            "the records passed between workers are damaged: {what}"
        ))
        .with_hint("reload the page and run again")
    };
    let count = |v: f64, what: &str| -> Result<usize, KilnError> {
        if v.is_finite() && v >= 0.0 && v.fract() == 0.0 && v < 9.007_199_254_740_992e15 {
            Ok(v as usize)
        } else {
            Err(bad(what))
        }
    };
    let mut records = Vec::new();
    let mut at = 0;
    while at < data.len() {
        if data.len() - at < RECORD_SCALARS {
            return Err(bad("a record is cut short"));
        }
        let h = &data[at..at + RECORD_SCALARS];
        at += RECORD_SCALARS;
        let nz = count(h[10], "length of z")?;
        if data.len() - at < nz + 1 {
            return Err(bad("z is cut short"));
        }
        let z = data[at..at + nz].to_vec();
        at += nz;
        let nb = count(data[at], "length of β")?;
        at += 1;
        if (data.len() - at) / 2 < nb {
            return Err(bad("β or δ is cut short"));
        }
        let beta = data[at..at + nb].to_vec();
        let delta = data[at + nb..at + 2 * nb].to_vec();
        at += 2 * nb;
        if at >= data.len() {
            return Err(bad("the proposals' weights are missing"));
        }
        let nw = count(data[at], "number of proposals")?;
        at += 1;
        if data.len() - at < nw {
            return Err(bad("the proposals' weights are cut short"));
        }
        let proposal_log_w = data[at..at + nw].to_vec();
        at += nw;
        records.push(Record {
            chain: count(h[0], "chain")?,
            evaluations: count(h[1], "evaluations")? as u64,
            eps: h[2],
            accept: h[3],
            divergences: count(h[4], "divergences")?,
            leapfrogs: count(h[5], "leapfrogs")? as u64,
            max_depth_hits: count(h[6], "depth limits")?,
            independence_accepted: count(h[7], "independence moves")?,
            iterations: count(h[8], "iterations")?,
            transitions: count(h[9], "transitions")?,
            z,
            beta,
            delta,
            proposal_log_w,
        });
    }
    Ok(records)
}

impl Plan {
    pub fn new(
        modes: Vec<Mode>,
        laplace: Laplace,
        options: SamplerOptions,
    ) -> Result<Plan, KilnError> {
        let base = Base {
            q: Arc::new(laplace.base.clone()),
            log_zeta: laplace.log_zeta,
        };
        let heavy = Arc::new(heavy_tails(&base.q));
        let metric = Plan::metric_of(&base.q)?;
        Ok(Plan {
            base,
            heavy,
            bias: Bias::flat(options.knots),
            metric,
            u_scale: 1.8,
            options,
            modes,
            laplace,
            refitted: false,
            new_modes: 0,
            discovery_evaluations: 0,
            p_gradient: 1.0,
            support: (1.0, 0.0),
            notes: Vec::new(),
        })
    }

    /// The whitening of a base, or the error that it has none.
    pub(super) fn metric_of(q: &Mixture) -> Result<Whitening, KilnError> {
        Whitening::new(q)
            .ok_or_else(|| KilnError::density("the base's covariance is not positive definite"))
    }

    pub(super) fn dim(&self) -> usize {
        self.base.q.dim
    }

    pub fn is_tempered(&self) -> bool {
        self.options.fixed_beta.is_none()
    }
}

/// Base draws used to measure the base's mass on the target's support.
pub const SUPPORT_DRAWS: usize = 4000;

impl Plan {
    /// Measures Q₊, the base's mass where the target's density is not zero.
    ///
    /// Where the target is zero (energy NaN or +∞), Δ = ∞: such points have zero marginal
    /// probability in the tempered family, yet they carry the δ-like share Q₋ = 1 − Q₊ of
    /// E[p(0|x)] (p(x) p(0|x) = q(x)/C for every x). A chain can never draw them, so the chain
    /// average of p(0|x) estimates Q₊/C rather than 1/C, and log Z must gain + log Q₊. Q₊ is
    /// the share of finite energies among independent base draws; its binomial standard error
    /// enters the SE of log Z.
    pub fn measure_support(&mut self, target: &Target) {
        let d = self.dim();
        let mut rng = Stream::new(self.options.seed, Purpose::Check, 1);
        let mut ev = target.evaluator();
        let mut scratch = self.base.q.scratch();
        let mut z = vec![0.0; d];
        let mut inside = 0usize;
        let mut drawn = 0usize;
        // A first batch; if any draw falls outside the support, ten times more for precision.
        for batch in [SUPPORT_DRAWS, 9 * SUPPORT_DRAWS] {
            for _ in 0..batch {
                self.base.q.sample(&mut rng, &mut z, &mut scratch);
                if ev.energy(&z).is_finite() {
                    inside += 1;
                }
            }
            drawn += batch;
            if inside == drawn {
                break;
            }
        }
        self.discovery_evaluations += ev.evaluations;
        let n = drawn as f64;
        let q = inside as f64 / n;
        if inside == drawn {
            self.support = (1.0, 0.0);
        } else if inside == 0 {
            self.support = (f64::NAN, f64::NAN);
        } else {
            self.support = (q, sqrt(q * (1.0 - q) / n));
            self.notes.push(format!(
                "{:.1}% of the base approximation lies where the density is zero; log Z includes the correction log Q₊ = {:.4} for it",
                100.0 * (1.0 - q),
                ln(q)
            ));
        }
    }

    /// g ← g − γ log p̂(b), normalised so that g(0) = 0.
    pub(super) fn update_bias(&mut self, records: &[Record], step: f64) {
        let lm = log_marginal_at_knots(&self.bias, records);
        for j in 0..self.bias.values.len() {
            let upd = if lm[j].is_finite() { lm[j] } else { 30.0 };
            self.bias.values[j] -= step * upd.clamp(-30.0, 30.0);
        }
        let g0 = self.bias.values[0];
        for v in self.bias.values.iter_mut() {
            *v -= g0;
        }
    }

    /// Looks for regions the chains visit near β = 1 that no known mode covers, and
    /// optimises from them. Returns how many new modes were added.
    pub(super) fn discover_modes(
        &mut self,
        target: &Target,
        records: &[Record],
    ) -> Result<usize, KilnError> {
        let d = self.dim();
        let threshold = 30.0 + 4.0 * d as f64;
        let mut candidates: Vec<(f64, Vec<f64>)> = Vec::new();
        for r in records {
            for (i, &beta) in r.beta.iter().enumerate() {
                if beta < 0.5 {
                    continue;
                }
                let z = &r.z[i * d..(i + 1) * d];
                let near = self
                    .modes
                    .iter()
                    .map(|m| mahalanobis2(z, &m.z, &m.hessian))
                    .fold(f64::INFINITY, f64::min);
                if near > threshold {
                    candidates.push((near, z.to_vec()));
                }
            }
        }
        candidates.sort_by(|a, b| a.0.total_cmp(&b.0));
        let mut ev = target.evaluator();
        let mut added = 0;
        let mut tried: Vec<Vec<f64>> = Vec::new();
        for (_, z) in candidates.into_iter().rev() {
            if tried.len() >= 20 {
                break;
            }
            if tried
                .iter()
                .any(|t| t.iter().zip(&z).all(|(a, b)| (a - b).abs() < 1e-9))
            {
                continue;
            }
            // Skip draws a mode found in this round already covers.
            if self
                .modes
                .iter()
                .any(|m| mahalanobis2(&z, &m.z, &m.hessian) <= threshold)
            {
                continue;
            }
            tried.push(z.clone());
            if let Some(mut m) = mode_from(target, &mut ev, &z)? {
                m.hits = 0;
                m.found_by = FoundBy::Chains;
                if merge_mode(&mut self.modes, m) {
                    added += 1;
                }
            }
        }
        self.discovery_evaluations += ev.evaluations;
        if added > 0 {
            self.laplace = Laplace::from_modes(&self.modes)?;
        }
        Ok(added)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sample::two_modes_at;

    #[test]
    fn draws_in_an_unexplored_region_become_a_new_mode() {
        // A mixture whose second component (at (8, 8)) the optimiser is made to miss: keep only
        // the first mode, then hand the plan draws near β = 1 sitting around (8, 8).
        let (target, mut search) = two_modes_at(8.0);
        search.modes.retain(|m| m.x[0] < 4.0);
        assert_eq!(search.modes.len(), 1);
        let laplace = Laplace::from_modes(&search.modes).unwrap();
        let mut plan = Plan::new(search.modes, laplace, SamplerOptions::new(1)).unwrap();
        let mut rng = Stream::new(1, Purpose::Check, 0);
        let mut rec = Record::default();
        for _ in 0..50 {
            rec.z.push(8.0 + 0.7 * rng.normal());
            rec.z.push(8.0 + 0.7 * rng.normal());
            rec.beta.push(0.9);
            rec.delta.push(0.0);
        }
        let added = plan.discover_modes(&target, &[rec]).unwrap();
        assert_eq!(added, 1);
        let new = plan
            .modes
            .iter()
            .find(|m| m.x[0] > 4.0)
            .expect("the new mode is in the list");
        assert!(
            (new.x[0] - 8.0).abs() < 1e-4 && (new.x[1] - 8.0).abs() < 1e-4,
            "{:?}",
            new.x
        );
        assert_eq!(plan.laplace.base.components.len(), 2);
    }
}

#[cfg(test)]
mod encoding_tests {
    use super::*;

    fn record(chain: usize, n: usize, dim: usize) -> Record {
        Record {
            chain,
            evaluations: 123_456_789_012,
            eps: 0.1 + 1e-17 * chain as f64,
            z: (0..n * dim)
                .map(|i| (i as f64 * 0.37 - 1.0) / 3.0)
                .collect(),
            beta: (0..n).map(|i| 1.0 / (i as f64 + 7.0)).collect(),
            delta: (0..n).map(|i| -(i as f64) * 1.000_000_1e3).collect(),
            accept: 2.0 / 3.0,
            divergences: 4,
            leapfrogs: 98_765,
            max_depth_hits: 1,
            independence_accepted: 17,
            iterations: n,
            transitions: n.saturating_sub(1),
            proposal_log_w: (0..n)
                .map(|i| {
                    if i == 1 {
                        f64::NEG_INFINITY
                    } else {
                        -3.25 + i as f64 / 7.0
                    }
                })
                .collect(),
        }
    }

    #[test]
    fn records_round_trip_bit_for_bit() {
        let rs = [record(0, 5, 3), record(1, 0, 3), record(2, 9, 3)];
        // Two workers' arrays concatenated read back as one list.
        let mut flat = encode_records(&rs[..1]);
        flat.extend(encode_records(&rs[1..]));
        let back = decode_records(&flat).unwrap();
        assert_eq!(back.len(), 3);
        for (a, b) in rs.iter().zip(&back) {
            assert_eq!(
                serde_json::to_string(a).unwrap(),
                serde_json::to_string(b).unwrap()
            );
            let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&a.z), bits(&b.z));
            assert_eq!(bits(&a.beta), bits(&b.beta));
            assert_eq!(bits(&a.delta), bits(&b.delta));
            assert_eq!(bits(&a.proposal_log_w), bits(&b.proposal_log_w));
            assert_eq!(a.eps.to_bits(), b.eps.to_bits());
        }
    }

    #[test]
    fn damaged_records_are_errors() {
        let flat = encode_records(&[record(0, 4, 2)]);
        for cut in 1..flat.len() {
            assert!(decode_records(&flat[..cut]).is_err(), "cut at {cut}");
        }
        let mut bad = flat.clone();
        bad[0] = -1.0;
        assert!(decode_records(&bad).is_err());
        bad[0] = f64::NAN;
        assert!(decode_records(&bad).is_err());
        let mut huge = flat;
        huge[10] = 1e300;
        assert!(decode_records(&huge).is_err());
        assert!(decode_records(&[]).unwrap().is_empty());
    }
}
