//! The fitted models a run folder keeps (`fitted-models.json`): each placement's
//! lowest-BIC fit with its parameters on the fitting scale, the design terms (with the
//! centres and scales of standardisation) and the levels seen, so that `predict` can give
//! memberships for new rows with exactly the arithmetic of the fit.

use crate::data::{Column, Dataset, Design, Term, MISSING_ITEM};
use crate::error::{Diagnostic, Error, Result};
use crate::fit::{fit_data, FitResult, PreparedPlacement};
use crate::model::family::{
    Components, CountComponents, CovarianceStructure, Degeneracy, GaussianComponents, ItemComponents,
};
use crate::model::gating::Gating;
use crate::model::{e_step, Model};
use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;

/// File name inside a run folder.
pub const FILE_NAME: &str = "fitted-models.json";

/// Version of the file's layout.
pub const SAVED_VERSION: u32 = 1;

/// Everything `predict` needs from a run.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SavedRun {
    /// Layout version.
    pub schema_version: u32,
    /// Program version that wrote it.
    pub program_version: String,
    /// The spec file as given when fitting (for messages).
    pub spec_file: String,
    /// The spec text (column types, indicators, placements).
    pub spec_text: String,
    /// SHA-256 of the data the models were fitted to.
    pub data_sha256: String,
    /// Levels of each categorical covariate in the fitted data.
    pub covariate_levels: BTreeMap<String, Vec<String>>,
    /// Levels of each item, by item name, in code order.
    pub item_levels: BTreeMap<String, Vec<String>>,
    /// The fits.
    pub fits: Vec<SavedFit>,
}

/// One fitted model.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SavedFit {
    /// Placement name.
    pub placement: String,
    /// Clusters.
    pub clusters: usize,
    /// Covariance structure in words.
    pub covariance: String,
    /// Gating design terms.
    pub gating_terms: Vec<Term>,
    /// All component design terms.
    pub component_terms: Vec<Term>,
    /// Terms acting on the continuous indicators.
    pub gaussian_terms: Vec<Term>,
    /// Parameters on the fitting scale.
    pub model: SavedModel,
}

/// Parameters of a model on the fitting scale.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SavedModel {
    /// Gating network.
    pub gating: SavedGating,
    /// Gaussian block.
    pub gaussian: Option<SavedGaussian>,
    /// Item block.
    pub items: Option<SavedItems>,
    /// Count block: per count, log-rate coefficients `[k q + a]`.
    pub counts: Option<Vec<Vec<f64>>>,
}

/// The gaussian block's parameters.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SavedGaussian {
    /// Covariance structure.
    pub structure: CovarianceStructure,
    /// Coefficients `[(k q + a) d + j]`.
    pub coefficients: Vec<f64>,
    /// Covariance per cluster, row-major.
    pub covariances: Vec<Vec<f64>>,
}

/// The item block's parameters.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SavedItems {
    /// Per item without covariates: log probabilities `[k L + l]` (else empty).
    pub log_probabilities: Vec<Vec<f64>>,
    /// Per item with covariates: logit coefficients `[(k (L − 1) + l − 1) q + a]` (else empty).
    pub logit_coefficients: Vec<Vec<f64>>,
    /// Smoothing pseudo-count.
    pub smoothing: f64,
}

/// The gating network's parameters.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SavedGating {
    /// Equal shares of g clusters.
    Equal(usize),
    /// Fixed log shares.
    Fixed(Vec<f64>),
    /// Estimated log shares.
    Free(Vec<f64>),
    /// Logit coefficients `gamma[k p + j]` of clusters 2..g.
    Logit(usize, usize, Vec<f64>),
}

impl SavedModel {
    /// From a fitted model.
    pub fn new(m: &Model) -> SavedModel {
        let gating = match &m.gating {
            Gating::Equal { g } => SavedGating::Equal(*g),
            Gating::Fixed { log_pi } => SavedGating::Fixed(log_pi.clone()),
            Gating::Free { log_pi } => SavedGating::Free(log_pi.clone()),
            Gating::Logit { g, p, gamma, .. } => SavedGating::Logit(*g, *p, gamma.clone()),
        };
        let c = &m.components;
        SavedModel {
            gating,
            gaussian: c.gaussian.as_ref().map(|gc| SavedGaussian {
                structure: gc.structure,
                coefficients: gc.coef.clone(),
                covariances: gc.cov.iter().map(|s| s.transpose().as_slice().to_vec()).collect(),
            }),
            items: c.items.as_ref().map(|it| SavedItems {
                log_probabilities: it.log_prob.clone(),
                logit_coefficients: it.coef.clone(),
                smoothing: it.smoothing,
            }),
            counts: c.counts.as_ref().map(|ct| ct.coef.clone()),
        }
    }

