//! Fitting: the search grid over placements × cluster counts, many starts per fit.
//!
//! [`prepare`] builds the design matrices and block arrays of every placement once
//! (errors point at the placement in the spec). [`plan`] lists the grid's fits as values
//! ([`FitSpec`]); [`fit_cell`] runs all starts of one in parallel, each with its own
//! random stream, and keeps the best usable start; a start that degenerates is recorded
//! with its reason and skipped. [`fit_grid`] does every fit; [`fit_grid_cached`] looks each
//! up in the run's cache first.

pub mod cache;
mod cell;
mod definition;
pub mod em;
mod grid;
mod prepare;
pub mod saved;
pub mod starts;
pub mod three_step;

pub use cell::{fit_cell, BestFit, StartRecord};
pub use definition::{fit_spec, plan, DataIdentity, FitSpec, PlacementSpec, StartSettings, TwoStages};
pub use grid::{cells_in_parallel, fit_grid, fit_grid_cached, CacheUse};
pub use prepare::{assemble, check_rows, fit_data, initial_model, prepare, prepare_placement, PreparedPlacement};

use crate::model::family::CovarianceStructure;
use crate::model::gating::Gating;
use crate::model::Model;
pub use crate::model::ModelOptions;
use em::Termination;

/// Two starts' log-likelihoods within this absolute distance count as the same optimum
/// (or within [`SAME_OPTIMUM`] of their size, for very many rows). At the default search
/// tolerance (1e-10 relative) starts on one optimum of the demo study end within 2e-4 of
/// each other, and distinct optima can lie 0.1 apart.
pub const SAME_OPTIMUM_ABSOLUTE: f64 = 0.01;
/// Relative counterpart of [`SAME_OPTIMUM_ABSOLUTE`].
pub const SAME_OPTIMUM: f64 = 1e-9;
/// The best start of every fit is run on until the relative change of its objective is at
/// most this: the fit that criteria, standard errors, step 3, the screen and the
/// cluster-count test use is at its optimum, not where the search tolerance stopped it.
pub const POLISH_TOLERANCE: f64 = 1e-12;

/// Whether two starts' objectives are one optimum (see [`SAME_OPTIMUM_ABSOLUTE`]).
pub fn same_optimum(a: f64, b: f64) -> bool {
    (a - b).abs() <= SAME_OPTIMUM_ABSOLUTE.max(SAME_OPTIMUM * a.abs().max(b.abs()))
}

/// One cell of the grid: a placement at one cluster count.
#[derive(Debug, Clone)]
pub struct FitResult {
    /// What defines the fit.
    pub spec: FitSpec,
    /// Index of the placement in the spec.
    pub placement_index: usize,
    /// Placement name.
    pub placement: String,
    /// Cluster count.
    pub clusters: usize,
    /// Covariance structure of the Gaussian components.
    pub structure: CovarianceStructure,
    /// Whether a block uses the structure (else it means nothing).
    pub uses_structure: bool,
    /// Free parameters.
    pub n_params: usize,
    /// Rows used.
    pub n_rows: usize,
    /// The n of BIC: the sum of frequency weights, else the rows used.
    pub sample_size: f64,
    /// Every start.
    pub starts: Vec<StartRecord>,
    /// The best usable start, if any.
    pub best: Option<BestFit>,
    /// Three-step placements: the step-3 gating effects, or why they failed.
    pub step_three: Option<std::result::Result<three_step::StepThree, String>>,
}

/// The words for a fit's covariance structure, or that there is none.
pub fn covariance_label(structure: &CovarianceStructure, uses_structure: bool) -> String {
    if uses_structure {
        structure.describe()
    } else {
        NO_COVARIANCE.to_string()
    }
}

/// The covariance label of fits without continuous indicators.
pub const NO_COVARIANCE: &str = "no continuous indicators";

impl FitResult {
    /// The covariance structure in words, or that there is none.
    pub fn covariance(&self) -> String {
        covariance_label(&self.structure, self.uses_structure)
    }

    /// How the fit ended: the best start's termination, or why every start failed.
    pub fn termination(&self) -> Termination {
        match &self.best {
            Some(b) => b.run.termination.clone(),
            None => {
                let reason = self
                    .starts
                    .iter()
                    .find_map(|s| s.termination.reason().map(str::to_string))
                    .unwrap_or_else(|| "no start finished".to_string());
                Termination::Degenerate(format!("every start failed; first reason: {reason}"))
            }
        }
    }

