//! The log-ratio series of tempered draws: for every draw, log p(β=1|x) and log p(β=0|x)
//! under the bias it was drawn with (method note, "Estimates from every draw").
//!
//! Owns: the one construction of that series ([`Series`]), from which warm-up (re-estimating
//! log ζ, judging bases, measuring efficiency) and the estimate stage (log Z ± SE, weights of
//! draws) both read; the linearised series `z_i = p1_i/mean(p1) − p0_i/mean(p0)`; the pooled
//! β marginal at the bias's knots (for learning the bias).
//! Must not: decide what to report, or run chains.

use super::plan::Record;
use super::tempering::{Base, Bias};
use crate::common::maths::{exp, ln, log_sum_exp};
use crate::common::stats::ess;

/// log p(1|x_i) and log p(0|x_i) of every draw of some records, chains one after another.
#[derive(Clone, Debug)]
pub struct Series {
    pub l1: Vec<f64>,
    pub l0: Vec<f64>,
    /// Draws per record (chain), in order.
    pub lens: Vec<usize>,
    /// log Σ p1 and log Σ p0.
    pub lse1: f64,
    pub lse0: f64,
}

impl Series {
    /// The series of `records`, drawn under `bias`.
    pub fn new(bias: &Bias, records: &[Record]) -> Series {
        let total: usize = records.iter().map(|r| r.delta.len()).sum();
        let mut s = vec![0.0; bias.knots.len()];
        let (mut l1, mut l0) = (Vec::with_capacity(total), Vec::with_capacity(total));
        for r in records {
            for &delta in &r.delta {
                let (a, b) = bias.log_p1_p0(delta, &mut s);
                l1.push(a);
                l0.push(b);
            }
        }
        Series::from_logs(l1, l0, records.iter().map(|r| r.delta.len()).collect())
    }

    /// The series of draws made without tempering (β fixed): every weight is 1.
    pub fn untempered(records: &[Record]) -> Series {
        let total: usize = records.iter().map(|r| r.delta.len()).sum();
        Series::from_logs(
            vec![0.0; total],
            vec![0.0; total],
            records.iter().map(|r| r.delta.len()).collect(),
        )
    }

    fn from_logs(l1: Vec<f64>, l0: Vec<f64>, lens: Vec<usize>) -> Series {
        let lse1 = log_sum_exp(&l1);
        let lse0 = log_sum_exp(&l0);
        Series {
            l1,
            l0,
            lens,
            lse1,
            lse0,
        }
    }

    pub fn len(&self) -> usize {
        self.l1.len()
    }

    pub fn is_empty(&self) -> bool {
        self.l1.is_empty()
    }

    /// The method note's estimate without the support correction:
    /// `log ζ + g(0) − g(1) + log mean p(1|x) − log mean p(0|x)`.
    pub fn log_z(&self, bias: &Bias, log_zeta: f64) -> f64 {
        let g0 = bias.values[0];
        let g1 = bias.values[bias.values.len() - 1];
        log_zeta + g0 - g1 + self.lse1 - self.lse0
    }

    /// p1_i / mean(p1): the draws' weights for the target.
    pub fn weights(&self) -> Vec<f64> {
        let ln_n = ln(self.len() as f64);
        self.l1.iter().map(|a| exp(a - self.lse1 + ln_n)).collect()
    }

    /// p0_i / mean(p0).
    pub fn base_weights(&self) -> Vec<f64> {
        let ln_n = ln(self.len() as f64);
        self.l0.iter().map(|b| exp(b - self.lse0 + ln_n)).collect()
    }

    /// The linearised series `z_i = p1_i/mean(p1) − p0_i/mean(p0)` (mean ≈ 0).
    pub fn linearised(&self) -> Vec<f64> {
        let ln_n = ln(self.len() as f64);
        self.l1
            .iter()
            .zip(&self.l0)
            .map(|(a, b)| exp(a - self.lse1 + ln_n) - exp(b - self.lse0 + ln_n))
            .collect()
    }

    /// Per-draw variance of the linearised series, mean(z²) (0 without draws).
    pub fn variance(&self) -> f64 {
        if self.is_empty() {
            return 0.0;
        }
        mean_square(&self.linearised())
    }

    /// `v` (one value per draw) cut into its chains.
    pub fn per_chain<'a>(&self, v: &'a [f64]) -> Vec<&'a [f64]> {
        let mut chains = Vec::with_capacity(self.lens.len());
        let mut at = 0;
        for &l in &self.lens {
            chains.push(&v[at..at + l]);
            at += l;
        }
        chains
    }

    /// Multi-chain effective sample size of a per-draw series `v` (at least 1).
    pub fn ess_of(&self, v: &[f64]) -> f64 {
        ess(&self.per_chain(v)).max(1.0)
    }
}

/// mean(v²).
pub fn mean_square(v: &[f64]) -> f64 {
    v.iter().map(|z| z * z).sum::<f64>() / v.len() as f64
}

/// The log Z estimate of the method note from records made with `bias` and `base` (no support
/// correction; warm-up uses it to re-estimate log ζ).
pub fn log_z_from(bias: &Bias, base: &Base, records: &[Record]) -> f64 {
    Series::new(bias, records).log_z(bias, base.log_zeta)
}

/// Pooled log p(b_j | x) averaged over records: log of the Rao-Blackwellised β marginal at the
/// knots.
pub fn log_marginal_at_knots(bias: &Bias, records: &[Record]) -> Vec<f64> {
    let k = bias.knots.len();
    let mut acc = vec![Vec::new(); k];
    let mut s = vec![0.0; k];
    let mut lp = vec![0.0; k];
    for r in records {
        for &delta in &r.delta {
            bias.log_p_knots(delta, &mut lp, &mut s);
            for j in 0..k {
                acc[j].push(lp[j]);
            }
        }
    }
    acc.iter()
        .map(|v| log_sum_exp(v) - ln(v.len().max(1) as f64))
        .collect()
}
