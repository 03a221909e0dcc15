//! What case weights mean. Sampling weights carry no information in their scale, so every
//! number a run writes is the same when they are all multiplied by 50. Frequency weights
//! stand for identical people, so every number is the one the same rows written out once
//! per person give. Both on the fuzz fixture's study (80 rows, a Gaussian indicator,
//! items and a count, a gating network and a component covariate).

use super::common::root;
use serde_json::Value;
use std::path::Path;
use std::process::Command;

fn run_compare(dir: &Path) -> (Value, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args(["compare", "study.toml"])
        .current_dir(dir)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let results = serde_json::from_slice(&std::fs::read(dir.join("run/results.json")).unwrap()).unwrap();
    let members = std::fs::read_to_string(dir.join("run/memberships.csv")).unwrap();
    (results, members)
}

/// A folder with the fixture's spec (edited by `spec`) and the data `rows` under its header.
fn study(spec: impl FnOnce(String) -> String, rows: &[String]) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(root("fuzz/fixture/study.toml")).unwrap();
    // A tight tolerance, so that fits that reach the same optimum by different paths
    // agree to far below the comparison's tolerance.
    let text = text.replace("[search]\n", "[search]\ntolerance = 1e-13\nmax_iterations = 5000\n");
    std::fs::write(dir.path().join("study.toml"), spec(text)).unwrap();
    let data = std::fs::read_to_string(root("fuzz/fixture/data.csv")).unwrap();
    let header = data.lines().next().unwrap();
    std::fs::write(dir.path().join("data.csv"), format!("{header}\n{}\n", rows.join("\n"))).unwrap();
    dir
}

fn fixture_rows() -> Vec<Vec<String>> {
    let data = std::fs::read_to_string(root("fuzz/fixture/data.csv")).unwrap();
    data.lines()
        .skip(1)
        .map(|l| l.split(',').map(str::to_string).collect())
        .collect()
}

/// Keys whose values differ between identical runs or name the run itself.
const SKIPPED: [&str; 4] = ["seconds", "spec_file", "data_file", "sha256"];

/// Every number of `a` and `b` agrees to `rel` (relative to max(1, |a|)); every other
/// value is equal. Returns how many numbers were compared.
fn same(a: &Value, b: &Value, rel: f64, path: &str, skip: &dyn Fn(&str) -> bool) -> usize {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) => {
            let (x, y) = (x.as_f64().unwrap(), y.as_f64().unwrap());
            assert!((x - y).abs() <= rel * x.abs().max(1.0), "{path}: {x} against {y}");
            1
        }
        (Value::Object(x), Value::Object(y)) => {
            assert_eq!(x.keys().collect::<Vec<_>>(), y.keys().collect::<Vec<_>>(), "{path}");
            x.iter()
                .filter(|(k, _)| !skip(k))
                .map(|(k, v)| same(v, &y[k], rel, &format!("{path}.{k}"), skip))
                .sum()
        }
        (Value::Array(x), Value::Array(y)) => {
            assert_eq!(x.len(), y.len(), "{path}");
            x.iter()
                .zip(y)
                .enumerate()
                .map(|(i, (p, q))| same(p, q, rel, &format!("{path}[{i}]"), skip))
                .sum()
        }
        _ => {
            assert_eq!(a, b, "{path}");
            0
        }
    }
}

#[test]
fn sampling_weights_times_fifty_change_nothing() {
    let rows = fixture_rows();
    let scaled = |factor: f64| -> Vec<String> {
        rows.iter()
            .map(|r| {
                let mut r = r.clone();
                let w: f64 = r[9].parse().unwrap();
                r[9] = format!("{}", w * factor);
                r.join(",")
            })
            .collect()
    };
    let one = study(|s| s, &scaled(1.0));
    let fifty = study(|s| s, &scaled(50.0));
    let (a, ma) = run_compare(one.path());
    let (b, mb) = run_compare(fifty.path());
    assert_eq!(a["study"]["weight_type"], "sampling");
    let skip = |k: &str| SKIPPED.iter().any(|s| k.contains(s));
    let compared = same(&a, &b, 1e-10, "results", &skip);
    assert!(compared > 500, "only {compared} numbers compared");
    // The memberships, to their 6 written decimals.
    assert_eq!(ma, mb);
    // The scale really differs in the input (the test would be empty otherwise).
    assert_ne!(scaled(1.0), scaled(50.0));
}

#[test]
fn frequency_weights_equal_the_rows_written_out_once_per_person() {
    let rows = fixture_rows();
    // Weights 1, 2 or 3 per row.
    let weighted: Vec<String> = rows
        .iter()
        .enumerate()
        .map(|(i, r)| {
            let mut r = r.clone();
            r[9] = (1 + i % 3).to_string();
            r.join(",")
        })
        .collect();
    let written_out: Vec<String> = rows
        .iter()
        .enumerate()
        .flat_map(|(i, r)| {
            (0..=i % 3).map(move |copy| {
                let mut r = r.clone();
                r[0] = format!("{}-{copy}", r[0]);
                r[9] = "1".into();
                r.join(",")
            })
        })
        .collect();
    // The sandwich, whose middle counts sampling units: people here.
    let frequency = |s: String| {
        s.replace("weight_type = \"sampling\"", "weight_type = \"frequency\"")
            + "\n[inference]\nstandard_errors = \"sandwich\"\n"
    };
    let a = study(frequency, &weighted);
    let b = study(frequency, &written_out);
    let (ra, _) = run_compare(a.path());
    let (rb, _) = run_compare(b.path());
    let people = written_out.len() as f64;
    assert_eq!(ra["study"]["sample_size"], people);
    assert_eq!(rb["study"]["sample_size"], people);
    assert_eq!(ra["study"]["rows_used"], 80);
    // Everything but what counts rows (rows used, and the starts, which are drawn from the
    // rows) is the same. The comparison's cross-tables and certainty histograms count rows,
    // and the starts' paths differ; the optimum they reach does not.
    let skip = |k: &str| {
        SKIPPED.iter().any(|s| k.contains(s))
            || [
                "rows_read",
                "rows_used",
                "rows",
                "starts",
                "iterations",
                "missing_by_column",
                "sentences",
                "inference_notes",
            ]
            .contains(&k)
    };
    let fits = |r: &Value| r["fits"].clone();
    assert_eq!(ra["fits"][0]["standard_errors"]["method"], "sandwich");
    assert!(ra["fits"][0]["parameters_named"][0]["se"].as_f64().unwrap() > 0.0);
    let compared = same(&fits(&ra), &fits(&rb), 1e-6, "fits", &skip);
    assert!(compared > 100, "only {compared} numbers compared");
    let criteria = |r: &Value| r["comparison"]["criteria"].clone();
    same(&criteria(&ra), &criteria(&rb), 1e-6, "criteria", &skip);
}