    /// The model, sized for `fd` (the data it will be evaluated on).
    pub fn to_model(&self, fd: &crate::model::FitData, g: usize) -> std::result::Result<Model, Degeneracy> {
        let gating = match &self.gating {
            SavedGating::Equal(g) => Gating::Equal { g: *g },
            SavedGating::Fixed(l) => Gating::Fixed { log_pi: l.clone() },
            SavedGating::Free(l) => Gating::Free { log_pi: l.clone() },
            SavedGating::Logit(g, p, gamma) => Gating::Logit {
                g: *g,
                p: *p,
                gamma: gamma.clone(),
                ridge: 0.0,
                bound_inverse: None,
            },
        };
        let gaussian = match &self.gaussian {
            Some(sg) => {
                let d = fd.d;
                let covs = sg
                    .covariances
                    .iter()
                    .map(|c| DMatrix::from_row_slice(d, d, c))
                    .collect();
                Some(GaussianComponents::new(fd, g, sg.structure).with_parameters(sg.coefficients.clone(), covs)?)
            }
            None => None,
        };
        let items = match (&self.items, fd.items) {
            (Some(si), Some(it)) => {
                let mut b = ItemComponents::new(fd, g, it.names.to_vec(), si.smoothing);
                b.log_prob = si.log_probabilities.clone();
                b.coef = si.logit_coefficients.clone();
                Some(b)
            }
            _ => None,
        };
        let counts = match (&self.counts, fd.counts) {
            (Some(coef), Some(ct)) => {
                let mut b = CountComponents::new(fd, g, ct.names.to_vec());
                b.coef = coef.clone();
                Some(b)
            }
            _ => None,
        };
        Ok(Model {
            gating,
            components: Components {
                gaussian,
                items,
                counts,
            },
        })
    }
}

/// The saved run of a study's fits: each placement's lowest-BIC fit (the fits
/// `memberships.csv` lists).
pub fn save(
    study: &crate::spec::Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[FitResult],
) -> SavedRun {
    let mut covariate_levels = BTreeMap::new();
    for (name, col) in &data.columns {
        if let Column::Categorical { levels, .. } = col {
            covariate_levels.insert(name.clone(), levels.clone());
        }
    }
    let item_levels = data.items.as_ref().map_or_else(BTreeMap::new, |b| {
        b.names.iter().cloned().zip(b.levels.iter().cloned()).collect()
    });
    let saved = crate::fit::chosen_fits(fits, prepared.len(), None)
        .into_iter()
        .flatten()
        .filter_map(|i| {
            let f = &fits[i];
            let best = f.best.as_ref()?;
            let pp = &prepared[f.placement_index];
            Some(SavedFit {
                placement: f.placement.clone(),
                clusters: f.clusters,
                covariance: f.covariance(),
                gating_terms: pp.gating.terms.clone(),
                component_terms: pp.components.terms.clone(),
                gaussian_terms: pp.gaussian.terms.clone(),
                model: SavedModel::new(&best.run.model),
            })
        })
        .collect();
    SavedRun {
        schema_version: SAVED_VERSION,
        program_version: env!("CARGO_PKG_VERSION").to_string(),
        spec_file: study.spec_path.display().to_string(),
        spec_text: study.spec_text.clone(),
        data_sha256: data.sha256.clone(),
        covariate_levels,
        item_levels,
        fits: saved,
    }
}

/// Memberships of new rows under one saved fit.
#[derive(Debug, Clone)]
pub struct Predicted {
    /// Placement.
    pub placement: String,
    /// Clusters.
    pub clusters: usize,
    /// Posterior membership probabilities, n×G row-major.
    pub tau: Vec<f64>,
}

