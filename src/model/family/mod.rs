//! Component families: what the indicators look like inside a cluster.
//!
//! A family is three things, all in its own module:
//! - a [`Family`] (a static value): its [`FamilyInfo`] for the spec and data layers,
//!   checks of the data it is fitted to, and how it prepares its arrays for a placement;
//! - a [`Prepared`] block of data (per placement): the family's typed arrays, from which it
//!   makes empty blocks for EM and restores saved ones;
//! - a [`Block`] (per fit): the parameters over those arrays, with everything EM,
//!   inference, the comparison, simulation and saving ask of it.
//!
//! The EM driver owns the loop; a block only answers its questions. Code outside a
//! family never asks which family a block is. [`Families`] lists the families the program
//! offers: adding one is its module and one line there.
//!
//! ```
//! use cohortmix::model::family::Families;
//! let words: Vec<&str> = Families::standard().infos().iter().map(|f| f.word).collect();
//! assert_eq!(words, ["gaussian", "items", "counts"]);
//! ```

pub mod counts;
pub mod covariance;
pub mod gaussian;
pub mod items;

pub use counts::CountComponents;
pub use covariance::{CovarianceStructure, Orientation, Shape, Volume};
pub use gaussian::{CovariancePrior, GaussianComponents};
pub use items::ItemComponents;

use crate::data::{Dataset, Design, IndicatorSet, IndicatorValues};
use crate::error::Result;
use crate::model::gating::{Gating, GatingStats};
use crate::model::rows::{Base, GaussianStats};
use crate::model::{FitData, ModelOptions};
use crate::rng::Stream;
use crate::spec::{FamilyInfo, Placement, Study};
use std::any::Any;
use std::fmt::Debug;
use std::sync::Arc;

/// Why a cluster cannot be estimated any more; stops the start that hit it.
#[derive(Debug, Clone, PartialEq)]
pub struct Degeneracy {
    /// 1-based cluster.
    pub cluster: usize,
    /// Plain-words reason.
    pub reason: String,
}

/// What an estimated coefficient measures, when it is shown as an effect.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Measure {
    /// Its name ("odds ratio").
    pub name: &'static str,
    /// Whether the coefficient is a log ratio (shown exponentiated).
    pub ratio: bool,
}

/// The block a named parameter belongs to, written as its name (`gating`, `mean`,
/// `covariance`, `item_probability`, `item_logit`, `count_rate`, `count_log_rate`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ParamBlock {
    /// The name written in the outputs.
    pub name: &'static str,
    /// What its covariate coefficients measure (None: not an effect).
    pub measure: Option<Measure>,
}

impl ParamBlock {
    /// The gating network's coefficients: log relative risk ratios against cluster 1.
    pub const GATING: ParamBlock = ParamBlock {
        name: "gating",
        measure: Some(Measure {
            name: "relative risk ratio",
            ratio: true,
        }),
    };

    /// A block of parameters that are not covariate effects.
    pub const fn plain(name: &'static str) -> ParamBlock {
        ParamBlock { name, measure: None }
    }

    /// A block of regression coefficients whose covariate terms are effects.
    pub const fn effects(name: &'static str, measure: &'static str, ratio: bool) -> ParamBlock {
        ParamBlock {
            name,
            measure: Some(Measure { name: measure, ratio }),
        }
    }

    /// Whether these are the gating network's coefficients.
    pub fn is_gating(&self) -> bool {
        *self == ParamBlock::GATING
    }
}

impl schemars::JsonSchema for ParamBlock {
    fn schema_name() -> std::borrow::Cow<'static, str> {
        "ParamBlock".into()
    }

    fn json_schema(generator: &mut schemars::SchemaGenerator) -> schemars::Schema {
        String::json_schema(generator)
    }
}

impl serde::Serialize for ParamBlock {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        s.serialize_str(self.name)
    }
}

