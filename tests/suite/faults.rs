//! Numerical faults: data that drive a fit to NaN or infinity, or to a collapse, stop the
//! start with its reason recorded; nothing panics and no such start is used.

use cohortmix::data::Design;
use cohortmix::fit::em::{self, EmSettings, Termination};
use cohortmix::fit::initial_model;
use cohortmix::fit::starts::{partition, StartKind};
use cohortmix::model::family::CovarianceStructure;
use cohortmix::model::FitData;
use cohortmix::rng::Stream;

fn run_on(y: &[f64], d: usize, g: usize, seed: u64) -> Termination {
    let n = y.len() / d;
    let weights = vec![1.0; n];
    let one = Design::intercept(n);
    let fd = FitData {
        n,
        weights: &weights,
        w: &one.x,
        p: 1,
    };
    let blocks = super::common::gaussian_block(y, d, &one);
    let options = super::common::plain_options(CovarianceStructure::UNCONSTRAINED);
    let model = initial_model(&fd, &blocks, &super::common::free_placement(), g, options);
    let kind = if g == 1 {
        StartKind::Single
    } else {
        StartKind::RandomPartition
    };
    let tau = partition(kind, y, d, &weights, g, &mut Stream::new(seed, "faults"));
    let run = em::run(
        &fd,
        model,
        tau,
        EmSettings {
            max_iterations: 200,
            tolerance: 1e-10,
            accelerate: true,
        },
    );
    if run.termination.usable() {
        assert!(run.loglik.is_finite(), "a usable start with loglik {}", run.loglik);
    }
    run.termination
}

fn normal_rows(n: usize, d: usize, seed: u64) -> Vec<f64> {
    let mut s = Stream::new(seed, "rows");
    (0..n * d)
        .map(|i| s.normal() + if i % 7 == 0 { 3.0 } else { 0.0 })
        .collect()
}

#[test]
fn a_nan_value_stops_the_start_with_its_reason() {
    for g in 1..4 {
        let mut y = normal_rows(200, 2, 1);
        y[17] = f64::NAN;
        let t = run_on(&y, 2, g, 3);
        assert!(!t.usable(), "G = {g}: {t:?}");
        assert!(t.reason().is_some_and(|r| !r.is_empty()), "G = {g}: {t:?}");
    }
}

#[test]
fn an_overflowing_value_stops_the_start_with_its_reason() {
    for g in 1..4 {
        let mut y = normal_rows(200, 2, 2);
        y[40] = 1e200; // its square overflows
        let t = run_on(&y, 2, g, 5);
        assert!(!t.usable(), "G = {g}: {t:?}");
        assert!(t.reason().is_some(), "G = {g}: {t:?}");
    }
}

#[test]
fn near_duplicate_rows_collapse_with_a_reason_not_a_crash() {
    // 300 rows, all but 8 the same point up to 1e-13: extra clusters collapse.
    let mut y = normal_rows(300, 2, 3);
    for i in 8..300 {
        y[i * 2] = 1.0 + 1e-13 * i as f64;
        y[i * 2 + 1] = -1.0;
    }
    let mut seen = Vec::new();
    for seed in 0..6 {
        let t = run_on(&y, 2, 3, seed);
        if !t.usable() {
            seen.push(t.reason().unwrap().to_string());
        }
    }
    assert!(
        !seen.is_empty(),
        "no start of a three-cluster fit to a near-constant cloud failed"
    );
    println!("reasons: {seen:?}");
}
