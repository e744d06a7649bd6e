//! Seeded, portable random numbers.
//!
//! Owns: the one generator of Kiln (ChaCha8 from `rand_chacha`, whose output is specified bit
//! for bit on every platform), independent streams for chains and restarts, and the few
//! distributions the statistics need, written here with `libm` so that native and WebAssembly
//! builds draw identical numbers.
//! Must not: be seeded from the clock or the operating system; every seed comes from the spec.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// One stream of random numbers.
#[derive(Clone, Debug)]
pub struct Stream {
    rng: ChaCha8Rng,
    spare_normal: Option<f64>,
}

/// What a stream is used for; streams for different purposes never overlap.
#[derive(Clone, Copy, Debug)]
pub enum Purpose {
    ModeSearch = 1,
    Chain = 2,
    Resample = 3,
    Check = 4,
}

impl Stream {
    /// Stream `index` of the given purpose, from a run's seed.
    pub fn new(seed: u64, purpose: Purpose, index: u64) -> Stream {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        rng.set_stream(((purpose as u64) << 48) | index);
        Stream {
            rng,
            spare_normal: None,
        }
    }

    /// Uniform on the open interval (0, 1).
    pub fn uniform(&mut self) -> f64 {
        loop {
            let u: f64 = self.rng.random();
            if u > 0.0 {
                return u;
            }
        }
    }

    /// Uniform integer in 0..n.
    pub fn below(&mut self, n: usize) -> usize {
        ((self.uniform() * n as f64) as usize).min(n.saturating_sub(1))
    }

    /// Standard normal, by the polar method.
    pub fn normal(&mut self) -> f64 {
        if let Some(z) = self.spare_normal.take() {
            return z;
        }
        loop {
            let a = 2.0 * self.uniform() - 1.0;
            let b = 2.0 * self.uniform() - 1.0;
            let s = a * a + b * b;
            if s < 1.0 && s > 0.0 {
                let f = crate::common::maths::sqrt(-2.0 * crate::common::maths::ln(s) / s);
                self.spare_normal = Some(b * f);
                return a * f;
            }
        }
    }

    /// Gamma(shape, 1), by Marsaglia & Tsang (2000), "A simple method for generating gamma
    /// variables", ACM TOMS 26, 363.
    pub fn gamma(&mut self, shape: f64) -> f64 {
        if shape < 1.0 {
            let u = self.uniform();
            return self.gamma(shape + 1.0) * crate::common::maths::pow(u, 1.0 / shape);
        }
        let d = shape - 1.0 / 3.0;
        let c = 1.0 / crate::common::maths::sqrt(9.0 * d);
        loop {
            let x = self.normal();
            let v = 1.0 + c * x;
            if v <= 0.0 {
                continue;
            }
            let v = v * v * v;
            let u = self.uniform();
            if crate::common::maths::ln(u)
                < 0.5 * x * x + d - d * v + d * crate::common::maths::ln(v)
            {
                return d * v;
            }
        }
    }

    /// Chi-square with `nu` degrees of freedom.
    pub fn chi_square(&mut self, nu: f64) -> f64 {
        2.0 * self.gamma(0.5 * nu)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn streams_are_reproducible_and_distinct() {
        let mut a = Stream::new(7, Purpose::Chain, 0);
        let mut b = Stream::new(7, Purpose::Chain, 0);
        let mut c = Stream::new(7, Purpose::Chain, 1);
        let xa: Vec<f64> = (0..5).map(|_| a.normal()).collect();
        let xb: Vec<f64> = (0..5).map(|_| b.normal()).collect();
        let xc: Vec<f64> = (0..5).map(|_| c.normal()).collect();
        assert_eq!(xa, xb);
        assert_ne!(xa, xc);
    }

    #[test]
    fn normal_and_gamma_moments() {
        // Exact moments: N(0,1) has mean 0, variance 1; Gamma(k) has mean k, variance k.
        let mut s = Stream::new(1, Purpose::Check, 0);
        let n = 200_000;
        let xs: Vec<f64> = (0..n).map(|_| s.normal()).collect();
        let m = xs.iter().sum::<f64>() / n as f64;
        let v = xs.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / n as f64;
        assert!(m.abs() < 0.01 && (v - 1.0).abs() < 0.01, "{m} {v}");
        for &k in &[0.4, 2.5] {
            let gs: Vec<f64> = (0..n).map(|_| s.gamma(k)).collect();
            let m = gs.iter().sum::<f64>() / n as f64;
            let v = gs.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / n as f64;
            assert!(
                (m - k).abs() < 0.02 * k.max(1.0) && (v - k).abs() < 0.05 * k.max(1.0),
                "{k}: {m} {v}"
            );
        }
    }
}
