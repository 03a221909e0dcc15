//! Invariants checked over random problems: EM never lowers the log-likelihood, and the
//! gating score and Hessian are the derivatives of the gating objective.

use cohortmix::data::Exposure;
use cohortmix::data::{Column, Design};
use cohortmix::fit::em::{self, EmSettings};
use cohortmix::fit::starts::{partition, StartKind};
use cohortmix::fit::{initial_model, ModelOptions};
use cohortmix::model::family::counts::CountData;
use cohortmix::model::family::gaussian::GaussianRows;
use cohortmix::model::family::{
    Components, CountComponents, CovarianceStructure, GaussianComponents, ItemComponents, Prepared,
};
use cohortmix::model::gating::{logit_objective, logit_score_hessian, Gating};
use cohortmix::model::{e_step, FitData};
use cohortmix::rng::Stream;
use cohortmix::spec::VariableType;
use proptest::prelude::*;
use std::sync::Arc;

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
    /// every covariance structure, with and without gating and component covariates, the
    /// covariance prior and extrapolated steps; plus, for a gating network, the rounding of the
    /// log-likelihood (see [`loglik_rounding`]: seed 5374 separates, reaches |γ| ≈ 1e11
    /// and falls by 2e-5 at iterations where the bound step is taken).
    #[test]
    fn em_never_lowers_the_loglik(seed in 0u64..10_000, n in 30usize..160, d in 1usize..4, g in 1usize..5,
                                  with_w: bool, with_z: bool, random_start: bool, structure in 0usize..14,
                                  prior: bool, accelerate: bool) {
        let (y, w, z, weights) = problem(seed, n, d, g, with_w, with_z);
        let fd = FitData { n, weights: &weights, w: &w.x, p: w.p() };
        let blocks = super::common::gaussian_block(&y, d, &z);
        let structure = CovarianceStructure::all()[structure];
        let structure = if d == 1 && !structure.fits_one_indicator() { CovarianceStructure::all()[1] } else { structure };
        let options = ModelOptions { structure, gating_ridge: 0.0, covariance_prior: prior, variance_floor: 0.0, smoothing: 0.0 };
        let model = initial_model(&fd, &blocks, &super::common::free_placement(), g, options);
        let kind = if g == 1 { StartKind::Single } else if random_start { StartKind::RandomPartition } else { StartKind::SeededCentres };
        let mut rng = Stream::new(seed, "start");
        let tau = partition(kind, &y, d, &weights, g, &mut rng);
        let run = em::run(&fd, model, tau, EmSettings { max_iterations: 300, tolerance: 1e-13, accelerate });
        let rounding = loglik_rounding(&run.model.gating, &w.x, n);
        for pair in run.trace.windows(2) {
            prop_assert!(pair[1] >= pair[0] - 1e-9 * pair[0].abs() - rounding, "fell from {} to {} ({:?})", pair[0], pair[1], run.termination);
        }
        // The responsibilities returned are those of the final parameters, bit for bit,
        // whether or not the iterations kept them.
        if run.termination.usable() {
            let mut again = vec![0.0; run.tau.len()];
            let loglik = e_step(&run.model, &fd, &mut again, None);
            prop_assert_eq!(loglik.to_bits(), run.loglik.to_bits());
            prop_assert!(again.iter().zip(&run.tau).all(|(a, b)| a.to_bits() == b.to_bits()), "responsibilities differ");
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

/// A random problem for the item, count and mixed families: `family` 0 = items (three
/// binary items and one with three levels), 1 = counts (two, with an exposure), 2 = mixed
/// (one continuous indicator, two binary items, one count). One covariate x, in the
/// gating network and/or acting on every indicator.
struct BlockProblem {
    n: usize,
    weights: Vec<f64>,
    y: Vec<f64>,
    d: usize,
    codes: Vec<u16>,
    levels: Vec<usize>,
    item_names: Vec<String>,
    counts: Vec<f64>,
    count_names: Vec<String>,
    log_exposure: Vec<f64>,
    w: Design,
    z: Design,
    item_terms: Vec<Vec<usize>>,
    count_terms: Vec<Vec<usize>>,
    exposure: Vec<f64>,
    seeding: Vec<f64>,
    seeding_d: usize,
}

fn block_problem(seed: u64, n: usize, family: usize, g: usize, with_w: bool, with_z: bool) -> BlockProblem {
    let mut s = Stream::new(seed, "blocks");
    let x: Vec<f64> = (0..n).map(|_| s.normal()).collect();
    let group: Vec<usize> = (0..n).map(|_| s.index(g)).collect();
    let weights: Vec<f64> = (0..n).map(|_| 0.5 + s.uniform()).collect();
    let (n_gauss, levels, n_counts): (usize, Vec<usize>, usize) = match family {
        0 => (0, vec![2, 2, 2, 3], 0),
        1 => (0, vec![], 2),
        _ => (1, vec![2, 2], 1),
    };
    let y: Vec<f64> = (0..n)
        .map(|i| 2.0 * group[i] as f64 + 0.5 * x[i] + s.normal())
        .take(n * n_gauss)
        .collect();
    let mut codes = Vec::new();
    for gi in &group {
        for l in &levels {
            let lean = (gi + 1) as f64 / (g + 1) as f64;
            let u = s.uniform();
            let c = if u < 0.05 {
                cohortmix::data::MISSING_ITEM
            } else if u < lean {
                (l - 1) as u16
            } else {
                s.index(*l) as u16
            };
            codes.push(c);
        }
    }
    let log_exposure: Vec<f64> = (0..n).map(|_| (0.5 + 2.0 * s.uniform()).ln()).collect();
    let mut counts = Vec::new();
    for i in 0..n {
        for c in 0..n_counts {
            let mean = ((0.3 + group[i] as f64 + 0.2 * c as f64) * (0.2 * x[i]).exp()) * log_exposure[i].exp();
            counts.push(s.poisson(mean) as f64);
        }
    }
    // The model reads counts column by column.
    let counts_by_column: Vec<f64> = (0..n_counts)
        .flat_map(|c| (0..n).map(move |i| (i, c)))
        .map(|(i, c)| counts[i * n_counts + c])
        .collect();
    let col = Column::Numeric {
        kind: VariableType::Continuous,
        values: x,
    };
    let design = |on: bool| {
        if on {
            Design::from_columns(n, &[("x", &col)]).unwrap()
        } else {
            Design::intercept(n)
        }
    };
    let (w, z) = (design(with_w), design(with_z));
    let all: Vec<usize> = (0..z.p()).collect();
    let mut seeding = Vec::new();
    let seeding_d = n_gauss + levels.len() + n_counts;
    for i in 0..n {
        seeding.extend(y.get(i..i + n_gauss).unwrap_or(&[]).iter().copied());
        seeding.extend(
            codes[i * levels.len()..(i + 1) * levels.len()]
                .iter()
                .map(|c| f64::from(*c % 8)),
        );
        seeding.extend(counts[i * n_counts..(i + 1) * n_counts].iter().map(|c| c.ln_1p()));
    }
    let item_terms = vec![all.clone(); levels.len()];
    let count_terms = vec![all.clone(); n_counts];
    BlockProblem {
        n,
        weights,
        y,
        d: n_gauss,
        exposure: log_exposure.iter().map(|v| v.exp()).collect(),
        item_terms,
        count_terms,
        item_names: (0..levels.len()).map(|j| format!("item{j}")).collect(),
        count_names: (0..n_counts).map(|j| format!("count{j}")).collect(),
        codes,
        levels,
        counts: counts_by_column,
        log_exposure,
        w,
        z,
        seeding,
        seeding_d,
    }
}

impl BlockProblem {
    fn data(&self) -> FitData<'_> {
        FitData {
            n: self.n,
            weights: &self.weights,
            w: &self.w.x,
            p: self.w.p(),
        }
    }

    /// The problem's blocks, in block order: Gaussian, items, counts (those it has).
    fn blocks(&self) -> Vec<Arc<dyn Prepared>> {
        let mut out = Vec::new();
        if self.d > 0 {
            let names = (0..self.d).map(|j| format!("y{j}")).collect();
            out.push(cohortmix::model::family::gaussian::prepared(GaussianRows::new(
                names,
                Arc::new(self.y.clone()),
                self.z.clone(),
            )));
        }
        if !self.levels.is_empty() {
            out.push(cohortmix::model::family::items::prepared(super::common::item_data(
                &self.item_names,
                &self.codes,
                &self.levels,
                &self.z,
                &self.item_terms,
            )));
        }
        if !self.count_names.is_empty() {
            let exposure = Exposure {
                values: self.exposure.clone(),
                logs: self.log_exposure.clone(),
            };
            out.push(cohortmix::model::family::counts::prepared(CountData::new(
                self.count_names.clone(),
                Arc::new(self.counts.clone()),
                self.z.clone(),
                self.count_terms.clone(),
                Some(Arc::new(exposure)),
            )));
        }
        out
    }
}

/// Σ_i c_i Σ_k τ_ik log f_k(y_i): the component part of EM's expected complete-data
/// log-likelihood.
fn expected_complete(comps: &Components, data: &FitData, tau: &[f64], g: usize) -> f64 {
    let mut out = vec![0.0; data.n * g];
    comps.log_density(&mut out);
    out.iter()
        .zip(tau)
        .enumerate()
        .map(|(i, (o, t))| if *t > 0.0 { data.weights[i / g] * t * o } else { 0.0 })
        .sum()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 96, .. ProptestConfig::default() })]

    /// EM never lowers the objective for the items, counts and mixed families, with and
    /// without covariates in the gating network and the components, with and without item
    /// smoothing and extrapolated steps, from random and seeded starts.
    #[test]
    fn em_never_lowers_the_loglik_for_items_counts_and_mixed(seed in 0u64..10_000, n in 40usize..150, family in 0usize..3, g in 1usize..4,
                                                             with_w: bool, with_z: bool, random_start: bool, smoothing in prop_oneof![Just(0.0), Just(1.0)],
                                                             accelerate: bool) {
        let pb = block_problem(seed, n, family, g, with_w, with_z);
        let fd = pb.data();
        let blocks = pb.blocks();
        let options = ModelOptions { structure: CovarianceStructure::UNCONSTRAINED, gating_ridge: 0.0, covariance_prior: false, variance_floor: 0.0, smoothing };
        let model = initial_model(&fd, &blocks, &super::common::free_placement(), g, options);
        let kind = if g == 1 { StartKind::Single } else if random_start { StartKind::RandomPartition } else { StartKind::SeededCentres };
        let mut rng = Stream::new(seed, "start");
        let tau = partition(kind, &pb.seeding, pb.seeding_d, &pb.weights, g, &mut rng);
        let run = em::run(&fd, model, tau, EmSettings { max_iterations: 200, tolerance: 1e-13, accelerate });
        for pair in run.trace.windows(2) {
            prop_assert!(pair[1] >= pair[0] - 1e-9 * pair[0].abs(), "fell from {} to {} ({:?})", pair[0], pair[1], run.termination);
        }
    }

    /// Score and negative Hessian of the weighted Poisson objective match central finite
    /// differences.
    #[test]
    fn poisson_derivatives_match_finite_differences(seed in 0u64..10_000) {
        let mut s = Stream::new(seed, "poisson-fd");
        let (n, q) = (30, 3);
        let x: Vec<f64> = (0..n * q).map(|i| if i % q == 0 { 1.0 } else { s.normal() }).collect();
        let y: Vec<f64> = (0..n).map(|_| s.poisson(2.0) as f64).collect();
        let offset: Vec<f64> = (0..n).map(|_| 0.3 * s.normal()).collect();
        let v: Vec<f64> = (0..n).map(|_| s.uniform()).collect();
        let beta: Vec<f64> = (0..q).map(|_| 0.3 * s.normal()).collect();
        let rows = cohortmix::model::glm::PoissonRows { x: &x, q, y: &y, offset: Some(&offset), weights: &v };
        let (obj, score, neg) = rows.derivatives(&beta);
        prop_assert!((obj - rows.objective(&beta)).abs() <= 1e-12 * obj.abs().max(1.0));
        let h = 1e-5;
        for a in 0..q {
            let (mut up, mut dn) = (beta.clone(), beta.clone());
            up[a] += h;
            dn[a] -= h;
            let numeric = (rows.objective(&up) - rows.objective(&dn)) / (2.0 * h);
            prop_assert!((numeric - score[a]).abs() <= 1e-6 * (1.0 + score[a].abs()), "score {a}: {} vs {numeric}", score[a]);
            let (_, su, _) = rows.derivatives(&up);
            let (_, sd, _) = rows.derivatives(&dn);
            for b in 0..q {
                let numeric = -(su[b] - sd[b]) / (2.0 * h);
                prop_assert!((numeric - neg[(b, a)]).abs() <= 1e-5 * (1.0 + neg[(b, a)].abs()), "hessian ({b},{a})");
            }
        }
    }

    /// Every family's M-step maximises its part of the expected complete-data
    /// log-likelihood: after repeated M-steps with the responsibilities held fixed, the
    /// central finite-difference gradient with respect to every regression coefficient
    /// (gaussian means, item logits, count log rates) is zero.
    #[test]
    fn m_steps_reach_a_zero_finite_difference_gradient(seed in 0u64..10_000, family in 0usize..3, g in 1usize..3) {
        let pb = block_problem(seed, 150, family, g, false, true);
        let fd = pb.data();
        let blocks = pb.blocks();
        let options = ModelOptions { structure: CovarianceStructure::UNCONSTRAINED, gating_ridge: 0.0, covariance_prior: false, variance_floor: 0.0, smoothing: 0.0 };
        let mut model = initial_model(&fd, &blocks, &super::common::free_placement(), g, options);
        let mut rng = Stream::new(seed, "fixed tau");
        let tau: Vec<f64> = (0..pb.n * g).map(|_| 0.2 + rng.uniform()).collect::<Vec<_>>()
            .chunks(g).flat_map(|r| { let t: f64 = r.iter().sum(); r.iter().map(move |v| v / t).collect::<Vec<_>>() }).collect();
        for _ in 0..80 {
            prop_assume!(model.components.m_step(&fd, &tau, None).is_ok());
        }
        let h = 1e-6;
        let mut checked = 0;
        let comps = model.components.clone();
        let q0 = expected_complete(&comps, &fd, &tau, g);
        let mut gradient = |perturb: &dyn Fn(&mut cohortmix::model::family::Components, f64)| {
            let (mut up, mut dn) = (comps.clone(), comps.clone());
            perturb(&mut up, h);
            perturb(&mut dn, -h);
            checked += 1;
            (expected_complete(&up, &fd, &tau, g) - expected_complete(&dn, &fd, &tau, g)) / (2.0 * h)
        };
        let tol = 1e-5 * q0.abs().max(1.0);
        if let Some(gc) = comps.find::<GaussianComponents>() {
            for i in 0..gc.coef.len() {
                let d = gradient(&|c, e| c.find_mut::<GaussianComponents>().unwrap().coef[i] += e);
                prop_assert!(d.abs() <= tol, "gaussian coefficient {i}: gradient {d}");
            }
        }
        if let Some(ic) = comps.find::<ItemComponents>() {
            for j in 0..ic.coef.len() {
                for i in 0..ic.coef[j].len() {
                    let d = gradient(&|c, e| c.find_mut::<ItemComponents>().unwrap().coef[j][i] += e);
                    prop_assert!(d.abs() <= tol, "item {j} logit coefficient {i}: gradient {d}");
                }
            }
        }
        if let Some(cc) = comps.find::<CountComponents>() {
            for j in 0..cc.coef.len() {
                for i in 0..cc.coef[j].len() {
                    let d = gradient(&|c, e| c.find_mut::<CountComponents>().unwrap().coef[j][i] += e);
                    prop_assert!(d.abs() <= tol, "count {j} coefficient {i}: gradient {d}");
                }
            }
        }
        prop_assert!(checked > 0);
    }
}

