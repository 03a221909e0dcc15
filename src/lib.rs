//! cohortmix: mixture-of-experts cluster analysis for epidemiology.
//!
//! A study spec ([`spec`]) names a CSV ([`data`]), the indicators that define the
//! clusters, and covariate placements: covariates in the gating network change who
//! belongs to a cluster ([`model::gating`]); covariates in the component models change
//! what is measured inside it ([`model::family`]). [`fit`] runs EM with many starts over
//! every placement and cluster count; [`report`] writes the run folder; [`simulate`] makes
//! data from a stated truth. [`cli`] is the command line.
//!
//! ```no_run
//! let families = cohortmix::model::family::Families::standard();
//! let study = cohortmix::spec::load(std::path::Path::new("configs/demo.toml"), &families.infos()).unwrap();
//! let data = cohortmix::data::load(&study).unwrap();
//! let prepared = cohortmix::fit::prepare(&study, &data, &families).unwrap();
//! let fits = cohortmix::fit::fit_grid(&study, &data, &prepared, |_, _, _| {});
//! println!("{} fits", fits.len());
//! ```
#![deny(missing_docs)]
// `!(x > 0.0)` is written on purpose: unlike `x <= 0.0` it is also true for NaN.
#![allow(clippy::neg_cmp_op_on_partial_ord)]

pub mod cli;
pub mod compare;
pub mod data;
pub mod error;
pub mod fit;
pub mod inference;
pub mod model;
pub mod numerics;
pub mod pipeline;
pub mod render;
pub mod rng;
pub mod runfolder;
pub mod simulate;
pub mod spec;

pub use error::{Error, Result};
