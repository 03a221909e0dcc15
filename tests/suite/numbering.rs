//! One cluster numbering in every file of a run: the demo's third placement has four
//! clusters whose numbers are not their fitted order ([1, 4, 2, 3]), so a file that
//! numbered clusters as fitted would disagree with the report here.

use super::common::root;
use serde_json::Value;
use std::collections::BTreeMap;
use std::path::Path;
use std::process::Command;

fn cohortmix(args: &[&str]) {
    let out = Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args(args)
        .current_dir(root(""))
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
}

fn json(path: &Path) -> Value {
    serde_json::from_slice(&std::fs::read(path).unwrap()).unwrap()
}

fn numbers(v: &Value) -> Vec<u64> {
    v.as_array().unwrap().iter().map(|x| x.as_u64().unwrap()).collect()
}

#[test]
fn every_file_of_a_comparison_numbers_clusters_as_the_report_does() {
    let dir = tempfile::tempdir().unwrap();
    let run = dir.path().join("run");
    cohortmix(&["compare", "configs/demo.toml", "--out", run.to_str().unwrap()]);
    let results = json(&run.join("results.json"));
    let comparison = &results["comparison"];

    // The alignment the report shows, per placement.
    let aligned: BTreeMap<String, Vec<u64>> = comparison["alignments"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| (a["placement"].as_str().unwrap().to_string(), numbers(&a["aligned"])))
        .collect();
    assert!(
        aligned
            .values()
            .any(|a| a.iter().enumerate().any(|(k, n)| *n != k as u64 + 1)),
        "the demo should have a placement whose numbers differ from its fitted order: {aligned:?}"
    );

    // The profiles' row counts per (placement, cluster) are the report's.
    let mut report_counts: BTreeMap<(String, u64), u64> = BTreeMap::new();
    for p in comparison["profiles"].as_array().unwrap() {
        let key = (
            p["placement"].as_str().unwrap().to_string(),
            p["cluster"].as_u64().unwrap(),
        );
        report_counts.insert(key, p["count"].as_u64().unwrap());
    }

    // memberships.csv: most likely cluster by number, and as fitted.
    let text = std::fs::read_to_string(run.join("memberships.csv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    assert_eq!(
        header[..5],
        ["placement", "clusters", "id", "most_likely", "most_likely_as_fitted"]
    );
    let mut file_counts: BTreeMap<(String, u64), u64> = BTreeMap::new();
    for line in lines {
        // Placement names of the demo hold commas: they are quoted.
        let mut r = csv::ReaderBuilder::new()
            .has_headers(false)
            .from_reader(line.as_bytes());
        let rec = r.records().next().unwrap().unwrap();
        let placement = rec[0].to_string();
        let number: u64 = rec[3].parse().unwrap();
        let fitted: usize = rec[4].parse().unwrap();
        assert_eq!(aligned[&placement][fitted - 1], number, "{line}");
        // The posterior of the most likely cluster stands in its number's column.
        let col = header.iter().position(|h| *h == format!("posterior_{number}")).unwrap();
        let top: f64 = rec[col].parse().unwrap();
        for (h, v) in header.iter().zip(rec.iter()).skip(5) {
            if !v.is_empty() {
                assert!(v.parse::<f64>().unwrap() <= top, "{h} above the most likely: {line}");
            }
        }
        *file_counts.entry((placement, number)).or_default() += 1;
    }
    assert_eq!(
        file_counts, report_counts,
        "memberships.csv against the report's profiles"
    );

    // results.json fits: numbers, shares and parameters by number.
    for f in results["fits"].as_array().unwrap() {
        let placement = f["placement"].as_str().unwrap();
        let nums = numbers(&f["cluster_numbers"]);
        let mut sorted = nums.clone();
        sorted.sort_unstable();
        sorted.dedup();
        assert_eq!(sorted.len(), nums.len(), "numbers repeat in {f}");
        let compared = comparison["criteria"].as_array().unwrap().iter().any(|c| {
            c["placement"] == f["placement"]
                && c["clusters"] == f["clusters"]
                && c["covariance"] == f["covariance"]
                && c["chosen"] == true
        });
        if compared {
            assert_eq!(nums, aligned[placement], "{placement}");
            for s in f["shares"].as_array().unwrap() {
                let profile = comparison["profiles"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .find(|p| p["placement"] == f["placement"] && p["cluster"] == s["cluster"])
                    .unwrap();
                assert_eq!(profile["share"], s["share"], "{placement}");
            }
        }
        for p in f["parameters_named"].as_array().unwrap() {
            let fitted = p["fitted_cluster"].as_u64().unwrap() as usize;
            assert_eq!(p["cluster"].as_u64().unwrap(), nums[fitted - 1]);
        }
    }

    // fitted-models.json carries the same numbers, and predict writes them.
    let saved = json(&run.join("fitted-models.json"));
    for s in saved["fits"].as_array().unwrap() {
        assert_eq!(
            numbers(&s["cluster_numbers"]),
            aligned[s["placement"].as_str().unwrap()]
        );
    }
    let again = dir.path().join("again.csv");
    cohortmix(&[
        "predict",
        run.to_str().unwrap(),
        "demo-data/respiratory.csv",
        "--out",
        again.to_str().unwrap(),
    ]);
    assert_eq!(
        std::fs::read(&again).unwrap(),
        std::fs::read(run.join("memberships.csv")).unwrap()
    );
}
