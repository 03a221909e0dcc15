//! The fit cache: every finished fit is stored in the run folder under a key that hashes
//! everything that defines it, so a rerun refits only what changed and a run killed
//! part-way resumes where it stopped.
//!
//! Key: SHA-256 of the fit's canonical definition ([`FitSpec::key`]): the program version,
//! the data file's hash, the rows used and their weights, the column types, the
//! indicators and their families, the placement (name, covariates, `acts_on`,
//! proportions, method), the cluster count, the model options, the search settings, the
//! seed and the random streams. Entry: `cache/<key>.json`, whose first line is the SHA-256 of the
//! rest; an entry whose hash does not match (truncated, edited, corrupted) is refitted,
//! never trusted. An entry holds the best start's parameters and every start's record;
//! the posteriors are recomputed from the parameters by one E-step, which gives the same
//! bits as the fit (see `order_largest_first`).

use super::em::{EmRun, Termination};
use super::saved::SavedModel;
use super::{fit_data, initial_model, BestFit, FitResult, FitSpec, PreparedPlacement, StartRecord};
use crate::data::Dataset;
use crate::numerics::sha256_hex;
use serde::{Deserialize, Serialize};
use std::path::Path;

/// Folder of the cache inside a run folder.
pub const CACHE_DIR: &str = "cache";

/// What a cache entry holds.
#[derive(Debug, Serialize, Deserialize)]
struct Entry {
    key: String,
    n_params: usize,
    n_rows: usize,
    starts: Vec<StartRecord>,
    best: Option<CachedBest>,
}

#[derive(Debug, Serialize, Deserialize)]
struct CachedBest {
    start: usize,
    reaching: usize,
    model: SavedModel,
    loglik: f64,
    objective: f64,
    trace: Vec<f64>,
    iterations: usize,
    termination: Termination,
    gating_damped: usize,
    gating_fallbacks: usize,
    #[serde(default)]
    gating_failed: usize,
}

/// Store a finished fit (temporary name, then rename: never half a file).
pub fn store(folder: &Path, key: &str, result: &FitResult) -> std::io::Result<()> {
    let best = result.best.as_ref().map(|b| CachedBest {
        start: b.start,
        reaching: b.reaching,
        model: SavedModel::new(&b.run.model),
        loglik: b.run.loglik,
        objective: b.run.objective,
        trace: b.run.trace.clone(),
        iterations: b.run.iterations,
        termination: b.run.termination.clone(),
        gating_damped: b.run.gating_damped,
        gating_fallbacks: b.run.gating_fallbacks,
        gating_failed: b.run.gating_failed,
    });
    let entry = Entry {
        key: key.to_string(),
        n_params: result.n_params,
        n_rows: result.n_rows,
        starts: result.starts.clone(),
        best,
    };
    let payload = serde_json::to_string(&entry).map_err(std::io::Error::other)?;
    let dir = folder.join(CACHE_DIR);
    std::fs::create_dir_all(&dir)?;
    // A fresh temporary name, created exclusively (never through a planted link).
    let mut tmp = tempfile::Builder::new()
        .prefix(&format!(".{key}."))
        .suffix(".partial")
        .tempfile_in(&dir)?;
    std::io::Write::write_all(
        &mut tmp,
        format!("{}\n{payload}", sha256_hex(payload.as_bytes())).as_bytes(),
    )?;
    tmp.persist(dir.join(format!("{key}.json"))).map_err(|e| e.error)?;
    Ok(())
}

/// What looking up a fit found.
pub enum Lookup {
    /// No entry.
    Missing,
    /// An entry whose checksum or contents are wrong: refit it.
    Corrupt(String),
    /// The fit, as it was.
    Found(Box<FitResult>),
}

/// Look up the fit `spec` (whose placement is `prepared`) under `key`, its key.
pub fn load(folder: &Path, key: &str, spec: &FitSpec, data: &Dataset, prepared: &PreparedPlacement) -> Lookup {
    let path = folder.join(CACHE_DIR).join(format!("{key}.json"));
    let Ok(text) = std::fs::read_to_string(&path) else {
        return Lookup::Missing;
    };
    read(&path, &text, key, spec, data, prepared)
}