/// How far rounding can move a log-likelihood over `n` rows under `gating` (design `w`):
/// each row's term is a difference of two log sums of linear predictors, so it is good to
/// a few ε·max |η|. That is nothing for fitted coefficients of ordinary size, but when a
/// covariate separates a cluster they grow without bound (|γ| ≈ 1e10 within 200
/// iterations in seeds 5374 and 3196 of the properties here).
fn loglik_rounding(gating: &Gating, w: &[f64], n: usize) -> f64 {
    let largest_eta = match gating {
        Gating::Logit { gamma, p, .. } => w
            .chunks_exact(*p)
            .flat_map(|row| {
                gamma
                    .chunks_exact(*p)
                    .map(move |c| c.iter().zip(row).map(|(a, b)| a * b).sum::<f64>().abs())
            })
            .fold(0.0, f64::max),
        _ => 0.0,
    };
    8.0 * f64::EPSILON * n as f64 * largest_eta
}

/// A model set from its own extrapolation coordinates ([`cohortmix::model::Model::coordinates`])
/// has the same log-likelihood, to 1e-12 relative.
fn check_coordinates_give_back_the_model(model: &cohortmix::model::Model, fd: &FitData) -> Result<(), TestCaseError> {
    let again = model
        .with_coordinates(&model.coordinates())
        .expect("a model's own coordinates are a model");
    let mut scratch = vec![0.0; fd.n * model.clusters()];
    let (a, b) = (
        e_step(model, fd, &mut scratch, None),
        e_step(&again, fd, &mut scratch, None),
    );
    prop_assert!((a - b).abs() <= 1e-12 * a.abs(), "{} against {}", a, b);
    Ok(())
}

