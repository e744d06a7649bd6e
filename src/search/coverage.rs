//! How sure is the search that it found every mode? Estimates from the counts of scattered
//! starts per mode, and the rule that stops the starts.
//!
//! Owns: the estimators and the stopping rule, and [`Coverage`], the search's evidence as a
//! result of its own (what was searched, at what resolution, and what could have been missed).
//!
//! The scattered starts are treated as independent draws of a point whose local search ends in
//! mode i with an unknown probability p_i (the relative size of the mode's region of
//! attraction under the start design). With N converged starts, w distinct modes among them,
//! f1 of them reached by exactly one start and f2 by exactly two:
//! - **Good–Turing** (I. J. Good 1953, "The population frequencies of species and the estimation
//!   of population parameters", Biometrika 40, 237–264): the chance that one more start ends in a
//!   mode no start has reached is about f1 / N.
//! - **Boender & Rinnooy Kan** (1987, "Bayesian stopping rules for multistart global
//!   optimization methods", Mathematical Programming 37, 59–80), with a flat prior on the
//!   number of modes K and a uniform Dirichlet prior on the sizes of their regions of
//!   attraction: the posterior mean of K is `w (N − 1) / (N − w − 2)` (for N > w + 2), and the
//!   posterior mean of the total relative size of the regions not yet reached is
//!   `w (w + 1) / (N (N − 1))`. The stopping rule used here is theirs: stop once the expected
//!   number of unseen modes, E[K] − w, is below 1/2. Both formulas were recalled from memory
//!   (the paper was not available here); the unit tests below check them against the model
//!   they come from, by direct summation of the posterior.
//! - **Chao** (1984, "Nonparametric estimation of the number of classes in a population",
//!   Scandinavian Journal of Statistics 11, 265–270), in its bias-corrected form
//!   `f1 (f1 − 1) / (2 (f2 + 1))`: a second, prior-free estimate of the modes not yet seen,
//!   which the stopping rule also requires below 1/2.
//!
//! These estimate what *more scattered starts* would find. A mode whose region of attraction is
//! much smaller than 1/N of the start design is invisible to them: that is why the report also
//! states the region searched and, where the dense scan of `scan` ran, the narrowest mode it
//! resolves.
//! Must not: search (the counts come in from `modes`).

use super::scan::{Part, Spacing};
use serde::Serialize;

/// The starts stop once the expected number of unseen modes (Boender & Rinnooy Kan) is below
/// this.
pub const UNSEEN_LIMIT: f64 = 0.5;
/// … and the Good–Turing chance that one more start finds a new mode is at most this.
pub const NEW_MODE_LIMIT: f64 = 0.01;

/// Estimates from the number of scattered starts that ended in each mode.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct StartCounts {
    /// N: starts whose local search ended in a mode.
    pub converged: usize,
    /// w: distinct modes among them.
    pub distinct: usize,
    /// f1: modes reached by exactly one start.
    pub singletons: usize,
    /// f2: modes reached by exactly two starts.
    pub doubletons: usize,
}

impl StartCounts {
    /// From the number of starts that ended in each mode (modes with zero starts are ignored:
    /// they were found another way).
    pub fn from_hits(hits: impl IntoIterator<Item = usize>) -> StartCounts {
        let mut c = StartCounts {
            converged: 0,
            distinct: 0,
            singletons: 0,
            doubletons: 0,
        };
        for h in hits {
            if h == 0 {
                continue;
            }
            c.converged += h;
            c.distinct += 1;
            c.singletons += usize::from(h == 1);
            c.doubletons += usize::from(h == 2);
        }
        c
    }

    /// Good–Turing: the chance that one more start ends in a mode no start has reached.
    pub fn new_mode_chance(&self) -> f64 {
        if self.converged == 0 {
            return 1.0;
        }
        self.singletons as f64 / self.converged as f64
    }

    /// Boender & Rinnooy Kan: the posterior mean number of modes, when defined (N > w + 2).
    pub fn expected_modes(&self) -> Option<f64> {
        let (n, w) = (self.converged as f64, self.distinct as f64);
        (n > w + 2.0).then(|| w * (n - 1.0) / (n - w - 2.0))
    }

    /// Boender & Rinnooy Kan: the posterior mean of the total relative size of the regions of
    /// attraction no start has reached.
    pub fn unreached_share(&self) -> Option<f64> {
        let (n, w) = (self.converged as f64, self.distinct as f64);
        (n > 1.0).then(|| (w * (w + 1.0) / (n * (n - 1.0))).min(1.0))
    }

