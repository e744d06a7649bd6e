//! A run as a fixed sequence of steps, for all chains or for a subset of them.
//!
//! Owns: [`Step`] and [`Stepper`]: the warm-up windows cut into steps of at most
//! [`MAX_STEP_ITERATIONS`], the sampling chunks, merging every chain's records after a step,
//! freezing what warm-up learned before the kept draws, shortening the warm-up windows left
//! when warm-up finds the base good, and the kept records themselves.
//! Must not: estimate anything for the report.

use super::chain::{run_chains, Chain};
use super::options::SamplerOptions;
use super::plan::{Plan, Record};
use super::tempering::Bias;
use super::warmup::{window_lengths, MIN_SHORT_WINDOW};
use crate::common::error::KilnError;
use crate::common::rng::{Purpose, Stream};
use crate::model::target::Target;
use crate::search::laplace::Laplace;
use crate::search::modes::Mode;

/// One step of a run: a piece of a warm-up window (the window's last piece is followed by
/// learning from the whole window) or a chunk of kept draws.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
pub enum Step {
    Warmup {
        window: usize,
        iterations: usize,
        last_of_window: bool,
    },
    Sample {
        chunk: usize,
        iterations: usize,
    },
}

/// Most iterations per chain in one step, so that a step stays short (progress is reported and
/// a cancel in the page takes effect between steps; a running WebAssembly call cannot be
/// interrupted).
pub const MAX_STEP_ITERATIONS: usize = 100;

/// Splits `n` iterations into pieces of at most [`MAX_STEP_ITERATIONS`] (at least one piece).
fn pieces(n: usize) -> Vec<usize> {
    let k = n.div_ceil(MAX_STEP_ITERATIONS).max(1);
    (0..k).map(|i| n / k + usize::from(i < n % k)).collect()
}

/// A run as a fixed sequence of steps, for all chains or for a subset of them.
///
/// Each step, the owned chains run (`run_step`) and the records of *all* chains are then
/// handed to `absorb`, which applies what warm-up learns (bias, mode discovery, refit, mass of
/// u) identically wherever it runs. The command line owns every chain; a page worker owns
/// some and exchanges records with the others, and gets the same numbers.
pub struct Stepper {
    pub plan: Plan,
    pub(super) target: Target,
    /// The owned chains, in increasing chain order.
    pub(super) chains: Vec<Chain>,
    steps: Vec<Step>,
    at: usize,
    pub(super) history: Vec<(Bias, Vec<Record>)>,
    pub(super) since_reset: usize,
    pub(super) merge_rng: Stream,
    /// Kept draws of every chain, concatenated over sampling chunks (index = chain).
    pub kept: Vec<Record>,
    /// The current warm-up window's records so far, every chain (index = chain).
    window: Vec<Record>,
    /// Effective draws of the log Z series per evaluation in the last window that made a
    /// Hamiltonian move in every iteration (the reference for the trial of cheaper moves).
    pub(super) full_efficiency: f64,
    /// The trial of cheaper moves was skipped (the base did not cover the target).
    pub(super) trial_skipped: bool,
}

/// Appends warm-up window `window` of `len` iterations as its steps (the last one marked).
fn push_window(steps: &mut Vec<Step>, window: usize, len: usize) {
    let parts = pieces(len);
    let n = parts.len();
    for (i, iterations) in parts.into_iter().enumerate() {
        steps.push(Step::Warmup {
            window,
            iterations,
            last_of_window: i + 1 == n,
        });
    }
}

fn merge_records(into: &mut Record, r: &Record) {
    let n_old = into.transitions as f64;
    let n_new = r.transitions as f64;
    into.z.extend_from_slice(&r.z);
    into.beta.extend_from_slice(&r.beta);
    into.delta.extend_from_slice(&r.delta);
    into.proposal_log_w.extend_from_slice(&r.proposal_log_w);
    if n_old + n_new > 0.0 {
        into.accept = (into.accept * n_old + r.accept * n_new) / (n_old + n_new);
    }
    into.divergences += r.divergences;
    into.leapfrogs += r.leapfrogs;
    into.max_depth_hits += r.max_depth_hits;
    into.independence_accepted += r.independence_accepted;
    into.iterations += r.iterations;
    into.transitions += r.transitions;
    into.chain = r.chain;
    into.evaluations = r.evaluations;
    into.eps = r.eps;
}

