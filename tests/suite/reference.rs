//! Checks against outside references. Each names its source; the scripts that made the
//! fixtures are beside them in tests/reference/.

use super::common::*;
use cohortmix::data::Design;
use cohortmix::model::family::{ComponentFamily, CovarianceStructure, GaussianComponents, Naming};
use cohortmix::model::gating::{fit_multinomial_logit, logit_objective, MAX_NEWTON_ITERATIONS};
use cohortmix::model::FitData;
use serde_json::Value;

fn fixture(name: &str) -> Value {
    let text = std::fs::read_to_string(root(&format!("tests/reference/{name}"))).unwrap();
    serde_json::from_str(&text).unwrap()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

/// Gating M-step with hard memberships = multinomial logit.
/// Source: statsmodels MNLogit on its documented anes96 example (944 rows, PID with 7
/// levels, reference level 0); made by tests/reference/make_gating_anes96.py.
fn check_anes96(weighted: bool) {
    let reference = fixture("gating_anes96.json");
    let case = &reference[if weighted { "frequency_weighted" } else { "unweighted" }];
    let (header, cols) = read_csv(&root("tests/reference/anes96.csv"));
    let names = ["logpopul", "selfLR", "age", "educ", "income"];
    let columns: Vec<_> = names.iter().map(|n| numeric(col(&header, &cols, n))).collect();
    let named: Vec<(&str, &cohortmix::data::Column)> = names.iter().copied().zip(columns.iter()).collect();
    let n = cols[0].len();
    let design = Design::from_columns(n, &named).unwrap();
    let g = 7;
    let mut tau = vec![0.0; n * g];
    for (i, v) in col(&header, &cols, "PID").iter().enumerate() {
        tau[i * g + v.parse::<usize>().unwrap()] = 1.0;
    }
    let weights: Vec<f64> = if weighted {
        col(&header, &cols, "freq").iter().map(|v| v.parse().unwrap()).collect()
    } else {
        vec![1.0; n]
    };
    let p = design.p();
    let fit = fit_multinomial_logit(
        &design.x,
        p,
        &tau,
        g,
        &weights,
        0.0,
        &vec![0.0; (g - 1) * p],
        MAX_NEWTON_ITERATIONS,
    );
    assert!(fit.converged);
    let loglik = logit_objective(&design.x, p, &tau, g, &weights, 0.0, &fit.gamma);
    let ref_ll = case["loglik"].as_f64().unwrap();
    assert!(digits(loglik, ref_ll) >= 9.0, "loglik {loglik} vs {ref_ll}");
    let mut worst = 16.0f64;
    for (k, ref_coef) in case["coefficients"].as_array().unwrap().iter().enumerate() {
        let ours = design.to_original_scale(&fit.gamma[k * p..(k + 1) * p]);
        for (a, b) in ours.iter().zip(floats(ref_coef)) {
            worst = worst.min(digits(*a, b));
        }
    }
    println!(
        "anes96 weighted={weighted}: loglik {loglik} vs {ref_ll}; coefficients agree to {worst:.1} significant digits"
    );
    assert!(worst >= 6.0, "coefficients agree to only {worst:.1} significant digits");
}

#[test]
fn gating_matches_statsmodels_mnlogit_on_anes96() {
    check_anes96(false);
}

#[test]
fn gating_with_frequency_weights_matches_replicated_rows() {
    check_anes96(true);
}

/// Gaussian component M-step with hard memberships = weighted least squares.
/// Source: statsmodels WLS on Fisher's iris (scikit-learn's bundled copy), species as
/// clusters; made by tests/reference/make_gaussian_iris.py.
#[test]
fn gaussian_components_match_statsmodels_wls_on_iris() {
    let reference = fixture("gaussian_iris.json");
    let (header, cols) = read_csv(&root("tests/reference/iris.csv"));
    let n = cols[0].len();
    let sl = numeric(col(&header, &cols, "sepal_length"));
    let sw = numeric(col(&header, &cols, "sepal_width"));
    let design = Design::from_columns(n, &[("sepal_length", &sl), ("sepal_width", &sw)]).unwrap();
    let pl: Vec<f64> = col(&header, &cols, "petal_length")
        .iter()
        .map(|v| v.parse().unwrap())
        .collect();
    let pw: Vec<f64> = col(&header, &cols, "petal_width")
        .iter()
        .map(|v| v.parse().unwrap())
        .collect();
    let y: Vec<f64> = pl.iter().zip(&pw).flat_map(|(a, b)| [*a, *b]).collect();
    let weights: Vec<f64> = col(&header, &cols, "weight")
        .iter()
        .map(|v| v.parse().unwrap())
        .collect();
    let g = 3;
    let mut tau = vec![0.0; n * g];
    for (i, v) in col(&header, &cols, "species").iter().enumerate() {
        tau[i * g + v.parse::<usize>().unwrap()] = 1.0;
    }
    let data = FitData {
        n,
        weights: &weights,
        y: &y,
        d: 2,
        z: &design.x,
        q: design.p(),
        w: &vec![1.0; n],
        p: 1,
    };
    let mut comps = GaussianComponents::new(&data, g, CovarianceStructure::UNCONSTRAINED);
    comps.m_step(&data, &tau).unwrap();
    let indicators = vec!["petal_length".to_string(), "petal_width".to_string()];
    let params = comps.parameters(Naming {
        indicators: &indicators,
        design: &design,
    });
    let terms = ["intercept", "sepal_length", "sepal_width"];
    let mut worst = 16.0f64;
    for (k, cl) in reference["clusters"].as_array().unwrap().iter().enumerate() {
        for (j, coefs) in cl["coefficients"].as_array().unwrap().iter().enumerate() {
            for (t, b) in terms.iter().zip(floats(coefs)) {
                let ours = params
                    .iter()
                    .find(|p| {
                        p.block == "mean"
                            && p.cluster == k + 1
                            && p.indicator.as_deref() == Some(&indicators[j])
                            && p.term.as_deref() == Some(*t)
                    })
                    .unwrap()
                    .value;
                worst = worst.min(digits(ours, b));
            }
        }
        for (a, row) in cl["covariance"].as_array().unwrap().iter().enumerate() {
            for (b, v) in floats(row).iter().enumerate() {
                worst = worst.min(digits(comps.cov[k][(a, b)], *v));
            }
        }
    }
    println!("iris WLS: agreement {worst:.1} significant digits");
    assert!(worst >= 8.0, "WLS agreement only {worst:.1} significant digits");
}
