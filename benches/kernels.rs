//! The row passes on their own: `cargo bench --bench kernels`.
//!
//! N = 100,000 rows, d = 5 indicators, G = 4 clusters, full covariance, on simulated data
//! (a fixed seed). Each benchmark is one pass over all rows on the global thread pool
//! (`RAYON_NUM_THREADS=1` for one thread).

use cohortmix::data::Design;
use cohortmix::model::family::gaussian::GaussianRows;
use cohortmix::model::family::{Components, CovarianceStructure, GaussianComponents};
use cohortmix::model::gating::{logit_score_hessian, Gating, GatingStats};
use cohortmix::model::{e_step, e_step_sums, e_step_with, FitData, GaussianStats, Model};
use cohortmix::rng::Stream;
use nalgebra::DMatrix;
use std::sync::Arc;

const N: usize = 100_000;
const D: usize = 5;
const G: usize = 4;
const P: usize = 4;

struct Fixture {
    y: Vec<f64>,
    ones: Vec<f64>,
    w: Vec<f64>,
    tau: Vec<f64>,
}

fn fixture() -> Fixture {
    let mut rng = Stream::new(7, "kernel benchmark");
    let y = (0..N * D).map(|i| rng.normal() + (i % (D * 3)) as f64 * 0.1).collect();
    let w = (0..N)
        .flat_map(|_| [1.0, rng.normal(), rng.normal(), rng.normal()])
        .collect::<Vec<f64>>();
    let mut tau = vec![0.0; N * G];
    for row in tau.chunks_exact_mut(G) {
        row[rng.index(G)] = 1.0;
    }
    Fixture {
        y,
        ones: vec![1.0; N],
        w,
        tau,
    }
}

fn data(f: &Fixture, gating: bool) -> FitData<'_> {
    FitData {
        n: N,
        weights: &f.ones,
        w: if gating { &f.w } else { &f.ones },
        p: if gating { P } else { 1 },
    }
}

fn model(f: &Fixture, fd: &FitData, gating: bool) -> Model {
    let coef = (0..G * D).map(|i| (i % 7) as f64 * 0.2).collect();
    let cov = (0..G)
        .map(|k| DMatrix::from_fn(D, D, |a, b| if a == b { 1.0 + k as f64 * 0.1 } else { 0.2 }))
        .collect();
    let names = (0..D).map(|j| format!("y{j}")).collect();
    let rows = GaussianRows::new(names, Arc::new(f.y.clone()), Design::intercept(N));
    let gaussian = GaussianComponents::new(Arc::new(rows), fd.weights, G, CovarianceStructure::UNCONSTRAINED)
        .with_parameters(coef, cov)
        .expect("positive definite");
    Model {
        gating: if gating {
            Gating::Logit {
                g: G,
                p: P,
                gamma: (0..(G - 1) * P).map(|i| (i % 5) as f64 * 0.1 - 0.2).collect(),
                ridge: 0.0,
                bound_inverse: None,
            }
        } else {
            Gating::Free {
                log_pi: vec![-(G as f64).ln(); G],
            }
        },
        components: Components {
            blocks: vec![Box::new(gaussian)],
        },
    }
}

fn main() {
    divan::main();
}

/// E-step alone: densities, responsibilities, log-likelihood.
#[divan::bench]
fn e_step_only(bencher: divan::Bencher) {
    let f = fixture();
    let fd = data(&f, false);
    let m = model(&f, &fd, false);
    let mut tau = f.tau.clone();
    bencher.bench_local(|| e_step(&m, &fd, &mut tau, None));
}

/// One EM iteration's pass: the E-step with the Gaussian M-step sums and the gating sums
/// (free shares, or with `gating` a logit on 3 covariates with its score and Hessian).
#[divan::bench(args = [false, true])]
fn e_step_with_sums(bencher: divan::Bencher, gating: bool) {
    let f = fixture();
    let fd = data(&f, gating);
    let m = model(&f, &fd, gating);
    let mut tau = f.tau.clone();
    let (mut gs, mut ss) = (GatingStats::default(), GaussianStats::default());
    bencher.bench_local(|| e_step_with(&m, &fd, &mut tau, Some(&mut gs), Some(&mut ss)));
}

/// One EM iteration's pass when the M-step runs from sums alone (what `em::run` uses for
/// Gaussian models): the same sums as `e_step_with_sums`, no responsibilities written.
/// With `gating`, the logit's bound is prepared so that the model qualifies.
#[divan::bench(args = [false, true])]
fn e_step_sums_only(bencher: divan::Bencher, gating: bool) {
    let f = fixture();
    let fd = data(&f, gating);
    let mut m = model(&f, &fd, gating);
    m.gating.prepare_bound(fd.w, fd.weights);
    let (mut gs, mut ss) = (GatingStats::default(), GaussianStats::default());
    bencher.bench_local(|| e_step_sums(&m, &fd, &mut gs, &mut ss));
}

/// The multinomial-logit Newton pass on hard memberships (objective, score, Hessian).
#[divan::bench]
fn logit_newton_pass(bencher: divan::Bencher) {
    let f = fixture();
    let gamma = vec![0.1; (G - 1) * P];
    bencher.bench_local(|| logit_score_hessian(&f.w, P, &f.tau, G, &f.ones, 0.0, &gamma));
}
