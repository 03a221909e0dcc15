//! Numerics shared by every layer: stable log-space primitives, a linear solve, one
//! damped Newton maximiser ([`newton`]) and hashing. Nothing here knows about models,
//! data or specs.
//!
//! ```
//! use cohortmix::numerics::{log_sum_exp, softmax_in_place};
//! let mut x = [1000.0, 1000.0];
//! let lse = softmax_in_place(&mut x);
//! assert!((lse - (1000.0 + 2f64.ln())).abs() < 1e-12 && x == [0.5, 0.5]);
//! assert_eq!(log_sum_exp(&[f64::NEG_INFINITY]), f64::NEG_INFINITY);
//! ```

pub mod newton;

use nalgebra::{DMatrix, DVector};
use sha2::{Digest, Sha256};

/// log Σ exp(x), with the row's own maximum subtracted first (−∞ for an empty or all −∞
/// row).
pub fn log_sum_exp(x: &[f64]) -> f64 {
    let m = x.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if m == f64::NEG_INFINITY {
        return m;
    }
    m + x.iter().map(|v| (v - m).exp()).sum::<f64>().ln()
}

/// Replace `x` by softmax(x) and return log Σ exp(x), with the row's own maximum
/// subtracted first. One `exp` per entry.
pub fn softmax_in_place(x: &mut [f64]) -> f64 {
    let m = x.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if m == f64::NEG_INFINITY {
        return m;
    }
    let mut sum = 0.0;
    for v in x.iter_mut() {
        *v = (*v - m).exp();
        sum += *v;
    }
    for v in x.iter_mut() {
        *v /= sum;
    }
    m + sum.ln()
}

/// log π_k(w) of a multinomial logit with category 1 as reference (its coefficients 0):
/// `out[0]` for the reference, `out[k]` from the coefficients `gamma[(k − 1) p..k p]`.
/// One maximum per row (stable).
pub fn log_softmax_row(gamma: &[f64], p: usize, w: &[f64], out: &mut [f64]) {
    out[0] = 0.0;
    for (k, coef) in gamma.chunks_exact(p).enumerate() {
        out[k + 1] = coef.iter().zip(w).map(|(a, b)| a * b).sum();
    }
    let lse = log_sum_exp(out);
    for o in out.iter_mut() {
        *o -= lse;
    }
}

/// Index of the largest entry of a row (the first on ties): a row's most likely cluster.
pub fn most_likely(row: &[f64]) -> usize {
    let mut best = 0;
    for (k, v) in row.iter().enumerate() {
        if *v > row[best] {
            best = k;
        }
    }
    best
}

/// Solve A x = b for symmetric positive definite A; `None` when A is not (or the solution
/// is not finite).
pub fn solve_spd(a: &DMatrix<f64>, b: &DVector<f64>) -> Option<DVector<f64>> {
    let chol = a.clone().cholesky()?;
    let x = chol.solve(b);
    x.iter().all(|v| v.is_finite()).then_some(x)
}

/// Sum with compensation (Neumaier's variant of Kahan summation): accurate to about one unit
/// in the last place whatever the order of magnitudes, in a fixed order.
pub fn sum(xs: &[f64]) -> f64 {
    let (mut s, mut c) = (0.0_f64, 0.0_f64);
    for &x in xs {
        let t = s + x;
        c += if s.abs() >= x.abs() { (s - t) + x } else { (x - t) + s };
        s = t;
    }
    s + c
}

/// SHA-256 of bytes, as lower-case hexadecimal.
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex(&Sha256::digest(bytes))
}

/// Lower-case hexadecimal of bytes.
pub fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn compensated_sum_keeps_small_terms() {
        assert_eq!(sum(&[1e16, 1.0, -1e16]), 1.0);
        assert_eq!(sum(&[0.1; 10]), 1.0);
    }

    #[test]
    fn log_softmax_is_stable_for_large_scores() {
        let gamma = [1000.0, 0.0];
        let mut out = [0.0; 2];
        log_softmax_row(&gamma, 2, &[1.0, 0.0], &mut out);
        assert!(out.iter().all(|v| v.is_finite()));
        assert!((out[1]).abs() < 1e-12);
    }

    #[test]
    fn most_likely_takes_the_first_of_ties() {
        assert_eq!(most_likely(&[0.2, 0.4, 0.4]), 1);
        assert_eq!(most_likely(&[1.0]), 0);
    }
}
