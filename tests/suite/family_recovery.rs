//! Recovery for the items, counts and mixed families: data simulated from a known mixture
//! of experts (n = 20,000, covariates in the gating network and the components) are fitted
//! back, clusters are matched to the truth by the largest posterior overlap (Hungarian
//! method on the cross-table of posteriors and true labels), and every parameter is
//! checked against a tolerance. Tolerances are set by hand at roughly 4 rough standard
//! errors: √(p(1−p)/n_k) for an item probability in a cluster of n_k rows, √(1/(n_k p(1−p)
//! s²)) for a logit slope over a covariate with spread s, and 1/√(events) for a log rate;
//! fitted standard errors arrive with the inference work. The tests print every deviation.

use cohortmix::compare::assign::max_weight_assignment;
use cohortmix::model::family::{CovarianceStructure, Parameter};
use cohortmix::{data, fit, simulate, spec};

const COVARIATES: &str = r#"
[[covariate]]
name = "age"
distribution = "normal"
mean = 45
sd = 10
decimals = 1

[[covariate]]
name = "smoker"
distribution = "bernoulli"
probability = 0.35

[[covariate]]
name = "years"
distribution = "uniform"
min = 1
max = 20
decimals = 2
"#;

/// Simulate, fit one placement at the true cluster count, and return the named
/// parameters with `order[t]` = the fitted cluster (1-based) matched to true cluster t.
fn fit_truth(
    truth_text: &str,
    study_text: &str,
    g: usize,
    starts_reaching: usize,
) -> (simulate::Truth, Vec<Parameter>, Vec<usize>) {
    let dir = tempfile::tempdir().unwrap();
    let truth = simulate::parse(&dir.path().join("truth.toml"), truth_text).unwrap();
    let sim = simulate::generate(&truth);
    std::fs::write(&truth.output, &sim.csv).unwrap();
    let study = spec::parse(
        &dir.path().join("study.toml"),
        study_text,
        &super::common::families().infos(),
    )
    .unwrap();
    let data = data::load(&study).unwrap();
    let prepared = fit::prepare(&study, &data, &super::common::families()).unwrap();
    let result = super::common::fit_one(&study, &data, &prepared[0], 0, g, CovarianceStructure::UNCONSTRAINED);
    let best = result
        .best
        .as_ref()
        .unwrap_or_else(|| panic!("no usable fit: {:?}", result.termination()));
    assert!(
        best.reaching >= starts_reaching,
        "best optimum reached by {} starts",
        best.reaching
    );
    assert_eq!(data.rows_excluded, 0);
    // Cross-table of fitted posteriors against true labels; every row is used.
    let mut table = vec![vec![0.0; g]; g];
    for (row, t) in best.run.tau.chunks_exact(g).zip(&sim.clusters) {
        for (k, v) in row.iter().enumerate() {
            table[k][*t] += v;
        }
    }
    let assignment = max_weight_assignment(&table);
    let mut order = vec![0; g];
    for (k, t) in assignment.iter().enumerate() {
        order[t.expect("square assignment")] = k + 1;
    }
    let params = cohortmix::inference::named_parameters(&best.run.model, &prepared[0]);
    (truth, params, order)
}

use super::common::param_value as value;

/// Collects checks; fails with every line printed.
struct Checks(Vec<String>, bool);

impl Checks {
    fn check(&mut self, what: String, got: f64, want: f64, tol: f64) {
        let ok = (got - want).abs() <= tol;
        self.0.push(format!(
            "{}{what}: fitted {got:.4}, true {want:.4}, tolerance {tol}",
            if ok { "" } else { "FAIL " }
        ));
        self.1 &= ok;
    }
    fn finish(self) {
        println!("{}", self.0.join("\n"));
        assert!(self.1, "{}", self.0.join("\n"));
    }
}

/// Gating coefficients against the true reference cluster: the fitted logit is
/// re-referenced to the cluster matched with true cluster 1.
fn check_gating(c: &mut Checks, truth: &simulate::Truth, params: &[Parameter], order: &[usize], terms: &[(&str, f64)]) {
    let gating = |k: usize, term: &str| {
        if k == 1 {
            0.0
        } else {
            value(params, "gating", k, None, Some(term))
        }
    };
    for t in 1..truth.clusters.len() {
        for (term, tol) in terms {
            let got = gating(order[t], term) - gating(order[0], term);
            let want = truth.clusters[t].gating.get(*term).copied().unwrap_or(0.0);
            c.check(format!("cluster {t} gating {term}"), got, want, *tol);
        }
    }
}

