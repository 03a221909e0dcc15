//! The fitted models a run folder keeps (`fitted-models.json`): the fit a run reports for
//! each placement, with its clusters' numbers in the run's files, its parameters on the fitting scale, the design terms (with the
//! centres and scales of standardisation) and the levels seen, so that `predict` can give
//! memberships for new rows with exactly the arithmetic of the fit.

use crate::data::{Column, Dataset, Design, IndicatorValues, Term, MISSING_ITEM};
use crate::error::{Diagnostic, Error, Result};
use crate::fit::{fit_data, FitResult, PreparedPlacement};
use crate::model::family::{check_values, Components, Families, Prepared};
use crate::model::gating::Gating;
use crate::model::{e_step, FitData, Model, ModelOptions};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;
use std::sync::Arc;

/// File name inside a run folder.
pub const FILE_NAME: &str = "fitted-models.json";

/// Version of the file's layout (2: each block saved by its family, under its word;
/// 3: each fit's cluster numbers).
pub const SAVED_VERSION: u32 = 4;

/// Everything `predict` needs from a run.
#[derive(Debug, Clone, Serialize, Deserialize, schemars::JsonSchema)]
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
    /// The file it was read from (for messages; not written).
    #[serde(skip)]
    pub path: std::path::PathBuf,
}

/// One fitted model.
#[derive(Debug, Clone, Serialize, Deserialize, schemars::JsonSchema)]
pub struct SavedFit {
    /// Placement name.
    pub placement: String,
    /// Clusters.
    pub clusters: usize,
    /// The number each fitted cluster carries in the run's files (fitted cluster k,
    /// 1-based, is `cluster_numbers[k - 1]`); `predict` writes these.
    pub cluster_numbers: Vec<usize>,
    /// Covariance structure in words.
    pub covariance: String,
    /// Gating design terms.
    pub gating_terms: Vec<Term>,
    /// All component design terms (each block uses the columns acting on its indicators).
    pub component_terms: Vec<Term>,
    /// Parameters on the fitting scale.
    pub model: SavedModel,
}

/// Parameters of a model on the fitting scale.
#[derive(Debug, Clone, Serialize, Deserialize, schemars::JsonSchema)]
pub struct SavedModel {
    /// Gating network.
    pub gating: SavedGating,
    /// The component blocks, in block order.
    pub blocks: Vec<SavedBlock>,
}

/// One component block: its family's word and the state the family saved
/// ([`crate::model::family::Block::state`]).
#[derive(Debug, Clone, Serialize, Deserialize, schemars::JsonSchema)]
pub struct SavedBlock {
    /// The family (`gaussian`, `items`, `counts`).
    pub family: String,
    /// Its parameters and EM state, as the family writes them.
    pub state: serde_json::Value,
}

/// The gating network's parameters.
#[derive(Debug, Clone, Serialize, Deserialize, schemars::JsonSchema)]
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

impl SavedGating {
    /// From a fitted gating network.
    pub fn new(gating: &Gating) -> SavedGating {
        match gating {
            Gating::Equal { g } => SavedGating::Equal(*g),
            Gating::Fixed { log_pi } => SavedGating::Fixed(log_pi.clone()),
            Gating::Free { log_pi } => SavedGating::Free(log_pi.clone()),
            Gating::Logit { g, p, gamma, .. } => SavedGating::Logit(*g, *p, gamma.clone()),
        }
    }

