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
pub mod glm;
pub mod rows;

use family::{ComponentFamily, Components, Degeneracy};
use gating::{Gating, GatingStats};
pub use rows::GaussianStats;

/// The arrays one fit reads. All row-major.
#[derive(Debug, Clone, Copy, Default)]
pub struct FitData<'a> {
    /// Rows.
    pub n: usize,
    /// Case weights (length n).
    pub weights: &'a [f64],
    /// Continuous (gaussian) indicators, n×d.
    pub y: &'a [f64],
    /// Continuous indicator count (0 without a gaussian block).
    pub d: usize,
    /// Design of the gaussian block, n×q (intercept first).
    pub z: &'a [f64],
    /// Gaussian design columns.
    pub q: usize,
    /// Gating design, n×p (intercept first).
    pub w: &'a [f64],
    /// Gating design columns.
    pub p: usize,
    /// Item indicators, when the family has them.
    pub items: Option<ItemData<'a>>,
    /// Count indicators, when the family has them.
    pub counts: Option<CountData<'a>>,
}

/// The arrays of the item block.
#[derive(Debug, Clone, Copy)]
pub struct ItemData<'a> {
    /// Item names (for messages).
    pub names: &'a [String],
    /// Level codes, n×J row-major; [`crate::data::MISSING_ITEM`] where missing.
    pub codes: &'a [u16],
    /// Levels per item (J entries).
    pub levels: &'a [usize],
    /// The placement's component design, n×qz (intercept first).
    pub z: &'a [f64],
    /// Its columns.
    pub qz: usize,
    /// Per item, the design columns its logits use (column 0, the intercept, first).
    pub terms: &'a [Vec<usize>],
    /// Per item, the arrays its M-step reuses at every EM iteration.
    pub rows: &'a [family::items::ItemRows],
}

/// The arrays of the count block.
#[derive(Debug, Clone, Copy)]
pub struct CountData<'a> {
    /// Count names (for messages).
    pub names: &'a [String],
    /// Counts, column by column: count c of row i at `y[c * n + i]`.
    pub y: &'a [f64],
    /// log(y!) of every count, laid out as `y`.
    pub ln_factorial: &'a [f64],
    /// The placement's component design, n×qz (intercept first).
    pub z: &'a [f64],
    /// Its columns.
    pub qz: usize,
    /// Per count column, the design columns its regression uses (intercept first).
    pub terms: &'a [Vec<usize>],
    /// Per count column with covariates, its design on those columns (n×q, row-major;
    /// empty for a count without covariates), built once by [`design_rows`].
    pub x: &'a [Vec<f64>],
    /// Exposure per row, if an exposure is given.
    pub exposure: Option<&'a [f64]>,
    /// log exposure per row (the offset), if an exposure is given.
    pub log_exposure: Option<&'a [f64]>,
}

