//! The command line as a user runs it: the run folder, failed reruns, determinism, demo.

use super::common::root;
use std::path::Path;
use std::process::{Command, Output};

fn cohortmix(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args(args)
        .current_dir(dir)
        .output()
        .unwrap()
}

const TRUTH: &str = r#"
[simulation]
rows = 600
seed = 11
output = "small.csv"
id = "pid"
indicators = ["y1", "y2"]
[[covariate]]
name = "age"
distribution = "normal"
mean = 50
sd = 10
missing = 0.05
[[cluster]]
name = "low"
mean = { y1 = 0, y2 = 0 }
sd = { y1 = 1, y2 = 1 }
[[cluster]]
name = "high"
gating = { intercept = -2.5, age = 0.05 }
mean = { y1 = 3, y2 = 2 }
sd = { y1 = 1, y2 = 1.5 }
correlation = 0.4
"#;

const STUDY: &str = r#"
[study]
title = "small <study> & co"
data = "small.csv"
id = "pid"
seed = 5
[variables]
age = "continuous"
[indicators]
columns = ["y1", "y2"]
[search]
clusters = [1, 2, 3]
starts = 6
[[placement]]
name = "unadjusted"
[[placement]]
name = "age in gating"
gating = ["age"]
"#;

fn small_study() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("truth.toml"), TRUTH).unwrap();
    std::fs::write(dir.path().join("study.toml"), STUDY).unwrap();
    let out = cohortmix(dir.path(), &["simulate", "truth.toml"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    dir
}

fn read(p: &Path) -> Vec<u8> {
    std::fs::read(p).unwrap_or_else(|e| panic!("{}: {e}", p.display()))
}

#[test]
fn fit_writes_the_run_folder() {
    let dir = small_study();
    let out = cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(stdout.contains("smaller is better"), "{stdout}");
    let run = dir.path().join("run");
    let results: serde_json::Value = serde_json::from_slice(&read(&run.join("results.json"))).unwrap();
    assert_eq!(results["schema_version"], 1);
    let fits = results["fits"].as_array().unwrap();
    assert_eq!(fits.len(), 6);
    let rows = results["study"]["rows_used"].as_u64().unwrap() as usize;
    assert!(
        results["study"]["rows_excluded"].as_u64().unwrap() > 0,
        "age has missing values"
    );
    for f in fits {
        let (ll, k, n) = (
            f["loglik"].as_f64().unwrap(),
            f["parameters"].as_f64().unwrap(),
            f["rows"].as_f64().unwrap(),
        );
        let bic = f["bic"].as_f64().unwrap();
        assert!((bic - (-2.0 * ll + k * n.ln())).abs() < 1e-9 * bic.abs());
        assert!(f["starts"]["reaching_best"].as_u64().unwrap() >= 1);
        assert!(!f["parameters_named"].as_array().unwrap().is_empty());
    }
    // Two clusters are the truth; BIC should pick them in both placements.
    for c in results["chosen"].as_array().unwrap() {
        assert_eq!(c["clusters"], 2, "{c}");
    }
    let models = String::from_utf8(read(&run.join("models.csv"))).unwrap();
    assert_eq!(models.lines().count(), 7);
    let memberships = String::from_utf8(read(&run.join("memberships.csv"))).unwrap();
    assert_eq!(memberships.lines().count(), 1 + 2 * rows);
    assert!(memberships.starts_with("placement,clusters,id,most_likely,posterior_1,posterior_2\n"));
    let manifest: serde_json::Value = serde_json::from_slice(&read(&run.join("manifest.json"))).unwrap();
    assert_eq!(manifest["data_sha256"].as_str().unwrap().len(), 64);
    // No temporary files are left behind.
    let leftovers: Vec<_> = std::fs::read_dir(&run)
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().ends_with(".partial"))
        .collect();
    assert!(leftovers.is_empty());
}

#[test]
fn a_failed_rerun_leaves_earlier_results_intact() {
    let dir = small_study();
    assert!(cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"])
        .status
        .success());
    let run = dir.path().join("run");
    let before: Vec<Vec<u8>> = ["results.json", "models.csv", "memberships.csv", "manifest.json"]
        .iter()
        .map(|f| read(&run.join(f)))
        .collect();
    // Break the data: a word in a numeric column.
    let csv = std::fs::read_to_string(dir.path().join("small.csv")).unwrap();
    let mut lines: Vec<String> = csv.lines().map(str::to_string).collect();
    let fields: Vec<&str> = lines[5].split(',').collect();
    lines[5] = format!("{},oops,{}", fields[0], fields[2..].join(","));
    std::fs::write(dir.path().join("small.csv"), lines.join("\n") + "\n").unwrap();
    let out = cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("small.csv:6:"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let after: Vec<Vec<u8>> = ["results.json", "models.csv", "memberships.csv", "manifest.json"]
        .iter()
        .map(|f| read(&run.join(f)))
        .collect();
    assert_eq!(before, after);
}

#[test]
fn outputs_do_not_depend_on_the_thread_count() {
    let dir = small_study();
    assert!(
        cohortmix(dir.path(), &["--threads", "1", "fit", "study.toml", "--out", "one"])
            .status
            .success()
    );
    assert!(
        cohortmix(dir.path(), &["--threads", "2", "fit", "study.toml", "--out", "two"])
            .status
            .success()
    );
    for f in ["results.json", "models.csv", "memberships.csv"] {
        assert_eq!(
            read(&dir.path().join("one").join(f)),
            read(&dir.path().join("two").join(f)),
            "{f} differs"
        );
    }
}

#[test]
fn check_prints_the_plan() {
    let dir = small_study();
    let out = cohortmix(dir.path(), &["check", "study.toml"]);
    assert!(out.status.success());
    let s = String::from_utf8_lossy(&out.stdout);
    assert!(
        s.contains("6 fits in all") && s.contains("excluded for missing values") && s.contains("gating terms:    age"),
        "{s}"
    );
}

#[test]
fn the_demo_data_is_what_its_truth_spec_generates() {
    let dir = tempfile::tempdir().unwrap();
    let out = cohortmix(
        dir.path(),
        &[
            "simulate",
            root("demo-data/respiratory-truth.toml").to_str().unwrap(),
            "--out",
            "demo.csv",
        ],
    );
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert_eq!(
        read(&dir.path().join("demo.csv")),
        read(&root("demo-data/respiratory.csv"))
    );
}

#[test]
fn help_shows_an_example_for_every_command() {
    for cmd in ["check", "fit", "simulate"] {
        let out = cohortmix(Path::new("."), &[cmd, "--help"]);
        assert!(out.status.success());
        let s = String::from_utf8_lossy(&out.stdout);
        assert!(s.contains(&format!("cohortmix {cmd} ")), "{cmd}: {s}");
    }
}