/// A named parameter value on the original scale of the data.
#[derive(Debug, Clone, PartialEq, serde::Serialize, schemars::JsonSchema)]
pub struct Parameter {
    /// The block it belongs to.
    pub block: ParamBlock,
    /// 1-based cluster.
    pub cluster: usize,
    /// Indicator (or indicator pair for a covariance), when the parameter has one.
    pub indicator: Option<String>,
    /// Design term (`intercept`, `age`, `sex=male`), when the parameter has one.
    pub term: Option<String>,
    /// Value.
    pub value: f64,
}

/// A numerical guard a block applied, or an inner step that failed, counted (a variance
/// floor raised an eigenvalue, a probability was held off 0, a Newton step of an M-step
/// failed): written with each fit so a reader can see it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Guard {
    /// Its name in `results.json` (one of the constants below for the guards results.json
    /// reports by name).
    pub name: &'static str,
    /// Times it acted in the fit.
    pub count: usize,
}

/// Guard: times the variance floor raised a covariance eigenvalue.
pub const VARIANCE_FLOOR_HITS: &str = "variance_floor_hits";
/// Guard: item cells with no posterior weight that smoothing held off 0.
pub const ITEM_CELLS_HELD_OFF_ZERO: &str = "item_cells_held_off_zero";
/// Guard: inner Newton steps of a block's M-step that failed.
pub const NEWTON_STEPS_FAILED: &str = "newton_steps_failed";

/// A component family: the static part, one value per family.
pub trait Family: Send + Sync {
    /// What the spec and data layers know of it.
    fn info(&self) -> &'static FamilyInfo;

    /// Checks of the data a study is fitted to (not of new rows to score): for example
    /// that a continuous indicator is not constant. Errors point at the spec.
    fn check(&self, _study: &Study, _set: &IndicatorSet) -> Result<()> {
        Ok(())
    }

    /// The family's arrays for one placement: its indicators from `set`, its designs from
    /// `designs`.
    fn prepare(&self, set: &IndicatorSet, data: &Dataset, designs: &BlockDesigns) -> Arc<dyn Prepared>;

    /// The groups of indicators a direct effect is tested on: each indicator alone, or
    /// all of them at once when they share one design (named "<adjective> indicators").
    fn effect_groups(&self, set: &IndicatorSet) -> Vec<(String, Vec<String>)> {
        match self.info().shared_design {
            Some(adjective) => vec![(format!("{adjective} indicators"), set.names.clone())],
            None => set.names.iter().map(|n| (n.clone(), vec![n.clone()])).collect(),
        }
    }
}

/// The designs a family builds its own from: the placement, and its whole component
/// design (every component covariate).
#[derive(Debug, Clone, Copy)]
pub struct BlockDesigns<'a> {
    /// The placement.
    pub placement: &'a Placement,
    /// The whole component design, intercept first.
    pub components: &'a Design,
}

impl BlockDesigns<'_> {
    /// Columns of the component design that act on `indicator` under the placement: the
    /// intercept and every term of a covariate that acts on it.
    pub fn terms_for(&self, indicator: &str) -> Vec<usize> {
        let design = self.components;
        (0..design.p())
            .filter(|a| {
                design.terms[*a]
                    .covariate
                    .as_ref()
                    .is_none_or(|c| self.placement.acts_on(c, indicator))
            })
            .collect()
    }

    /// The design of the covariates acting on `indicator`: those columns of the component
    /// design (the same values, shared when they are all of them).
    pub fn design_for(&self, indicator: &str) -> Design {
        self.components.select(&self.terms_for(indicator))
    }
}

/// A family's arrays for one placement, typed by the family: makes its blocks.
pub trait Prepared: Debug + Send + Sync {
    /// The family.
    fn info(&self) -> &'static FamilyInfo;

    /// An empty block for `g` clusters, which the first M-step fills (it keeps these
    /// arrays, shared).
    fn block(self: Arc<Self>, fd: &FitData, g: usize, options: &ModelOptions) -> Box<dyn Block>;

    /// A block restored from its saved state ([`Block::state`]).
    fn restore(
        self: Arc<Self>,
        fd: &FitData,
        g: usize,
        options: &ModelOptions,
        state: &serde_json::Value,
    ) -> std::result::Result<Box<dyn Block>, String>;

