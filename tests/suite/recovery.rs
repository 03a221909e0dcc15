//! Recovery: data simulated from a known mixture of experts are fitted back.
//!
//! Truth: 3 clusters, gating on age and exposure years (multinomial logit against cluster
//! 1), smoking shifting two of the three indicators inside every cluster. n = 20,000.
//! Tolerances are set by hand per parameter kind, at roughly 3–5 rough standard errors
//! (sd/√n_g for intercepts with n_g ≈ 2,000–12,000 rows per cluster; sd/√(0.21·n_g) for
//! the smoking effects; a logistic approximation for the gating slopes), because fitted
//! standard errors arrive with the inference work. The test prints every deviation.

use cohortmix::{data, fit, simulate, spec};

const TRUTH: &str = r#"
[simulation]
rows = 20000
seed = 424242
output = "cohort.csv"
id = "id"
indicators = ["fev1", "fvc", "flow"]
decimals = 3

[[covariate]]
name = "age"
distribution = "normal"
mean = 45
sd = 10

[[covariate]]
name = "exposure"
distribution = "uniform"
min = 0
max = 30
decimals = 3

[[covariate]]
name = "smoker"
distribution = "bernoulli"
probability = 0.3

[[cluster]]
name = "a"
mean = { fev1 = 100, fvc = 100, flow = 95 }
effects = { fev1 = { smoker = -4 }, flow = { smoker = -10 } }
sd = { fev1 = 9, fvc = 9, flow = 15 }
correlation = 0.5

[[cluster]]
name = "b"
gating = { intercept = -3.0, age = 0.03, exposure = 0.08 }
mean = { fev1 = 70, fvc = 92, flow = 45 }
effects = { fev1 = { smoker = -4 }, flow = { smoker = -10 } }
sd = { fev1 = 10, fvc = 10, flow = 12 }
correlation = 0.6

[[cluster]]
name = "c"
gating = { intercept = -4.0, age = 0.06, exposure = 0.0 }
mean = { fev1 = 78, fvc = 75, flow = 80 }
effects = { fev1 = { smoker = -4 }, flow = { smoker = -10 } }
sd = { fev1 = 8, fvc = 8, flow = 15 }
correlation = 0.7
"#;

const STUDY: &str = r#"
[study]
title = "recovery"
data = "cohort.csv"
id = "id"
seed = 99
[variables]
age = "continuous"
exposure = "continuous"
smoker = "binary"
[indicators]
columns = ["fev1", "fvc", "flow"]
[search]
clusters = [3]
starts = 8
[[placement]]
name = "both"
gating = ["age", "exposure"]
components = ["smoker"]
"#;

use super::common::param_value as value;

#[test]
fn mixture_of_experts_parameters_are_recovered() {
    let dir = tempfile::tempdir().unwrap();
    let truth = simulate::parse(&dir.path().join("truth.toml"), TRUTH).unwrap();
    std::fs::write(&truth.output, simulate::generate(&truth).csv).unwrap();
    let spec_path = dir.path().join("study.toml");
    let study = spec::parse(&spec_path, STUDY, &super::common::families().infos()).unwrap();
    let data = data::load(&study).unwrap();
    let prepared = fit::prepare(&study, &data, &super::common::families()).unwrap();
    let result = super::common::fit_one(
        &study,
        &data,
        &prepared[0],
        0,
        3,
        cohortmix::model::family::CovarianceStructure::UNCONSTRAINED,
    );
    let best = result.best.as_ref().expect("a usable fit");
    assert!(best.reaching >= 2, "best optimum reached by {} starts", best.reaching);
    let params = &cohortmix::inference::named_parameters(&best.run.model, &prepared[0]);

    // Match fitted clusters to true ones by the fev1 intercept (70, 78, 100 are far apart).
    let fitted: Vec<f64> = (1..=3)
        .map(|k| value(params, "mean", k, Some("fev1"), Some("intercept")))
        .collect();
    let mut order = [0usize; 3]; // order[true] = fitted cluster (1-based)
    for (t, c) in truth.clusters.iter().enumerate() {
        let k = (0..3)
            .min_by(|a, b| {
                (fitted[*a] - c.mean[0])
                    .abs()
                    .total_cmp(&(fitted[*b] - c.mean[0]).abs())
            })
            .unwrap();
        order[t] = k + 1;
    }
    let mut distinct = order.to_vec();
    distinct.sort();
    distinct.dedup();
    assert_eq!(distinct.len(), 3, "label matching failed: {fitted:?}");

    let mut report = Vec::new();
    let mut check = |what: String, got: f64, want: f64, tol: f64| {
        report.push(format!("{what}: fitted {got:.4}, true {want:.4}, tolerance {tol}"));
        assert!((got - want).abs() <= tol, "{}", report.join("\n"));
    };
    let inds = ["fev1", "fvc", "flow"];
    for (t, c) in truth.clusters.iter().enumerate() {
        let k = order[t];
        for (j, ind) in inds.iter().enumerate() {
            check(
                format!("cluster {t} {ind} intercept"),
                value(params, "mean", k, Some(ind), Some("intercept")),
                c.mean[j],
                1.5,
            );
            let eff = c.effects[j].get("smoker").copied().unwrap_or(0.0);
            check(
                format!("cluster {t} {ind} smoker"),
                value(params, "mean", k, Some(ind), Some("smoker")),
                eff,
                2.0,
            );
            let sd = c.covariance[(j, j)].sqrt();
            check(
                format!("cluster {t} {ind} sd"),
                value(params, "covariance", k, Some(ind), None).sqrt(),
                sd,
                0.6,
            );
        }
    }
    // Gating: re-reference the fitted logit to the true reference cluster.
    let gating = |k: usize, term: &str| {
        if k == 1 {
            0.0
        } else {
            value(params, "gating", k, None, Some(term))
        }
    };
    for t in 1..3 {
        for (term, tol) in [("intercept", 0.6), ("age", 0.012), ("exposure", 0.015)] {
            let got = gating(order[t], term) - gating(order[0], term);
            let want = truth.clusters[t].gating.get(term).copied().unwrap_or(0.0);
            check(format!("cluster {t} gating {term}"), got, want, tol);
        }
    }
    println!("{}", report.join("\n"));
}