    /// Check the parameters for a network of `g` clusters over `p` design columns: the
    /// right kind of sizes, finite values, and shares that sum to 1.
    pub fn check(&self, g: usize, p: usize) -> std::result::Result<(), String> {
        let shares = |what: &str, log_pi: &[f64]| {
            check_values(what, log_pi, g)?;
            let total: f64 = log_pi.iter().map(|l| l.exp()).sum();
            if (total - 1.0).abs() > 1e-6 {
                return Err(format!("its cluster shares sum to {total}, not 1"));
            }
            Ok(())
        };
        match self {
            SavedGating::Equal(k) if *k == g => Ok(()),
            SavedGating::Fixed(l) => shares("fixed shares", l),
            SavedGating::Free(l) => shares("shares", l),
            SavedGating::Logit(k, q, gamma) if *k == g && *q == p => {
                check_values("gating coefficients", gamma, (g - 1) * p)?;
                // On the standardised scale a fit never comes near this (a log relative
                // risk of 1e8 per standard deviation); a value beyond it was written by hand.
                if gamma.iter().any(|c| c.abs() > 1e8) {
                    return Err("its gating coefficients are beyond any fit (above 1e8 in size)".into());
                }
                Ok(())
            }
            SavedGating::Logit(k, q, _) => Err(format!(
                "its gating network has {k} clusters over {q} design columns, where the fit has {g} over {p}"
            )),
            SavedGating::Equal(k) => Err(format!("its gating network has {k} clusters, the fit {g}")),
        }
    }

    /// Set the parameters of `gating`, a network of the same kind and size (its ridge and
    /// prepared bound stay as they are).
    pub fn apply_to(&self, gating: &mut Gating) -> std::result::Result<(), String> {
        let (g, p) = match gating {
            Gating::Equal { g } => (*g, 0),
            Gating::Fixed { log_pi } | Gating::Free { log_pi } => (log_pi.len(), 0),
            Gating::Logit { g, p, .. } => (*g, *p),
        };
        self.check(g, p)?;
        match (gating, self) {
            (Gating::Logit { gamma, .. }, SavedGating::Logit(_, _, s)) if gamma.len() == s.len() => *gamma = s.clone(),
            (Gating::Free { log_pi }, SavedGating::Free(s)) if log_pi.len() == s.len() => *log_pi = s.clone(),
            (Gating::Equal { .. }, SavedGating::Equal(_)) | (Gating::Fixed { .. }, SavedGating::Fixed(_)) => {}
            _ => return Err("its gating network does not fit the placement".into()),
        }
        Ok(())
    }

    /// The gating network itself (no ridge, no bound: for scoring).
    pub fn gating(&self) -> Gating {
        match self {
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
        }
    }
}

impl SavedModel {
    /// From a fitted model.
    pub fn new(m: &Model) -> SavedModel {
        SavedModel {
            gating: SavedGating::new(&m.gating),
            blocks: m
                .components
                .blocks
                .iter()
                .map(|b| SavedBlock {
                    family: b.info().word.to_string(),
                    state: b.state(),
                })
                .collect(),
        }
    }

    /// The component blocks restored over `prepared` (each family restores its own
    /// saved block, in block order).
    pub fn components(
        &self,
        fd: &FitData,
        prepared: &[Arc<dyn Prepared>],
        g: usize,
        options: &ModelOptions,
    ) -> std::result::Result<Components, String> {
        if self.blocks.len() != prepared.len() {
            return Err(format!(
                "it has {} component blocks, the study {}",
                self.blocks.len(),
                prepared.len()
            ));
        }
        let blocks = self
            .blocks
            .iter()
            .zip(prepared)
            .map(|(saved, p)| {
                if saved.family != p.info().word {
                    return Err(format!(
                        "its block of the '{}' family stands where the study has the '{}' family",
                        saved.family,
                        p.info().word
                    ));
                }
                Arc::clone(p).restore(fd, g, options, &saved.state)
            })
            .collect::<std::result::Result<Vec<_>, String>>()?;
        Ok(Components { blocks })
    }

    /// The model over `prepared`, for scoring rows.
    pub fn to_model(
        &self,
        fd: &FitData,
        prepared: &[Arc<dyn Prepared>],
        g: usize,
        options: &ModelOptions,
    ) -> std::result::Result<Model, String> {
        self.gating.check(g, fd.p)?;
        Ok(Model {
            gating: self.gating.gating(),
            components: self.components(fd, prepared, g, options)?,
        })
    }
}

