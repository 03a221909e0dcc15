//! Component families: what the indicators look like inside a cluster.
//!
//! Every family implements [`ComponentFamily`]: log-densities of all rows under all
//! clusters into a buffer, an M-step from responsibilities, and a parameter count. The EM
//! driver owns the loop; a family only answers these questions. [`Components`] is the
//! closed set of families the program offers.

pub mod counts;
pub mod covariance;
mod gaussian;
pub mod items;

pub use counts::CountComponents;
pub use covariance::{CovarianceStructure, Orientation, Shape, Volume};
pub use gaussian::{CovariancePrior, GaussianComponents};
pub use items::ItemComponents;

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
    /// `gating`, `mean`, `covariance`, `item_probability`, `item_logit`, `count_rate` or
    /// `count_log_rate`.
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

/// What the families need to say for output: names of indicators, levels and terms.
#[derive(Debug, Clone, Copy)]
pub struct Naming<'a> {
    /// Continuous (gaussian) indicator names.
    pub indicators: &'a [String],
    /// Design of the gaussian block.
    pub design: &'a crate::data::Design,
    /// The placement's whole component design (items and counts pick columns of it).
    pub components: &'a crate::data::Design,
    /// Level names of each item.
    pub item_levels: &'a [Vec<String>],
}

/// The operations the EM driver needs from a component family.
pub trait ComponentFamily {
    /// Add log f_g(y_i | z_i) of this family's indicators to `out` (n×G, row-major).
    fn add_log_density(&self, data: &FitData, out: &mut [f64]);
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
    /// The parameters as coordinates in which EM steps can be extrapolated
    /// ([`crate::fit::em`]): free of constraints, each on a scale near 1.
    fn push_coordinates(&self, out: &mut Vec<f64>);
    /// Set the parameters from coordinates laid out as [`ComponentFamily::push_coordinates`]
    /// writes them; returns how many it read. Fails when they make a cluster degenerate.
    fn set_coordinates(&mut self, c: &[f64]) -> Result<usize, Degeneracy>;
}

/// The component model: blocks of indicators, independent given the cluster. The
/// gaussian, items and counts families have one block; the mixed family has several.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Components {
    /// Continuous indicators: multivariate normal regressions.
    pub gaussian: Option<GaussianComponents>,
    /// Binary and categorical items.
    pub items: Option<ItemComponents>,
    /// Counts: Poisson regressions.
    pub counts: Option<CountComponents>,
}

impl Components {
    /// Fill `out` (n×G) with the log-density of every block, summed.
    pub fn log_density(&self, data: &FitData, out: &mut [f64]) {
        out.fill(0.0);
        self.add_log_density(data, out);
    }

    /// The blocks present, as trait objects.
    fn blocks(&self) -> Vec<&dyn ComponentFamily> {
        let mut v: Vec<&dyn ComponentFamily> = Vec::new();
        if let Some(b) = &self.gaussian {
            v.push(b);
        }
        if let Some(b) = &self.items {
            v.push(b);
        }
        if let Some(b) = &self.counts {
            v.push(b);
        }
        v
    }

    fn blocks_mut(&mut self) -> Vec<&mut dyn ComponentFamily> {
        let mut v: Vec<&mut dyn ComponentFamily> = Vec::new();
        if let Some(b) = &mut self.gaussian {
            v.push(b);
        }
        if let Some(b) = &mut self.items {
            v.push(b);
        }
        if let Some(b) = &mut self.counts {
            v.push(b);
        }
        v
    }

    /// The M-step of every block; the Gaussian block uses `gaussian` (sums of the E-step
    /// that produced `tau`) when given.
    pub fn m_step_with(
        &mut self,
        data: &FitData,
        tau: &[f64],
        gaussian: Option<&crate::model::GaussianStats>,
    ) -> Result<(), Degeneracy> {
        match (&mut self.gaussian, gaussian) {
            (Some(b), Some(st)) => b.m_step_from_stats(st)?,
            (Some(b), None) => b.m_step(data, tau)?,
            (None, _) => {}
        }
        if let Some(b) = &mut self.items {
            b.m_step(data, tau)?;
        }
        if let Some(b) = &mut self.counts {
            b.m_step(data, tau)?;
        }
        Ok(())
    }

    /// Times the variance floor acted (0 without a gaussian block).
    pub fn floor_hits(&self) -> usize {
        self.gaussian.as_ref().map_or(0, |c| c.floor_hits)
    }
}

impl ComponentFamily for Components {
    fn add_log_density(&self, data: &FitData, out: &mut [f64]) {
        for b in self.blocks() {
            b.add_log_density(data, out);
        }
    }
    fn m_step(&mut self, data: &FitData, tau: &[f64]) -> Result<(), Degeneracy> {
        self.m_step_with(data, tau, None)
    }
    fn n_params(&self) -> usize {
        self.blocks().iter().map(|b| b.n_params()).sum()
    }
    fn permute(&mut self, order: &[usize]) {
        for b in self.blocks_mut() {
            b.permute(order);
        }
    }
    fn log_prior(&self) -> f64 {
        self.blocks().iter().map(|b| b.log_prior()).sum()
    }
    fn parameters(&self, naming: Naming) -> Vec<Parameter> {
        self.blocks().iter().flat_map(|b| b.parameters(naming)).collect()
    }
    fn push_coordinates(&self, out: &mut Vec<f64>) {
        for b in self.blocks() {
            b.push_coordinates(out);
        }
    }
    fn set_coordinates(&mut self, c: &[f64]) -> Result<usize, Degeneracy> {
        let mut read = 0;
        for b in self.blocks_mut() {
            read += b.set_coordinates(&c[read..])?;
        }
        Ok(read)
    }
}