/// Compares a chart's analytic score at a random point near the fit with central
/// differences of the log-likelihood the same pass returns (allowing for the rounding of
/// the log-likelihood, see [`loglik_rounding`]).
fn check_chart_score(model: &cohortmix::model::Model, fd: &FitData, seed: u64) -> Result<(), TestCaseError> {
    use cohortmix::inference::chart::Chart;
    let chart = match Chart::new(model) {
        Ok(c) => c,
        // A boundary fit (an empty item level) has no chart; that is reported, not tested.
        Err(_) => return Ok(()),
    };
    prop_assert_eq!(chart.len(), model.n_params());
    let mut s = Stream::new(seed, "chart-point");
    let theta: Vec<f64> = (0..chart.len()).map(|j| 0.05 * s.normal() * chart.scale(j)).collect();
    let score = match chart.total_score(&theta, fd) {
        Ok(v) => v,
        Err(_) => return Ok(()),
    };
    // The total score (made from sums over rows for Gaussian components alone) equals
    // the row scores added up, to rounding of the row scores' size.
    let (mut by_rows, mut size) = (vec![0.0; chart.len()], vec![0.0; chart.len()]);
    chart
        .scores(&theta, fd, |_, s| {
            for (j, x) in s.iter().enumerate() {
                by_rows[j] += x;
                size[j] += x.abs();
            }
        })
        .unwrap();
    for j in 0..chart.len() {
        prop_assert!(
            (score[j] - by_rows[j]).abs() <= 1e-10 * size[j] + 1e-12,
            "coordinate {j}: total score {} vs row scores added {}",
            score[j],
            by_rows[j]
        );
    }
    let loglik = |t: &[f64]| chart.scores(t, fd, |_, _| {}).unwrap();
    let rounding = loglik_rounding(&model.gating, fd.w, fd.n);
    for j in 0..chart.len() {
        let h = 1e-5 * chart.scale(j);
        let mut t = theta.clone();
        t[j] += h;
        let up = loglik(&t);
        t[j] -= 2.0 * h;
        let down = loglik(&t);
        let fd_grad = (up - down) / (2.0 * h);
        let tol = 1e-4 * (1.0 + fd_grad.abs()) / chart.scale(j).min(1.0) + rounding / h;
        prop_assert!(
            (score[j] - fd_grad).abs() <= tol,
            "coordinate {j}: score {} vs difference {}",
            score[j],
            fd_grad
        );
    }
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, .. ProptestConfig::default() })]

    /// The inference chart's score is the gradient of the observed-data log-likelihood for
    /// every covariance structure, with gating and component covariates; the chart has as
    /// many coordinates as the model has free parameters. And the model set from its own
    /// extrapolation coordinates is the same model.
    #[test]
    fn chart_score_is_the_loglik_gradient_for_every_structure(seed in 0u64..10_000, d in 1usize..4, g in 1usize..4,
                                                            with_w: bool, with_z: bool, structure in 0usize..14) {
        let n = 150;
        let (y, w, z, weights) = problem(seed, n, d, g, with_w, with_z);
        let fd = FitData { n, weights: &weights, w: &w.x, p: w.p() };
        let blocks = super::common::gaussian_block(&y, d, &z);
        let structure = CovarianceStructure::all()[structure];
        let structure = if d == 1 && !structure.fits_one_indicator() { CovarianceStructure::all()[1] } else { structure };
        let options = ModelOptions { structure, gating_ridge: 0.0, covariance_prior: false, variance_floor: 0.0, smoothing: 0.0 };
        let model = initial_model(&fd, &blocks, &super::common::free_placement(), g, options);
        let kind = if g == 1 { StartKind::Single } else { StartKind::SeededCentres };
        let tau = partition(kind, &y, d, &weights, g, &mut Stream::new(seed, "start"));
        let run = em::run(&fd, model, tau, EmSettings { max_iterations: 200, tolerance: 1e-10, accelerate: true });
        prop_assume!(run.termination.usable());
        check_chart_score(&run.model, &fd, seed)?;
        check_coordinates_give_back_the_model(&run.model, &fd)?;
    }

    /// The same for the items, counts and mixed families, with direct effects (and their
    /// extrapolation coordinates).
    #[test]
    fn chart_score_is_the_loglik_gradient_for_items_counts_and_mixed(seed in 0u64..10_000, family in 0usize..3, g in 1usize..4,
                                                                     with_w: bool, with_z: bool) {
        let pb = block_problem(seed, 150, family, g, with_w, with_z);
        let fd = pb.data();
        let blocks = pb.blocks();
        let options = ModelOptions { structure: CovarianceStructure::UNCONSTRAINED, gating_ridge: 0.0, covariance_prior: false, variance_floor: 0.0, smoothing: 0.5 };
        let model = initial_model(&fd, &blocks, &super::common::free_placement(), g, options);
        let kind = if g == 1 { StartKind::Single } else { StartKind::SeededCentres };
        let tau = partition(kind, &pb.seeding, pb.seeding_d, &pb.weights, g, &mut Stream::new(seed, "start"));
        let run = em::run(&fd, model, tau, EmSettings { max_iterations: 200, tolerance: 1e-10, accelerate: true });
        prop_assume!(run.termination.usable());
        check_chart_score(&run.model, &fd, seed)?;
        check_coordinates_give_back_the_model(&run.model, &fd)?;
    }
}