/// The saved run of a study's fits: the `reported` fits (the fits `memberships.csv` lists),
/// with `numbers[fit]`, the number of each fitted cluster in the run's files.
pub fn save(
    study: &crate::spec::Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[FitResult],
    reported: &[usize],
    numbers: &[Vec<usize>],
) -> SavedRun {
    let mut covariate_levels = BTreeMap::new();
    for (name, col) in &data.columns {
        if let Column::Categorical { levels, .. } = col {
            covariate_levels.insert(name.clone(), levels.clone());
        }
    }
    let mut item_levels = BTreeMap::new();
    for set in &data.indicator_sets {
        if let IndicatorValues::Levels { levels, .. } = &set.values {
            item_levels.extend(set.names.iter().cloned().zip(levels.iter().cloned()));
        }
    }
    let saved = reported
        .iter()
        .filter_map(|&i| {
            let f = &fits[i];
            let best = f.best.as_ref()?;
            let pp = &prepared[f.placement_index];
            Some(SavedFit {
                placement: f.placement.clone(),
                clusters: f.clusters,
                cluster_numbers: numbers[i].clone(),
                covariance: f.covariance(),
                gating_terms: pp.gating.terms.clone(),
                component_terms: pp.components.terms.clone(),
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
        path: std::path::PathBuf::from(FILE_NAME),
    }
}

/// Memberships of new rows under one saved fit.
#[derive(Debug, Clone)]
pub struct Predicted {
    /// Placement.
    pub placement: String,
    /// Clusters.
    pub clusters: usize,
    /// The number of each fitted cluster in the run's files.
    pub numbers: Vec<usize>,
    /// Posterior membership probabilities, n×G row-major, in fitted order.
    pub tau: Vec<f64>,
}

/// The largest saved-model file read (a run's is a few hundred kilobytes; a larger one is
/// not one cohortmix wrote).
pub const MAX_SAVED_BYTES: u64 = 256 << 20;

impl SavedRun {
    /// Check what the file says beyond its layout: cluster counts and numbers, design
    /// terms and levels. (Each fit's parameters are checked when its model is built.)
    pub fn check(&self) -> std::result::Result<(), String> {
        let mut seen = std::collections::BTreeSet::new();
        for f in &self.fits {
            let at = format!("the fit of '{}' with {} clusters", f.placement, f.clusters);
            if f.clusters == 0 || f.clusters > crate::spec::MAX_CLUSTERS {
                return Err(format!(
                    "{at}: a cluster count must be 1 to {}",
                    crate::spec::MAX_CLUSTERS
                ));
            }
            if !seen.insert(&f.placement) {
                return Err(format!("the placement '{}' has two fits", f.placement));
            }
            let mut numbers = f.cluster_numbers.clone();
            numbers.sort_unstable();
            numbers.dedup();
            if f.cluster_numbers.len() != f.clusters
                || numbers.len() != f.clusters
                || numbers
                    .iter()
                    .any(|n| *n == 0 || *n > 2 * crate::spec::MAX_CLUSTERS * crate::spec::MAX_PLACEMENTS)
            {
                return Err(format!(
                    "{at}: its cluster numbers {:?} are not one distinct number per cluster",
                    f.cluster_numbers
                ));
            }
            for t in f.gating_terms.iter().chain(&f.component_terms) {
                if !t.center.is_finite() || !t.scale.is_finite() || t.scale == 0.0 {
                    return Err(format!(
                        "{at}: the term '{}' has a centre or scale that is not a usable number",
                        t.name
                    ));
                }
            }
            if f.gating_terms.first().is_none_or(|t| t.covariate.is_some())
                || f.component_terms.first().is_none_or(|t| t.covariate.is_some())
            {
                return Err(format!("{at}: its designs do not start with the intercept"));
            }
        }
        for (name, levels) in self.covariate_levels.iter().chain(&self.item_levels) {
            let distinct: std::collections::BTreeSet<&String> = levels.iter().collect();
            if levels.is_empty() || distinct.len() != levels.len() || levels.len() > usize::from(MISSING_ITEM) {
                return Err(format!("the levels of '{name}' are empty, repeated or too many"));
            }
        }
        Ok(())
    }
}

/// Read a run folder's saved models, checking them as untrusted input.
pub fn load_run(run: &Path) -> Result<SavedRun> {
    let path = run.join(FILE_NAME);
    let damaged = |e: String| {
        Error::input(Diagnostic::new(format!("{} is damaged: {e}", path.display())).help(
            "it was changed or cut short since cohortmix wrote it; refit the study (cohortmix fit) to write it again",
        ))
    };
    if let Ok(meta) = std::fs::metadata(&path) {
        if !meta.is_file() {
            return Err(damaged("it is not a regular file".into()));
        }
        if meta.len() > MAX_SAVED_BYTES {
            return Err(damaged(format!(
                "it holds {} bytes, more than the {} MiB a saved-model file can hold",
                meta.len(),
                MAX_SAVED_BYTES >> 20
            )));
        }
    }
    let text = std::fs::read_to_string(&path).map_err(|e| {
        Error::input(
            Diagnostic::new(format!("cannot read {}: {e}", path.display())).help(format!(
                "RUN must be a run folder written by `cohortmix fit` or `cohortmix compare` (it holds {FILE_NAME})"
            )),
        )
    })?;
    read_saved(&path, &text)
}

/// Read the text of a saved-model file (`path` names it in messages), checking it as
/// untrusted input.
pub fn read_saved(path: &Path, text: &str) -> Result<SavedRun> {
    let damaged = |e: String| {
        Error::input(Diagnostic::new(format!("{} is damaged: {e}", path.display())).help(
            "it was changed or cut short since cohortmix wrote it; refit the study (cohortmix fit) to write it again",
        ))
    };
    let unreadable = |e: String| {
        Error::input(
            Diagnostic::new(format!(
                "{} is not a saved-model file this version can read: {e}",
                path.display()
            ))
            .help("refit the study with this version of cohortmix"),
        )
    };
    let value: serde_json::Value = serde_json::from_str(text).map_err(|e| unreadable(e.to_string()))?;
    let version = value.get("schema_version").and_then(serde_json::Value::as_u64);
    if version != Some(u64::from(SAVED_VERSION)) {
        return Err(Error::input(
            Diagnostic::new(format!(
                "{} has layout version {}, this program reads version {SAVED_VERSION}",
                path.display(),
                version.map_or_else(|| "(none)".to_string(), |v| v.to_string())
            ))
            .help("refit the study with this version of cohortmix"),
        ));
    }
    let saved: SavedRun = serde_json::from_value(value).map_err(|e| unreadable(e.to_string()))?;
    saved.check().map_err(damaged)?;
    Ok(SavedRun {
        path: path.to_path_buf(),
        ..saved
    })
}

/// Load new data with the saved spec's column checks (case weights are not needed and
/// not read) and map its item levels onto the fitted ones.
pub fn load_new_data(saved: &SavedRun, data_path: &Path, families: &Families) -> Result<(crate::spec::Study, Dataset)> {
    if !data_path.exists() {
        return Err(Error::input(
            Diagnostic::new(format!("the data file {} does not exist", data_path.display()))
                .help("give the path of a CSV with the columns the study uses"),
        ));
    }
    new_data_with(saved, data_path, families, |study| {
        crate::data::load_for(study, crate::data::Purpose::Score)
    })
}

/// [`load_new_data`] from the text of the new data (`data_path` names it in messages).
pub fn new_data_from_text(
    saved: &SavedRun,
    data_path: &Path,
    text: &str,
    families: &Families,
) -> Result<(crate::spec::Study, Dataset)> {
    new_data_with(saved, data_path, families, |study| {
        crate::data::from_text_for(study, text, crate::data::Purpose::Score)
    })
}

fn new_data_with(
    saved: &SavedRun,
    data_path: &Path,
    families: &Families,
    read: impl FnOnce(&crate::spec::Study) -> Result<Dataset>,
) -> Result<(crate::spec::Study, Dataset)> {
    let mut study = crate::spec::parse(Path::new(&saved.spec_file), &saved.spec_text, &families.infos())?;
    study.data_path = data_path.to_path_buf();
    study.weights = None;
    study.weight_type = None;
    study.strata = None;
    study.psu = None;
    let mut data = read(&study).map_err(|e| {
        e.with_help(format!(
            "the new rows in {} are checked against the spec the models were fitted with ({})",
            data_path.display(),
            saved.spec_file
        ))
    })?;
    let ids = data.ids.clone();
    for set in &mut data.indicator_sets {
        if let IndicatorValues::Levels { codes, levels, .. } = &mut set.values {
            let codes = Arc::make_mut(codes);
            for (j, name) in set.names.iter().enumerate() {
                let Some(known) = saved.item_levels.get(name) else {
                    continue;
                };
                map_levels(data_path, name, &ids, codes, set.names.len(), j, &mut levels[j], known)?;
            }
        }
    }
    Ok((study, data))
}

/// Recode item `j` (of `width`) of new rows from their levels to the fitted ones
/// (`known`); a level the fitted model never saw is an error naming the row.
#[allow(clippy::too_many_arguments)]
fn map_levels(
    data_path: &Path,
    name: &str,
    ids: &crate::data::RowIds,
    codes: &mut [u16],
    width: usize,
    j: usize,
    levels: &mut Vec<String>,
    known: &[String],
) -> Result<()> {
    let map: Vec<Option<u16>> = levels
        .iter()
        .map(|l| known.iter().position(|k| k == l).map(|p| p as u16))
        .collect();
    for i in 0..ids.len() {
        let c = &mut codes[i * width + j];
        if *c == MISSING_ITEM {
            continue;
        }
        *c = map[usize::from(*c)].ok_or_else(|| {
            Error::input(
                Diagnostic::new(format!(
                    "{}: item '{name}' has the value '{}' in row {}, which the fitted model never saw (its levels: {})",
                    data_path.display(),
                    levels[usize::from(*c)],
                    &ids[i],
                    known.join(", ")
                ))
                .help("recode the value to one of those levels, or leave it empty (a missing item value is skipped)"),
            )
        })?;
    }
    *levels = known.to_vec();
    Ok(())
}

/// Posterior memberships of `data`'s rows under every saved fit.
/// `study` is the saved spec as [`load_new_data`] returns it.
pub fn predict(
    saved: &SavedRun,
    study: &crate::spec::Study,
    data: &Dataset,
    families: &Families,
) -> Result<Vec<Predicted>> {
    let saved_path = &saved.path;
    saved
        .fits
        .iter()
        .map(|f| {
            let placement = study.placements.iter().find(|p| p.name == f.placement).ok_or_else(|| {
                Error::input(
                    Diagnostic::new(format!(
                        "{} is damaged: it holds a model of the placement '{}', which its spec does not list",
                        saved_path.display(),
                        f.placement
                    ))
                    .help("it was changed since cohortmix wrote it; refit the study (cohortmix fit) to write it again"),
                )
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
                families,
            );
            let fd = fit_data(data, &pp);
            // Scoring needs no prior (it is used in fitting only) and no structure (the
            // saved block names its own).
            let options = ModelOptions {
                covariance_prior: false,
                ..ModelOptions::for_study(study, study.search.structures[0])
            };
            let model = f.model.to_model(&fd, &pp.blocks, f.clusters, &options).map_err(|e| {
                Error::input(
                    Diagnostic::new(format!(
                        "the saved model of '{}' in {} is damaged: {e}",
                        f.placement,
                        saved_path.display()
                    ))
                    .help("it was changed since cohortmix wrote it; refit the study (cohortmix fit) to write it again"),
                )
            })?;
            let mut tau = vec![0.0; data.n() * f.clusters];
            e_step(&model, &fd, &mut tau, None);
            if let Some(i) = tau
                .chunks_exact(f.clusters)
                .position(|row| row.iter().any(|t| !t.is_finite()))
            {
                return Err(Error::input(
                    Diagnostic::new(format!(
                        "{}: row '{}' gets no finite membership probabilities under the model of '{}'",
                        data.path.display(),
                        &data.ids[i],
                        f.placement
                    ))
                    .help("its values lie too far from the fitted data's to be scored; check them and their units"),
                ));
            }
            Ok(Predicted {
                placement: f.placement.clone(),
                clusters: f.clusters,
                numbers: f.cluster_numbers.clone(),
                tau,
            })
        })
        .collect()
}
