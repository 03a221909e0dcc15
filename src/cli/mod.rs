//! The command line: `check`, `fit`, `simulate`. Only this module prints or exits.
//!
//! Exit status: 0 success, 2 bad spec, data or usage, 1 any other failure.

use crate::error::{Diagnostic, Error, Result};
use crate::fit::{self, FitResult};
use crate::model::family::Families;
use crate::pipeline::{self, Cache, Loaded, Mode, Observer, Stage};
use crate::render;
use crate::runfolder::{write_file, Manifest, OpenOptions, RunFolder};
use crate::spec::Study;
use clap::{Parser, Subcommand};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Instant;

const EXAMPLES: &str = "\
Examples:
  cohortmix check configs/demo.toml       validate the spec against its data, show the plan
  cohortmix fit configs/demo.toml         fit every placement and cluster count
  cohortmix compare configs/demo.toml     fit, then compare placements: report.html
  cohortmix predict runs/demo demo-data/respiratory.csv
                                          memberships of rows under the fitted models
  cohortmix simulate demo-data/respiratory-truth.toml --out my-cohort.csv
                                          write data drawn from a stated truth

Exit status: 0 success, 2 bad spec, data or command line, 1 other failure.";

/// Mixture-of-experts cluster analysis with covariates in the gating network, the
/// component models, or both.
#[derive(Debug, Parser)]
#[command(name = "cohortmix", version, about, long_about = None, after_help = EXAMPLES)]
pub struct Cli {
    /// Worker threads (default: all cores). Results do not depend on it.
    #[arg(long, global = true, value_name = "N")]
    pub threads: Option<usize>,
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// Subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Validate a study spec against its data and print the plan: models to fit, rows used
    /// and excluded.
    #[command(after_help = "Example:\n  cohortmix check configs/demo.toml")]
    Check {
        /// The study spec (TOML).
        spec: PathBuf,
    },
    /// Fit every placement × cluster count of a study spec and write the run folder.
    #[command(after_help = "Example:\n  cohortmix fit configs/demo.toml --out runs/demo\n\n\
The run folder gets results.json, models.csv, memberships.csv and manifest.json.\n\
Default folder: [study].output in the spec, else runs/<spec name> here.")]
    Fit {
        /// The study spec (TOML).
        spec: PathBuf,
        /// Run folder (overrides [study].output).
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
        /// Refit everything, ignoring the fits cached in the run folder.
        #[arg(long)]
        fresh: bool,
        /// If another run is writing the run folder, wait for it (default: refuse).
        #[arg(long)]
        wait: bool,
        /// Use an existing folder that holds other files; they are moved aside to
        /// <folder>.replaced-<time>, never deleted.
        #[arg(long)]
        force: bool,
    },
    /// Fit what the spec lists, then compare the placements: aligned clusters, profiles,
    /// effects, agreement; writes report.html and summary.md beside the fit outputs.
    #[command(after_help = "Example:\n  cohortmix compare configs/demo.toml\n\n\
The run folder gets report.html (one self-contained page), summary.md, table1.csv\n\
(covariates and indicators by cluster) and results.json with a \"comparison\" section,\n\
besides models.csv, memberships.csv and manifest.json.")]
    Compare {
        /// The study spec (TOML).
        spec: PathBuf,
        /// Run folder (overrides [study].output).
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
        /// Refit everything, ignoring the fits cached in the run folder.
        #[arg(long)]
        fresh: bool,
        /// If another run is writing the run folder, wait for it (default: refuse).
        #[arg(long)]
        wait: bool,
        /// Use an existing folder that holds other files; they are moved aside to
        /// <folder>.replaced-<time>, never deleted.
        #[arg(long)]
        force: bool,
    },
    /// Posterior memberships of new rows under the models a run folder saved (the fits its
    /// report compares; after `fit`, each placement's lowest-BIC fit).
    #[command(
        after_help = "Example (after `cohortmix compare configs/demo.toml`):\n  cohortmix predict runs/demo demo-data/respiratory.csv --out scored.csv\n\n\
The new data need the columns the study uses (indicators, covariates, id), coded as the\n\
fitted data were; case weights are not needed. Rows missing a value the models need are\n\
left out and counted. Output: the layout of memberships.csv."
    )]
    Predict {
        /// The run folder (holds fitted-models.json).
        run: PathBuf,
        /// CSV of new rows.
        data: PathBuf,
        /// Output CSV (default: RUN/predictions/<data file name>).
        #[arg(long, value_name = "FILE")]
        out: Option<PathBuf>,
        /// If a run is writing the run folder, wait for it (default: refuse).
        #[arg(long)]
        wait: bool,
    },
    /// Write a CSV of data drawn from the truth a truth spec states (seeded).
    #[command(
        after_help = "Example:\n  cohortmix simulate demo-data/respiratory-truth.toml --out my-cohort.csv\n\n\
The truth spec format is described in docs/simulate.md. An existing file is replaced only\n\
with --force (or when it already holds exactly the rows drawn)."
    )]
    Simulate {
        /// The truth spec (TOML).
        spec: PathBuf,
        /// Output CSV (overrides [simulation].output).
        #[arg(long, value_name = "FILE")]
        out: Option<PathBuf>,
        /// Replace an existing output file that holds other rows.
        #[arg(long)]
        force: bool,
    },
}