    /// Columns for seeding starts by distance (k-means++-type): numbers on which a
    /// Euclidean distance makes sense, one vector per column (seeding standardises them).
    fn seeding_columns(&self) -> Vec<Vec<f64>>;

    /// The indicators as one row-major matrix, when they are one already (seeding then
    /// reads them without a copy): (values, columns).
    fn seeding_rows(&self) -> Option<(&[f64], usize)> {
        None
    }

    /// Names of the profile values [`Block::profile`] gives.
    fn profile_columns(&self) -> Vec<String>;
}

/// The E-step pass a block computes fused with the gating network (the Gaussian block's
/// tiled kernel, [`crate::model::rows`]).
pub trait FusedPass {
    /// The pass: this block's log-densities (added to the others' in `tau` with
    /// [`Base::Written`]), the log cluster probabilities, the responsibilities (into `tau`
    /// when given) and the weighted log-likelihood; the gating sums and this block's
    /// M-step sums when asked.
    fn pass(
        &self,
        fd: &FitData,
        gating: &Gating,
        base: Base,
        tau: Option<&mut [f64]>,
        gating_stats: Option<&mut GatingStats>,
        sums: Option<&mut GaussianStats>,
    ) -> f64;

    /// Whether this block's M-step runs from the pass's sums alone (no responsibilities).
    fn steps_from_sums(&self) -> bool;
}

/// A block's local chart for inference: its free parameters as coordinates θ, 0 at the
/// fit, moved within the block's constraints (a covariance structure, probabilities
/// that sum to 1), so the coordinates number exactly its parameters.
pub trait BlockChart: Send + Sync {
    /// Number of coordinates ([`Block::n_params`]).
    fn len(&self) -> usize;
    /// Whether there is none.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// A natural step size per coordinate (a standard deviation for a mean coefficient,
    /// 1 on a log or logit scale).
    fn scales(&self) -> Vec<f64>;
    /// The block at θ (this block's part of θ).
    fn at(&self, theta: &[f64]) -> std::result::Result<Box<dyn Block>, Degeneracy>;
    /// A row scorer for `block`, the block at θ.
    fn scorer<'a>(&'a self, block: &'a dyn Block, theta: &'a [f64]) -> Box<dyn RowScorer + 'a>;
    /// When the model is this block alone: the total score at θ from one pass of sums,
    /// with the gating sums and log-likelihood of the same pass (None: add row scores).
    #[allow(clippy::type_complexity)]
    fn total_score(
        &self,
        _block: &dyn Block,
        _theta: &[f64],
        _fd: &FitData,
        _gating: &Gating,
    ) -> Option<(f64, GatingStats, Vec<f64>)> {
        None
    }
}

/// Adds one row's score to a block's part of the score vector.
pub trait RowScorer {
    /// Row `i` with case weight `c` and responsibilities `tau` (G entries): add the
    /// derivative of its complete-data log-density, weighted by its posterior, to `s`.
    fn add(&mut self, i: usize, c: f64, tau: &[f64], s: &mut [f64]);
}

/// Draws a block's indicators row by row (simulation, the bootstrap cluster-count test).
pub trait RowSampler {
    /// Row `i`'s indicators given cluster `k` (0-based).
    fn draw(&mut self, i: usize, k: usize, rng: &mut Stream);
    /// The drawn values, in the family's layout (values it does not draw, such as a
    /// missing item value, stay as observed).
    fn finish(self: Box<Self>) -> IndicatorValues;
}

/// What every block has by being a `Clone + 'static` type (given to each block by a
/// blanket implementation, so a family writes none of it).
pub trait BlockBase {
    /// This block as `Any`, for its own family's code.
    fn as_any(&self) -> &dyn Any;
    /// This block as `Any`, mutable.
    fn as_any_mut(&mut self) -> &mut dyn Any;
    /// A copy.
    fn clone_block(&self) -> Box<dyn Block>;
}

