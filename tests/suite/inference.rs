//! Standard errors and effects checked against outside references.

use super::common::*;
use cohortmix::data::Design;
use cohortmix::fit::em::{self, EmSettings};
use cohortmix::fit::initial_model;
use cohortmix::inference::{gating_parameters, uncertainty_of, ErrorMethod, InferenceSettings};
use cohortmix::model::family::CovarianceStructure;
use cohortmix::model::{FitData, Model};
use cohortmix::rng::Stream;
use serde_json::Value;

fn fixture(name: &str) -> Value {
    let text = std::fs::read_to_string(root(&format!("tests/reference/{name}"))).unwrap();
    serde_json::from_str(&text).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

fn settings(method: ErrorMethod) -> InferenceSettings {
    InferenceSettings {
        method,
        replicates: 0,
        seed: 1,
        em: EmSettings {
            max_iterations: 2000,
            tolerance: 1e-14,
            accelerate: true,
        },
        weight_type: None,
        survey: None,
    }
}

/// A study over data drawn from a truth spec, in a fresh folder (kept alive by the
/// returned guard): the study, its data and its prepared placements.
fn simulated(
    truth_text: &str,
    study_text: &str,
) -> (
    tempfile::TempDir,
    cohortmix::spec::Study,
    cohortmix::data::Dataset,
    Vec<cohortmix::fit::PreparedPlacement>,
) {
    use cohortmix::{data, fit, simulate, spec};
    let dir = tempfile::tempdir().unwrap();
    let truth = simulate::parse(&dir.path().join("truth.toml"), truth_text).unwrap();
    std::fs::write(&truth.output, simulate::generate(&truth).csv).unwrap();
    let study = spec::parse(
        &dir.path().join("study.toml"),
        study_text,
        &super::common::families().infos(),
    )
    .unwrap();
    let data = data::load(&study).unwrap();
    let prepared = fit::prepare(&study, &data, &super::common::families()).unwrap();
    (dir, study, data, prepared)
}

/// With hard 0/1 memberships the mixture's gating block is a multinomial logit, and its
/// observed-information standard errors are the logit's.
///
/// Source: statsmodels MNLogit `bse` on its documented anes96 example (944 rows, PID with
/// 7 levels); made by tests/reference/make_gating_anes96.py. Memberships are made hard by
/// one continuous indicator, 1000 × PID plus standard normal noise, so the clusters are
/// PID exactly; frequency weights are checked against the replicated rows.
fn check_anes96_standard_errors(weighted: bool) {
    let reference = fixture("gating_anes96.json");
    let case = &reference[if weighted { "frequency_weighted" } else { "unweighted" }];
    let (header, cols) = read_csv(&root("tests/reference/anes96.csv"));
    let names = ["logpopul", "selfLR", "age", "educ", "income"];
    let columns: Vec<_> = names.iter().map(|n| numeric(col(&header, &cols, n))).collect();
    let named: Vec<(&str, &cohortmix::data::Column)> = names.iter().copied().zip(columns.iter()).collect();
    let n = cols[0].len();
    let design = Design::from_columns(n, &named).unwrap();
    let g = 7;
    let mut noise = Stream::new(96, "anes96-noise");
    let pid: Vec<usize> = col(&header, &cols, "PID").iter().map(|v| v.parse().unwrap()).collect();
    let y: Vec<f64> = pid.iter().map(|k| 1000.0 * *k as f64 + noise.normal()).collect();
    let mut tau = vec![0.0; n * g];
    for (i, k) in pid.iter().enumerate() {
        tau[i * g + k] = 1.0;
    }
    let weights: Vec<f64> = if weighted {
        col(&header, &cols, "freq").iter().map(|v| v.parse().unwrap()).collect()
    } else {
        vec![1.0; n]
    };
    let intercept = Design::intercept(n);
    let fd = FitData {
        n,
        weights: &weights,
        w: &design.x,
        p: design.p(),
    };
    let blocks = gaussian_block(&y, 1, &intercept);
    let options = plain_options(CovarianceStructure::all()[1]);
    let mut model = initial_model(&fd, &blocks, &free_placement(), g, options);
    model.gating.prepare_bound(fd.w, fd.weights);
    let run = em::run(&fd, model, tau.clone(), settings(ErrorMethod::ObservedInformation).em);
    assert!(run.termination.usable(), "{:?}", run.termination);
    let reported = |m: &Model| gating_parameters(&m.gating, &design);
    let u = uncertainty_of(
        &run.model,
        &run.tau,
        &fd,
        &reported,
        &settings(ErrorMethod::ObservedInformation),
        "anes96",
    )
    .expect("standard errors");
    let (mut worst_coef, mut worst_se) = (16.0f64, 16.0f64);
    let p = design.p();
    for (k, (ref_coef, ref_se)) in case["coefficients"]
        .as_array()
        .unwrap()
        .iter()
        .zip(case["standard_errors"].as_array().unwrap())
        .enumerate()
    {
        for (a, (c, s)) in floats(ref_coef).into_iter().zip(floats(ref_se)).enumerate() {
            let i = k * p + a;
            worst_coef = worst_coef.min(digits(u.parameters[i].value, c));
            worst_se = worst_se.min(digits(u.se(i), s));
        }
    }
    println!(
        "anes96 weighted={weighted}: coefficients agree to {worst_coef:.1} digits, standard errors to {worst_se:.1}"
    );
    assert!(worst_coef >= 6.0, "coefficients agree to only {worst_coef:.1} digits");
    assert!(worst_se >= 4.0, "standard errors agree to only {worst_se:.1} digits");
}

#[test]
fn gating_standard_errors_match_statsmodels_mnlogit_on_anes96() {
    check_anes96_standard_errors(false);
}

#[test]
fn gating_standard_errors_with_frequency_weights_match_replicated_rows() {
    check_anes96_standard_errors(true);
}

/// Observed-information standard errors of a fitted mixture of experts (3 clusters on
/// iris petal length and width, a covariance per cluster, gating on sepal length) agree
/// with the inverse of an independent numerical Hessian of the log-likelihood.
///
/// Source: tests/reference/make_information_iris.py (numpy log-likelihood with a Cholesky
/// parameterisation of the covariances, scipy maximum, numdifftools Hessian); iris as
/// bundled with scikit-learn.
#[test]
fn mixture_standard_errors_match_an_independent_numerical_hessian() {
    let reference = fixture("information_iris.json");
    let (header, cols) = read_csv(&root("tests/reference/iris.csv"));
    let n = cols[0].len();
    let sl = numeric(col(&header, &cols, "sepal_length"));
    let design = Design::from_columns(n, &[("sepal_length", &sl)]).unwrap();
    let pl: Vec<f64> = col(&header, &cols, "petal_length")
        .iter()
        .map(|v| v.parse().unwrap())
        .collect();
    let pw: Vec<f64> = col(&header, &cols, "petal_width")
        .iter()
        .map(|v| v.parse().unwrap())
        .collect();
    let y: Vec<f64> = pl.iter().zip(&pw).flat_map(|(a, b)| [*a, *b]).collect();
    let species: Vec<usize> = col(&header, &cols, "species")
        .iter()
        .map(|v| v.parse().unwrap())
        .collect();
    let weights = vec![1.0; n];
    let intercept = Design::intercept(n);
    let fd = FitData {
        n,
        weights: &weights,
        w: &design.x,
        p: design.p(),
    };
    let names = vec!["petal_length".to_string(), "petal_width".to_string()];
    let blocks = named_gaussian_block(&names, &y, &intercept);
    let options = plain_options(CovarianceStructure::UNCONSTRAINED);
    let g = 3;
    let mut tau = vec![0.0; n * g];
    for (i, k) in species.iter().enumerate() {
        tau[i * g + k] = 1.0;
    }
    let mut model = initial_model(&fd, &blocks, &free_placement(), g, options);
    model.gating.prepare_bound(fd.w, fd.weights);
    let run = em::run(&fd, model, tau, settings(ErrorMethod::ObservedInformation).em);
    let ref_ll = reference["loglik"].as_f64().unwrap();
    assert!(digits(run.loglik, ref_ll) >= 8.0, "loglik {} vs {ref_ll}", run.loglik);
    let reported = |m: &Model| {
        let mut out = gating_parameters(&m.gating, &design);
        out.extend(m.components.parameters());
        out
    };
    let u = uncertainty_of(
        &run.model,
        &run.tau,
        &fd,
        &reported,
        &settings(ErrorMethod::ObservedInformation),
        "iris",
    )
    .expect("standard errors");
    let mut worst = 16.0f64;
    let terms = ["intercept", "sepal_length"];
    for (k, ses) in reference["gating_standard_errors"]
        .as_array()
        .unwrap()
        .iter()
        .enumerate()
    {
        for (term, s) in terms.iter().zip(floats(ses)) {
            let i = u.index("gating", k + 2, None, Some(term)).unwrap();
            worst = worst.min(digits(u.se(i), s));
        }
    }
    for (k, ses) in reference["mean_standard_errors"].as_array().unwrap().iter().enumerate() {
        for (ind, s) in names.iter().zip(floats(ses)) {
            let i = u.index("mean", k + 1, Some(ind), Some("intercept")).unwrap();
            worst = worst.min(digits(u.se(i), s));
        }
    }
    println!(
        "iris mixture: loglik {} vs {ref_ll}; standard errors agree to {worst:.1} digits",
        run.loglik
    );
    assert!(worst >= 3.0, "standard errors agree to only {worst:.1} digits");
}

/// A two-cluster truth with a continuous and a binary gating effect; `{seed}` and
/// `{rows}` are filled in per replicate.
const COVERAGE_TRUTH: &str = r#"
[simulation]
title = "coverage"
rows = {rows}
seed = {seed}
output = "data.csv"
indicators = ["fev1", "fvc"]
decimals = 3

[[covariate]]
name = "age"
distribution = "normal"
mean = 45
sd = 10

[[covariate]]
name = "smoker"
distribution = "bernoulli"
probability = 0.35

[[cluster]]
name = "reference"
mean = { fev1 = 100, fvc = 100 }
sd = { fev1 = 10, fvc = 10 }
correlation = 0.5

[[cluster]]
name = "low"
gating = { intercept = -2.3, age = 0.04, smoker = 0.7 }
mean = { fev1 = 75, fvc = 90 }
sd = { fev1 = 12, fvc = 10 }
correlation = 0.5
"#;

const COVERAGE_STUDY: &str = r#"
[study]
title = "coverage"
data = "data.csv"
seed = 7

[variables]
age = "continuous"
smoker = "binary"

[indicators]
columns = ["fev1", "fvc"]

[search]
clusters = [2]
starts = 4
covariance = [{ volume = "varying", shape = "varying", orientation = "varying" }]

[[placement]]
name = "gating"
gating = ["age", "smoker"]
"#;

/// Coverage of 95% observed-information intervals of gating effects over 500 simulated
/// data sets (800 rows, two overlapping clusters, so memberships are soft): the age and
/// smoking log relative risk ratios of cluster 2 against cluster 1 (true 0.04 and 0.7).
/// With 1,000 intervals the coverage's standard error is about 0.7 points; the test
/// asks for 93–97%.
#[test]
#[ignore = "slow coverage simulation (about a minute); CI runs it"]
fn gating_intervals_cover_the_truth_95_percent_of_the_time() {
    use cohortmix::inference;
    use rayon::prelude::*;
    let truth_values = [("age", 0.04), ("smoker", 0.7)];
    let replicates = 500;
    let results: Vec<Option<[bool; 2]>> = (0..replicates)
        .into_par_iter()
        .map(|r| {
            let text = COVERAGE_TRUTH
                .replace("{rows}", "800")
                .replace("{seed}", &(1000 + r).to_string());
            let (_dir, study, data, prepared) = simulated(&text, COVERAGE_STUDY);
            let result = super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
            let best = result.best.as_ref()?;
            let u = inference::uncertainty(
                &best.run.model,
                &best.run.tau,
                &data,
                &prepared[0],
                &inference::settings_for(&study),
                "coverage",
            )
            .ok()?;
            // Fitted cluster 1 is the larger; the truth's reference has the higher fev1.
            let mean = |k| u.parameters[u.index("mean", k, Some("fev1"), Some("intercept")).unwrap()].value;
            let sign = if mean(1) > mean(2) { 1.0 } else { -1.0 };
            let mut covered = [false; 2];
            for (c, (term, value)) in covered.iter_mut().zip(truth_values) {
                let i = u.index("gating", 2, None, Some(term)).unwrap();
                let (est, se) = (u.parameters[i].value, u.se(i));
                *c = (est - sign * value).abs() <= inference::effects::Z_95 * se;
            }
            Some(covered)
        })
        .collect();
    let usable: Vec<[bool; 2]> = results.into_iter().flatten().collect();
    assert!(
        usable.len() >= replicates * 98 / 100,
        "only {} usable fits",
        usable.len()
    );
    for (j, (term, _)) in truth_values.iter().enumerate() {
        let rate = usable.iter().filter(|c| c[j]).count() as f64 / usable.len() as f64;
        println!(
            "coverage of the {term} effect: {:.1}% of {}",
            100.0 * rate,
            usable.len()
        );
    }
    let all = usable.iter().flatten().filter(|c| **c).count() as f64 / (2 * usable.len()) as f64;
    println!(
        "coverage of both: {:.1}% of {} intervals",
        100.0 * all,
        2 * usable.len()
    );
    assert!((0.93..=0.97).contains(&all), "coverage {:.1}%", 100.0 * all);
}

/// On one simulated data set the three methods agree where theory says they should
/// (a correctly specified model: sandwich and bootstrap standard errors estimate the
/// same thing as the observed information), and the bootstrap gives the same bytes on
/// one thread and on two.
#[test]
fn sandwich_and_bootstrap_agree_with_the_observed_information() {
    use cohortmix::inference;
    let text = COVERAGE_TRUTH.replace("{rows}", "2000").replace("{seed}", "31");
    let (_dir, study, data, prepared) = simulated(&text, COVERAGE_STUDY);
    let result = super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
    let best = result.best.as_ref().unwrap();
    let run = |method, replicates| {
        let mut s = inference::settings_for(&study);
        s.method = method;
        s.replicates = replicates;
        inference::uncertainty(&best.run.model, &best.run.tau, &data, &prepared[0], &s, "agree").unwrap()
    };
    let info = run(ErrorMethod::ObservedInformation, 0);
    let sandwich = run(ErrorMethod::Sandwich, 0);
    let pool = |n| rayon::ThreadPoolBuilder::new().num_threads(n).build().unwrap();
    let boot = pool(2).install(|| run(ErrorMethod::Bootstrap, 200));
    let boot_one = pool(1).install(|| run(ErrorMethod::Bootstrap, 200));
    assert_eq!(
        boot.covariance, boot_one.covariance,
        "bootstrap depends on the thread count"
    );
    assert_eq!(
        boot.replicates.unwrap().0,
        200,
        "every bootstrap refit should be usable here"
    );
    for term in ["intercept", "age", "smoker"] {
        let i = info.index("gating", 2, None, Some(term)).unwrap();
        let (a, b, c) = (info.se(i), sandwich.se(i), boot.se(i));
        println!("gating {term}: observed information {a:.4}, sandwich {b:.4}, bootstrap {c:.4}");
        // The sandwich and the bootstrap estimate the same standard error with their own
        // noise: about 5% per standard deviation for 200 replicates (√(1/(2·200))), more
        // for the sandwich of a mean in overlapping clusters (14% at this seed; 2–5% at
        // seeds 32–34).
        assert!((b / a - 1.0).abs() < 0.2, "sandwich {b} vs {a}");
        assert!((c / a - 1.0).abs() < 0.2, "bootstrap {c} vs {a}");
    }
    for ind in ["fev1", "fvc"] {
        let i = info.index("mean", 2, Some(ind), Some("intercept")).unwrap();
        let (a, b, c) = (info.se(i), sandwich.se(i), boot.se(i));
        println!("mean {ind}, cluster 2: observed information {a:.4}, sandwich {b:.4}, bootstrap {c:.4}");
        assert!((b / a - 1.0).abs() < 0.2 && (c / a - 1.0).abs() < 0.2);
    }
}

/// `predict` on the rows a model was fitted to gives back the fitted posteriors bit for
/// bit, through the saved-model file, for the mixed family (a continuous indicator,
/// binary and three-level items with missing values, a count with an exposure) with
/// gating covariates and a direct effect; a new level of a covariate or an item is an
/// error that names it.
#[test]
fn predict_reproduces_the_fitted_posteriors_exactly() {
    use cohortmix::fit::{self, saved};
    use cohortmix::{data, spec};
    let text = std::fs::read_to_string(root("configs/symptoms.toml"))
        .unwrap()
        .replace("clusters = [1, 2, 3, 4]", "clusters = [3]")
        .replace("starts = 10", "starts = 3");
    let spec_path = root("configs/symptoms-test.toml");
    let study = spec::parse(&spec_path, &text, &super::common::families().infos()).unwrap();
    let data = data::load(&study).unwrap();
    let prepared = fit::prepare(&study, &data, &super::common::families()).unwrap();
    let fits = fit::fit_grid(&study, &data, &prepared, |_, _, _| {});
    let reported: Vec<usize> = fit::chosen_fits(&fits, prepared.len(), None)
        .into_iter()
        .flatten()
        .collect();
    let numbers = cohortmix::compare::Numbering::as_fitted(&fits).numbers;
    let json = serde_json::to_string(&saved::save(&study, &data, &prepared, &fits, &reported, &numbers)).unwrap();
    let stored: saved::SavedRun = serde_json::from_str(&json).unwrap();
    assert_eq!(stored.fits.len(), 4);
    let dir = tempfile::tempdir().unwrap();
    let csv = std::fs::read_to_string(root("demo-data/symptoms.csv")).unwrap();
    let copy = dir.path().join("same.csv");
    std::fs::write(&copy, &csv).unwrap();
    let (saved_study, new) = saved::load_new_data(&stored, &copy, &super::common::families()).unwrap();
    let predicted = saved::predict(&stored, &saved_study, &new, &super::common::families()).unwrap();
    for (p, f) in predicted.iter().zip(&fits) {
        assert_eq!(p.placement, f.placement);
        let fitted = &f.best.as_ref().unwrap().run.tau;
        let diff = p.tau.iter().zip(fitted).map(|(a, b)| (a - b).abs()).fold(0.0, f64::max);
        assert!(
            p.tau == *fitted,
            "'{}': predicted posteriors differ from the fitted ones by up to {diff:e}",
            p.placement
        );
    }

    // A covariate level the model never saw.
    let odd = csv.replacen(",male,", ",intersex,", 1);
    std::fs::write(&copy, &odd).unwrap();
    let (saved_study, new) = saved::load_new_data(&stored, &copy, &super::common::families()).unwrap();
    let err = saved::predict(&stored, &saved_study, &new, &super::common::families())
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("'sex' has the level 'intersex'") && err.contains("female, male"),
        "{err}"
    );
    // An item value the model never saw (the spec lists the item's levels, so the data
    // check catches it, with the line and column).
    let odd = csv.replacen(",often,", ",daily,", 1);
    std::fs::write(&copy, &odd).unwrap();
    let err = saved::load_new_data(&stored, &copy, &super::common::families())
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("'daily' is not a level of item 'chest_tightness'") && err.contains("same.csv:2:"),
        "{err}"
    );
    // A missing column.
    let header_cut = csv.replacen("worker_id,age,", "worker_id,age_years,", 1);
    std::fs::write(&copy, &header_cut).unwrap();
    let err = saved::load_new_data(&stored, &copy, &super::common::families())
        .unwrap_err()
        .to_string();
    assert!(err.contains("'age'"), "{err}");
}