/// Run the program with the process arguments; returns the exit status.
pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return code;
        }
    };
    match run(cli) {
        Ok(()) => 0,
        Err(e) => {
            let mut err = std::io::stderr().lock();
            let _ = write!(err, "{e}");
            e.exit_code()
        }
    }
}

/// Run a parsed command line.
pub fn run(cli: Cli) -> Result<()> {
    if let Some(n) = cli.threads {
        if n == 0 {
            return Err(Error::input(
                Diagnostic::new("--threads must be at least 1").help("leave --threads out to use every core"),
            ));
        }
        // Fails only if a pool exists already (a second call in one process); harmless.
        let _ = rayon::ThreadPoolBuilder::new().num_threads(n).build_global();
    }
    match cli.command {
        Command::Check { spec } => check(&spec),
        Command::Fit {
            spec,
            out,
            fresh,
            wait,
            force,
        } => fit_command(&spec, out.as_deref(), Mode::Fit, fresh, OpenOptions { wait, force }),
        Command::Compare {
            spec,
            out,
            fresh,
            wait,
            force,
        } => fit_command(&spec, out.as_deref(), Mode::Compare, fresh, OpenOptions { wait, force }),
        Command::Simulate { spec, out, force } => simulate_command(&spec, out.as_deref(), force),
        Command::Predict { run, data, out, wait } => predict_command(&run, &data, out.as_deref(), wait),
    }
}

/// Read spec and data, build designs, and check there are enough rows for every fit.
pub fn load_study(spec_path: &Path) -> Result<Loaded> {
    pipeline::load(spec_path, &Families::standard())
}

fn check(spec_path: &Path) -> Result<()> {
    let Loaded { study, data, prepared } = load_study(spec_path)?;
    let mut out = std::io::stdout().lock();
    let _ = writeln!(out, "spec {} is valid: {}", study.spec_path.display(), study.title);
    for w in &data.warnings {
        let _ = writeln!(out, "warning: {w}");
    }
    let _ = writeln!(
        out,
        "data {}: {} rows read, {} used, {} excluded for missing values",
        data.path.display(),
        data.rows_read,
        data.n(),
        data.rows_excluded
    );
    for (col, m) in &data.missing_by_column {
        if *m > 0 {
            let _ = writeln!(out, "  {col}: {m} missing");
        }
    }
    let _ = writeln!(
        out,
        "indicators ({}): {}",
        study.family.word(),
        data.indicator_names.join(", ")
    );
    if let Some(w) = &study.weights {
        let _ = writeln!(out, "case weights: {}", w.name);
    }
    let _ = writeln!(out, "plan:");
    let mut total_fits = 0;
    for pp in &prepared {
        let fd = fit::fit_data(&data, pp);
        let terms = |d: &crate::data::Design| {
            d.terms
                .iter()
                .skip(1)
                .map(|t| t.name.clone())
                .collect::<Vec<_>>()
                .join(", ")
        };
        let _ = writeln!(out, "  placement '{}'", pp.placement.name);
        let _ = writeln!(out, "    gating terms:    {}", or_none(&terms(&pp.gating)));
        let _ = writeln!(out, "    component terms: {}", or_none(&terms(&pp.components)));
        for (covariate, targets) in &pp.placement.acts_on {
            let _ = writeln!(out, "      {covariate} acts only on: {}", targets.join(", "));
        }
        for &g in &pp.placement.clusters {
            for &structure in &study.search.structures {
                let options = fit::ModelOptions::for_study(&study, structure);
                let k = fit::initial_model(&fd, &pp.blocks, &pp.placement, g, options).n_params();
                let starts = if g == 1 { 1 } else { study.search.starts };
                let _ = writeln!(
                    out,
                    "    {g} cluster{}, {}: {k} parameters, {starts} start{}",
                    plural(g),
                    fit::covariance_label(&structure, pp.uses_structure()),
                    plural(starts)
                );
                total_fits += 1;
            }
        }
    }
    let _ = writeln!(out, "{total_fits} fits in all");
    Ok(())
}

