//! The fit cache: every finished fit is stored in the run folder under a key that hashes
//! everything that defines it, so a rerun refits only what changed and a run killed
//! part-way resumes where it stopped.
//!
//! Key: SHA-256 of the program version, the data file's hash, the rows used, the column
//! types, the indicators and their settings, the search settings, the seed, the
//! placement (name, covariates, `acts_on`, proportions, method), the cluster count and the
//! covariance structure. Entry: `cache/<key>.json`, whose first line is the SHA-256 of the
//! rest; an entry whose hash does not match (truncated, edited, corrupted) is refitted,
//! never trusted. An entry holds the best start's parameters and every start's record;
//! the posteriors are recomputed from the parameters by one E-step, which gives the same
//! bits as the fit (see `order_largest_first`).

use super::em::{EmRun, Termination};
use super::saved::SavedModel;
use super::{fit_data, initial_model, BestFit, Cell, FitResult, ModelOptions, PreparedPlacement, StartRecord};
use crate::data::Dataset;
use crate::model::family::CovarianceStructure;
use crate::numerics::sha256_hex;
use crate::spec::Study;
use serde::{Deserialize, Serialize};
use std::fmt::Write as _;
use std::path::Path;

/// Folder of the cache inside a run folder.
pub const CACHE_DIR: &str = "cache";

/// The key of one fit.
pub fn fit_key(
    study: &Study,
    data: &Dataset,
    prepared: &PreparedPlacement,
    g: usize,
    structure: CovarianceStructure,
) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "cohortmix {}", env!("CARGO_PKG_VERSION"));
    let _ = writeln!(s, "data {}", data.sha256);
    let _ = writeln!(s, "rows {}", sha256_hex(data.ids.joined().as_bytes()));
    let weights: Vec<u8> = data.weights.iter().flat_map(|w| w.to_le_bytes()).collect();
    let _ = writeln!(s, "weights {}", sha256_hex(&weights));
    for (name, (kind, _)) in &study.variables {
        let _ = writeln!(s, "variable {name} {kind:?}");
    }
    let names: Vec<&str> = study.indicators.iter().map(|c| c.name.as_str()).collect();
    let kinds: Vec<&str> = study.indicator_families.iter().map(|f| f.word).collect();
    let _ = writeln!(s, "indicators {:?} {:?} {:?}", names, kinds, study.family.word());
    let _ = writeln!(
        s,
        "exposure {:?} smoothing {:?} weights {:?}",
        study.exposure.as_ref().map(|c| &c.name),
        study.smoothing,
        study.weights.as_ref().map(|c| &c.name)
    );
    let q = &study.search;
    let _ = writeln!(
        s,
        "search starts {} iterations {} tolerance {:?} ridge {:?} prior {} floor {:?} seed {}",
        q.starts, q.max_iterations, q.tolerance, q.gating_ridge, q.covariance_prior, q.variance_floor, study.seed
    );
    if q.accelerate {
        // Keys of fits made without extrapolation, before it was offered, stay the same.
        let _ = writeln!(s, "extrapolated steps");
    }
    if q.two_stages() {
        // Only then do they change a fit, so that specs without them keep their keys.
        let _ = writeln!(s, "two stages warmup {} finish {}", q.warmup_iterations, q.finish_best);
    }
    let p = &prepared.placement;
    let cols = |v: &[crate::spec::ColumnRef]| v.iter().map(|c| c.name.clone()).collect::<Vec<_>>();
    let _ = writeln!(
        s,
        "placement {:?} gating {:?} components {:?} acts_on {:?} proportions {:?} method {:?}",
        p.name,
        cols(&p.gating),
        cols(&p.components),
        p.acts_on,
        p.proportions,
        p.method
    );
    let _ = writeln!(s, "clusters {g} structure {structure:?}");
    sha256_hex(s.as_bytes())
}

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
    let tmp = dir.join(format!("{key}.json.partial"));
    std::fs::write(&tmp, format!("{}\n{payload}", sha256_hex(payload.as_bytes())))?;
    std::fs::rename(&tmp, dir.join(format!("{key}.json")))
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

/// Look up the fit of grid cell `cell` (whose placement is `prepared`).
pub fn load(
    folder: &Path,
    key: &str,
    study: &Study,
    data: &Dataset,
    prepared: &PreparedPlacement,
    cell: Cell,
) -> Lookup {
    let path = folder.join(CACHE_DIR).join(format!("{key}.json"));
    let Ok(text) = std::fs::read_to_string(&path) else {
        return Lookup::Missing;
    };
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
    match rebuild(entry, study, data, prepared, cell) {
        Ok(r) => Lookup::Found(Box::new(r)),
        Err(e) => Lookup::Corrupt(format!("{}: {e}", path.display())),
    }
}

fn rebuild(
    entry: Entry,
    study: &Study,
    data: &Dataset,
    prepared: &PreparedPlacement,
    cell: Cell,
) -> Result<FitResult, String> {
    let (g, structure) = (cell.clusters, cell.structure);
    let fd = fit_data(data, prepared);
    let best = match entry.best {
        None => None,
        Some(c) => {
            let options = ModelOptions::for_study(study, structure);
            let mut model = initial_model(&fd, &prepared.blocks, &prepared.placement, g, options);
            model.gating.prepare_bound(fd.w, fd.weights);
            c.model.gating.apply_to(&mut model.gating)?;
            model.components = c.model.components(&fd, &prepared.blocks, g, &options)?;
            let mut tau = vec![0.0; data.n() * g];
            crate::model::e_step(&model, &fd, &mut tau, None);
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
                },
                start: c.start,
                reaching: c.reaching,
            })
        }
    };
    let step_three = super::step_three_of(prepared, best.as_ref(), g, &data.weights);
    Ok(FitResult {
        step_three,
        placement_index: cell.placement,
        placement: prepared.placement.name.clone(),
        clusters: g,
        structure,
        uses_structure: prepared.uses_structure(),
        n_params: entry.n_params,
        n_rows: entry.n_rows,
        starts: entry.starts,
        best,
    })
}