/// [`load`] from the text of an entry (`path` names it in messages).
pub fn read(
    path: &Path,
    text: &str,
    key: &str,
    spec: &FitSpec,
    data: &Dataset,
    prepared: &PreparedPlacement,
) -> Lookup {
    let Some((sum, payload)) = text.split_once('\n') else {
        return Lookup::Corrupt(format!("{} has no checksum line", path.display()));
    };
    if sha256_hex(payload.as_bytes()) != sum {
        return Lookup::Corrupt(format!("{} does not match its checksum", path.display()));
    }
    let entry: Entry = match serde_json::from_str(payload) {
        Ok(e) => e,
        Err(e) => return Lookup::Corrupt(format!("{} cannot be read: {e}", path.display())),
    };
    if entry.key != key {
        return Lookup::Corrupt(format!("{} holds another fit", path.display()));
    }
    match rebuild(entry, spec, data, prepared) {
        Ok(r) => Lookup::Found(Box::new(r)),
        Err(e) => Lookup::Corrupt(format!("{}: {e}", path.display())),
    }
}

/// Check what an entry says of its starts against the fit it is filed under: an entry is
/// untrusted input (it may have been edited and its checksum recomputed).
fn check_entry(entry: &Entry, spec: &FitSpec, data: &Dataset) -> Result<(), String> {
    let starts = spec.search.starts_for(spec.clusters);
    if entry.starts.len() != starts {
        return Err(format!(
            "it records {} starts where the fit has {starts}",
            entry.starts.len()
        ));
    }
    if entry.n_rows != data.n() {
        return Err(format!(
            "it was fitted to {} rows, the data have {}",
            entry.n_rows,
            data.n()
        ));
    }
    if let Some(c) = &entry.best {
        if c.start == 0 || c.start > starts || c.reaching == 0 || c.reaching > starts {
            return Err(format!(
                "its best start ({}) or the starts reaching it ({}) are not among its {starts} starts",
                c.start, c.reaching
            ));
        }
        if !c.loglik.is_finite() || !c.objective.is_finite() || c.trace.iter().any(|v| !v.is_finite()) {
            return Err("its log-likelihood is not a finite number".into());
        }
        if c.iterations > spec.search.em.max_iterations || c.trace.len() > c.iterations + 1 {
            return Err(format!(
                "it records {} iterations and {} trace values, above the cap of {}",
                c.iterations,
                c.trace.len(),
                spec.search.em.max_iterations
            ));
        }
    }
    Ok(())
}

/// The log-likelihood an entry records must be the one its parameters give (to rounding).
fn same_loglik(stored: f64, recomputed: f64) -> bool {
    (stored - recomputed).abs() <= 1e-8 * (1.0 + stored.abs())
}

fn rebuild(entry: Entry, spec: &FitSpec, data: &Dataset, prepared: &PreparedPlacement) -> Result<FitResult, String> {
    check_entry(&entry, spec, data)?;
    let (g, structure) = (spec.clusters, spec.structure());
    let fd = fit_data(data, prepared);
    let best = match entry.best {
        None => None,
        Some(c) => {
            let options = spec.options;
            let mut model = initial_model(&fd, &prepared.blocks, &prepared.placement, g, options);
            model.gating.prepare_bound(fd.w, fd.weights);
            c.model.gating.apply_to(&mut model.gating)?;
            model.components = c.model.components(&fd, &prepared.blocks, g, &options)?;
            if model.n_params() != entry.n_params {
                return Err(format!(
                    "it records {} parameters, its model has {}",
                    entry.n_params,
                    model.n_params()
                ));
            }
            let mut tau = vec![0.0; data.n() * g];
            let loglik = crate::model::e_step(&model, &fd, &mut tau, None);
            if !same_loglik(c.loglik, loglik) {
                return Err(format!(
                    "its parameters give the log-likelihood {loglik}, not the {} it records",
                    c.loglik
                ));
            }
            Some(BestFit {
                run: EmRun {
                    model,
                    tau,
                    loglik: c.loglik,
                    objective: c.objective,
                    trace: c.trace,
                    iterations: c.iterations,
                    termination: c.termination,
                    gating_damped: c.gating_damped,
                    gating_fallbacks: c.gating_fallbacks,
                    gating_failed: c.gating_failed,
                },
                start: c.start,
                reaching: c.reaching,
            })
        }
    };
    let step_three = super::step_three_of(prepared, best.as_ref(), g, &data.weights, spec.weight_type);
    Ok(FitResult {
        spec: spec.clone(),
        step_three,
        placement_index: spec.placement_index,
        placement: prepared.placement.name.clone(),
        clusters: g,
        structure,
        uses_structure: prepared.uses_structure(),
        n_params: entry.n_params,
        n_rows: entry.n_rows,
        sample_size: data.sample_size,
        starts: entry.starts,
        best,
    })
}