fn or_none(s: &str) -> &str {
    if s.is_empty() {
        "(none)"
    } else {
        s
    }
}

fn plural(n: usize) -> &'static str {
    if n == 1 {
        ""
    } else {
        "s"
    }
}

/// The run folder for a spec: `--out`, else `[study].output`, else `runs/<spec stem>`.
pub fn run_folder(study: &Study, out: Option<&Path>) -> PathBuf {
    if let Some(o) = out {
        return o.to_path_buf();
    }
    if let Some(o) = &study.output {
        return o.clone();
    }
    let stem = study
        .spec_path
        .file_stem()
        .map_or_else(|| "study".into(), |s| s.to_string_lossy().to_string());
    PathBuf::from("runs").join(stem)
}

/// Prints a run's progress to standard error.
struct Progress;

impl Observer for Progress {
    fn fitted(&mut self, done: usize, total: usize, fit: &FitResult, reused: bool) {
        let from = if reused { " (from the cache)" } else { "" };
        eprintln!("[{done}/{total}] {}{from}", render::console::progress_line(fit));
    }

    fn stage(&mut self, stage: Stage) {
        match stage {
            Stage::Fitted(usage) => {
                for why in &usage.refused {
                    eprintln!("warning: a cached fit was refused and refitted: {why}");
                }
                if let Some(why) = usage.not_stored.first() {
                    eprintln!(
                        "warning: {} fit(s) could not be cached ({why}); the run goes on, a rerun refits them",
                        usage.not_stored.len()
                    );
                }
                eprintln!(
                    "{} of {} fits reused from the cache, {} fitted",
                    usage.reused,
                    usage.reused + usage.fitted,
                    usage.fitted
                );
            }
            Stage::StandardErrors { method, fits } => {
                eprintln!(
                    "standard errors ({}) of the {fits} chosen fit{}",
                    method.word(),
                    plural(fits)
                );
            }
            Stage::Screen => eprintln!("direct-effect screen of the chosen fits"),
            Stage::ClusterCountTest { replicates } => {
                eprintln!("bootstrap test of each chosen cluster count ({replicates} replicates)");
            }
        }
    }
}

fn waiting_notice(folder: &Path) {
    eprintln!(
        "another cohortmix run is writing {}; waiting for it to finish (--wait)",
        folder.display()
    );
}