impl<T: Block + Clone + 'static> BlockBase for T {
    fn as_any(&self) -> &dyn Any {
        self
    }

    fn as_any_mut(&mut self) -> &mut dyn Any {
        self
    }

    fn clone_block(&self) -> Box<dyn Block> {
        Box::new(self.clone())
    }
}

/// What a block's profile values are: the scale on which their 95% intervals are made
/// (Wald intervals on the scale where the estimate is closest to normal, mapped back).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ProfileScale {
    /// Means of continuous indicators: estimate ± 1.96 SE.
    Mean,
    /// Probabilities: on the logit scale, so the interval stays inside (0, 1).
    Probability,
    /// Rates or mean counts: on the log scale, so the interval stays positive.
    Rate,
}

impl ProfileScale {
    /// The 95% interval of `value` with standard error `se` (None when the value sits on
    /// the edge of its range or the error is not finite).
    pub fn interval(self, value: f64, se: f64) -> Option<(f64, f64)> {
        const Z: f64 = 1.959963984540054;
        if !(se.is_finite() && value.is_finite()) {
            return None;
        }
        match self {
            ProfileScale::Mean => Some((value - Z * se, value + Z * se)),
            ProfileScale::Probability => {
                if !(value > 0.0 && value < 1.0) {
                    return None;
                }
                let (logit, spread) = ((value / (1.0 - value)).ln(), Z * se / (value * (1.0 - value)));
                let expit = |x: f64| 1.0 / (1.0 + (-x).exp());
                Some((expit(logit - spread), expit(logit + spread)))
            }
            ProfileScale::Rate => {
                if !(value > 0.0) {
                    return None;
                }
                let spread = (Z * se / value).exp();
                Some((value / spread, value * spread))
            }
        }
    }
}

/// One block of the component model: a family's parameters over its prepared arrays.
pub trait Block: BlockBase + Debug + Send + Sync {
    /// The family.
    fn info(&self) -> &'static FamilyInfo;

    /// Add log f_k(y_i | z_i) of this block's indicators to `out` (n×G, row-major).
    fn add_log_density(&self, out: &mut [f64]);
    /// The fused pass, when this block computes its log-density inside the E-step's
    /// tiled pass.
    fn fused(&self) -> Option<&dyn FusedPass> {
        None
    }
    /// Raise the expected complete-data log-likelihood given responsibilities `tau`
    /// (n×G) and case weights; `sums` are the fused pass's sums that produced `tau`.
    fn m_step(
        &mut self,
        fd: &FitData,
        tau: &[f64],
        sums: Option<&GaussianStats>,
    ) -> std::result::Result<(), Degeneracy>;
    /// Number of free parameters.
    fn n_params(&self) -> usize;
    /// Log-density of the parameters' prior, up to a constant (0 without a prior); EM
    /// maximises log-likelihood + log-prior.
    fn log_prior(&self) -> f64 {
        0.0
    }
    /// Relabel clusters: new cluster k is old cluster `order[k]`.
    fn permute(&mut self, order: &[usize]);
    /// The parameters as coordinates in which EM steps can be extrapolated
    /// ([`crate::fit::em`]): free of constraints, each on a scale near 1.
    fn push_coordinates(&self, out: &mut Vec<f64>);
    /// Set the parameters from coordinates laid out as [`Block::push_coordinates`] writes
    /// them; returns how many it read. Fails when they make a cluster degenerate.
    fn set_coordinates(&mut self, c: &[f64]) -> std::result::Result<usize, Degeneracy>;

    /// The local chart for standard errors, or why there is none (a boundary fit).
    fn chart(&self) -> std::result::Result<Box<dyn BlockChart + '_>, String>;

    /// Parameters with names, on the original scale.
    fn parameters(&self) -> Vec<Parameter>;
    /// Cluster k's profile values ([`Prepared::profile_columns`]) at row `row`'s covariates,
    /// or at the reference covariate values (`None`), into `out` (cleared first).
    fn profile(&self, k: usize, row: Option<usize>, out: &mut Vec<f64>);
    /// What its profile values are, which sets the scale their intervals are made on.
    fn profile_scale(&self) -> ProfileScale {
        ProfileScale::Mean
    }
    /// The numerical guards it applied.
    fn guards(&self) -> Vec<Guard> {
        Vec::new()
    }