/// Three-step estimation against a known gating effect. Data: 20,000 rows from two
/// overlapping clusters (about one row in eight misclassified) whose membership depends
/// on age (log relative risk 0.04 per year) and smoking (0.7). Classify-analyze
/// attenuates both effects; the BCH and ML corrections recover them (within 4 of their
/// own standard errors), as Vermunt (2010) and Bakk, Tekle & Vermunt (2013) found.
#[test]
fn three_step_corrections_undo_the_attenuation_of_classify_analyze() {
    use cohortmix::fit::three_step;
    use cohortmix::spec::Method;
    let text = COVERAGE_TRUTH
        .replace("{rows}", "20000")
        .replace("{seed}", "77")
        .replace("mean = { fev1 = 75, fvc = 90 }", "mean = { fev1 = 82, fvc = 94 }");
    let study_text = COVERAGE_STUDY.replace(
        "gating = [\"age\", \"smoker\"]",
        "gating = [\"age\", \"smoker\"]\nmethod = \"three-step-ml\"",
    );
    let (_dir, study, data, prepared) = simulated(&text, &study_text);
    let design = prepared[0]
        .step_three
        .as_ref()
        .expect("a three-step placement keeps its covariates");
    let result = super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
    let best = result.best.as_ref().unwrap();
    let ml = result.step_three.as_ref().unwrap().as_ref().unwrap();
    let bch = three_step::estimate(
        Method::ThreeStepBch,
        &best.run.tau,
        &three_step::log_shares(&best.run.model),
        2,
        &data.weights,
        None,
        design,
    )
    .unwrap();
    // Fitted cluster 1 is the larger one; when that is the truth's second cluster the
    // log relative risks change sign.
    let mean = |k: usize| {
        best.run
            .model
            .components
            .find::<cohortmix::model::family::GaussianComponents>()
            .unwrap()
            .coef[k * 2]
    };
    let sign = if mean(0) > mean(1) { 1.0 } else { -1.0 };
    let original = |gamma: &[f64], cov: &nalgebra::DMatrix<f64>, j: usize| {
        let value = sign * design.to_original_scale(gamma)[j];
        // Slopes map by 1/scale alone.
        (value, cov[(j, j)].sqrt() / design.terms[j].scale)
    };
    println!("misclassified: {:.1}%", 100.0 * ml.misclassified);
    assert!(ml.misclassified > 0.08, "the clusters should overlap");
    for (j, (term, truth)) in [("age", 0.04), ("smoker", 0.7)]
        .into_iter()
        .enumerate()
        .map(|(j, t)| (j + 1, t))
    {
        let (naive, naive_se) = original(&ml.naive_gamma, &ml.naive_covariance, j);
        let (b, b_se) = original(&bch.gamma, &bch.covariance, j);
        let (m, m_se) = original(&ml.gamma, &ml.covariance, j);
        println!(
            "{term}: truth {truth}; classify-analyze {naive:.4} (se {naive_se:.4}); BCH {b:.4} (se {b_se:.4}); ML {m:.4} (se {m_se:.4})"
        );
        assert!(
            naive.abs() < 0.9 * truth,
            "{term}: classify-analyze should attenuate: {naive}"
        );
        assert!((b - truth).abs() < 4.0 * b_se, "{term}: BCH {b} ± {b_se}");
        assert!((m - truth).abs() < 4.0 * m_se, "{term}: ML {m} ± {m_se}");
        assert!(
            b_se > naive_se && m_se > naive_se,
            "corrected estimates should be less precise"
        );
    }
}