    /// Starts that ran to their end: all of them unless the two-stage search set some
    /// aside after the warm-up.
    pub fn finished_starts(&self) -> usize {
        self.starts
            .iter()
            .filter(|s| s.termination != Termination::SetAside)
            .count()
    }

    /// Log-likelihood of the best start.
    pub fn loglik(&self) -> Option<f64> {
        self.best.as_ref().map(|b| b.run.loglik)
    }

    /// BIC = −2 loglik + k ln n (smaller is better; Schwarz 1978), n the sample size.
    pub fn bic(&self) -> Option<f64> {
        self.loglik()
            .map(|l| -2.0 * l + self.n_params as f64 * self.sample_size.ln())
    }

    /// Sample-size-adjusted BIC = −2 loglik + k ln((n + 2) / 24) (Sclove 1987).
    pub fn sabic(&self) -> Option<f64> {
        self.loglik()
            .map(|l| -2.0 * l + self.n_params as f64 * ((self.sample_size + 2.0) / 24.0).ln())
    }

    /// AIC = −2 loglik + 2k (smaller is better).
    pub fn aic(&self) -> Option<f64> {
        self.loglik().map(|l| -2.0 * l + 2.0 * self.n_params as f64)
    }

    /// The gating network whose effects are reported: the step-3 logit of a three-step
    /// placement, else the fitted one.
    pub fn reported_gating(&self) -> Option<Gating> {
        let best = self.best.as_ref()?;
        match &self.step_three {
            Some(Ok(st)) => Some(Gating::Logit {
                g: self.clusters,
                p: st.gamma.len() / (self.clusters - 1),
                gamma: st.gamma.clone(),
                ridge: 0.0,
                bound_inverse: None,
            }),
            _ => Some(best.run.model.gating.clone()),
        }
    }

    /// The fitted model with the reported gating network (see [`Self::reported_gating`]).
    pub fn reported_model(&self) -> Option<Model> {
        let mut m = self.best.as_ref()?.run.model.clone();
        m.gating = self.reported_gating()?;
        Some(m)
    }

    /// Cluster shares of the best fit (weighted posterior sums over the weight total).
    pub fn shares(&self, weights: &[f64]) -> Option<Vec<f64>> {
        let b = self.best.as_ref()?;
        Some(cluster_shares(&b.run.tau, weights, self.clusters))
    }
}

/// Weighted posterior shares per cluster.
pub fn cluster_shares(tau: &[f64], weights: &[f64], g: usize) -> Vec<f64> {
    let mut sums = vec![0.0; g];
    for (row, c) in tau.chunks_exact(g).zip(weights) {
        for (s, t) in sums.iter_mut().zip(row) {
            *s += c * t;
        }
    }
    let total: f64 = sums.iter().sum();
    sums.iter().map(|s| s / total).collect()
}

/// Index into `fits` of the chosen fit of each placement: its lowest BIC, at the cluster
/// count `fixed` when one is given.
pub fn chosen_fits(fits: &[FitResult], placements: usize, fixed: Option<usize>) -> Vec<Option<usize>> {
    (0..placements)
        .map(|p| {
            fits.iter()
                .enumerate()
                .filter(|(_, f)| f.placement_index == p && fixed.is_none_or(|g| f.clusters == g))
                .filter_map(|(i, f)| f.bic().map(|b| (i, b)))
                .min_by(|a, b| a.1.total_cmp(&b.1))
                .map(|(i, _)| i)
        })
        .collect()
}

/// Step 3 of a three-step placement's fit (None for other placements and one cluster).
pub fn step_three_of(
    prepared: &PreparedPlacement,
    best: Option<&BestFit>,
    g: usize,
    weights: &[f64],
    weight_type: Option<crate::spec::WeightType>,
) -> Option<std::result::Result<three_step::StepThree, String>> {
    match (&prepared.step_three, best) {
        (Some(design), Some(b)) if g > 1 => Some(three_step::estimate(
            prepared.placement.method,
            &b.run.tau,
            &three_step::log_shares(&b.run.model),
            g,
            weights,
            weight_type,
            design,
        )),
        _ => None,
    }
}