impl Stepper {
    /// `owned`: the chain indices this stepper runs (`None`: all of them).
    pub fn new(
        target: &Target,
        modes: Vec<Mode>,
        laplace: Laplace,
        options: SamplerOptions,
        owned: Option<&[usize]>,
    ) -> Result<Stepper, KilnError> {
        let plan = Plan::new(modes, laplace, options)?;
        let all: Vec<usize> = (0..plan.options.chains).collect();
        let mut owned: Vec<usize> = owned.map(|o| o.to_vec()).unwrap_or(all);
        owned.sort_unstable();
        owned.dedup();
        if let Some(bad) = owned.iter().find(|&&c| c >= plan.options.chains) {
            return Err(KilnError::usage(format!(
                "chain {bad} does not exist: the run has {} chains",
                plan.options.chains
            )));
        }
        let mut chains: Vec<Chain> = owned
            .iter()
            .map(|&c| Chain::new(c, target, &plan))
            .collect::<Result<_, _>>()?;
        for c in chains.iter_mut() {
            c.restart_adaptation(&plan);
        }
        let mut steps: Vec<Step> = Vec::new();
        for (window, len) in window_lengths(plan.options.warmup).into_iter().enumerate() {
            push_window(&mut steps, window, len);
        }
        for (chunk, iterations) in pieces(plan.options.draws).into_iter().enumerate() {
            steps.push(Step::Sample { chunk, iterations });
        }
        let merge_rng = Stream::new(plan.options.seed, Purpose::Resample, 1 << 20);
        let fresh = |c: usize| Record {
            chain: c,
            ..Record::default()
        };
        let kept = (0..plan.options.chains).map(fresh).collect();
        let window = (0..plan.options.chains).map(fresh).collect();
        Ok(Stepper {
            plan,
            target: target.clone(),
            chains,
            steps,
            at: 0,
            history: Vec::new(),
            since_reset: 0,
            merge_rng,
            kept,
            window,
            full_efficiency: 0.0,
            trial_skipped: false,
        })
    }

    /// Splits the sampling steps not yet run into pieces of at most `max` iterations. Kept
    /// draws only accumulate between sampling steps, so the draws are the same; a caller that
    /// stops at a budget of evaluations can then stop closer to it.
    pub fn split_sampling(&mut self, max: usize) {
        let max = max.max(1);
        let at = self.at;
        let first = self.steps[at..]
            .iter()
            .position(|s| matches!(s, Step::Sample { .. }))
            .map_or(self.steps.len(), |i| at + i);
        let left: usize = self.steps[first..]
            .iter()
            .map(|s| match s {
                Step::Sample { iterations, .. } | Step::Warmup { iterations, .. } => *iterations,
            })
            .sum();
        self.steps.truncate(first);
        let done = self
            .steps
            .iter()
            .filter(|s| matches!(s, Step::Sample { .. }))
            .count();
        let k = left.div_ceil(max);
        for i in 0..k {
            let iterations = left / k + usize::from(i < left % k);
            self.steps.push(Step::Sample {
                chunk: done + i,
                iterations,
            });
        }
    }

    /// Cuts every warm-up window after `window` to `keep` of its length (at least
    /// [`MIN_SHORT_WINDOW`] iterations, or the whole window if shorter) and returns the new
    /// warm-up length per chain. Called while the current step is `window`'s last piece; the
    /// sampling steps are left as they are.
    pub(super) fn shorten_warmup(&mut self, window: usize, keep: f64) -> usize {
        let lengths = window_lengths(self.plan.options.warmup);
        let mut steps: Vec<Step> = self.steps[..=self.at].to_vec();
        let mut total: usize = lengths[..=window].iter().sum();
        for (w, &len) in lengths.iter().enumerate().skip(window + 1) {
            let short = ((len as f64 * keep).round() as usize).max(len.min(MIN_SHORT_WINDOW));
            total += short;
            push_window(&mut steps, w, short);
        }
        steps.extend(
            self.steps[self.at + 1..]
                .iter()
                .filter(|s| matches!(s, Step::Sample { .. }))
                .copied(),
        );
        self.steps = steps;
        self.plan.options.warmup = total;
        total
    }

    /// The current step, or `None` when the run is done.
    pub fn step(&self) -> Option<Step> {
        self.steps.get(self.at).copied()
    }

    pub fn step_index(&self) -> usize {
        self.at
    }

    pub fn step_count(&self) -> usize {
        self.steps.len()
    }

    /// Runs the owned chains through the current step.
    pub fn run_step(&mut self) -> Vec<Record> {
        match self.step() {
            Some(Step::Warmup { iterations, .. }) => {
                run_chains(&mut self.chains, &self.plan, iterations, true)
            }
            Some(Step::Sample { iterations, .. }) => {
                run_chains(&mut self.chains, &self.plan, iterations, false)
            }
            None => Vec::new(),
        }
    }

