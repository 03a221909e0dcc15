//! Component families: what the indicators look like inside a cluster.
//!
//! Every family implements [`ComponentFamily`]: log-densities of all rows under all
//! clusters into a buffer, an M-step from responsibilities, and a parameter count. The EM
//! driver owns the loop; a family only answers these questions. [`Components`] is the
//! closed set of families the program offers.

pub mod covariance;
mod gaussian;

pub use covariance::{CovarianceStructure, Orientation, Shape, Volume};
pub use gaussian::{CovariancePrior, GaussianComponents};

use crate::model::FitData;

/// Why a cluster cannot be estimated any more; stops the start that hit it.
#[derive(Debug, Clone, PartialEq)]
pub struct Degeneracy {
    /// 1-based cluster.
    pub cluster: usize,
    /// Plain-words reason.
    pub reason: String,
}

/// A named parameter value on the original scale of the data.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Parameter {
    /// `gating`, `mean` or `covariance`.
    pub block: &'static str,
    /// 1-based cluster.
    pub cluster: usize,
    /// Indicator (or indicator pair for a covariance), when the parameter has one.
    pub indicator: Option<String>,
    /// Design term (`intercept`, `age`, `sex=male`), when the parameter has one.
    pub term: Option<String>,
    /// Value.
    pub value: f64,
}

/// What the family needs to say for output: names of indicators and terms.
#[derive(Debug, Clone, Copy)]
pub struct Naming<'a> {
    /// Indicator names.
    pub indicators: &'a [String],
    /// Component design.
    pub design: &'a crate::data::Design,
}

/// The operations the EM driver needs from a component family.
pub trait ComponentFamily {
    /// Fill `out` (n×G, row-major) with log f_g(y_i | z_i).
    fn log_density(&self, data: &FitData, out: &mut [f64]);
    /// Maximise the expected complete-data log-likelihood given responsibilities (n×G).
    fn m_step(&mut self, data: &FitData, tau: &[f64]) -> Result<(), Degeneracy>;
    /// Number of free parameters.
    fn n_params(&self) -> usize;
    /// Log-density of the parameters' prior, up to a constant (0 without a prior); EM
    /// maximises log-likelihood + log-prior.
    fn log_prior(&self) -> f64 {
        0.0
    }
    /// Relabel clusters: new cluster k is old cluster `order[k]`.
    fn permute(&mut self, order: &[usize]);
    /// Parameters with names, on the original scale.
    fn parameters(&self, naming: Naming) -> Vec<Parameter>;
}

/// The families offered.
#[derive(Debug, Clone, PartialEq)]
pub enum Components {
    /// Multivariate normal regressions.
    Gaussian(GaussianComponents),
}

impl ComponentFamily for Components {
    fn log_density(&self, data: &FitData, out: &mut [f64]) {
        match self {
            Components::Gaussian(c) => c.log_density(data, out),
        }
    }
    fn m_step(&mut self, data: &FitData, tau: &[f64]) -> Result<(), Degeneracy> {
        match self {
            Components::Gaussian(c) => c.m_step(data, tau),
        }
    }
    fn n_params(&self) -> usize {
        match self {
            Components::Gaussian(c) => c.n_params(),
        }
    }
    fn permute(&mut self, order: &[usize]) {
        match self {
            Components::Gaussian(c) => c.permute(order),
        }
    }
    fn log_prior(&self) -> f64 {
        match self {
            Components::Gaussian(c) => c.log_prior(),
        }
    }
    fn parameters(&self, naming: Naming) -> Vec<Parameter> {
        match self {
            Components::Gaussian(c) => c.parameters(naming),
        }
    }
}