/// Read a run folder's saved models.
pub fn load_run(run: &Path) -> Result<SavedRun> {
    let path = run.join(FILE_NAME);
    let text = std::fs::read_to_string(&path).map_err(|e| {
        Error::input(
            Diagnostic::new(format!("cannot read {}: {e}", path.display())).help(format!(
                "RUN must be a run folder written by `cohortmix fit` or `cohortmix compare` (it holds {FILE_NAME})"
            )),
        )
    })?;
    let saved: SavedRun = serde_json::from_str(&text).map_err(|e| {
        Error::input(
            Diagnostic::new(format!(
                "{} is not a saved-model file this version can read: {e}",
                path.display()
            ))
            .help("refit the study with this version of cohortmix"),
        )
    })?;
    if saved.schema_version != SAVED_VERSION {
        return Err(Error::input(
            Diagnostic::new(format!(
                "{} has layout version {}, this program reads version {SAVED_VERSION}",
                path.display(),
                saved.schema_version
            ))
            .help("refit the study with this version of cohortmix"),
        ));
    }
    Ok(saved)
}

/// Load new data with the saved spec's column checks (case weights are not needed and
/// not read) and map its item levels onto the fitted ones.
pub fn load_new_data(saved: &SavedRun, data_path: &Path) -> Result<(crate::spec::Study, Dataset)> {
    let mut study = crate::spec::parse(Path::new(&saved.spec_file), &saved.spec_text)?;
    if !data_path.exists() {
        return Err(Error::input(
            Diagnostic::new(format!("the data file {} does not exist", data_path.display()))
                .help("give the path of a CSV with the columns the study uses"),
        ));
    }
    study.data_path = data_path.to_path_buf();
    study.weights = None;
    let mut data = crate::data::load(&study).map_err(|e| {
        e.with_help(format!(
            "the new rows in {} are checked against the spec the models were fitted with ({})",
            data_path.display(),
            saved.spec_file
        ))
    })?;
    if let Some(items) = &mut data.items {
        let j_count = items.names.len();
        for (j, name) in items.names.iter().enumerate() {
            let Some(known) = saved.item_levels.get(name) else {
                continue;
            };
            let map: Vec<Option<u16>> = items.levels[j]
                .iter()
                .map(|l| known.iter().position(|k| k == l).map(|p| p as u16))
                .collect();
            for i in 0..data.ids.len() {
                let c = &mut items.codes[i * j_count + j];
                if *c == MISSING_ITEM {
                    continue;
                }
                *c = map[usize::from(*c)].ok_or_else(|| {
                    Error::input(
                        Diagnostic::new(format!(
                            "{}: item '{name}' has the value '{}' in row {}, which the fitted model never saw (its levels: {})",
                            data_path.display(),
                            items.levels[j][usize::from(*c)],
                            &data.ids[i],
                            known.join(", ")
                        ))
                        .help("recode the value to one of those levels, or leave it empty (a missing item value is skipped)"),
                    )
                })?;
            }
            items.levels[j] = known.clone();
        }
    }
    Ok((study, data))
}

/// Posterior memberships of `data`'s rows under every saved fit.
/// `study` is the saved spec as [`load_new_data`] returns it.
pub fn predict(saved: &SavedRun, study: &crate::spec::Study, data: &Dataset) -> Result<Vec<Predicted>> {
    saved
        .fits
        .iter()
        .map(|f| {
            let placement = study.placements.iter().find(|p| p.name == f.placement).ok_or_else(|| {
                Error::run(Diagnostic::new(format!(
                    "the saved spec has no placement '{}'",
                    f.placement
                )))
            })?;
            let design = |terms: &[Term]| {
                Design::from_terms(data, terms, &saved.covariate_levels).map_err(|e| {
                    Error::input(
                        Diagnostic::new(format!("{}: {}", data.path.display(), e.message))
                            .help("new rows must be coded as the fitted data were"),
                    )
                })
            };
            let pp = crate::fit::assemble(
                data,
                placement,
                design(&f.gating_terms)?,
                design(&f.component_terms)?,
                design(&f.gaussian_terms)?,
            );
            let fd = fit_data(data, &pp);
            let model = f.model.to_model(&fd, f.clusters).map_err(|e| {
                Error::run(Diagnostic::new(format!(
                    "the saved model of '{}' is not usable: cluster {}: {}",
                    f.placement, e.cluster, e.reason
                )))
            })?;
            let mut tau = vec![0.0; data.n() * f.clusters];
            e_step(&model, &fd, &mut tau, None);
            Ok(Predicted {
                placement: f.placement.clone(),
                clusters: f.clusters,
                tau,
            })
        })
        .collect()
}
