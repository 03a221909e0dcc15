//! Item and count families against outside references: statsmodels GLMs with hard
//! memberships on open data, and a published latent class analysis.

use super::common::*;
use cohortmix::data::{Column, Design, Exposure, MISSING_ITEM};
use cohortmix::fit::em::{self, EmSettings};
use cohortmix::fit::starts::{partition, StartKind};
use cohortmix::fit::{initial_model, ModelOptions};
use cohortmix::model::family::counts::CountData;
use cohortmix::model::family::items::ItemData;
use cohortmix::model::family::{Block, CountComponents, CovarianceStructure, ItemComponents};
use cohortmix::model::FitData;
use cohortmix::rng::Stream;
use serde_json::Value;
use std::sync::Arc;

fn fixture() -> Value {
    serde_json::from_str(&std::fs::read_to_string(root("tests/reference/families_reference.json")).unwrap()).unwrap()
}

fn categorical(values: &[String]) -> Column {
    let mut levels: Vec<String> = values.to_vec();
    levels.sort_by(|a, b| match (a.parse::<f64>(), b.parse::<f64>()) {
        (Ok(x), Ok(y)) => x.total_cmp(&y),
        _ => a.cmp(b),
    });
    levels.dedup();
    let codes = values
        .iter()
        .map(|v| levels.iter().position(|l| l == v).unwrap() as u32)
        .collect();
    Column::Categorical {
        levels,
        reference: 0,
        codes,
    }
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

/// Hard 0/1 responsibilities from 0-based cluster labels.
fn hard(labels: &[usize], g: usize) -> Vec<f64> {
    let mut tau = vec![0.0; labels.len() * g];
    for (i, l) in labels.iter().enumerate() {
        tau[i * g + l] = 1.0;
    }
    tau
}

/// Weighted log-likelihood of the rows labelled k, from two-cluster log-densities `ll`.
fn hard_loglik(ll: &[f64], labels: &[usize], weights: &[f64], k: usize) -> f64 {
    (0..labels.len())
        .filter(|i| labels[*i] == k)
        .map(|i| weights[i] * ll[i * 2 + k])
        .sum()
}

fn parsed(header: &[String], cols: &[Vec<String>], name: &str) -> Vec<f64> {
    col(header, cols, name).iter().map(|v| v.parse().unwrap()).collect()
}

/// Count component M-step with hard memberships = weighted Poisson GLM with an offset.
/// Source: statsmodels GLM Poisson (freq_weights, offset log service) on MASS `ships`
/// (McCullagh & Nelder 1989, section 6.3.2), made by tests/reference/make_families.py.
#[test]
fn count_component_matches_statsmodels_poisson_on_ships() {
    let reference = fixture();
    let (header, cols) = read_csv(&root("tests/reference/ships.csv"));
    let n = cols[0].len();
    let columns: Vec<Column> = ["type", "year", "period"]
        .iter()
        .map(|c| categorical(col(&header, &cols, c)))
        .collect();
    let named: Vec<(&str, &Column)> = ["type", "year", "period"].iter().copied().zip(columns.iter()).collect();
    let design = Design::from_columns(n, &named).unwrap();
    let y = parsed(&header, &cols, "incidents");
    let service = parsed(&header, &cols, "service");
    let log_service: Vec<f64> = service.iter().map(|s| s.ln()).collect();
    let weights = parsed(&header, &cols, "weight");
    let labels: Vec<usize> = parsed(&header, &cols, "cluster").iter().map(|v| *v as usize).collect();
    let terms = vec![(0..design.p()).collect::<Vec<_>>()];
    let names = vec!["incidents".to_string()];
    let ones = vec![1.0; n];
    let data = FitData {
        n,
        weights: &weights,
        w: &ones,
        p: 1,
    };
    let exposure = Exposure {
        values: service,
        logs: log_service,
    };
    let rows = CountData::new(
        names.clone(),
        Arc::new(y),
        design.clone(),
        terms,
        Some(Arc::new(exposure)),
    );
    let tau = hard(&labels, 2);
    let mut comps = CountComponents::new(Arc::new(rows), 2);
    for _ in 0..60 {
        comps.m_step(&data, &tau, None).unwrap();
    }
    let params = comps.parameters();
    let mut ll = vec![0.0; n * 2];
    comps.add_log_density(&mut ll);
    let mut worst = 16.0f64;
    for (k, case) in reference["ships_poisson"].as_array().unwrap().iter().enumerate() {
        for (term, want) in case["terms"]
            .as_array()
            .unwrap()
            .iter()
            .zip(floats(&case["coefficients"]))
        {
            let got = param_value(&params, "count_log_rate", k + 1, Some("incidents"), term.as_str());
            worst = worst.min(digits(got, want));
        }
        worst = worst.min(digits(
            hard_loglik(&ll, &labels, &weights, k),
            case["loglik"].as_f64().unwrap(),
        ));
    }
    println!("ships Poisson: coefficients and loglik agree to {worst:.1} significant digits");
    assert!(worst >= 6.0, "only {worst:.1} digits");
}

/// Item component M-step with covariates and hard memberships = logistic and
/// baseline-category logit regressions. Sources: statsmodels GLM Binomial with
/// freq_weights (low birth weight on age, mother's weight and smoking) and MNLogit (race,
/// three levels, on age and mother's weight) on MASS `birthwt` (Hosmer & Lemeshow 1989),
/// made by tests/reference/make_families.py.
#[test]
fn item_logits_match_statsmodels_on_birthwt() {
    let reference = fixture();
    let (header, cols) = read_csv(&root("tests/reference/birthwt.csv"));
    let n = cols[0].len();
    let age = numeric(col(&header, &cols, "age"));
    let lwt = numeric(col(&header, &cols, "lwt"));
    let smoke = Column::Numeric {
        kind: cohortmix::spec::VariableType::Binary,
        values: parsed(&header, &cols, "smoke"),
    };
    let design = Design::from_columns(n, &[("age", &age), ("lwt", &lwt), ("smoke", &smoke)]).unwrap();
    let labels: Vec<usize> = parsed(&header, &cols, "cluster").iter().map(|v| *v as usize).collect();
    let tau = hard(&labels, 2);
    let mut worst = 16.0f64;
    for (item, levels, case_key, weighted, terms) in [
        ("low", 2usize, "birthwt_low_logit", true, vec![0usize, 1, 2, 3]),
        ("race", 3usize, "birthwt_race_mnlogit", false, vec![0usize, 1, 2]),
    ] {
        let offset = if item == "race" { 1 } else { 0 };
        let codes: Vec<u16> = parsed(&header, &cols, item)
            .iter()
            .map(|v| *v as u16 - offset)
            .collect();
        let weights = if weighted {
            parsed(&header, &cols, "weight")
        } else {
            vec![1.0; n]
        };
        let names = vec![item.to_string()];
        let term_lists = vec![terms.clone()];
        let ones = vec![1.0; n];
        let data = FitData {
            n,
            weights: &weights,
            w: &ones,
            p: 1,
        };
        let level_names: Vec<Vec<String>> = vec![(0..levels).map(|l| (l + offset as usize).to_string()).collect()];
        let rows = ItemData::new(
            names.clone(),
            Arc::new(codes),
            level_names.clone(),
            design.clone(),
            term_lists,
        );
        let mut comps = ItemComponents::new(Arc::new(rows), 2, 0.0);
        for _ in 0..60 {
            comps.m_step(&data, &tau, None).unwrap();
        }
        let params = comps.parameters();
        for (k, case) in reference[case_key].as_array().unwrap().iter().enumerate() {
            let per_level: Vec<Vec<f64>> = if levels == 2 {
                vec![floats(&case["coefficients"])]
            } else {
                case["coefficients"].as_array().unwrap().iter().map(floats).collect()
            };
            for (lv, coefs) in per_level.iter().enumerate() {
                let level = &level_names[0][lv + 1];
                for (term, want) in case["terms"].as_array().unwrap().iter().zip(coefs) {
                    let indicator = format!("{item}={level}");
                    let got = param_value(&params, "item_logit", k + 1, Some(&indicator), term.as_str());
                    worst = worst.min(digits(got, *want));
                }
            }
            let mut ll = vec![0.0; n * 2];
            comps.add_log_density(&mut ll);
            worst = worst.min(digits(
                hard_loglik(&ll, &labels, &weights, k),
                case["loglik"].as_f64().unwrap(),
            ));
        }
    }
    println!("birthwt logits: coefficients and logliks agree to {worst:.1} significant digits");
    assert!(worst >= 6.0, "only {worst:.1} digits");
}

/// The Stouffer-Toby table as cohortmix data: 16 response patterns of four binary items,
/// the pattern counts as case weights.
fn stouffer_toby(items: &[usize]) -> (Vec<u16>, Vec<f64>) {
    let st = &fixture()["stouffer_toby"];
    let mut codes = Vec::new();
    let mut counts = Vec::new();
    for (p, n) in st["patterns"].as_array().unwrap().iter().zip(floats(&st["counts"])) {
        let p = p.as_str().unwrap().as_bytes();
        codes.extend(items.iter().map(|j| u16::from(p[*j] == b'1')));
        counts.push(n);
    }
    (codes, counts)
}

/// Best log-likelihood of a latent class model on pattern counts, over many starts.
fn best_latent_class_loglik(codes: &[u16], counts: &[f64], j: usize, g: usize) -> (f64, Vec<f64>) {
    let n = counts.len();
    let levels = vec![2; j];
    let terms = vec![vec![0usize]; j];
    let names: Vec<String> = (0..j).map(|i| format!("item{i}")).collect();
    let ones = vec![1.0; n];
    let data = FitData {
        n,
        weights: counts,
        w: &ones,
        p: 1,
    };
    let blocks = vec![cohortmix::model::family::items::prepared(item_data(
        &names,
        codes,
        &levels,
        &Design::intercept(n),
        &terms,
    ))];
    let seeding: Vec<f64> = codes.iter().map(|c| f64::from(*c)).collect();
    let options = ModelOptions {
        structure: CovarianceStructure::UNCONSTRAINED,
        gating_ridge: 0.0,
        covariance_prior: false,
        variance_floor: 0.0,
        smoothing: 0.0,
    };
    let mut best = (f64::NEG_INFINITY, Vec::new());
    for s in 0..if g == 1 { 1 } else { 40 } {
        let mut rng = Stream::new(77, &format!("lca|{g}|{s}"));
        let tau = partition(StartKind::for_start(s, g), &seeding, j, counts, g, &mut rng);
        let run = em::run(
            &data,
            initial_model(&data, &blocks, &free_placement(), g, options),
            tau,
            EmSettings {
                max_iterations: 20_000,
                tolerance: 1e-14,
                accelerate: true,
            },
        );
        if run.termination.usable() && run.loglik > best.0 {
            best = (run.loglik, cohortmix::fit::cluster_shares(&run.tau, counts, g));
        }
    }
    best
}

/// G² = 2 Σ n log(n / fitted) = 2 (Σ n log(n/N) − loglik) for pattern counts n.
fn g_squared(counts: &[f64], loglik: f64) -> f64 {
    let total: f64 = counts.iter().sum();
    2.0 * (counts
        .iter()
        .filter(|n| **n > 0.0)
        .map(|n| n * (n / total).ln())
        .sum::<f64>()
        - loglik)
}

/// Published latent class table: Stouffer & Toby's (1951) four role-conflict items, 216
/// respondents, as analysed by Goodman (1974, Biometrika 61:215-231, Table 1 for the
/// counts). The two-class model has G² = 2.72 on 6 degrees of freedom and latent classes
/// of about 28% and 72% (Goodman 1974; counts and published values written from memory,
/// so the check fails if memory is wrong). The one-class model is the independence
/// log-linear model: its G² must equal the statsmodels Poisson GLM deviance.
#[test]
fn latent_class_models_reproduce_the_stouffer_toby_analysis() {
    let reference = fixture();
    let (codes, counts) = stouffer_toby(&[0, 1, 2, 3]);
    let (ll1, _) = best_latent_class_loglik(&codes, &counts, 4, 1);
    let g1 = g_squared(&counts, ll1);
    let want = reference["stouffer_toby"]["independence_deviance"].as_f64().unwrap();
    println!("one class: G2 {g1:.6} vs statsmodels deviance {want:.6}");
    assert!(digits(g1, want) >= 8.0, "{g1} vs {want}");

    let (ll2, mut shares) = best_latent_class_loglik(&codes, &counts, 4, 2);
    shares.sort_by(f64::total_cmp);
    let g2 = g_squared(&counts, ll2);
    println!(
        "two classes: G2 {g2:.4} (published 2.72, 6 df), classes {:.4} / {:.4}",
        shares[0], shares[1]
    );
    assert!((g2 - 2.72).abs() < 0.005, "G2 {g2}");
    // 15 cell degrees of freedom minus 1 + 2·4 parameters.
    assert_eq!(15 - (1 + 2 * 4), 6);
    assert!(
        (shares[0] - 0.28).abs() < 0.005 && (shares[1] - 0.72).abs() < 0.005,
        "{shares:?}"
    );

    // Saturated case: three binary items, two classes, 7 parameters for 7 cell degrees of
    // freedom: the fit reproduces the table, so loglik = Σ n log(n/N) (pure arithmetic).
    let (codes3, _) = stouffer_toby(&[0, 1, 2]);
    let (ll3, _) = best_latent_class_loglik(&codes3, &counts, 3, 2);
    let mut cells = std::collections::BTreeMap::new();
    for (row, n) in codes3.chunks(3).zip(&counts) {
        *cells.entry(row.to_vec()).or_insert(0.0) += n;
    }
    let table: Vec<f64> = cells.values().copied().collect();
    let total: f64 = table.iter().sum();
    let saturated: f64 = table.iter().map(|n| n * (n / total).ln()).sum();
    println!("saturated three-item model: loglik {ll3:.10} vs Σ n log(n/N) {saturated:.10}");
    assert!((ll3 - saturated).abs() < 1e-6 * saturated.abs(), "{ll3} vs {saturated}");
}

/// A missing item value is skipped: the log-likelihood of a fit equals the sum, over
/// rows, of log Σ_k π_k Π_{observed j} P(y_ij | k), computed here by hand.
#[test]
fn missing_items_are_skipped_in_the_likelihood() {
    let (mut codes, counts) = stouffer_toby(&[0, 1, 2, 3]);
    // Knock out every fifth value.
    for (i, c) in codes.iter_mut().enumerate() {
        if i % 5 == 2 {
            *c = MISSING_ITEM;
        }
    }
    let n = counts.len();
    let levels = vec![2; 4];
    let terms = vec![vec![0usize]; 4];
    let names: Vec<String> = (0..4).map(|i| format!("item{i}")).collect();
    let ones = vec![1.0; n];
    let data = FitData {
        n,
        weights: &counts,
        w: &ones,
        p: 1,
    };
    let blocks = vec![cohortmix::model::family::items::prepared(item_data(
        &names,
        &codes,
        &levels,
        &Design::intercept(n),
        &terms,
    ))];
    let options = ModelOptions {
        structure: CovarianceStructure::UNCONSTRAINED,
        gating_ridge: 0.0,
        covariance_prior: false,
        variance_floor: 0.0,
        smoothing: 0.0,
    };
    let seeding: Vec<f64> = codes
        .iter()
        .map(|c| if *c == MISSING_ITEM { 0.5 } else { f64::from(*c) })
        .collect();
    let mut rng = Stream::new(3, "missing");
    let tau = partition(StartKind::SeededCentres, &seeding, 4, &counts, 2, &mut rng);
    let run = em::run(
        &data,
        initial_model(&data, &blocks, &free_placement(), 2, options),
        tau,
        EmSettings {
            max_iterations: 5000,
            tolerance: 1e-12,
            accelerate: true,
        },
    );
    assert!(run.termination.usable());
    let items = run.model.components.find::<ItemComponents>().unwrap();
    let cohortmix::model::gating::Gating::Free { log_pi } = &run.model.gating else {
        panic!("free proportions expected")
    };
    let mut by_hand = 0.0;
    for i in 0..n {
        let mut row = 0.0;
        for (k, lp) in log_pi.iter().enumerate() {
            let mut p = lp.exp();
            for j in 0..4 {
                let c = codes[i * 4 + j];
                if c != MISSING_ITEM {
                    p *= items.reference_probabilities(j, k)[usize::from(c)];
                }
            }
            row += p;
        }
        by_hand += counts[i] * row.ln();
    }
    println!("loglik {} vs by hand over observed items {by_hand}", run.loglik);
    assert!((run.loglik - by_hand).abs() < 1e-10 * by_hand.abs());
}
