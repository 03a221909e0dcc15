//! The mixture of experts: a gating network and component models, and the E-step.
//!
//! ```text
//! p(y_i | w_i, z_i) = sum_g pi_g(w_i) f_g(y_i | z_i; theta_g)
//! ```
//!
//! [`FitData`] borrows the arrays one fit needs; [`Model`] holds the parameters;
//! [`e_step`] computes responsibilities in log space with one maximum per row and returns
//! the weighted log-likelihood.

pub mod family;
pub mod gating;

use family::{ComponentFamily, Components, Degeneracy};
use gating::{log_sum_exp, Gating};

/// The arrays one fit reads. All row-major.
#[derive(Debug, Clone, Copy)]
pub struct FitData<'a> {
    /// Rows.
    pub n: usize,
    /// Case weights (length n).
    pub weights: &'a [f64],
    /// Indicators, n×d.
    pub y: &'a [f64],
    /// Indicator count.
    pub d: usize,
    /// Component design, n×q (intercept first).
    pub z: &'a [f64],
    /// Component design columns.
    pub q: usize,
    /// Gating design, n×p (intercept first).
    pub w: &'a [f64],
    /// Gating design columns.
    pub p: usize,
}

/// Parameters of one mixture of experts.
#[derive(Debug, Clone, PartialEq)]
pub struct Model {
    /// Gating network.
    pub gating: Gating,
    /// Component models.
    pub components: Components,
}

impl Model {
    /// Number of clusters.
    pub fn clusters(&self) -> usize {
        self.gating.clusters()
    }

    /// Free parameters in all.
    pub fn n_params(&self) -> usize {
        self.gating.n_params() + self.components.n_params()
    }

    /// Both M-steps from responsibilities.
    pub fn m_step(&mut self, data: &FitData, tau: &[f64]) -> Result<gating::GatingStep, Degeneracy> {
        self.components.m_step(data, tau)?;
        Ok(self.gating.m_step(data.w, tau, data.weights))
    }

    /// Relabel clusters: new cluster k is old cluster `order[k]`.
    pub fn permute(&mut self, order: &[usize]) {
        self.gating.permute(order);
        self.components.permute(order);
    }
}

/// E-step: fill `tau` (n×G) with responsibilities and return sum_i c_i log p(y_i).
///
/// Rows whose every cluster has zero density give −∞; the caller treats a non-finite
/// log-likelihood as a numerical fault.
pub fn e_step(model: &Model, data: &FitData, tau: &mut [f64]) -> f64 {
    let g = model.clusters();
    model.components.log_density(data, tau);
    let mut prior = vec![0.0; g];
    let mut loglik = 0.0;
    for i in 0..data.n {
        model
            .gating
            .log_priors(&data.w[i * data.p..(i + 1) * data.p], &mut prior);
        let row = &mut tau[i * g..(i + 1) * g];
        for (r, l) in row.iter_mut().zip(&prior) {
            *r += l;
        }
        let lse = log_sum_exp(row);
        for r in row.iter_mut() {
            *r = (*r - lse).exp();
        }
        loglik += data.weights[i] * lse;
    }
    loglik
}

/// Log-likelihood alone (no responsibilities kept); uses `scratch` of length n×G.
pub fn log_likelihood(model: &Model, data: &FitData, scratch: &mut [f64]) -> f64 {
    e_step(model, data, scratch)
}
