//! The benchmark's jobs (target × method × budget × seed) and the pool that runs them on every
//! core.
//!
//! Owns: one job's run of one method, and [`pool`].
//! Must not: aggregate results.

use super::baselines::{self, Draws};
use super::budget::kiln_run;
use super::targets::BenchTarget;
use super::Method;
use crate::bench::KilnCounts;
use crate::run::Prepared;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::Instant;

/// One scored run.
#[derive(Clone, Debug)]
pub(super) struct Job {
    pub(super) target: usize,
    pub(super) budget: u64,
    pub(super) seed: u64,
    pub(super) method: Method,
}

#[derive(Clone, Debug)]
pub(super) struct JobResult {
    pub(super) log_z: f64,
    pub(super) log_z_se: f64,
    pub(super) mass_error: Option<f64>,
    pub(super) evaluations: u64,
    pub(super) seconds: f64,
    pub(super) tuning: String,
}

pub(super) fn run_job(
    job: &Job,
    targets: &[BenchTarget],
    prepared: &[Prepared],
    counts: &[(usize, u64, KilnCounts)],
) -> JobResult {
    let t = &targets[job.target];
    let p = &prepared[job.target];
    let base = crate::sample::tempering::Base {
        q: std::sync::Arc::new(p.laplace.base.clone()),
        log_zeta: p.laplace.log_zeta,
    };
    let t0 = Instant::now();
    let (log_z, log_z_se, evaluations, draws, tuning, seconds) = match job.method {
        Method::Kiln => {
            let c = counts
                .iter()
                .find(|(ti, b, _)| *ti == job.target && *b == job.budget)
                .map(|x| x.2);
            match c.map(|c| kiln_run(p, job.seed, c.chains, c.warmup, c.draws, Some(job.budget))) {
                Some(Ok(r)) => (
                    r.log_z,
                    r.log_z_se,
                    r.evaluations,
                    r.draws,
                    r.notes,
                    r.seconds,
                ),
                Some(Err(e)) => (f64::NAN, f64::NAN, 0, Draws::default(), e.render(), 0.0),
                None => (
                    f64::NAN,
                    f64::NAN,
                    0,
                    Draws::default(),
                    "no pilot".into(),
                    0.0,
                ),
            }
        }
        m => {
            let o = match m {
                Method::Ais => {
                    baselines::annealed_importance_sampling(&p.target, &base, job.budget, job.seed)
                }
                Method::Pt => baselines::parallel_tempering(&p.target, &base, job.budget, job.seed),
                Method::Is => {
                    baselines::importance_sampling(&p.target, &base, job.budget, job.seed)
                }
                _ => baselines::plain_nuts(&p.target, &base, job.budget, job.seed),
            };
            let s = t0.elapsed().as_secs_f64();
            (o.log_z, o.log_z_se, o.evaluations, o.draws, o.tuning, s)
        }
    };
    JobResult {
        log_z,
        log_z_se,
        mass_error: t.groups.largest_error(&draws),
        evaluations,
        seconds,
        tuning,
    }
}

/// Runs `n` tasks on `threads` threads, largest first as given; `done` reports each result.
pub(super) fn pool<T: Send, F, G>(n: usize, threads: usize, f: F, done: G) -> Vec<T>
where
    F: Fn(usize) -> T + Sync,
    G: Fn(usize, &T) + Sync,
{
    let next = AtomicUsize::new(0);
    let out: Mutex<Vec<Option<T>>> = Mutex::new((0..n).map(|_| None).collect());
    std::thread::scope(|s| {
        for _ in 0..threads.max(1) {
            s.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::SeqCst);
                if i >= n {
                    break;
                }
                let r = f(i);
                done(i, &r);
                if let Ok(mut o) = out.lock() {
                    o[i] = Some(r);
                }
            });
        }
    });
    // `thread::scope` re-raises a task's panic before returning, so here every task has run and
    // filled its slot (and the lock is not poisoned): the `expect` cannot fire.
    out.into_inner()
        .unwrap_or_default()
        .into_iter()
        .map(|r| r.expect("every task ran"))
        .collect()
}
