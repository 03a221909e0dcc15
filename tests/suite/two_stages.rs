//! The two-stage search (`[search] finish_best`): every start runs the warm-up, and only
//! the best of those still running go on. Checked against the same spec with every
//! start run to its end, and against a warm-up-only run that shows the ranking.

use cohortmix::fit::em::Termination;
use cohortmix::fit::{self, FitResult};
use cohortmix::model::family::CovarianceStructure;
use cohortmix::{data, simulate, spec};

const TRUTH: &str = r#"
[simulation]
rows = 1500
seed = 5150
output = "cohort.csv"
id = "id"
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
sd = { fev1 = 9, fvc = 9 }
correlation = 0.5

[[cluster]]
name = "b"
gating = { intercept = -2.5, age = 0.04 }
mean = { fev1 = 80, fvc = 92 }
sd = { fev1 = 10, fvc = 10 }
correlation = 0.6

[[cluster]]
name = "c"
gating = { intercept = -3.0, age = 0.03 }
mean = { fev1 = 88, fvc = 78 }
sd = { fev1 = 8, fvc = 8 }
correlation = 0.2
"#;

fn study(dir: &std::path::Path, search: &str) -> spec::Study {
    let text = format!(
        r#"
[study]
title = "two stages"
data = "cohort.csv"
id = "id"
seed = 7
[variables]
age = "continuous"
[indicators]
columns = ["fev1", "fvc"]
[search]
clusters = [4]
starts = 10
{search}
[[placement]]
name = "gating"
gating = ["age"]
"#
    );
    spec::parse(&dir.join("study.toml"), &text, &super::common::families().infos()).unwrap()
}

fn fit(study: &spec::Study) -> FitResult {
    let data = data::load(study).unwrap();
    let prepared = fit::prepare(study, &data, &super::common::families()).unwrap();
    super::common::fit_one(study, &data, &prepared[0], 0, 4, CovarianceStructure::UNCONSTRAINED)
}

#[test]
fn finalists_follow_the_single_run_path_and_are_the_best_after_the_warm_up() {
    let dir = tempfile::tempdir().unwrap();
    let truth = simulate::parse(&dir.path().join("truth.toml"), TRUTH).unwrap();
    std::fs::write(&truth.output, simulate::generate(&truth).csv).unwrap();

    let every = study(dir.path(), "");
    assert!(!every.search.two_stages(), "off unless finish_best is given");
    let staged = study(dir.path(), "warmup_iterations = 8\nfinish_best = 3");
    assert!(staged.search.two_stages());
    let warmup_only = study(dir.path(), "max_iterations = 8");

    let full = fit(&every);
    let two = fit(&staged);
    let short = fit(&warmup_only);
    assert_eq!(full.finished_starts(), 10);

    let mut set_aside = Vec::new();
    let mut finalists = Vec::new();
    for (i, rec) in two.starts.iter().enumerate() {
        let short_rec = &short.starts[i];
        if rec.termination == Termination::SetAside {
            // Set aside after exactly the warm-up, with no log-likelihood claimed.
            assert_eq!(rec.iterations, 8);
            assert_eq!(rec.loglik, None);
            assert_eq!(short_rec.termination, Termination::IterationCap);
            set_aside.push(short_rec.loglik.unwrap());
        } else {
            // A start that ran to its end took the path a single run takes: same
            // log-likelihood bits, iterations and ending as in the all-starts fit.
            assert_eq!(rec, &full.starts[i], "start {}", i + 1);
            if short_rec.termination == Termination::IterationCap {
                finalists.push(short_rec.loglik.unwrap());
            }
        }
    }
    assert_eq!(finalists.len(), 3, "three starts still running after the warm-up go on");
    assert!(
        !set_aside.is_empty(),
        "this data leaves starts running after 8 iterations"
    );
    assert_eq!(two.finished_starts(), 10 - set_aside.len());
    let lowest_finalist = finalists.iter().copied().fold(f64::INFINITY, f64::min);
    let highest_set_aside = set_aside.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    assert!(
        lowest_finalist >= highest_set_aside,
        "a start set aside ({highest_set_aside}) was ahead of a finalist ({lowest_finalist}) after the warm-up"
    );

    // The best of the two-stage fit is one of the all-starts fit's runs, so never above
    // its best; when the overall best start went on, the fit is the same to the bit.
    let (full_best, two_best) = (full.best.as_ref().unwrap(), two.best.as_ref().unwrap());
    assert!(two_best.run.loglik <= full_best.run.loglik);
    if two.starts[full_best.start - 1].termination != Termination::SetAside {
        assert_eq!(two_best.run.loglik.to_bits(), full_best.run.loglik.to_bits());
        assert_eq!(two_best.run.tau, full_best.run.tau);
    }
    assert!(two_best.reaching <= two.finished_starts());

    // The cache tells the two searches apart, and a spec that says `finish_best = starts`
    // keeps the key of one that does not mention it. Likewise extrapolated and plain EM
    // steps, whose fits differ in their last digits.
    let key = |s: &spec::Study| {
        let data = data::load(s).unwrap();
        let prepared = fit::prepare(s, &data, &super::common::families()).unwrap();
        let _ = &prepared;
        fit::fit_spec(
            s,
            &fit::DataIdentity::of(&data),
            0,
            4,
            CovarianceStructure::UNCONSTRAINED,
        )
        .key()
    };
    let all_named = study(dir.path(), "warmup_iterations = 8\nfinish_best = 10");
    assert_eq!(key(&every), key(&all_named));
    assert_ne!(key(&every), key(&staged));
    assert!(every.search.accelerate, "extrapolation is on by default");
    assert_eq!(key(&every), key(&study(dir.path(), "accelerate = true")));
    let plain = study(dir.path(), "accelerate = false");
    assert!(!plain.search.accelerate);
    assert_ne!(key(&every), key(&plain));
}