/// Rows of a row-major design `z` (n×qz) restricted to the columns `cols`, row-major.
pub fn design_rows(z: &[f64], qz: usize, cols: &[usize]) -> Vec<f64> {
    z.chunks_exact(qz)
        .flat_map(|row| cols.iter().map(|a| row[*a]))
        .collect()
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

    /// What EM subtracts from the log-likelihood: the gating ridge penalty minus the
    /// log-prior of the components.
    pub fn penalty(&self) -> f64 {
        self.gating.penalty() - self.components.log_prior()
    }

    /// Free parameters in all.
    pub fn n_params(&self) -> usize {
        self.gating.n_params() + self.components.n_params()
    }

    /// Both M-steps from responsibilities.
    ///
    /// `stats` are the gating sums and `gaussian` the Gaussian sums of the E-step that
    /// produced `tau` (see [`e_step_with`]); without the latter the Gaussian block sums
    /// them from `tau`.
    /// With them a logit gating network takes a Newton step (`safe = false`) or Böhning's
    /// bound step, which always raises the gating objective (`safe = true`); without them
    /// it takes a Newton step with step-halving, computed from `tau` directly.
    pub fn m_step(
        &mut self,
        data: &FitData,
        tau: &[f64],
        stats: Option<&GatingStats>,
        gaussian: Option<&GaussianStats>,
        safe: bool,
    ) -> Result<gating::GatingStep, Degeneracy> {
        self.components.m_step_with(data, tau, gaussian)?;
        let has_bound = matches!(
            self.gating,
            Gating::Logit {
                bound_inverse: Some(_),
                ..
            }
        );
        let one = |damped| gating::GatingStep {
            iterations: 1,
            outcome: crate::numerics::newton::Outcome::IterationCap,
            damped,
        };
        match stats {
            Some(st) if has_bound && safe => {
                self.gating.bound_step(&st.score);
                Ok(one(0))
            }
            Some(st) if has_bound => {
                if !self.gating.newton_step(st) {
                    self.gating.bound_step(&st.score);
                    return Ok(one(1));
                }
                Ok(one(0))
            }
            Some(st) if matches!(self.gating, Gating::Free { .. }) && !st.cluster_weight.is_empty() => {
                self.gating.shares_from(&st.cluster_weight);
                Ok(gating::GatingStep {
                    iterations: 0,
                    outcome: crate::numerics::newton::Outcome::Converged,
                    damped: 0,
                })
            }
            _ => Ok(self.gating.m_step(data.w, tau, data.weights)),
        }
    }

    /// Whether [`Model::m_step`] needs only the E-step's sums, not the responsibilities:
    /// Gaussian components alone and a gating network without parameters, with free
    /// shares, or a logit with its bound prepared.
    pub fn steps_from_sums(&self) -> bool {
        let c = &self.components;
        let gating = match &self.gating {
            Gating::Equal { .. } | Gating::Fixed { .. } | Gating::Free { .. } => true,
            Gating::Logit { bound_inverse, .. } => bound_inverse.is_some(),
        };
        c.gaussian.is_some() && c.items.is_none() && c.counts.is_none() && gating
    }

    /// The parameters as one vector of coordinates in which EM steps can be extrapolated:
    /// gating first, then the component blocks ([`ComponentFamily::push_coordinates`]).
    pub fn coordinates(&self) -> Vec<f64> {
        let mut out = Vec::new();
        self.gating.push_coordinates(&mut out);
        self.components.push_coordinates(&mut out);
        out
    }

    /// This model with its parameters set from `c`, laid out as [`Model::coordinates`]
    /// gives them. Fails when they make a cluster degenerate.
    pub fn with_coordinates(&self, c: &[f64]) -> Result<Model, Degeneracy> {
        let mut m = self.clone();
        let read = m.gating.set_coordinates(c);
        let read = read + m.components.set_coordinates(&c[read..])?;
        debug_assert_eq!(read, c.len());
        Ok(m)
    }

    /// Relabel clusters: new cluster k is old cluster `order[k]`.
    pub fn permute(&mut self, order: &[usize]) {
        self.gating.permute(order);
        self.components.permute(order);
    }
}

/// E-step: fill `tau` (n×G) with responsibilities and return sum_i c_i log p(y_i).
///
/// When `gating_stats` is given and the gating network is a logit, it is filled with the
/// gating score and negative Hessian at the current coefficients, which the next gating
/// M-step needs: the pass computes π and τ anyway. Rows whose every cluster has
/// zero density give −∞; the caller treats a non-finite log-likelihood as a fault.
pub fn e_step(model: &Model, data: &FitData, tau: &mut [f64], gating_stats: Option<&mut GatingStats>) -> f64 {
    e_step_with(model, data, tau, gating_stats, None)
}

/// [`e_step`] that also fills the Gaussian M-step sums, when asked and the model has a
/// Gaussian block. The Gaussian block and the gating network go through the tiled row
/// pass of [`rows`]; items and counts add their log-densities first.
pub fn e_step_with(
    model: &Model,
    data: &FitData,
    tau: &mut [f64],
    gating_stats: Option<&mut GatingStats>,
    gaussian_stats: Option<&mut GaussianStats>,
) -> f64 {
    let c = &model.components;
    let has_base = c.items.is_some() || c.counts.is_some();
    if has_base {
        tau.fill(0.0);
        if let Some(b) = &c.items {
            b.add_log_density(data, tau);
        }
        if let Some(b) = &c.counts {
            b.add_log_density(data, tau);
        }
    }
    rows::e_step(
        *data,
        c.gaussian.as_ref(),
        &model.gating,
        has_base,
        Some(tau),
        gating_stats,
        gaussian_stats,
    )
}

/// The E-step's log-likelihood and M-step sums without the responsibilities, for a
/// model whose M-step runs from sums alone ([`Model::steps_from_sums`]): the pass then
/// writes nothing per row.
pub fn e_step_sums(
    model: &Model,
    data: &FitData,
    gating_stats: &mut GatingStats,
    gaussian_stats: &mut GaussianStats,
) -> f64 {
    assert!(
        model.steps_from_sums(),
        "this model's M-step needs the responsibilities"
    );
    rows::e_step(
        *data,
        model.components.gaussian.as_ref(),
        &model.gating,
        false,
        None,
        Some(gating_stats),
        Some(gaussian_stats),
    )
}

/// Log-likelihood alone (no responsibilities kept); uses `scratch` of length n×G.
pub fn log_likelihood(model: &Model, data: &FitData, scratch: &mut [f64]) -> f64 {
    e_step(model, data, scratch, None)
}