fn items_truth(missing: f64) -> String {
    format!(
        r#"
[simulation]
rows = 20000
seed = 515
output = "items.csv"
id = "id"
items = ["a", "b", "c", "d", "e", "grade"]
item_levels = {{ grade = ["low", "mid", "high"] }}
missing_items = {missing}
{COVARIATES}
[[cluster]]
name = "one"
item_probability = {{ a = 0.1, b = 0.15, c = 0.1, d = 0.2, e = 0.1, grade = [0.7, 0.2, 0.1] }}
item_effects = {{ a = {{ smoker = 0.9 }} }}

[[cluster]]
name = "two"
gating = {{ intercept = -1.8, age = 0.03, smoker = 1.0 }}
item_probability = {{ a = 0.6, b = 0.8, c = 0.7, d = 0.3, e = 0.2, grade = [0.3, 0.4, 0.3] }}
item_effects = {{ a = {{ smoker = 0.9 }} }}

[[cluster]]
name = "three"
gating = {{ intercept = -1.2, age = 0.01, smoker = -0.5 }}
item_probability = {{ a = 0.3, b = 0.2, c = 0.8, d = 0.85, e = 0.7, grade = [0.1, 0.3, 0.6] }}
item_effects = {{ a = {{ smoker = 0.9 }} }}
"#
    )
}

const ITEMS_STUDY: &str = r#"
[study]
title = "items recovery"
data = "items.csv"
id = "id"
seed = 8
[variables]
age = "continuous"
smoker = "binary"
a = "binary"
b = "binary"
c = "binary"
d = "binary"
e = "binary"
grade = { type = "categorical", levels = ["low", "mid", "high"] }
[indicators]
family = "items"
columns = ["a", "b", "c", "d", "e", "grade"]
[search]
clusters = [3]
starts = 4
[[placement]]
name = "both"
gating = ["age", "smoker"]
components = ["smoker"]
acts_on = { smoker = ["a"] }
"#;

fn check_items(missing: f64, widen: f64) {
    let (truth, params, order) = fit_truth(&items_truth(missing), ITEMS_STUDY, 3, 2);
    let mut c = Checks(Vec::new(), true);
    for (t, cl) in truth.clusters.iter().enumerate() {
        let k = order[t];
        for (j, (name, levels)) in truth.items.iter().enumerate() {
            // True probabilities at the reference (smoker = 0) from the baseline log odds.
            let eta: Vec<f64> = std::iter::once(0.0).chain(cl.item_logits[j].iter().copied()).collect();
            let total: f64 = eta.iter().map(|e| e.exp()).sum();
            for (l, level) in levels.iter().enumerate().skip(1) {
                let want = eta[l].exp() / total;
                let got = value(&params, "item_probability", k, Some(&format!("{name}={level}")), None);
                c.check(format!("cluster {t} P({name}={level})"), got, want, 0.035 * widen);
            }
        }
        let got = value(&params, "item_logit", k, Some("a=1"), Some("smoker"));
        c.check(
            format!("cluster {t} direct effect of smoker on a"),
            got,
            0.9,
            0.35 * widen,
        );
    }
    check_gating(
        &mut c,
        &truth,
        &params,
        &order,
        &[("age", 0.012 * widen), ("smoker", 0.25 * widen)],
    );
    c.finish();
}

#[test]
fn items_with_covariates_are_recovered() {
    check_items(0.0, 1.0);
}

/// 20% of item values removed completely at random: the truth is still recovered, with
/// tolerances widened by half.
#[test]
fn items_are_recovered_with_a_fifth_of_values_missing() {
    check_items(0.2, 1.5);
}

