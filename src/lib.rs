//! cohortmix: mixture-of-experts cluster analysis for epidemiology.
//!
//! A study spec ([`spec`]) names a CSV ([`data`]), the indicators that define the
//! clusters, and covariate placements: covariates in the gating network change who
//! belongs to a cluster ([`model::gating`]); covariates in the component models change
//! what is measured inside it ([`model::family`], one module per component family).
//! [`fit`] runs EM with many starts over every placement and cluster count; [`inference`]
//! gives standard errors and effects; [`compare`] lines the placements' clusters up and
//! says what changes; [`pipeline`] does all of it in one call and returns output types that
//! [`render`] formats and [`runfolder`] writes; [`simulate`] makes data from a stated truth;
//! [`cli`] is the command line. Layers use only the layers below them (see DEVELOPERS.md).
//!
//! ```no_run
//! use cohortmix::model::family::Families;
//! use cohortmix::pipeline::{self, Cache, Mode, Quiet};
//! let loaded = pipeline::load(std::path::Path::new("configs/demo.toml"), &Families::standard()).unwrap();
//! let run = pipeline::run(&loaded, Mode::Compare, Cache::none(), &mut Quiet).unwrap();
//! print!("{}", cohortmix::render::json::results_json(&run.results));
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