    /// Chao's bias-corrected estimate of the modes no start has reached.
    pub fn chao_unseen(&self) -> f64 {
        let (f1, f2) = (self.singletons as f64, self.doubletons as f64);
        f1 * (f1 - 1.0).max(0.0) / (2.0 * (f2 + 1.0))
    }

    /// Whether the stopping rule holds: the expected number of unseen modes is below
    /// [`UNSEEN_LIMIT`] by Boender & Rinnooy Kan's estimate and by Chao's (which reacts to
    /// modes reached by only one or two starts, the sign of small regions of attraction), and
    /// the chance of a new mode is at most [`NEW_MODE_LIMIT`].
    pub fn rule_holds(&self) -> bool {
        match self.expected_modes() {
            Some(k) => {
                k - (self.distinct as f64) < UNSEEN_LIMIT
                    && self.chao_unseen() < UNSEEN_LIMIT
                    && self.new_mode_chance() <= NEW_MODE_LIMIT
            }
            None => false,
        }
    }
}

/// One unknown's range, in the user's units.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Range {
    pub lower: f64,
    pub upper: f64,
}

/// The dense scan of `scan`, as it was run.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ScanSummary {
    /// Which grid: near the modes found, or the whole searched region.
    pub part: Part,
    /// The region scanned, per unknown.
    pub region: Vec<Range>,
    /// How each unknown's axis is spaced: evenly in the unknown (`linear`), or evenly in the log
    /// of its distance from its one bound (`log`).
    pub scale: Vec<Spacing>,
    /// Grid points per unknown.
    pub points: Vec<usize>,
    /// Grid spacing per unknown: in the user's units for a linear axis, in log units (a relative
    /// step) for a log axis.
    pub spacing: Vec<f64>,
    /// The narrowest mode the scan resolves, per unknown, in the same units as `spacing`: a
    /// mode at least this wide (one standard deviation) along every unknown has a grid point
    /// within one standard deviation of its peak. Half the spacing.
    pub narrowest: Vec<f64>,
    pub evaluations: u64,
    /// Local maxima of the density on the grid.
    pub maxima: usize,
    /// Of them, those outside every known mode, from which the optimiser started.
    pub starts: usize,
    /// New modes the scan's starts found.
    pub new_modes: usize,
}

/// Why the search may have missed a mode (empty: nothing in its evidence says so).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Limitation {
    /// A short code: `start_budget`, `scan_coarse`, `found_late`.
    pub code: String,
    pub sentence: String,
}

/// The search's evidence that it found every mode, reported as a result of its own.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Coverage {
    /// Scattered starts made.
    pub starts: usize,
    pub counts: StartCounts,
    /// Good–Turing: the chance that one more start would find a new mode.
    pub new_mode_chance: f64,
    /// Boender & Rinnooy Kan: the expected number of modes no start has reached (null when
    /// there were too few starts to say).
    pub expected_unseen: Option<f64>,
    /// Chao's estimate of the same.
    pub chao_unseen: f64,
    /// Boender & Rinnooy Kan: the expected share of the start design whose regions of
    /// attraction no start reached.
    pub unreached_share: Option<f64>,
    /// Whether the starts stopped because the stopping rule held (otherwise their budget was
    /// spent).
    pub rule_held: bool,
    /// The region the scattered starts were drawn from, per unknown (user units).
    pub start_region: Vec<Range>,
    /// Modes found by the outward searches from known modes (barrier crossing, lattice).
    pub found_outward: usize,
    /// Modes found by the chains during warm-up (filled in by the run).
    pub found_by_chains: usize,
    /// The grids of the dense scan, where it ran (at most `scan::MAX_SCAN_DIM` unknowns): a
    /// finer one near the modes found when they fill little of the searched region, and one
    /// over the whole region.
    pub scan: Vec<ScanSummary>,
    /// The narrowest standard deviation among the modes found, per unknown (in the units of the
    /// scan's axes: user units, or log units for an unknown with one bound).
    pub narrowest_found: Vec<f64>,
    /// What could have been missed, in plain words.
    pub limitations: Vec<Limitation>,
    /// One sentence: what was searched and what it would have found.
    pub summary: String,
}

impl Coverage {
    /// True when nothing in the evidence says a mode could have been missed, beyond the stated
    /// region and resolution.
    pub fn thorough(&self) -> bool {
        self.limitations.is_empty()
    }