/// The direct-effect screen finds the direct effects the symptom demo's truth has
/// (smoking on cough in every cluster, smoking on sick-leave spells in one cluster) and
/// flags nothing else, for a one-step and a three-step placement; for the three-step one
/// it marks the failed assumption.
#[test]
fn direct_effect_screen_finds_the_true_direct_effects() {
    use cohortmix::inference::screen::screen;
    use cohortmix::{data, fit, spec};
    let text = std::fs::read_to_string(root("configs/symptoms.toml"))
        .unwrap()
        .replace("clusters = [1, 2, 3, 4]", "clusters = [3]")
        .replace("starts = 10", "starts = 3");
    let study = spec::parse(
        &root("configs/symptoms-test.toml"),
        &text,
        &super::common::families().infos(),
    )
    .unwrap();
    let data = data::load(&study).unwrap();
    let prepared = fit::prepare(&study, &data, &super::common::families()).unwrap();
    let fits = fit::fit_grid(&study, &data, &prepared, |_, _, _| {});
    let which: Vec<usize> = fits
        .iter()
        .enumerate()
        .filter(|(_, f)| f.placement.starts_with("age, sex, smoking"))
        .map(|(i, _)| i)
        .collect();
    assert_eq!(which.len(), 2);
    let tests = screen(&study, &data, &prepared, &fits, &which);
    for t in tests
        .iter()
        .filter(|t| t.flagged || t.p_value.is_some_and(|p| p < 0.01))
    {
        println!(
            "{}: {} -> {}: LR {:?}, df {}, p {:?}, flagged {}",
            t.placement, t.covariate, t.indicator, t.statistic, t.df, t.p_value, t.flagged
        );
    }
    for t in &tests {
        println!(
            "{}: {} -> {}: shared score {:?} (df {}, p {:?}, flagged {}); per cluster LR {:?} (df {})",
            t.placement,
            t.covariate,
            t.indicator,
            t.shared.statistic,
            t.shared.df,
            t.shared.p_value,
            t.shared.flagged,
            t.statistic,
            t.df
        );
    }
    assert!(
        tests.iter().all(|t| t.statistic.is_some()),
        "every refit should be usable"
    );
    assert!(
        tests.iter().all(|t| t.shared.statistic.is_some()),
        "every shared test should have a statistic: {:?}",
        tests
            .iter()
            .find(|t| t.shared.statistic.is_none())
            .map(|t| &t.shared.note)
    );
    // The shared test adds (L − 1)·t parameters where the per-cluster test adds G times
    // as many (3 clusters here).
    assert!(tests.iter().all(|t| t.df == 3 * t.shared.df));
    let flagged: Vec<(&str, &str, &str, bool)> = tests
        .iter()
        .filter(|t| t.flagged)
        .map(|t| {
            (
                t.placement.as_str(),
                t.covariate.as_str(),
                t.indicator.as_str(),
                t.step_three_covariate,
            )
        })
        .collect();
    let one = "age, sex, smoking drive membership";
    let three = "age, sex, smoking related to the unadjusted clusters (three-step)";
    assert_eq!(
        flagged,
        vec![
            (one, "smoker", "cough", false),
            (one, "smoker", "sick_leave_spells", false),
            (three, "smoker", "cough", true),
            (three, "smoker", "sick_leave_spells", true),
        ]
    );
}

