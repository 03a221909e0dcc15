//! A fit as a value: [`FitSpec`] holds everything that defines one fit of the grid (the
//! data's identity, the columns and their coding, the families, the placement, the
//! cluster count, the model options, the search settings, the seed and the random
//! streams). Fitting reads only it and the arrays it names; the cache key is the hash of
//! its canonical serialisation, so nothing that changes a fit can be left out of the key.

use super::em::EmSettings;
use crate::data::Dataset;
use crate::model::ModelOptions;
use crate::numerics::sha256_hex;
use crate::spec::{CovarianceStructure, Method, Proportions, Study, VariableType};
use serde::Serialize;
use std::collections::BTreeMap;

/// What identifies the rows a fit was made on.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DataIdentity {
    /// SHA-256 of the data file.
    pub file_sha256: String,
    /// SHA-256 of the kept rows' ids, in order.
    pub rows_sha256: String,
    /// SHA-256 of the case weights' bytes.
    pub weights_sha256: String,
}

impl DataIdentity {
    /// The identity of a dataset (hashes every id and weight once).
    pub fn of(data: &Dataset) -> DataIdentity {
        let weights: Vec<u8> = data.weights.iter().flat_map(|w| w.to_le_bytes()).collect();
        DataIdentity {
            file_sha256: data.sha256.clone(),
            rows_sha256: sha256_hex(data.ids.joined().as_bytes()),
            weights_sha256: sha256_hex(&weights),
        }
    }
}

/// A placement as it defines a fit: names only, no spans.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlacementSpec {
    /// Name.
    pub name: String,
    /// Gating covariates.
    pub gating: Vec<String>,
    /// Component covariates.
    pub components: Vec<String>,
    /// Component covariates restricted to some indicators.
    pub acts_on: BTreeMap<String, Vec<String>>,
    /// Proportions model.
    pub proportions: Proportions,
    /// How gating effects are estimated.
    pub method: Method,
}

/// How the starts of a fit are run.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct StartSettings {
    /// Starts (one-cluster fits need one).
    pub starts: usize,
    /// EM settings of every start.
    pub em: EmSettings,
    /// The two-stage search, when the spec asks for one (absent otherwise, so that its
    /// settings, which then change nothing, do not change the key).
    pub two_stages: Option<TwoStages>,
    /// Whether spurious starts are set apart (see [`crate::spec::Search::spurious_guard`]).
    pub spurious_guard: bool,
    /// Tolerance the best start is polished to ([`super::POLISH_TOLERANCE`]).
    pub polish_tolerance: f64,
}

/// A two-stage search: every start runs a warm-up, the best few run on.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct TwoStages {
    /// Iterations of the warm-up.
    pub warmup_iterations: usize,
    /// Starts run to their end after it.
    pub finish_best: usize,
}

impl StartSettings {
    /// Starts actually run for `g` clusters.
    pub fn starts_for(&self, g: usize) -> usize {
        if g == 1 {
            1
        } else {
            self.starts
        }
    }

    /// The two-stage search of a fit of `g` clusters, when it sets starts aside.
    pub fn stages_for(&self, g: usize) -> Option<TwoStages> {
        self.two_stages.filter(|t| {
            crate::spec::two_stages(
                self.starts_for(g),
                t.finish_best,
                t.warmup_iterations,
                self.em.max_iterations,
            )
        })
    }
}

