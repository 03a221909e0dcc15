//! Invariants checked over random problems: EM never lowers the log-likelihood, and the
//! gating score and Hessian are the derivatives of the gating objective.

use cohortmix::data::{Column, Design};
use cohortmix::fit::em::{self, EmSettings};
use cohortmix::fit::starts::{partition, StartKind};
use cohortmix::fit::{initial_model, ModelOptions};
use cohortmix::model::family::CovarianceStructure;
use cohortmix::model::gating::{logit_objective, logit_score_hessian};
use cohortmix::model::FitData;
use cohortmix::rng::Stream;
use cohortmix::spec::VariableType;
use proptest::prelude::*;

/// A random problem: n rows, d indicators drawn from a loose g-group mixture, with one
/// gating and one component covariate when asked.
fn problem(
    seed: u64,
    n: usize,
    d: usize,
    g: usize,
    with_w: bool,
    with_z: bool,
) -> (Vec<f64>, Design, Design, Vec<f64>) {
    let mut s = Stream::new(seed, "problem");
    let x: Vec<f64> = (0..n).map(|_| s.normal()).collect();
    let group: Vec<usize> = (0..n).map(|_| s.index(g)).collect();
    let mut y = Vec::with_capacity(n * d);
    for i in 0..n {
        for j in 0..d {
            y.push(2.0 * group[i] as f64 + 0.5 * j as f64 * x[i] + s.normal());
        }
    }
    let weights: Vec<f64> = (0..n).map(|_| 0.5 + s.uniform()).collect();
    let col = Column::Numeric {
        kind: VariableType::Continuous,
        values: x,
    };
    let w = if with_w {
        Design::from_columns(n, &[("x", &col)]).unwrap()
    } else {
        Design::intercept(n)
    };
    let z = if with_z {
        Design::from_columns(n, &[("x", &col)]).unwrap()
    } else {
        Design::intercept(n)
    };
    (y, w, z, weights)
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 160, .. ProptestConfig::default() })]

    /// The EM objective never falls by more than 1e-9·|loglik| between iterations, for
    /// every covariance structure, with and without gating and component covariates and
    /// the covariance prior.
    #[test]
    fn em_never_lowers_the_loglik(seed in 0u64..10_000, n in 30usize..160, d in 1usize..4, g in 1usize..5,
                                  with_w: bool, with_z: bool, random_start: bool, structure in 0usize..14,
                                  prior: bool) {
        let (y, w, z, weights) = problem(seed, n, d, g, with_w, with_z);
        let fd = FitData { n, weights: &weights, y: &y, d, z: &z.x, q: z.p(), w: &w.x, p: w.p() , ..Default::default()};
        let structure = CovarianceStructure::all()[structure];
        let structure = if d == 1 && !structure.fits_one_indicator() { CovarianceStructure::all()[1] } else { structure };
        let options = ModelOptions { structure, gating_ridge: 0.0, covariance_prior: prior, variance_floor: 0.0, smoothing: 0.0 };
        let model = initial_model(&fd, &super::common::free_placement(), g, options);
        let kind = if g == 1 { StartKind::Single } else if random_start { StartKind::RandomPartition } else { StartKind::SeededCentres };
        let mut rng = Stream::new(seed, "start");
        let tau = partition(kind, &y, d, &weights, g, &mut rng);
        let run = em::run(&fd, model, tau, EmSettings { max_iterations: 300, tolerance: 1e-13 });
        for pair in run.trace.windows(2) {
            prop_assert!(pair[1] >= pair[0] - 1e-9 * pair[0].abs(), "fell from {} to {} ({:?})", pair[0], pair[1], run.termination);
        }
    }

    /// Score and Hessian of the (ridge-penalised) gating objective match central
    /// finite differences.
    #[test]
    fn gating_derivatives_match_finite_differences(seed in 0u64..10_000, g in 2usize..5, ridge in prop_oneof![Just(0.0), 0.01f64..2.0]) {
        let n = 40;
        let p = 3;
        let mut s = Stream::new(seed, "fd");
        let w: Vec<f64> = (0..n).flat_map(|_| [1.0, 0.0, 0.0]).enumerate().map(|(i, v)| if i % p == 0 { v } else { s.normal() }).collect();
        let mut tau = vec![0.0; n * g];
        for row in tau.chunks_exact_mut(g) {
            let raw: Vec<f64> = (0..g).map(|_| s.uniform() + 0.05).collect();
            let t: f64 = raw.iter().sum();
            for (r, v) in row.iter_mut().zip(&raw) { *r = v / t; }
        }
        let weights: Vec<f64> = (0..n).map(|_| 0.5 + s.uniform()).collect();
        let gamma: Vec<f64> = (0..(g - 1) * p).map(|_| 0.5 * s.normal()).collect();
        let (obj, score, hess) = logit_score_hessian(&w, p, &tau, g, &weights, ridge, &gamma);
        let f = |gm: &[f64]| logit_objective(&w, p, &tau, g, &weights, ridge, gm);
        prop_assert!((obj - f(&gamma)).abs() <= 1e-10 * obj.abs());
        let h = 1e-5;
        for i in 0..gamma.len() {
            let mut up = gamma.clone();
            let mut dn = gamma.clone();
            up[i] += h;
            dn[i] -= h;
            let numeric = (f(&up) - f(&dn)) / (2.0 * h);
            prop_assert!((numeric - score[i]).abs() <= 1e-6 * (1.0 + score[i].abs()), "score {i}: {} vs {numeric}", score[i]);
            let (_, su, _) = logit_score_hessian(&w, p, &tau, g, &weights, ridge, &up);
            let (_, sd, _) = logit_score_hessian(&w, p, &tau, g, &weights, ridge, &dn);
            for j in 0..gamma.len() {
                let numeric = (su[j] - sd[j]) / (2.0 * h);
                prop_assert!((numeric - hess[(j, i)]).abs() <= 1e-5 * (1.0 + hess[(j, i)].abs()), "hessian ({j},{i}): {} vs {numeric}", hess[(j, i)]);
            }
        }
    }
}