/// The screen's score machinery (the larger model set at the smaller one's optimum, its
/// added coordinates found and tied) against the likelihood-ratio test of the same
/// per-cluster effects: the two statistics are asymptotically equivalent (Rao 1948; Wilks
/// 1938), so where the effect is absent or small they must nearly agree. Symptom demo
/// (items, counts and a continuous indicator), 3 clusters.
#[test]
fn score_and_likelihood_ratio_statistics_agree_near_the_null() {
    use cohortmix::inference::screen::per_cluster_scores;
    use cohortmix::{data, fit, spec};
    let text = std::fs::read_to_string(root("configs/symptoms.toml"))
        .unwrap()
        .replace("clusters = [1, 2, 3, 4]", "clusters = [3]")
        .replace("starts = 10", "starts = 3");
    let study = spec::parse(
        &root("configs/symptoms-test.toml"),
        &text,
        &super::common::families().infos(),
    )
    .unwrap();
    let data = data::load(&study).unwrap();
    let prepared = fit::prepare(&study, &data, &super::common::families()).unwrap();
    let fits = fit::fit_grid(&study, &data, &prepared, |_, _, _| {});
    let which = fits
        .iter()
        .position(|f| f.placement.starts_with("age, sex, smoking drive"))
        .unwrap();
    let rows = per_cluster_scores(&study, &data, &prepared, &fits, which);
    let mut compared = 0;
    for (c, indicator, score, lr, df) in &rows {
        println!("{c} -> {indicator}: score {score:?}, LR {lr:?}, df {df}");
        let (score, lr) = (
            score.expect("a score statistic"),
            lr.expect("a likelihood-ratio statistic"),
        );
        if lr < 3.0 * *df as f64 {
            // Near the null: within 10% of each other, or 1 unit for small statistics.
            assert!(
                (score - lr).abs() < (0.1 * lr).max(1.0),
                "{c} -> {indicator}: score {score} against LR {lr}"
            );
            compared += 1;
        }
    }
    assert!(compared >= 6, "only {compared} pairs near the null");
}

