//! The cohortmix side of `tests/benches/peers.py`: one timed run on data the script wrote.
//!
//! ```text
//! cargo bench --bench peers -- em FOLDER full|axis THREADS ITERATIONS
//! cargo bench --bench peers -- gating FOLDER THREADS
//! ```
//!
//! `em` reads `x.f64` (n×d, row-major, little-endian) and `start.json` (weights, means,
//! covariances), takes one E-step at the start and then ITERATIONS EM iterations with no
//! early stop, and prints one JSON line: seconds per iteration, the final log-likelihood,
//! peak resident memory. `gating` reads `w.f64` (n×3 covariates) and `labels.u8` and fits
//! the multinomial logit of the labels on an intercept and the covariates by Newton's
//! method from zero. Cargo appends `--bench` to the arguments; it is ignored.

use cohortmix::data::Design;
use cohortmix::fit::em::{self, EmSettings};
use cohortmix::model::family::gaussian::GaussianRows;
use cohortmix::model::family::{Components, CovarianceStructure, GaussianComponents, Orientation, Shape, Volume};
use cohortmix::model::gating::{fit_multinomial_logit, Gating, LogitRows, MAX_NEWTON_ITERATIONS};
use cohortmix::model::{e_step, FitData, Model};
use nalgebra::DMatrix;
use std::path::Path;
use std::sync::Arc;
use std::time::Instant;

fn read_f64(path: &Path) -> Vec<f64> {
    let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    bytes
        .chunks_exact(8)
        .map(|b| f64::from_le_bytes(b.try_into().expect("eight bytes")))
        .collect()
}

/// Peak resident memory of this process in MiB (Linux), or −1.
fn peak_rss_mib() -> f64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|kb| kb.parse::<f64>().ok())
        })
        .map_or(-1.0, |kb| kb / 1024.0)
}

fn threads(arg: &str) -> usize {
    let t: usize = arg.parse().expect("THREADS is a number");
    rayon::ThreadPoolBuilder::new()
        .num_threads(t)
        .build_global()
        .expect("the thread pool is set once");
    t
}

fn em_run(folder: &Path, covariance: &str, n_threads: usize, iterations: usize) {
    let start: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(folder.join("start.json")).expect("start.json")).expect("JSON");
    let d = start["d"].as_u64().expect("d") as usize;
    let weights_init: Vec<f64> = serde_json::from_value(start["weights"].clone()).expect("weights");
    let means: Vec<Vec<f64>> = serde_json::from_value(start["means"].clone()).expect("means");
    let covs: Vec<Vec<Vec<f64>>> = serde_json::from_value(start["covariances"].clone()).expect("covariances");
    let g = weights_init.len();
    let y = read_f64(&folder.join("x.f64"));
    let n = y.len() / d;
    let case_weights = vec![1.0; n];
    let z = vec![1.0; n];
    let data = FitData {
        n,
        weights: &case_weights,
        w: &z,
        p: 1,
    };
    let structure = match covariance {
        "full" => CovarianceStructure::UNCONSTRAINED,
        "axis" => CovarianceStructure::new(Volume::Varying, Shape::Varying, Orientation::Axes),
        other => panic!("covariance is full or axis, not {other}"),
    };
    let coef: Vec<f64> = means.iter().flatten().copied().collect();
    let cov = covs.iter().map(|c| DMatrix::from_fn(d, d, |a, b| c[a][b])).collect();
    let names = (0..d).map(|j| format!("y{j}")).collect();
    let rows = GaussianRows::new(names, Arc::new(y), Design::intercept(n));
    let gaussian = GaussianComponents::new(Arc::new(rows), &case_weights, g, structure)
        .with_parameters(coef, cov)
        .expect("the starting covariances are positive definite");
    let model = Model {
        gating: Gating::Free {
            log_pi: weights_init.iter().map(|w| w.ln()).collect(),
        },
        components: Components {
            blocks: vec![Box::new(gaussian)],
        },
    };
    let settings = EmSettings {
        max_iterations: iterations,
        tolerance: em::NEVER_STOP_EARLY,
        // Plain EM steps: the benchmark times one step against the peers' step.
        accelerate: false,
    };
    // On a thread of the pool, as the CLI runs a start: a pass over rows then splits
    // into tasks without waking the pool from outside at every iteration.
    let (run, seconds) = rayon::scope(|_| {
        let clock = Instant::now();
        let mut tau = vec![0.0; n * g];
        e_step(&model, &data, &mut tau, None);
        let run = em::run(&data, model, tau, settings);
        (run, clock.elapsed().as_secs_f64())
    });
    assert_eq!(run.iterations, iterations, "{:?}", run.termination);
    println!(
        "{}",
        serde_json::json!({
            "tool": "cohortmix",
            "n": n, "d": d, "g": g, "covariance": covariance, "threads": n_threads,
            "iterations": iterations,
            "seconds": seconds,
            "seconds_per_iteration": seconds / iterations as f64,
            "loglik": run.loglik,
            "peak_rss_mib": peak_rss_mib(),
        })
    );
}

fn gating_run(folder: &Path, n_threads: usize) {
    let covariates = read_f64(&folder.join("w.f64"));
    let labels = std::fs::read(folder.join("labels.u8")).expect("labels.u8");
    let n = labels.len();
    let k = covariates.len() / n;
    let p = k + 1;
    let g = usize::from(*labels.iter().max().expect("rows")) + 1;
    let mut w = Vec::with_capacity(n * p);
    for row in covariates.chunks_exact(k) {
        w.push(1.0);
        w.extend_from_slice(row);
    }
    let mut tau = vec![0.0; n * g];
    for (i, l) in labels.iter().enumerate() {
        tau[i * g + usize::from(*l)] = 1.0;
    }
    let weights = vec![1.0; n];
    let clock = Instant::now();
    let fit = fit_multinomial_logit(
        &LogitRows {
            w: &w,
            p,
            tau: &tau,
            g,
            weights: &weights,
            ridge: 0.0,
        },
        &vec![0.0; (g - 1) * p],
        MAX_NEWTON_ITERATIONS,
    );
    let seconds = clock.elapsed().as_secs_f64();
    println!(
        "{}",
        serde_json::json!({
            "tool": "cohortmix",
            "n": n, "covariates": k, "g": g, "threads": n_threads,
            "seconds": seconds,
            "newton_iterations": fit.iterations,
            "converged": fit.outcome.converged(),
            "loglik": fit.objective,
            "peak_rss_mib": peak_rss_mib(),
        })
    );
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).filter(|a| a != "--bench").collect();
    let usage = "usage: peers em FOLDER full|axis THREADS ITERATIONS | peers gating FOLDER THREADS";
    match args.first().map(String::as_str) {
        Some("em") if args.len() == 5 => {
            let t = threads(&args[3]);
            em_run(
                Path::new(&args[1]),
                &args[2],
                t,
                args[4].parse().expect("ITERATIONS is a number"),
            );
        }
        Some("gating") if args.len() == 3 => {
            let t = threads(&args[2]);
            gating_run(Path::new(&args[1]), t);
        }
        _ => {
            eprintln!("{usage}");
            std::process::exit(2);
        }
    }
}