    /// Takes the records of every chain for the current step and moves to the next.
    pub fn absorb(&mut self, mut records: Vec<Record>) -> Result<(), KilnError> {
        let Some(step) = self.step() else {
            return Ok(());
        };
        records.sort_by_key(|r| r.chain);
        let chains: Vec<usize> = records.iter().map(|r| r.chain).collect();
        let expected: Vec<usize> = (0..self.plan.options.chains).collect();
        if chains != expected {
            return Err(KilnError::usage(format!(
                "step {} needs the records of chains {expected:?}, got {chains:?}",
                self.at
            )));
        }
        match step {
            Step::Warmup {
                window,
                last_of_window,
                ..
            } => {
                for r in &records {
                    merge_records(&mut self.window[r.chain], r);
                }
                if last_of_window {
                    let whole: Vec<Record> = std::mem::take(&mut self.window);
                    self.window = (0..self.plan.options.chains)
                        .map(|c| Record {
                            chain: c,
                            ..Record::default()
                        })
                        .collect();
                    if self.plan.is_tempered() && whole.iter().any(|r| r.iterations > 0) {
                        self.learn(window, &whole)?;
                    }
                }
                // Leaving warm-up: every chain keeps its averaged step size from now on, and the
                // frozen base's mass outside the target's support is measured.
                if !matches!(self.steps.get(self.at + 1), Some(Step::Warmup { .. })) {
                    for c in self.chains.iter_mut() {
                        c.eps = c.adapt.final_eps();
                    }
                    let target = self.target.clone();
                    self.plan.measure_support(&target);
                }
            }
            Step::Sample { .. } => {
                for r in &records {
                    merge_records(&mut self.kept[r.chain], r);
                }
            }
        }
        self.at += 1;
        Ok(())
    }

    /// Energy evaluations of every chain (read from the records, so every worker agrees).
    pub fn chain_evaluations(&self) -> u64 {
        self.kept.iter().map(|r| r.evaluations).sum()
    }

    /// The step size of every chain in the kept draws.
    pub fn step_sizes(&self) -> Vec<f64> {
        self.kept.iter().map(|r| r.eps).collect()
    }

    /// Runs every remaining step with all chains owned.
    pub fn run_to_end(&mut self) -> Result<(), KilnError> {
        while self.step().is_some() {
            let r = self.run_step();
            self.absorb(r)?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sample::two_modes_at;
    use crate::sample::warmup::{SHORTEN_AFTER, WARMUP_KEEP};

    #[test]
    fn a_good_base_shortens_the_warm_up_and_keeps_the_kept_draws() {
        // Two normal modes with their exact Laplace base: the first two windows find the base
        // good and the five windows left are cut to WARMUP_KEEP.
        let (target, search) = two_modes_at(6.0);
        let laplace = Laplace::from_modes(&search.modes).unwrap();
        let mut opts = SamplerOptions::new(3);
        opts.chains = 2;
        opts.warmup = 500;
        opts.draws = 120;
        let mut s = Stepper::new(&target, search.modes.clone(), laplace, opts, None).unwrap();
        let (mut warm, mut kept) = (0, 0);
        while let Some(step) = s.step() {
            match step {
                Step::Warmup { iterations, .. } => warm += iterations,
                Step::Sample { iterations, .. } => kept += iterations,
            }
            let r = s.run_step();
            s.absorb(r).unwrap();
        }
        let lengths = window_lengths(500);
        let want: usize = lengths[..=SHORTEN_AFTER].iter().sum::<usize>()
            + lengths[SHORTEN_AFTER + 1..]
                .iter()
                .map(|&l| ((l as f64 * WARMUP_KEEP).round() as usize).max(l.min(MIN_SHORT_WINDOW)))
                .sum::<usize>();
        assert!(want < 300, "{want}");
        assert_eq!(warm, want);
        assert_eq!(s.plan.options.warmup, want);
        assert_eq!(kept, 120);
        assert!(s.kept.iter().all(|r| r.iterations == 120));
        let note = s
            .plan
            .notes
            .iter()
            .find(|n| n.starts_with("warm-up shortened"));
        assert!(
            note.is_some_and(|n| n.contains(&format!("from 500 to {want} iterations"))),
            "{:?}",
            s.plan.notes
        );
    }

    #[test]
    fn finer_sampling_steps_keep_the_same_draws() {
        // Kept draws only accumulate between sampling steps: splitting them must change nothing.
        let (target, search) = two_modes_at(6.0);
        let laplace = Laplace::from_modes(&search.modes).unwrap();
        let mut opts = SamplerOptions::new(5);
        opts.warmup = 150;
        opts.draws = 230;
        let run = |split: Option<usize>| {
            let mut s = Stepper::new(
                &target,
                search.modes.clone(),
                laplace.clone(),
                opts.clone(),
                None,
            )
            .unwrap();
            let mut sample_steps = 0;
            while let Some(step) = s.step() {
                if matches!(step, Step::Sample { .. }) {
                    if let Some(m) = split.filter(|_| sample_steps == 0) {
                        s.split_sampling(m);
                    }
                    sample_steps += 1;
                }
                let r = s.run_step();
                s.absorb(r).unwrap();
            }
            (s.kept.clone(), sample_steps)
        };
        let (a, na) = run(None);
        let (b, nb) = run(Some(7));
        assert_eq!(na, 3);
        assert_eq!(nb, 230usize.div_ceil(7));
        for (x, y) in a.iter().zip(&b) {
            assert_eq!(x.iterations, 230);
            assert_eq!(x.iterations, y.iterations);
            assert_eq!(x.z, y.z);
            assert_eq!(x.beta, y.beta);
            assert_eq!(x.evaluations, y.evaluations);
        }
    }
}