/// The bootstrap likelihood-ratio test (McLachlan 1987) rejects one cluster on data
/// drawn with two, and does not reject one cluster (at 5%) on data drawn with one.
/// 99 replicates, so that one replicate at or above the statistic still leaves p below
/// 5%: on the two-cluster data one does, a small cluster on a line (a spurious optimum
/// that EM also reaches without extrapolation when run to a tolerance of 1e-14).
#[test]
fn bootstrap_cluster_count_test_rejects_only_a_false_null() {
    use cohortmix::fit;
    use cohortmix::inference::cluster_test;
    let truth_two = r#"
[simulation]
rows = 300
seed = 5
output = "data.csv"
indicators = ["fev1", "fvc"]
decimals = 3
[[covariate]]
name = "age"
distribution = "normal"
mean = 45
sd = 10
[[cluster]]
name = "a"
mean = { fev1 = 100, fvc = 100 }
sd = { fev1 = 10, fvc = 10 }
correlation = 0.3
[[cluster]]
name = "b"
gating = { intercept = -0.5 }
mean = { fev1 = 80, fvc = 95 }
sd = { fev1 = 10, fvc = 10 }
correlation = 0.3
"#;
    let truth_one = truth_two.replace("gating = { intercept = -0.5 }", "gating = { intercept = -40 }");
    let study_text = r#"
[study]
title = "cluster count"
data = "data.csv"
seed = 3
[indicators]
columns = ["fev1", "fvc"]
[search]
clusters = [1, 2]
starts = 4
covariance = [{ volume = "varying", shape = "varying", orientation = "varying" }]
"#;
    let p_value = |truth: &str| {
        let (_dir, study, data, prepared) = simulated(truth, study_text);
        let fits = fit::fit_grid(&study, &data, &prepared, |_, _, _| {});
        let two = fits.iter().position(|f| f.clusters == 2).unwrap();
        let tests = cluster_test::test(&study, &data, &prepared, &fits, &[two], 99);
        let t = &tests[0];
        println!(
            "LR {:.2}: {} of {} usable replicates reached it, p = {:.3}",
            t.statistic, t.reached, t.usable, t.p_value
        );
        assert!(t.usable >= 95);
        t.p_value
    };
    assert!(p_value(truth_two) < 0.05, "two clusters in the data");
    assert!(p_value(&truth_one) > 0.05, "one cluster in the data");
}

const CLUSTER_SAMPLE_STUDY: &str = r#"
[study]
title = "two-stage cluster sample"
data = "data.csv"
strata = "region"
psu = "workplace"
seed = 5

[variables]
x = "continuous"

[indicators]
columns = ["y"]

[search]
clusters = [2]
starts = 4


[[placement]]
name = "gating"
gating = ["x"]
"#;

/// A two-stage cluster sample: 2 regions (strata), 40 workplaces (primary sampling units)
/// in each, 25 people per workplace. The covariate is clustered (x = 0.8 u_workplace +
/// 0.6 e), and so is membership: z = 1 when −0.3 + 0.8 x + ε > 0, where ε is, with
/// probability 0.5, the workplace's logistic draw and otherwise the person's own. A
/// mixture of two logistic distributions is logistic, so P(z = 1 | x) is exactly the logit
/// −0.3 + 0.8 x, the gating's target, while people of one workplace are alike. y is
/// N(0, 1) in cluster 1 and N(3, 1) in cluster 2, plus, when `y_shared_sd` > 0, a
/// workplace's own N(0, y_shared_sd²) shift (people of one workplace measure alike).
fn cluster_sample(seed: u64, y_shared_sd: f64) -> String {
    let mut rng = cohortmix::rng::Stream::new(seed, "cluster sample");
    let mut text = String::from("region,workplace,x,y\n");
    for region in 0..2 {
        for workplace in 0..40 {
            let u = rng.normal();
            let y_shared = y_shared_sd * rng.normal();
            let shared = rng.uniform();
            let shared = (shared / (1.0 - shared)).ln();
            for _ in 0..25 {
                let x = 0.8 * u + 0.6 * rng.normal();
                let epsilon = if rng.uniform() < 0.5 {
                    shared
                } else {
                    let own = rng.uniform();
                    (own / (1.0 - own)).ln()
                };
                let z = -0.3 + 0.8 * x + epsilon > 0.0;
                let y = if z { 3.0 } else { 0.0 } + y_shared + rng.normal();
                text.push_str(&format!("r{region},{workplace},{x:.6},{y:.6}\n"));
            }
        }
    }
    text
}

/// Coverage of 95% intervals for the gating slope (true 0.8) over 4,000 two-stage cluster
/// samples of 2,000 people: design-based (linearised over workplaces within regions)
/// against the same sandwich with people as the units and the observed information.
/// With 4,000 intervals the coverage's standard error is about 0.35 points; the
/// design-based intervals must cover 93.5–96.5%, and the naive ones must fall short (they
/// do, by over 20 points).
#[test]
#[ignore = "slow coverage simulation (about a minute); CI runs it"]
fn design_based_intervals_cover_under_a_two_stage_cluster_sample() {
    use cohortmix::{data, fit, inference, spec};
    use rayon::prelude::*;
    let replicates = 4000;
    let results: Vec<Option<[bool; 3]>> = (0..replicates)
        .into_par_iter()
        .map(|r| {
            let dir = tempfile::tempdir().unwrap();
            std::fs::write(dir.path().join("data.csv"), cluster_sample(7000 + r as u64, 0.0)).unwrap();
            let families = super::common::families();
            let study = spec::parse(&dir.path().join("study.toml"), CLUSTER_SAMPLE_STUDY, &families.infos()).unwrap();
            let data = data::load(&study).unwrap();
            let prepared = fit::prepare(&study, &data, &families).unwrap();
            let result = super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
            let best = result.best.as_ref()?;
            let covered = |method, survey| {
                let mut s = inference::settings_for(&study);
                s.method = method;
                s.survey = survey;
                let u =
                    inference::uncertainty(&best.run.model, &best.run.tau, &data, &prepared[0], &s, "cover").ok()?;
                let mean = |k| u.parameters[u.index("mean", k, Some("y"), Some("intercept")).unwrap()].value;
                // Cluster 2 of the truth has the higher mean.
                let sign = if mean(2) > mean(1) { 1.0 } else { -1.0 };
                let i = u.index("gating", 2, None, Some("x")).unwrap();
                Some((u.parameters[i].value - sign * 0.8).abs() <= inference::effects::Z_95 * u.se(i))
            };
            Some([
                covered(ErrorMethod::Sandwich, data.survey.clone())?,
                covered(ErrorMethod::Sandwich, None)?,
                covered(ErrorMethod::ObservedInformation, None)?,
            ])
        })
        .collect();
    let usable: Vec<[bool; 3]> = results.into_iter().flatten().collect();
    assert!(
        usable.len() >= replicates * 98 / 100,
        "only {} usable fits",
        usable.len()
    );
    let rate = |j: usize| usable.iter().filter(|c| c[j]).count() as f64 / usable.len() as f64;
    println!(
        "coverage of the slope over {} samples: design-based {:.1}%, people as units {:.1}%, observed information {:.1}%",
        usable.len(),
        100.0 * rate(0),
        100.0 * rate(1),
        100.0 * rate(2)
    );
    assert!(
        (0.935..=0.965).contains(&rate(0)),
        "design-based coverage {:.1}%",
        100.0 * rate(0)
    );
    assert!(
        rate(1) < 0.9,
        "the naive intervals cover {:.1}%: the simulation shows no design effect",
        100.0 * rate(1)
    );
}

