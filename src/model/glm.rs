//! Weighted Poisson log-linear regression with an offset, by Newton's method.
//!
//! With linear predictor η_i = x_i'β + o_i (o_i = log exposure, or 0) and mean μ_i = exp(η_i),
//! the weighted objective (the expected complete-data term of one cluster's count, without
//! the constant −Σ v_i log y_i!) is
//!
//! ```text
//! Q(β) = Σ_i v_i [ y_i η_i − μ_i ],   score = Σ_i v_i (y_i − μ_i) x_i,   −Hessian = Σ_i v_i μ_i x_i x_i'
//! ```
//!
//! Q is concave; Newton with step-halving raises it at every iteration (McCullagh & Nelder
//! 1989, ch. 6, where the same step is written as iteratively reweighted least squares).

use crate::numerics::newton::{maximise, Concave, Outcome, WhenSingular};
use nalgebra::{DMatrix, DVector};

/// Result of a weighted Poisson fit.
#[derive(Debug, Clone, PartialEq)]
pub struct PoissonFit {
    /// Coefficients.
    pub beta: Vec<f64>,
    /// Q at `beta`.
    pub objective: f64,
    /// Newton iterations.
    pub iterations: usize,
    /// Why Newton stopped.
    pub outcome: Outcome,
}

/// The rows of one Poisson regression: design rows x (n×q, row-major), counts, offsets
/// and weights. Rows of weight 0 are skipped.
#[derive(Debug, Clone, Copy)]
pub struct PoissonRows<'a> {
    /// Design, row-major n×q.
    pub x: &'a [f64],
    /// Columns of the design.
    pub q: usize,
    /// Counts.
    pub y: &'a [f64],
    /// Offsets (log exposure), or None for 0.
    pub offset: Option<&'a [f64]>,
    /// Weights.
    pub weights: &'a [f64],
}

impl PoissonRows<'_> {
    fn eta(&self, i: usize, beta: &[f64]) -> f64 {
        let x = &self.x[i * self.q..(i + 1) * self.q];
        x.iter().zip(beta).map(|(a, b)| a * b).sum::<f64>() + self.offset.map_or(0.0, |o| o[i])
    }

    /// Q(β).
    pub fn objective(&self, beta: &[f64]) -> f64 {
        let mut total = 0.0;
        for (i, (v, y)) in self.weights.iter().zip(self.y).enumerate() {
            if *v == 0.0 {
                continue;
            }
            let eta = self.eta(i, beta);
            let term = if *y == 0.0 { -eta.exp() } else { y * eta - eta.exp() };
            total += v * term;
        }
        total
    }

    /// Q, score and negative Hessian at β.
    pub fn derivatives(&self, beta: &[f64]) -> (f64, DVector<f64>, DMatrix<f64>) {
        let q = self.q;
        let mut score = DVector::zeros(q);
        let mut neg = DMatrix::zeros(q, q);
        let mut total = 0.0;
        for (i, (v, y)) in self.weights.iter().zip(self.y).enumerate() {
            if *v == 0.0 {
                continue;
            }
            let x = &self.x[i * q..(i + 1) * q];
            let eta = self.eta(i, beta);
            let mu = eta.exp();
            total += v * if *y == 0.0 { -mu } else { y * eta - mu };
            let r = v * (y - mu);
            let h = v * mu;
            for a in 0..q {
                score[a] += r * x[a];
                for b in 0..=a {
                    neg[(a, b)] += h * x[a] * x[b];
                }
            }
        }
        for a in 0..q {
            for b in 0..a {
                neg[(b, a)] = neg[(a, b)];
            }
        }
        (total, score, neg)
    }
}

impl Concave for PoissonRows<'_> {
    fn objective(&self, beta: &[f64]) -> f64 {
        PoissonRows::objective(self, beta)
    }

    fn derivatives(&self, beta: &[f64]) -> (f64, DVector<f64>, DMatrix<f64>) {
        PoissonRows::derivatives(self, beta)
    }
}

/// The damped Newton maximiser ([`crate::numerics::newton`]) from `start`, at most
/// `max_iter` iterations; it stops at a singular Hessian. With `max_iter = 1` it is one
/// generalised-EM step: Q does not fall.
pub fn fit_poisson(rows: &PoissonRows, start: &[f64], max_iter: usize) -> PoissonFit {
    let fit = maximise(rows, start, max_iter, WhenSingular::Stop);
    PoissonFit {
        beta: fit.x,
        objective: fit.objective,
        iterations: fit.iterations,
        outcome: fit.outcome,
    }
}
