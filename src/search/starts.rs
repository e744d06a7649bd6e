//! Where the optimiser starts: shifted Halton points spread over the space.
//!
//! Owns: [`SearchOptions`] (how many starts) and [`start_point`].
//! Must not: optimise.

use crate::common::maths::ln;
use crate::model::target::Transform;

/// How many scattered starts the search makes.
#[derive(Clone, Copy, Debug)]
pub struct SearchOptions {
    /// Most starts (the budget).
    pub max_starts: usize,
    /// Fewest starts before the stopping rule may end them.
    pub min_starts: usize,
    /// Stop before `max_starts` once the stopping rule of `coverage` holds (false: make every
    /// start, as when the user asks for a number of starts).
    pub stop_rule: bool,
    pub seed: u64,
    /// Work budget of the dense scan, in tape instructions (`scan::SCAN_WORK` by default).
    pub scan_work: f64,
}

impl SearchOptions {
    /// Default: at least 40 + 20 D starts and at most 200 + 100 D (3000 at most), stopping in
    /// between when the stopping rule holds.
    pub fn default_for(dim: usize, seed: u64) -> SearchOptions {
        SearchOptions {
            max_starts: (200 + 100 * dim).min(3000),
            min_starts: 40 + 20 * dim,
            stop_rule: true,
            seed,
            scan_work: super::scan::SCAN_WORK,
        }
    }
}

const FIRST_PRIMES: [u32; 64] = [
    2, 3, 5, 7, 11, 13, 17, 19, 23, 29, 31, 37, 41, 43, 47, 53, 59, 61, 67, 71, 73, 79, 83, 89, 97,
    101, 103, 107, 109, 113, 127, 131, 137, 139, 149, 151, 157, 163, 167, 173, 179, 181, 191, 193,
    197, 199, 211, 223, 227, 229, 233, 239, 241, 251, 257, 263, 269, 271, 277, 281, 283, 293, 307,
    311,
];

pub(super) fn radical_inverse(mut i: u64, base: u64) -> f64 {
    let mut f = 1.0;
    let mut r = 0.0;
    while i > 0 {
        f /= base as f64;
        r += f * (i % base) as f64;
        i /= base;
    }
    r
}

/// The k-th starting point in unconstrained coordinates: a randomly shifted Halton point,
/// mapped per unknown (inside the bounds; log-spread for one bound; for unbounded unknowns
/// uniform on ±s with a scale s log-uniform on [1, 100], drawn from one more Halton axis so
/// that scale and position are not correlated).
pub(super) fn start_point(k: usize, transforms: &[Transform], shift: &[f64]) -> Vec<f64> {
    let d = transforms.len();
    let halton = |axis: usize| -> f64 {
        if k == 0 {
            0.5
        } else {
            (radical_inverse(k as u64, FIRST_PRIMES[axis % FIRST_PRIMES.len()] as u64)
                + shift[axis])
                .fract()
        }
    };
    let scale = crate::common::maths::exp(ln(100.0) * halton(d));
    transforms
        .iter()
        .enumerate()
        .map(|(i, t)| {
            let u = 0.005 + 0.99 * halton(i);
            match t {
                Transform::Free => scale * (2.0 * u - 1.0),
                Transform::Lower(_) | Transform::Upper(_) => 12.0 * (u - 0.5),
                Transform::Interval(..) => ln(u) - ln(1.0 - u),
            }
        })
        .collect()
}