    /// Why the fit looks spurious — a cluster that fits a few rows too closely rather than
    /// a group in the data — or None. `sizes[k]` is cluster k's weighted size and `fd` the
    /// data it was fitted to. A family without such a risk keeps the default.
    fn spurious(&self, _fd: &FitData, _sizes: &[f64]) -> Option<String> {
        None
    }

    /// A sampler of its indicators.
    fn sampler(&self) -> Box<dyn RowSampler + '_>;

    /// Its parameters and EM state, to save and to restore exactly
    /// ([`Prepared::restore`]).
    fn state(&self) -> serde_json::Value;

    /// Take the parameters of `smaller`, the same family's block over the same indicators
    /// with a subset of this block's design terms, and set every coefficient of a term
    /// `smaller` lacks to 0: the larger model at the smaller one's point (the score test
    /// of the direct-effect screen evaluates it there). Terms are matched by name. A family
    /// that cannot do this keeps the default, which says so.
    fn embed(&mut self, _smaller: &dyn Block) -> std::result::Result<(), String> {
        Err(format!(
            "the {} family cannot evaluate a larger model at a smaller one's point",
            self.info().word
        ))
    }
}

/// For each of `larger`'s term names, its position among `smaller`'s (None: a new term).
pub fn term_positions(larger: &[&str], smaller: &[&str]) -> Vec<Option<usize>> {
    larger.iter().map(|t| smaller.iter().position(|s| s == t)).collect()
}

impl Clone for Box<dyn Block> {
    fn clone(&self) -> Box<dyn Block> {
        self.clone_block()
    }
}

/// The families the program offers, in the order their blocks appear everywhere.
#[derive(Clone)]
pub struct Families {
    list: Vec<&'static dyn Family>,
}

impl std::fmt::Debug for Families {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_list().entries(self.list.iter().map(|x| x.info().word)).finish()
    }
}

impl Families {
    /// The families built in. A new family is one more line here.
    pub fn standard() -> Families {
        Families {
            list: vec![&gaussian::GAUSSIAN, &items::ITEMS, &counts::COUNTS],
        }
    }

    /// These families and one more, listed last.
    pub fn with(mut self, family: &'static dyn Family) -> Families {
        self.list.push(family);
        self
    }

    /// What the spec needs to know of them, in order.
    pub fn infos(&self) -> Vec<&'static FamilyInfo> {
        self.list.iter().map(|f| f.info()).collect()
    }

    /// The family of an indicator set.
    pub fn of(&self, set: &IndicatorSet) -> &'static dyn Family {
        self.get(set.family.word)
            .unwrap_or_else(|| panic!("the data's family '{}' is one the program offers", set.family.word))
    }

    /// The family with this word.
    pub fn get(&self, word: &str) -> Option<&'static dyn Family> {
        self.list.iter().copied().find(|f| f.info().word == word)
    }
}

/// The component model: blocks of indicators, independent given the cluster, one per
/// family present, in the order of [`Families`].
#[derive(Debug, Clone, Default)]
pub struct Components {
    /// The blocks.
    pub blocks: Vec<Box<dyn Block>>,
}

impl Components {
    /// Fill `out` (n×G) with the log-density of every block, summed.
    pub fn log_density(&self, out: &mut [f64]) {
        out.fill(0.0);
        for b in &self.blocks {
            b.add_log_density(out);
        }
    }

    /// The M-step of every block; the fused block uses `sums` (of the pass that produced
    /// `tau`) when given.
    pub fn m_step(
        &mut self,
        fd: &FitData,
        tau: &[f64],
        sums: Option<&GaussianStats>,
    ) -> std::result::Result<(), Degeneracy> {
        let at = self.fused_at();
        for (i, b) in self.blocks.iter_mut().enumerate() {
            let own = if Some(i) == at { sums } else { None };
            b.m_step(fd, tau, own)?;
        }
        Ok(())
    }