fn fit_command(spec_path: &Path, out: Option<&Path>, mode: Mode, fresh: bool, options: OpenOptions) -> Result<()> {
    let t0 = Instant::now();
    let loaded = load_study(spec_path)?;
    let study = &loaded.study;
    let (folder, opened) = RunFolder::open(
        &run_folder(study, out),
        &[&study.spec_path, &study.data_path],
        options,
        &mut waiting_notice,
    )?;
    for what in &opened.recovered {
        eprintln!("note: {what}");
    }
    for w in &loaded.data.warnings {
        eprintln!("warning: {w}");
    }
    let seconds_reading = t0.elapsed().as_secs_f64();
    eprintln!(
        "{}: {} rows used ({} excluded for missing values)",
        study.title,
        loaded.data.n(),
        loaded.data.rows_excluded
    );
    // Fits are cached beside the outputs; with --fresh they are refitted (and re-stored).
    let cache = Cache {
        folder: Some(folder.path()),
        read: !fresh,
    };
    let run = pipeline::run(&loaded, mode, cache, &mut Progress)?;
    let manifest = Manifest {
        program: "cohortmix",
        version: env!("CARGO_PKG_VERSION"),
        command: if mode == Mode::Compare { "compare" } else { "fit" },
        spec_sha256: crate::numerics::sha256_hex(study.spec_text.as_bytes()),
        data_sha256: loaded.data.sha256.clone(),
        spec_file: study.spec_path.display().to_string(),
        data_file: study.data_path.display().to_string(),
        threads: rayon::current_num_threads(),
        fits: run.fits.len(),
        seconds_reading,
        seconds_fitting: run.seconds_fitting,
        seconds_inference: run.seconds_inference,
        files: Vec::new(),
    };
    let shown = run_folder(study, out);
    let committed = folder.commit(crate::runfolder::outputs(&loaded, &run)?, manifest)?;
    print!("{}", render::console::summary(&run.results));
    if let Some(aside) = &committed.set_aside {
        println!(
            "the folder's earlier contents (a previous run with other files, or files put there) were moved to {}",
            aside.display()
        );
    }
    println!(
        "wrote {} ({}) in {:.1} s",
        shown.display(),
        committed.files.join(", "),
        t0.elapsed().as_secs_f64()
    );
    Ok(())
}

fn predict_command(run: &Path, data_path: &Path, out: Option<&Path>, wait: bool) -> Result<()> {
    use crate::fit::saved;
    let families = Families::standard();
    // Held while the models are read and the output written: a run swapping the folder
    // in between would put predictions of the old models beside the new ones.
    let _lock = crate::runfolder::lock_existing(run, wait, &mut waiting_notice)?;
    let stored = saved::load_run(run)?;
    let (study, data) = saved::load_new_data(&stored, data_path, &families)?;
    let predicted = saved::predict(&stored, &study, &data, &families)?;
    let sets: Vec<render::csv::MembershipSet> = predicted
        .iter()
        .map(|p| render::csv::MembershipSet {
            placement: &p.placement,
            numbers: &p.numbers,
            tau: &p.tau,
        })
        .collect();
    let text = render::csv::memberships_table(&data.ids, &sets);
    let dest = out.map_or_else(
        || {
            let name = data_path
                .file_name()
                .map_or_else(|| "predicted.csv".into(), |n| n.to_os_string());
            run.join("predictions").join(name)
        },
        Path::to_path_buf,
    );
    crate::runfolder::check_output_file(&dest, &[data_path, &run.join(saved::FILE_NAME)])?;
    write_file(&dest, text)?;
    println!(
        "{} rows of {} predicted ({} left out for a missing value) under {} fitted model{}",
        data.n(),
        data.rows_read,
        data.rows_excluded,
        predicted.len(),
        plural(predicted.len())
    );
    for p in &predicted {
        println!("  '{}', {} cluster{}", p.placement, p.clusters, plural(p.clusters));
    }
    println!("wrote {}", dest.display());
    Ok(())
}

fn simulate_command(spec_path: &Path, out: Option<&Path>, force: bool) -> Result<()> {
    let truth = crate::simulate::load(spec_path)?;
    let dest = out.map_or_else(|| truth.output.clone(), Path::to_path_buf);
    crate::runfolder::check_output_file(&dest, &[spec_path])?;
    let sim = crate::simulate::generate(&truth);
    match std::fs::read(&dest) {
        Ok(existing) if existing == sim.csv.as_bytes() => {
            println!("{} already holds exactly these rows; left as it was", dest.display());
            return Ok(());
        }
        Ok(_) if !force => {
            return Err(Error::input(
                Diagnostic::new(format!("{} exists and holds other rows", dest.display()))
                    .help("write elsewhere with --out FILE, or replace it with --force"),
            ));
        }
        _ => {}
    }
    write_file(&dest, sim.csv)?;
    let mut counts = vec![0usize; truth.clusters.len()];
    for k in &sim.clusters {
        counts[*k] += 1;
    }
    println!("wrote {} rows to {}", truth.rows, dest.display());
    for (c, n) in truth.clusters.iter().zip(&counts) {
        println!(
            "  cluster '{}': {} rows ({:.1}%)",
            c.name,
            n,
            100.0 * *n as f64 / truth.rows as f64
        );
    }
    Ok(())
}