    /// Adds the modes the chains found and what that says about the search.
    pub fn add_found_by_chains(&mut self, n: usize) {
        if n == 0 {
            return;
        }
        self.found_by_chains += n;
        self.limitations.push(Limitation {
            code: "found_late".into(),
            sentence: format!(
                "the chains found {n} mode(s) the search had missed: it was not exhaustive, and others may be missing"
            ),
        });
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::common::maths::{exp, lgamma, ln};

    /// log C(a, b).
    fn log_choose(a: f64, b: f64) -> f64 {
        lgamma(a + 1.0) - lgamma(b + 1.0) - lgamma(a - b + 1.0)
    }

    /// The posterior of K under the model of Boender & Rinnooy Kan, summed directly: with a
    /// uniform Dirichlet prior on the sizes, every occupancy vector of N starts in K regions is
    /// equally likely (Bose–Einstein), so P(w regions reached | K) = C(K, w) C(N−1, w−1) /
    /// C(N+K−1, K−1); with a flat prior on K ≥ w, the posterior is proportional to that. Given
    /// K, the unreached share is Beta(K − w, N + w) a posteriori, with mean (K − w)/(N + K).
    fn by_summation(n: usize, w: usize) -> (f64, f64) {
        let (nf, wf) = (n as f64, w as f64);
        let mut terms = Vec::new();
        for k in w..w + 200_000 {
            let kf = k as f64;
            let lp = log_choose(kf, wf) - log_choose(nf + kf - 1.0, kf - 1.0);
            terms.push((kf, lp));
        }
        let top = terms.iter().map(|t| t.1).fold(f64::NEG_INFINITY, f64::max);
        let (mut z, mut ek, mut eu) = (0.0, 0.0, 0.0);
        for (kf, lp) in terms {
            let p = exp(lp - top);
            z += p;
            ek += p * kf;
            eu += p * (kf - wf) / (nf + kf);
        }
        (ek / z, eu / z)
    }

    #[test]
    fn the_bayesian_estimates_match_their_model() {
        for &(n, w) in &[(20, 2), (60, 5), (150, 18), (400, 30)] {
            let c = StartCounts {
                converged: n,
                distinct: w,
                singletons: 0,
                doubletons: 0,
            };
            let (ek, eu) = by_summation(n, w);
            let k = c.expected_modes().unwrap();
            let u = c.unreached_share().unwrap();
            assert!((k - ek).abs() < 1e-3 * ek, "N {n}, w {w}: {k} vs {ek}");
            assert!((u - eu).abs() < 1e-3 * eu, "N {n}, w {w}: {u} vs {eu}");
        }
    }

    #[test]
    fn good_turing_estimates_the_unseen_share_of_a_known_population() {
        // Draws from 60 classes of known sizes: the share of the population in classes not yet
        // drawn is known exactly; Good–Turing's f1/N should track it (averaged over repeats).
        use crate::common::rng::{Purpose, Stream};
        let sizes: Vec<f64> = (1..=60).map(|i| 1.0 / (i as f64)).collect();
        let total: f64 = sizes.iter().sum();
        let mut rng = Stream::new(7, Purpose::Check, 0);
        let (mut est, mut truth) = (0.0, 0.0);
        let repeats = 400;
        for _ in 0..repeats {
            let mut hits = vec![0usize; sizes.len()];
            for _ in 0..100 {
                let mut u = rng.uniform() * total;
                let mut i = 0;
                while i + 1 < sizes.len() && u >= sizes[i] {
                    u -= sizes[i];
                    i += 1;
                }
                hits[i] += 1;
            }
            let c = StartCounts::from_hits(hits.iter().copied());
            est += c.new_mode_chance();
            truth += sizes
                .iter()
                .zip(&hits)
                .filter(|(_, h)| **h == 0)
                .map(|(s, _)| s / total)
                .sum::<f64>();
        }
        let (est, truth) = (est / repeats as f64, truth / repeats as f64);
        assert!(
            (est - truth).abs() < 0.1 * truth,
            "Good–Turing {est} vs {truth}"
        );
    }

    #[test]
    fn the_rule_needs_enough_starts_per_mode() {
        let two = |n: usize| StartCounts::from_hits([n / 2, n - n / 2]);
        assert!(!two(10).rule_holds()); // E[K] − w = 6/(N − 4) = 1
        assert!(two(20).rule_holds()); // 6/16
        let many = StartCounts::from_hits(vec![10; 18]);
        assert!(!many.rule_holds(), "{:?}", many.expected_modes());
        let with_singletons = StartCounts::from_hits([200, 200, 1, 1, 1]);
        assert!(!with_singletons.rule_holds());
        assert!((with_singletons.new_mode_chance() - 3.0 / 403.0).abs() < 1e-15);
        assert!((with_singletons.chao_unseen() - 3.0).abs() < 1e-12);
        assert_eq!(ln(1.0), 0.0);
    }
}