/// Everything that defines one fit.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FitSpec {
    /// Program version (a new version refits).
    pub program: &'static str,
    /// The rows.
    pub data: DataIdentity,
    /// Declared column types and codings, by name.
    pub columns: BTreeMap<String, VariableType>,
    /// Each indicator and its family, in spec order.
    pub indicators: Vec<(String, &'static str)>,
    /// The spec's family word.
    pub family: &'static str,
    /// Case-weight column.
    pub weights: Option<String>,
    /// What the weights mean.
    pub weight_type: Option<crate::spec::WeightType>,
    /// Exposure column.
    pub exposure: Option<String>,
    /// The placement.
    pub placement: PlacementSpec,
    /// Index of the placement in the spec (not part of the key: reordering placements
    /// keeps their fits).
    #[serde(skip)]
    pub placement_index: usize,
    /// Cluster count.
    pub clusters: usize,
    /// Model options (covariance structure, penalties, smoothing).
    pub options: ModelOptions,
    /// How the starts are run.
    pub search: StartSettings,
    /// Master seed.
    pub seed: u64,
    /// Prefix of the starts' random-stream names (`start`, or a bootstrap's own).
    pub streams: String,
}

impl FitSpec {
    /// The covariance structure.
    pub fn structure(&self) -> CovarianceStructure {
        self.options.structure
    }

    /// The cache key: SHA-256 of the canonical serialisation (fields in declaration
    /// order, floats in their shortest exact form).
    pub fn key(&self) -> String {
        sha256_hex(serde_json::to_string(self).expect("a fit spec encodes").as_bytes())
    }

    /// The same fit at `g` clusters with starts on streams named `streams`.
    pub fn with(&self, g: usize, streams: &str) -> FitSpec {
        FitSpec {
            clusters: g,
            streams: streams.to_string(),
            ..self.clone()
        }
    }

    /// Label of start `start`'s (1-based) random stream.
    pub fn stream_label(&self, start: usize) -> String {
        format!(
            "{}|{}|{}|{}|{start}",
            self.streams,
            self.placement.name,
            self.clusters,
            self.structure().describe()
        )
    }
}

/// Every fit of a study's grid: placements in spec order, then cluster counts ascending,
/// then covariance structures in the spec's order.
pub fn plan(study: &Study, data: &Dataset) -> Vec<FitSpec> {
    let identity = DataIdentity::of(data);
    let mut out = Vec::new();
    for (i, p) in study.placements.iter().enumerate() {
        for &g in &p.clusters {
            for &structure in &study.search.structures {
                out.push(fit_spec(study, &identity, i, g, structure));
            }
        }
    }
    out
}

/// One fit of a study.
pub fn fit_spec(
    study: &Study,
    identity: &DataIdentity,
    placement_index: usize,
    g: usize,
    structure: CovarianceStructure,
) -> FitSpec {
    let p = &study.placements[placement_index];
    let names = |v: &[crate::spec::ColumnRef]| v.iter().map(|c| c.name.clone()).collect();
    let search = &study.search;
    FitSpec {
        program: env!("CARGO_PKG_VERSION"),
        data: identity.clone(),
        columns: study
            .variables
            .iter()
            .map(|(k, (t, _))| (k.clone(), t.clone()))
            .collect(),
        indicators: study
            .indicators
            .iter()
            .zip(&study.indicator_families)
            .map(|(c, f)| (c.name.clone(), f.word))
            .collect(),
        family: study.family.word(),
        weights: study.weights.as_ref().map(|c| c.name.clone()),
        weight_type: study.weight_type,
        exposure: study.exposure.as_ref().map(|c| c.name.clone()),
        placement: PlacementSpec {
            name: p.name.clone(),
            gating: names(&p.gating),
            components: names(&p.components),
            acts_on: p.acts_on.clone(),
            proportions: p.proportions.clone(),
            method: p.method,
        },
        placement_index,
        clusters: g,
        options: ModelOptions::for_study(study, structure),
        search: StartSettings {
            starts: search.starts,
            em: EmSettings::for_search(search),
            two_stages: search.two_stages().then_some(TwoStages {
                warmup_iterations: search.warmup_iterations,
                finish_best: search.finish_best,
            }),
            spurious_guard: search.spurious_guard,
            polish_tolerance: super::POLISH_TOLERANCE,
        },
        seed: study.seed,
        streams: "start".to_string(),
    }
}