/// Coverage of 95% intervals of three-step gating effects whose errors include step 1
/// (Bakk, Oberski & Vermunt 2014), BCH and ML, and of two-step ones (Bakk & Kuha 2018)
/// beside one-step ones on the same data, over 500 data sets of 2,000 rows with
/// clusters that overlap so much that about a quarter of the rows are misclassified: the
/// age and smoking log relative risk ratios (true 0.04 and 0.7). Step 3's own errors (step 1
/// taken as known) are reported beside them.
#[test]
#[ignore = "slow coverage simulation (a few minutes); CI runs it"]
fn corrected_three_step_intervals_cover_the_truth() {
    use cohortmix::inference;
    use rayon::prelude::*;
    let replicates = 500;
    let truth_values = [("age", 0.04), ("smoker", 0.7)];
    let text = |r: usize| {
        COVERAGE_TRUTH
            .replace("{rows}", "2000")
            .replace("{seed}", &(5000 + r).to_string())
            .replace("mean = { fev1 = 75, fvc = 90 }", "mean = { fev1 = 86, fvc = 97 }")
    };
    let study = |method: &str| {
        COVERAGE_STUDY.replace(
            "gating = [\"age\", \"smoker\"]",
            &format!("gating = [\"age\", \"smoker\"]\nmethod = \"{method}\""),
        )
    };
    // Per replicate and method: misclassified share, [covered with step 1, covered by step 3 alone] per effect.
    type Outcome = (f64, [[bool; 2]; 2]);
    let results: Vec<Option<[Outcome; 4]>> = (0..replicates)
        .into_par_iter()
        .map(|r| {
            let one = |method: &str| -> Option<Outcome> {
                let (_dir, study, data, prepared) = simulated(&text(r), &study(method));
                let result =
                    super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
                // The one-step fit, the yardstick, has no step 3.
                let stepwise = method != "one-step";
                let st = if stepwise {
                    Some(result.step_three.as_ref()?.as_ref().ok()?.clone())
                } else {
                    None
                };
                let fits = [result];
                let inf = inference::for_fits(&study, &data, &prepared, &fits, &[0]).pop()??;
                // Only fits whose errors include step 1 (a fit falls back to step 3's own
                // errors when a moved step 1 has no converging step 3).
                if stepwise {
                    inf.step_three_errors.as_ref()?;
                }
                let u = inf.uncertainty.ok()?;
                let best = fits[0].best.as_ref()?;
                let gauss = best
                    .run
                    .model
                    .components
                    .find::<cohortmix::model::family::GaussianComponents>()?;
                // Fitted cluster 1 is the larger; the truth's reference has the higher fev1.
                let sign = if gauss.coef[0] > gauss.coef[2] { 1.0 } else { -1.0 };
                let mut covered = [[false; 2]; 2];
                for (j, (term, value)) in truth_values.iter().enumerate() {
                    let i = u.index("gating", 2, None, Some(term))?;
                    let est = u.parameters[i].value;
                    let own_se = match (&st, prepared[0].step_three.as_ref()) {
                        (Some(st), Some(design)) => st.covariance[(j + 1, j + 1)].sqrt() / design.terms[j + 1].scale,
                        _ => u.se(i),
                    };
                    covered[j] = [
                        (est - sign * value).abs() <= inference::effects::Z_95 * u.se(i),
                        (est - sign * value).abs() <= inference::effects::Z_95 * own_se,
                    ];
                }
                Some((st.map_or(f64::NAN, |st| st.misclassified), covered))
            };
            Some([
                one("three-step-bch")?,
                one("three-step-ml")?,
                one("two-step")?,
                one("one-step")?,
            ])
        })
        .collect();
    let usable: Vec<[Outcome; 4]> = results.into_iter().flatten().collect();
    assert!(
        usable.len() >= replicates * 9 / 10,
        "only {} usable replicates",
        usable.len()
    );
    let misclassified = usable.iter().map(|o| o[0].0).sum::<f64>() / usable.len() as f64;
    println!(
        "{} replicates; mean share misclassified {:.1}%",
        usable.len(),
        100.0 * misclassified
    );
    let rate = |m: usize, own: usize| {
        usable
            .iter()
            .map(|o| o[m].1.iter().filter(|c| c[own]).count())
            .sum::<usize>() as f64
            / (2 * usable.len()) as f64
    };
    for (m, name) in ["BCH", "ML", "two-step", "one-step"].iter().enumerate() {
        let rate = |own: usize| rate(m, own);
        let per_effect = |j: usize| usable.iter().filter(|o| o[m].1[j][0]).count() as f64 / usable.len() as f64;
        println!(
            "{name}: with step 1 {:.1}% (age {:.1}%, smoking {:.1}%); step 3 alone {:.1}%",
            100.0 * rate(0),
            100.0 * per_effect(0),
            100.0 * per_effect(1),
            100.0 * rate(1)
        );
    }
    for (m, name) in ["BCH", "ML"].iter().enumerate() {
        assert!(
            (0.935..=0.965).contains(&rate(m, 0)),
            "{name} coverage {:.1}%",
            100.0 * rate(m, 0)
        );
    }
    // Two-step errors are nearly the one-step ones (Bakk & Kuha 2018), so its coverage
    // follows one-step's on the same data sets, which in this design runs a little above
    // 95% for smoking (observed information, 2 clusters that overlap this much).
    assert!(
        rate(2, 0) >= 0.935 && (rate(2, 0) - rate(3, 0)).abs() <= 0.015,
        "two-step coverage {:.1}% against one-step {:.1}%",
        100.0 * rate(2, 0),
        100.0 * rate(3, 0)
    );
    assert!(
        (0.2..=0.3).contains(&misclassified),
        "misclassified {:.1}%",
        100.0 * misclassified
    );
}

/// Two-step estimates (the full likelihood with step 1's clusters held) sit within half a
/// standard error of the one-step ones on data the model fits, and their errors (with step
/// 1's part) are near the one-step errors (Bakk & Kuha 2018 found two-step nearly as
/// efficient as one-step); the three-step BCH estimates are printed beside them.
#[test]
fn two_step_estimates_sit_near_the_one_step_ones() {
    use cohortmix::inference;
    let text = COVERAGE_TRUTH.replace("{rows}", "3000").replace("{seed}", "77");
    let estimate = |method: &str| {
        let study_text = COVERAGE_STUDY.replace(
            "gating = [\"age\", \"smoker\"]",
            &format!("gating = [\"age\", \"smoker\"]\nmethod = \"{method}\""),
        );
        let (_dir, study, data, prepared) = simulated(&text, &study_text);
        let fit = super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
        let gauss = fit
            .best
            .as_ref()
            .unwrap()
            .run
            .model
            .components
            .find::<cohortmix::model::family::GaussianComponents>()
            .unwrap()
            .clone();
        let sign = if gauss.coef[0] > gauss.coef[2] { 1.0 } else { -1.0 };
        let inf = inference::for_fits(&study, &data, &prepared, &[fit], &[0])
            .pop()
            .unwrap()
            .unwrap();
        let u = inf.uncertainty.unwrap();
        ["age", "smoker"].map(|term| {
            let i = u.index("gating", 2, None, Some(term)).unwrap();
            (sign * u.parameters[i].value, u.se(i))
        })
    };
    let one = estimate("one-step");
    let two = estimate("two-step");
    let bch = estimate("three-step-bch");
    for (j, term) in ["age", "smoker"].iter().enumerate() {
        println!(
            "{term}: one-step {:.4} (se {:.4}), two-step {:.4} (se {:.4}), three-step BCH {:.4} (se {:.4})",
            one[j].0, one[j].1, two[j].0, two[j].1, bch[j].0, bch[j].1
        );
        assert!(
            (two[j].0 - one[j].0).abs() < 0.5 * one[j].1,
            "{term}: two-step {} against one-step {} (se {})",
            two[j].0,
            one[j].0,
            one[j].1
        );
        assert!(
            two[j].1 > 0.8 * one[j].1 && two[j].1 < 2.0 * one[j].1,
            "{term}: two-step se {}",
            two[j].1
        );
    }
}