#[test]
fn counts_with_an_exposure_are_recovered() {
    let truth_text = format!(
        r#"
[simulation]
rows = 20000
seed = 616
output = "counts.csv"
id = "id"
counts = ["visits", "spells", "prescriptions"]
exposure = "years"
{COVARIATES}
[[cluster]]
name = "low"
rate = {{ visits = 0.3, spells = 0.1, prescriptions = 0.5 }}
count_effects = {{ visits = {{ smoker = 0.4 }} }}

[[cluster]]
name = "high"
gating = {{ intercept = -2.0, age = 0.03 }}
rate = {{ visits = 1.2, spells = 0.4, prescriptions = 0.6 }}
count_effects = {{ visits = {{ smoker = 0.4 }} }}

[[cluster]]
name = "spells"
gating = {{ intercept = -1.0, smoker = 0.8 }}
rate = {{ visits = 0.4, spells = 0.8, prescriptions = 2.0 }}
count_effects = {{ visits = {{ smoker = 0.4 }} }}
"#
    );
    let study = r#"
[study]
title = "counts recovery"
data = "counts.csv"
id = "id"
seed = 9
[variables]
age = "continuous"
smoker = "binary"
[indicators]
family = "counts"
columns = ["visits", "spells", "prescriptions"]
exposure = "years"
[search]
clusters = [3]
starts = 4
[[placement]]
name = "both"
gating = ["age", "smoker"]
components = ["smoker"]
acts_on = { smoker = ["visits"] }
"#;
    let (truth, params, order) = fit_truth(&truth_text, study, 3, 2);
    let mut c = Checks(Vec::new(), true);
    for (t, cl) in truth.clusters.iter().enumerate() {
        let k = order[t];
        for (j, name) in truth.counts.iter().enumerate() {
            let got = value(&params, "count_rate", k, Some(name), None).ln();
            c.check(format!("cluster {t} log rate of {name}"), got, cl.log_rate[j], 0.08);
        }
        let got = value(&params, "count_log_rate", k, Some("visits"), Some("smoker"));
        c.check(format!("cluster {t} smoker effect on visits"), got, 0.4, 0.1);
    }
    check_gating(&mut c, &truth, &params, &order, &[("age", 0.012), ("smoker", 0.25)]);
    c.finish();
}

#[test]
fn mixed_blocks_are_recovered() {
    let truth_text = format!(
        r#"
[simulation]
rows = 20000
seed = 717
output = "mixed.csv"
id = "id"
indicators = ["fev1"]
items = ["cough", "wheeze", "phlegm"]
counts = ["spells"]
exposure = "years"
decimals = 3
{COVARIATES}
[[cluster]]
name = "well"
mean = {{ fev1 = 100 }}
effects = {{ fev1 = {{ age = -0.3 }} }}
sd = {{ fev1 = 9 }}
item_probability = {{ cough = 0.1, wheeze = 0.05, phlegm = 0.1 }}
rate = {{ spells = 0.2 }}
count_effects = {{ spells = {{ smoker = 0.5 }} }}

[[cluster]]
name = "unwell"
gating = {{ intercept = -1.0, smoker = 1.2 }}
mean = {{ fev1 = 82 }}
effects = {{ fev1 = {{ age = -0.3 }} }}
sd = {{ fev1 = 11 }}
item_probability = {{ cough = 0.6, wheeze = 0.5, phlegm = 0.55 }}
rate = {{ spells = 0.5 }}
count_effects = {{ spells = {{ smoker = 0.5 }} }}
"#
    );
    let study = r#"
[study]
title = "mixed recovery"
data = "mixed.csv"
id = "id"
seed = 10
[variables]
age = "continuous"
smoker = "binary"
fev1 = "continuous"
cough = "binary"
wheeze = "binary"
phlegm = "binary"
spells = "count"
[indicators]
family = "mixed"
columns = ["fev1", "cough", "wheeze", "phlegm", "spells"]
exposure = "years"
[search]
clusters = [2]
starts = 4
[[placement]]
name = "both"
gating = ["smoker"]
components = ["age", "smoker"]
acts_on = { age = ["fev1"], smoker = ["spells"] }
"#;
    let (truth, params, order) = fit_truth(&truth_text, study, 2, 2);
    let mut c = Checks(Vec::new(), true);
    for (t, cl) in truth.clusters.iter().enumerate() {
        let k = order[t];
        c.check(
            format!("cluster {t} fev1 intercept"),
            value(&params, "mean", k, Some("fev1"), Some("intercept")),
            cl.mean[0],
            1.5,
        );
        c.check(
            format!("cluster {t} fev1 age effect"),
            value(&params, "mean", k, Some("fev1"), Some("age")),
            -0.3,
            0.04,
        );
        let sd = value(&params, "covariance", k, Some("fev1"), None).sqrt();
        c.check(format!("cluster {t} fev1 sd"), sd, cl.covariance[(0, 0)].sqrt(), 0.5);
        for (j, (name, _)) in truth.items.iter().enumerate() {
            let want = 1.0 / (1.0 + (-cl.item_logits[j][0]).exp());
            c.check(
                format!("cluster {t} P({name}=1)"),
                value(&params, "item_probability", k, Some(&format!("{name}=1")), None),
                want,
                0.03,
            );
        }
        let got = value(&params, "count_rate", k, Some("spells"), None).ln();
        c.check(format!("cluster {t} log rate of spells"), got, cl.log_rate[0], 0.1);
        let got = value(&params, "count_log_rate", k, Some("spells"), Some("smoker"));
        c.check(format!("cluster {t} smoker effect on spells"), got, 0.5, 0.12);
    }
    check_gating(&mut c, &truth, &params, &order, &[("smoker", 0.2)]);
    c.finish();
}
