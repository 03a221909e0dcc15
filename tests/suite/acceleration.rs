//! Extrapolated EM steps (`[search].accelerate`) end where plain EM steps end, in fewer
//! iterations.

use super::common::{free_placement, iris_measurements, plain_options};
use cohortmix::fit::em::{self, EmRun, EmSettings};
use cohortmix::fit::initial_model;
use cohortmix::fit::starts::{partition, StartKind};
use cohortmix::model::family::CovarianceStructure;
use cohortmix::rng::Stream;

/// Every start of every covariance structure, run with and without extrapolation to a
/// tight tolerance from the same starting partition, ends at the same objective (1e-9
/// relative) or fails in both runs; in all, extrapolation takes at most 60% of the
/// iterations. Iris with three and four clusters has several optima per structure, so a
/// start that extrapolated into another optimum's basin would show.
#[test]
fn extrapolated_em_ends_where_plain_em_ends_on_iris() {
    let (y, n) = iris_measurements();
    let d = 4;
    let ones = vec![1.0; n];
    let data = super::common::unadjusted_data(&ones);
    let blocks = super::common::gaussian_block(&y, d, &cohortmix::data::Design::intercept(n));
    let run = |structure: CovarianceStructure, g: usize, s: usize, accelerate: bool| -> EmRun {
        let mut rng = Stream::new(11, &format!("iris|{g}|{s}"));
        let tau = partition(StartKind::for_start(s, g), &y, d, &ones, g, &mut rng);
        let settings = EmSettings {
            max_iterations: 20_000,
            tolerance: 1e-13,
            accelerate,
        };
        em::run(
            &data,
            initial_model(&data, &blocks, &free_placement(), g, plain_options(structure)),
            tau,
            settings,
        )
    };
    let (mut plain_iterations, mut fast_iterations, mut compared) = (0, 0, 0);
    let mut differ = Vec::new();
    for structure in CovarianceStructure::all() {
        for g in [3, 4] {
            for s in 0..12 {
                let (plain, fast) = (run(structure, g, s, false), run(structure, g, s, true));
                match (plain.termination.usable(), fast.termination.usable()) {
                    (true, true) => {
                        compared += 1;
                        plain_iterations += plain.iterations;
                        fast_iterations += fast.iterations;
                        if (plain.objective - fast.objective).abs() > 1e-9 * plain.objective.abs() {
                            differ.push(format!(
                                "{} G={g} start {}: {} plain, {} extrapolated",
                                structure.describe(),
                                s + 1,
                                plain.objective,
                                fast.objective
                            ));
                        }
                    }
                    (false, false) => {}
                    (a, b) => differ.push(format!(
                        "{} G={g} start {}: usable {a} plain, {b} extrapolated ({:?} / {:?})",
                        structure.describe(),
                        s + 1,
                        plain.termination,
                        fast.termination
                    )),
                }
            }
        }
    }
    println!("{compared} starts compared; iterations {plain_iterations} plain, {fast_iterations} extrapolated");
    assert!(
        differ.is_empty(),
        "{} starts differ:\n{}",
        differ.len(),
        differ.join("\n")
    );
    assert!(compared >= 200, "only {compared} starts usable in both runs");
    assert!(
        (fast_iterations as f64) <= 0.6 * plain_iterations as f64,
        "{fast_iterations} iterations extrapolated against {plain_iterations} plain"
    );
}
