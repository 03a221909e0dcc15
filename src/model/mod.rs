//! The mixture of experts: a gating network and component models, and the E-step.
//!
//! ```text
//! p(y_i | w_i, z_i) = sum_g pi_g(w_i) f_g(y_i | z_i; theta_g)
//! ```
//!
//! [`FitData`] borrows what every block shares (case weights, the gating design); each
//! block of [`Model::components`] holds its own arrays. [`e_step`] computes
//! responsibilities in log space with one maximum per row and returns the weighted
//! log-likelihood.

pub mod family;
pub mod gating;
pub mod glm;
pub mod rows;

use crate::numerics::newton::Outcome;
use family::{Components, Degeneracy};
use gating::{Gating, GatingStats};
pub use rows::{Base, GaussianStats, PassRows};

/// What every block of one fit shares. Row-major.
#[derive(Debug, Clone, Copy)]
pub struct FitData<'a> {
    /// Rows.
    pub n: usize,
    /// Case weights (length n).
    pub weights: &'a [f64],
    /// Gating design, n×p (intercept first).
    pub w: &'a [f64],
    /// Gating design columns.
    pub p: usize,
}

impl FitData<'_> {
    /// The pass over these rows without a fused block.
    pub fn pass_rows(&self) -> PassRows<'_> {
        PassRows {
            n: self.n,
            weights: self.weights,
            w: self.w,
            p: self.p,
            y: &[],
            d: 0,
            z: &[],
            q: 0,
        }
    }
}

/// How a fit's blocks are set up besides the placement and cluster count (each family
/// reads its own).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct ModelOptions {
    /// Covariance structure of the Gaussian components.
    pub structure: crate::spec::CovarianceStructure,
    /// Ridge penalty on gating slopes.
    pub gating_ridge: f64,
    /// Conjugate prior on covariances.
    pub covariance_prior: bool,
    /// Variance floor relative to the smallest indicator variance (0 = off).
    pub variance_floor: f64,
    /// Pseudo-count per item and cluster (0 = none).
    pub smoothing: f64,
}

impl ModelOptions {
    /// Options of a study's fits for one structure.
    pub fn for_study(study: &crate::spec::Study, structure: crate::spec::CovarianceStructure) -> ModelOptions {
        ModelOptions {
            structure,
            gating_ridge: study.search.gating_ridge,
            covariance_prior: study.search.covariance_prior,
            variance_floor: study.search.variance_floor,
            smoothing: study.smoothing,
        }
    }
}

/// Which gating step an M-step takes when the E-step's gating sums are at hand.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GatingUpdate {
    /// A Newton step without line search (EM checks the objective and falls back).
    Newton,
    /// Böhning's bound step, which never lowers the gating objective.
    Bound,
}

/// Parameters of one mixture of experts.
#[derive(Debug, Clone)]
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
    /// `stats` are the gating sums and `sums` the fused block's sums of the E-step that
    /// produced `tau` (see [`e_step_with`]); without the latter the fused block sums from
    /// `tau`. With `stats` a logit gating network takes the step `update` says (after a
    /// failed Newton step, the bound step); without them it takes a Newton step with
    /// step-halving, computed from `tau` directly.
    pub fn m_step(
        &mut self,
        data: &FitData,
        tau: &[f64],
        stats: Option<&GatingStats>,
        sums: Option<&GaussianStats>,
        update: GatingUpdate,
    ) -> Result<gating::GatingStep, Degeneracy> {
        self.components.m_step(data, tau, sums)?;
        let has_bound = matches!(
            self.gating,
            Gating::Logit {
                bound_inverse: Some(_),
                ..
            }
        );
        let one = |damped| gating::GatingStep {
            iterations: 1,
            outcome: Outcome::IterationCap,
            damped,
        };
        match stats {
            Some(st) if has_bound && update == GatingUpdate::Bound => {
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
                    outcome: Outcome::Converged,
                    damped: 0,
                })
            }
            _ => Ok(self.gating.m_step(data.w, tau, data.weights)),
        }
    }

    /// Whether [`Model::m_step`] needs only the E-step's sums, not the responsibilities:
    /// one block whose M-step runs from its fused pass's sums, and a gating network
    /// without parameters, with free shares, or a logit with its bound prepared.
    pub fn steps_from_sums(&self) -> bool {
        let gating = match &self.gating {
            Gating::Equal { .. } | Gating::Fixed { .. } | Gating::Free { .. } => true,
            Gating::Logit { bound_inverse, .. } => bound_inverse.is_some(),
        };
        let blocks = &self.components.blocks;
        gating && blocks.len() == 1 && blocks[0].fused().is_some_and(|f| f.steps_from_sums())
    }

    /// The parameters as one vector of coordinates in which EM steps can be extrapolated:
    /// gating first, then the component blocks ([`family::Block::push_coordinates`]).
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

/// [`e_step`] that also fills the fused block's M-step sums, when asked and the model
/// has a fused block (the first block that offers a fused pass; any later one adds its
/// log-density like the others). The other blocks add their log-densities first (in
/// block order); the tiled row pass of [`rows`] adds the fused block's and the gating
/// network's.
pub fn e_step_with(
    model: &Model,
    data: &FitData,
    tau: &mut [f64],
    gating_stats: Option<&mut GatingStats>,
    sums: Option<&mut GaussianStats>,
) -> f64 {
    let blocks = &model.components.blocks;
    let at = model.components.fused_at();
    let fused = at.and_then(|i| blocks[i].fused());
    let mut base = Base::Empty;
    for (_, b) in blocks.iter().enumerate().filter(|(i, _)| Some(*i) != at) {
        if base == Base::Empty {
            tau.fill(0.0);
            base = Base::Written;
        }
        b.add_log_density(tau);
    }
    match fused {
        Some(f) => f.pass(data, &model.gating, base, Some(tau), gating_stats, sums),
        None => rows::e_step(
            data.pass_rows(),
            None,
            &model.gating,
            base,
            Some(tau),
            gating_stats,
            None,
        ),
    }
}

/// The E-step's log-likelihood and M-step sums without the responsibilities, for a
/// model whose M-step runs from sums alone ([`Model::steps_from_sums`]): the pass then
/// writes nothing per row.
pub fn e_step_sums(model: &Model, data: &FitData, gating_stats: &mut GatingStats, sums: &mut GaussianStats) -> f64 {
    assert!(
        model.steps_from_sums(),
        "this model's M-step needs the responsibilities"
    );
    let fused = model.components.blocks[0]
        .fused()
        .expect("a model stepping from sums has a fused block");
    fused.pass(data, &model.gating, Base::Empty, None, Some(gating_stats), Some(sums))
}

/// Rows of a row-major design `z` (n×qz) restricted to the columns `cols`, row-major.
pub fn design_rows(z: &[f64], qz: usize, cols: &[usize]) -> Vec<f64> {
    z.chunks_exact(qz)
        .flat_map(|row| cols.iter().map(|a| row[*a]))
        .collect()
}