/// With `standard_errors = "bootstrap"` a three-step fit's gating errors come from
/// replicates that rerun all three steps (and say so); the analytic errors that add step
/// 1's part exceed step 3's own.
#[test]
fn three_step_bootstrap_reruns_every_step_and_step_one_raises_the_errors() {
    use cohortmix::inference;
    let text = COVERAGE_TRUTH
        .replace("{rows}", "2000")
        .replace("{seed}", "41")
        .replace("mean = { fev1 = 75, fvc = 90 }", "mean = { fev1 = 84, fvc = 96 }");
    let errors = |method: &str| {
        let study_text = COVERAGE_STUDY.replace(
            "gating = [\"age\", \"smoker\"]",
            &format!("gating = [\"age\", \"smoker\"]\nmethod = \"three-step-bch\"\n\n[inference]\nstandard_errors = \"{method}\"\nreplicates = 100"),
        );
        let (_dir, study, data, prepared) = simulated(&text, &study_text);
        let fit = super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
        let st = fit.step_three.clone().unwrap().unwrap();
        let inf = inference::for_fits(&study, &data, &prepared, &[fit], &[0])
            .pop()
            .unwrap()
            .unwrap();
        let u = inf.uncertainty.unwrap();
        let design = prepared[0].step_three.clone().unwrap();
        let ses: Vec<(f64, f64)> = ["age", "smoker"]
            .iter()
            .enumerate()
            .map(|(j, term)| {
                let i = u.index("gating", 2, None, Some(term)).unwrap();
                (
                    u.se(i),
                    st.covariance[(j + 1, j + 1)].sqrt() / design.terms[j + 1].scale,
                )
            })
            .collect();
        (inf.step_three_errors.unwrap(), ses)
    };
    let (analytic, a) = errors("observed-information");
    let (boot, b) = errors("bootstrap");
    assert!(!analytic.bootstrap && boot.bootstrap);
    for (term, ((a_se, own), (b_se, _))) in ["age", "smoker"].iter().zip(a.iter().zip(&b)) {
        println!("{term}: step 3 alone {own:.4}, with step 1 {a_se:.4}, bootstrap of three steps {b_se:.4}");
        assert!(a_se > own, "{term}: adding step 1 should raise the error");
        // On one data set of overlapping clusters the bootstrap's error varies widely
        // (its calibration over many data sets is the ignored test below).
        assert!(
            *b_se > 0.5 * a_se && *b_se < 3.0 * a_se,
            "{term}: bootstrap {b_se} against {a_se}"
        );
    }
}