    /// The block whose fused pass the E-step runs: the first that offers one.
    pub fn fused_at(&self) -> Option<usize> {
        self.blocks.iter().position(|b| b.fused().is_some())
    }

    /// Free parameters.
    pub fn n_params(&self) -> usize {
        self.blocks.iter().map(|b| b.n_params()).sum()
    }

    /// Relabel clusters: new cluster k is old cluster `order[k]`.
    pub fn permute(&mut self, order: &[usize]) {
        for b in &mut self.blocks {
            b.permute(order);
        }
    }

    /// Log-prior of every block.
    pub fn log_prior(&self) -> f64 {
        self.blocks.iter().map(|b| b.log_prior()).sum()
    }

    /// Named parameters of every block.
    pub fn parameters(&self) -> Vec<Parameter> {
        self.blocks.iter().flat_map(|b| b.parameters()).collect()
    }

    /// Extrapolation coordinates of every block.
    pub fn push_coordinates(&self, out: &mut Vec<f64>) {
        for b in &self.blocks {
            b.push_coordinates(out);
        }
    }

    /// Set every block from its coordinates; returns how many were read.
    pub fn set_coordinates(&mut self, c: &[f64]) -> std::result::Result<usize, Degeneracy> {
        let mut read = 0;
        for b in &mut self.blocks {
            read += b.set_coordinates(&c[read..])?;
        }
        Ok(read)
    }

    /// The count of a named guard over the blocks (None when no block applies it).
    pub fn guard(&self, name: &str) -> Option<usize> {
        self.blocks
            .iter()
            .flat_map(|b| b.guards())
            .filter(|g| g.name == name)
            .map(|g| g.count)
            .reduce(|a, b| a + b)
    }

    /// The block of type `T`, for code that knows its family (tests, the family itself).
    pub fn find<T: Block + 'static>(&self) -> Option<&T> {
        self.blocks.iter().find_map(|b| b.as_any().downcast_ref::<T>())
    }

    /// The block of type `T`, mutable.
    pub fn find_mut<T: Block + 'static>(&mut self) -> Option<&mut T> {
        self.blocks.iter_mut().find_map(|b| b.as_any_mut().downcast_mut::<T>())
    }
}

/// The coefficients on the unit vector of a design with `q` columns: the intercept alone,
/// which on the fitting scale is the reference covariate values.
pub fn reference_row(q: usize) -> Vec<f64> {
    (0..q).map(|a| f64::from(u8::from(a == 0))).collect()
}

/// Coefficients on a subset of a design's columns, mapped to the original scale:
/// (term name, value) for each column of the subset.
pub fn subset_to_original(design: &Design, columns: &[usize], beta: &[f64]) -> Vec<(String, f64)> {
    let mut full = vec![0.0; design.p()];
    for (a, col) in columns.iter().enumerate() {
        full[*col] = beta[a];
    }
    let orig = design.to_original_scale(&full);
    columns
        .iter()
        .map(|col| (design.terms[*col].name.clone(), orig[*col]))
        .collect()
}

/// Check a saved array: `expected` values, every one finite; the error names it as `what`.
pub fn check_values(what: &str, values: &[f64], expected: usize) -> std::result::Result<(), String> {
    if values.len() != expected {
        return Err(format!(
            "its {what} hold {} values where {expected} are due",
            values.len()
        ));
    }
    if let Some(i) = values.iter().position(|v| !v.is_finite()) {
        return Err(format!(
            "its {what} hold a value that is not a finite number (at {})",
            i + 1
        ));
    }
    Ok(())
}

/// A block's saved state read back into its typed form, with a message that names the
/// family when it does not fit.
pub fn read_state<T: serde::de::DeserializeOwned>(
    word: &str,
    state: &serde_json::Value,
) -> std::result::Result<T, String> {
    T::deserialize(state).map_err(|e| format!("the saved '{word}' block cannot be read: {e}"))
}
