//! Random streams: one portable generator per task, derived from the master seed.
//!
//! Every start of every fit, and every simulation, draws from its own
//! Xoshiro256++ stream whose seed is a SHA-256 digest of the master seed and the task's
//! name, so results do not depend on how tasks are scheduled over threads. Uniforms and
//! normals are computed here from raw 64-bit outputs (53-bit uniforms, Box–Muller
//! normals) so a seed gives the same numbers whatever version of the `rand` crate builds.

use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256PlusPlus;
use sha2::{Digest, Sha256};

/// One random stream.
#[derive(Debug, Clone)]
pub struct Stream {
    inner: Xoshiro256PlusPlus,
    spare_normal: Option<f64>,
}

impl Stream {
    /// The stream for task `label` under `master` seed.
    pub fn new(master: u64, label: &str) -> Stream {
        let digest = Sha256::digest(format!("cohortmix stream|{master}|{label}").as_bytes());
        let mut first = [0u8; 8];
        first.copy_from_slice(&digest[..8]);
        Stream {
            inner: Xoshiro256PlusPlus::seed_from_u64(u64::from_le_bytes(first)),
            spare_normal: None,
        }
    }

    /// Uniform on [0, 1) with 53 random bits.
    pub fn uniform(&mut self) -> f64 {
        (self.inner.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Uniform on (0, 1].
    fn uniform_open0(&mut self) -> f64 {
        1.0 - self.uniform()
    }

    /// A uniform index in 0..n (n > 0), without modulo bias (Lemire's method).
    pub fn index(&mut self, n: usize) -> usize {
        let n = n as u64;
        loop {
            let x = self.inner.next_u64();
            let m = (x as u128) * (n as u128);
            let low = m as u64;
            if low >= n.wrapping_neg() % n {
                return (m >> 64) as usize;
            }
        }
    }

    /// Standard normal (Box–Muller, both values used).
    pub fn normal(&mut self) -> f64 {
        if let Some(z) = self.spare_normal.take() {
            return z;
        }
        let r = (-2.0 * self.uniform_open0().ln()).sqrt();
        let theta = std::f64::consts::TAU * self.uniform();
        self.spare_normal = Some(r * theta.sin());
        r * theta.cos()
    }

    /// A Poisson(mean) draw by inversion (sequential search from 0). Means above 500 are
    /// drawn as sums of Poisson(500) pieces (Poisson variables add), so exp(−mean) never
    /// underflows.
    pub fn poisson(&mut self, mean: f64) -> u64 {
        const PIECE: f64 = 500.0;
        let mut rest = mean.max(0.0);
        let mut total = 0;
        while rest > 0.0 {
            let m = rest.min(PIECE);
            rest -= m;
            let u = self.uniform();
            let mut k = 0u64;
            let mut p = (-m).exp();
            let mut cdf = p;
            while u >= cdf && p > 0.0 {
                k += 1;
                p *= m / k as f64;
                cdf += p;
            }
            total += k;
        }
        total
    }

    /// An index drawn with probabilities proportional to `weights` (not all zero).
    pub fn weighted_index(&mut self, weights: &[f64]) -> usize {
        let total: f64 = weights.iter().sum();
        let mut u = self.uniform() * total;
        for (i, w) in weights.iter().enumerate() {
            if u < *w {
                return i;
            }
            u -= w;
        }
        weights.iter().rposition(|w| *w > 0.0).unwrap_or(0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn streams_are_reproducible_and_distinct() {
        let a: Vec<f64> = (0..5)
            .map({
                let mut s = Stream::new(7, "x");
                move |_| s.uniform()
            })
            .collect();
        let b: Vec<f64> = (0..5)
            .map({
                let mut s = Stream::new(7, "x");
                move |_| s.uniform()
            })
            .collect();
        let mut other = Stream::new(7, "y");
        assert_eq!(a, b);
        assert_ne!(a[0], other.uniform());
    }

    #[test]
    fn poisson_draws_have_the_right_mean_and_variance() {
        for mean in [0.3, 4.0, 1234.5] {
            let mut s = Stream::new(2, "poisson");
            let n = 50_000;
            let draws: Vec<f64> = (0..n).map(|_| s.poisson(mean) as f64).collect();
            let m = draws.iter().sum::<f64>() / n as f64;
            let v = draws.iter().map(|x| (x - m).powi(2)).sum::<f64>() / n as f64;
            // Standard error of the mean is sqrt(mean/n); allow 5 of them.
            assert!((m - mean).abs() < 5.0 * (mean / n as f64).sqrt(), "mean {m} vs {mean}");
            assert!((v / mean - 1.0).abs() < 0.05, "variance {v} vs {mean}");
        }
    }

    #[test]
    fn normals_have_unit_variance() {
        let mut s = Stream::new(1, "normal");
        let n = 200_000;
        let draws: Vec<f64> = (0..n).map(|_| s.normal()).collect();
        let mean = draws.iter().sum::<f64>() / n as f64;
        let var = draws.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n as f64;
        // Standard errors: 1/sqrt(n) ≈ 0.0022 for the mean, sqrt(2/n) ≈ 0.0032 for the variance.
        assert!(mean.abs() < 0.011, "{mean}");
        assert!((var - 1.0).abs() < 0.016, "{var}");
    }

    #[test]
    fn index_stays_in_range() {
        let mut s = Stream::new(3, "i");
        let mut counts = [0usize; 3];
        for _ in 0..30_000 {
            counts[s.index(3)] += 1;
        }
        assert!(counts.iter().all(|c| (9_500..10_500).contains(c)), "{counts:?}");
    }
}