/// Calibration of three-step BCH errors over 200 data sets of 2,000 rows with overlapping
/// clusters: the mean of the errors that add step 1's part, and the median of the
/// bootstrap's (100 replicates rerunning the three steps), against the standard deviation
/// of the age estimates themselves; step 3's own errors fall short of it.
#[test]
#[ignore = "slow calibration simulation (a few minutes); CI runs it"]
fn three_step_errors_match_the_spread_of_the_estimates() {
    use cohortmix::inference;
    use rayon::prelude::*;
    let out: Vec<Option<(f64, f64, f64, f64)>> = (0..200usize).into_par_iter().map(|r| {
        let text = COVERAGE_TRUTH.replace("{rows}", "2000").replace("{seed}", &(9000 + r).to_string())
            .replace("mean = { fev1 = 75, fvc = 90 }", "mean = { fev1 = 84, fvc = 96 }");
        let run = |method: &str| -> Option<(f64, f64, f64)> {
            let study_text = COVERAGE_STUDY.replace("gating = [\"age\", \"smoker\"]",
                &format!("gating = [\"age\", \"smoker\"]\nmethod = \"three-step-bch\"\n\n[inference]\nstandard_errors = \"{method}\"\nreplicates = 100"));
            let (_dir, study, data, prepared) = simulated(&text, &study_text);
            let fit = super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
            let best = fit.best.as_ref()?;
            let gauss = best.run.model.components.find::<cohortmix::model::family::GaussianComponents>()?;
            let sign = if gauss.coef[0] > gauss.coef[2] { 1.0 } else { -1.0 };
            let st = fit.step_three.clone()?.ok()?;
            let design = prepared[0].step_three.clone()?;
            let inf = inference::for_fits(&study, &data, &prepared, &[fit], &[0]).pop()??;
            inf.step_three_errors.as_ref()?; // errors with step 1 (or the bootstrap), not a fallback
            let u = inf.uncertainty.ok()?;
            let i = u.index("gating", 2, None, Some("age"))?;
            Some((sign * u.parameters[i].value, u.se(i), st.covariance[(1, 1)].sqrt() / design.terms[1].scale))
        };
        let (e, a, own) = run("observed-information")?;
        let (_, b, _) = run("bootstrap")?;
        Some((e, a, b, own))
    }).collect();
    let ok: Vec<_> = out.into_iter().flatten().collect();
    let n = ok.len() as f64;
    let mean = ok.iter().map(|o| o.0).sum::<f64>() / n;
    let sd = (ok.iter().map(|o| (o.0 - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    let ma = ok.iter().map(|o| o.1).sum::<f64>() / n;
    let mut bs: Vec<f64> = ok.iter().map(|o| o.2).collect();
    bs.sort_by(|a, b| a.total_cmp(b));
    println!(
        "bootstrap SE quantiles: {:?}",
        bs.iter().step_by(20).collect::<Vec<_>>()
    );
    let mb = bs[bs.len() / 2];
    let mo = ok.iter().map(|o| o.3).sum::<f64>() / n;
    println!(
        "{n} data sets: age estimate mean {mean:.4}, standard deviation {sd:.5}; mean error: step 3 alone {mo:.5}, with step 1 {ma:.5}; median bootstrap error {mb:.5}"
    );
    assert!(n >= 180.0, "only {n} usable data sets");
    assert!(
        (ma / sd - 1.0).abs() < 0.1,
        "corrected errors {ma} against the spread {sd}"
    );
    assert!(
        (mb / sd - 1.0).abs() < 0.15,
        "bootstrap errors {mb} against the spread {sd}"
    );
    assert!(
        mo < 0.93 * sd,
        "step 3's own errors {mo} should fall short of the spread {sd}"
    );
}

/// The direct-effect screen under a two-stage cluster sample where the covariate acts on
/// membership only (no direct effect) and y is alike within a workplace: over 1,600
/// samples, how often the tests of x on y reject at 0.05 with the design declared (the
/// per-cluster likelihood-ratio statistic divided by its mean design effect; the shared
/// score test with the design-based score variance) and with the rows taken as independent.
#[test]
#[ignore = "slow size simulation (about a minute); CI runs it"]
fn the_screen_keeps_its_size_under_a_cluster_sample_when_the_design_is_declared() {
    use cohortmix::inference::screen::screen;
    use cohortmix::{data, fit, spec};
    use rayon::prelude::*;
    let replicates = 1600;
    let naive_study = CLUSTER_SAMPLE_STUDY.replace("strata = \"region\"\npsu = \"workplace\"\n", "");
    assert_ne!(naive_study, CLUSTER_SAMPLE_STUDY);
    // Rejected at 0.05: per-cluster test with the design, without; the design effect;
    // shared test with the design, without.
    type Outcome = (bool, bool, f64, bool, bool);
    let results: Vec<Option<Outcome>> = (0..replicates)
        .into_par_iter()
        .map(|r| {
            let dir = tempfile::tempdir().unwrap();
            std::fs::write(dir.path().join("data.csv"), cluster_sample(9100 + r as u64, 0.65)).unwrap();
            let families = super::common::families();
            let p_value = |text: &str| -> Option<(f64, Option<f64>, f64)> {
                let study = spec::parse(&dir.path().join("study.toml"), text, &families.infos()).unwrap();
                let data = data::load(&study).unwrap();
                let prepared = fit::prepare(&study, &data, &families).unwrap();
                let result =
                    super::common::fit_one(&study, &data, &prepared[0], 0, 2, CovarianceStructure::UNCONSTRAINED);
                let tests = screen(&study, &data, &prepared, &[result], &[0]);
                let t = tests.iter().find(|t| t.covariate == "x")?;
                Some((t.p_value?, t.design_effect, t.shared.p_value?))
            };
            let (design, effect, shared_design) = p_value(CLUSTER_SAMPLE_STUDY)?;
            let (naive, _, shared_naive) = p_value(&naive_study)?;
            Some((
                design < 0.05,
                naive < 0.05,
                effect?,
                shared_design < 0.05,
                shared_naive < 0.05,
            ))
        })
        .collect();
    let usable: Vec<Outcome> = results.into_iter().flatten().collect();
    assert!(
        usable.len() >= replicates * 95 / 100,
        "only {} usable samples",
        usable.len()
    );
    let n = usable.len() as f64;
    let design = usable.iter().filter(|u| u.0).count() as f64 / n;
    let naive = usable.iter().filter(|u| u.1).count() as f64 / n;
    let mut effects: Vec<f64> = usable.iter().map(|u| u.2).collect();
    effects.sort_by(|a, b| a.total_cmp(b));
    let shared_design = usable.iter().filter(|u| u.3).count() as f64 / n;
    let shared_naive = usable.iter().filter(|u| u.4).count() as f64 / n;
    println!(
        "{n} samples: per-cluster LR test rejected at 0.05 with the design {:.1}%, rows as independent {:.1}%; median design effect {:.2}; shared score test with the design {:.1}%, rows as independent {:.1}%",
        100.0 * design,
        100.0 * naive,
        effects[effects.len() / 2],
        100.0 * shared_design,
        100.0 * shared_naive
    );
    // The generalised score test refers its statistic to the design-based variance of the
    // score itself (Boos 1992), so it needs no correction of the statistic's mean: with
    // 1,600 samples it rejected 6.5% (standard error 0.55 points), against 11.0% for the
    // per-cluster test after its first-order correction. The excess over 5% is the score
    // variance estimated from 80 workplaces.
    assert!(
        (0.035..=0.075).contains(&shared_design) && shared_design < design,
        "the shared score test with the design rejects {:.1}% (per-cluster test {:.1}%)",
        100.0 * shared_design,
        100.0 * design
    );
    // The first-order correction brings the size from 28.7% to 10.8% here, not to 5%: it
    // corrects the statistic's mean, not its spread (docs/references.md).
    assert!(
        design < 0.13,
        "with the design declared the test rejects {:.1}%",
        100.0 * design
    );
    assert!(
        naive > 2.0 * design,
        "the design halved no rejection rate: {:.1}% against {:.1}%",
        100.0 * naive,
        100.0 * design
    );
}

/// A one-cluster Gaussian fit's profile intervals are the textbook intervals of a mean,
/// x̄ ± 1.959964 σ̂/√n with σ̂ the maximum-likelihood standard deviation (the observed
/// information of a normal mean is n/σ²), on iris's four measurements (the dataset as
/// `tests/reference/iris.csv` holds it); the interval of a probability is made on the
/// logit scale and that of a rate on the log scale.
#[test]
fn profile_intervals_of_one_cluster_are_the_textbook_intervals_of_a_mean() {
    use cohortmix::model::family::ProfileScale;
    let (y, n) = iris_measurements();
    let d = 4;
    let ones = vec![1.0; n];
    let data = unadjusted_data(&ones);
    let blocks = gaussian_block(&y, d, &Design::intercept(n));
    let options = plain_options(CovarianceStructure::UNCONSTRAINED);
    let model = initial_model(&data, &blocks, &free_placement(), 1, options);
    let run = em::run(
        &data,
        model,
        ones.clone(),
        EmSettings {
            max_iterations: 100,
            tolerance: 1e-14,
            accelerate: false,
        },
    );
    let chart = cohortmix::inference::chart::Chart::new(&run.model).unwrap();
    let v = cohortmix::inference::parameter_covariance(&chart, &data, ErrorMethod::ObservedInformation, None, None)
        .unwrap();
    let intervals = cohortmix::inference::profile_intervals(&run.model, &v).unwrap();
    assert_eq!(intervals.len(), 1);
    assert_eq!(intervals[0].len(), d);
    for j in 0..d {
        let column: Vec<f64> = (0..n).map(|i| y[i * d + j]).collect();
        let mean = column.iter().sum::<f64>() / n as f64;
        let sd = (column.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n as f64).sqrt();
        let half = 1.959963984540054 * sd / (n as f64).sqrt();
        let (lo, hi) = intervals[0][j].expect("an interval");
        assert!(
            (lo - (mean - half)).abs() < 1e-6 * half,
            "column {j}: {lo} against {}",
            mean - half
        );
        assert!(
            (hi - (mean + half)).abs() < 1e-6 * half,
            "column {j}: {hi} against {}",
            mean + half
        );
    }
    // p = 0.3 with SE 0.05: the logit 0.3/0.7 ± 1.96 × 0.05 / 0.21, back through the
    // inverse logit; a rate 2 with SE 0.4: 2 × exp(∓1.96 × 0.2).
    let (a, b) = ProfileScale::Probability.interval(0.3, 0.05).unwrap();
    let logit = (0.3f64 / 0.7).ln();
    let spread = 1.959963984540054 * 0.05 / 0.21;
    let expit = |x: f64| 1.0 / (1.0 + (-x).exp());
    assert!((a - expit(logit - spread)).abs() < 1e-12 && (b - expit(logit + spread)).abs() < 1e-12);
    assert!(a > 0.0 && b < 1.0 && a < 0.3 && b > 0.3);
    let (a, b) = ProfileScale::Rate.interval(2.0, 0.4).unwrap();
    assert!((a - 2.0 * (-1.959963984540054 * 0.2f64).exp()).abs() < 1e-12);
    assert!((b - 2.0 * (1.959963984540054 * 0.2f64).exp()).abs() < 1e-12);
    assert_eq!(ProfileScale::Probability.interval(1.0, 0.1), None);
}
