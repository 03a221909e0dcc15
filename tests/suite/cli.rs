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
    assert_eq!(results["schema_version"], cohortmix::pipeline::output::SCHEMA_VERSION);
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
    assert!(
        memberships.starts_with("placement,clusters,id,most_likely,most_likely_as_fitted,posterior_1,posterior_2\n")
    );
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

/// The files a run writes that must not change between identical runs (only
/// `manifest.json` carries timings and the thread count).
const STABLE: [&str; 8] = [
    "results.json",
    "figures",
    "models.csv",
    "memberships.csv",
    "fitted-models.json",
    "report.html",
    "summary.md",
    "cache",
];

fn stable_bytes(run: &Path) -> Vec<(String, Vec<u8>)> {
    let mut out = Vec::new();
    for f in STABLE {
        let p = run.join(f);
        if p.is_dir() {
            let mut names: Vec<_> = std::fs::read_dir(&p).unwrap().map(|e| e.unwrap().path()).collect();
            names.sort();
            for n in names {
                out.push((n.file_name().unwrap().to_string_lossy().to_string(), read(&n)));
            }
        } else {
            out.push((f.to_string(), read(&p)));
        }
    }
    out
}

#[test]
fn outputs_do_not_depend_on_the_thread_count() {
    let dir = small_study();
    assert!(
        cohortmix(dir.path(), &["--threads", "1", "compare", "study.toml", "--out", "one"])
            .status
            .success()
    );
    assert!(
        cohortmix(dir.path(), &["--threads", "2", "compare", "study.toml", "--out", "two"])
            .status
            .success()
    );
    let (one, two) = (
        stable_bytes(&dir.path().join("one")),
        stable_bytes(&dir.path().join("two")),
    );
    assert_eq!(one.len(), two.len());
    for ((f, a), (_, b)) in one.iter().zip(&two) {
        assert!(a == b, "{f} differs between 1 and 2 threads");
    }
}

#[test]
fn a_rerun_reuses_every_fit_and_a_changed_placement_refits_only_its_own() {
    let dir = small_study();
    let first = cohortmix(dir.path(), &["compare", "study.toml", "--out", "run"]);
    assert!(first.status.success());
    assert!(String::from_utf8_lossy(&first.stderr).contains("0 of 6 fits reused from the cache, 6 fitted"));
    let before = stable_bytes(&dir.path().join("run"));
    let again = cohortmix(dir.path(), &["compare", "study.toml", "--out", "run"]);
    let stderr = String::from_utf8_lossy(&again.stderr);
    assert!(
        stderr.contains("6 of 6 fits reused from the cache, 0 fitted"),
        "{stderr}"
    );
    assert!(
        before == stable_bytes(&dir.path().join("run")),
        "a cached rerun changed the outputs"
    );
    // --fresh refits everything and gives the same bytes.
    let fresh = cohortmix(dir.path(), &["compare", "study.toml", "--out", "run", "--fresh"]);
    assert!(String::from_utf8_lossy(&fresh.stderr).contains("0 of 6 fits reused"));
    assert!(
        before == stable_bytes(&dir.path().join("run")),
        "--fresh changed the outputs"
    );
    // A truncated entry is refused and refitted, with the same result.
    let cache = dir.path().join("run/cache");
    let entry = std::fs::read_dir(&cache).unwrap().next().unwrap().unwrap().path();
    let text = read(&entry);
    std::fs::write(&entry, &text[..text.len() / 2]).unwrap();
    let mended = cohortmix(dir.path(), &["compare", "study.toml", "--out", "run"]);
    let stderr = String::from_utf8_lossy(&mended.stderr);
    assert!(
        stderr.contains("refused and refitted") && stderr.contains("5 of 6 fits reused"),
        "{stderr}"
    );
    assert!(
        before == stable_bytes(&dir.path().join("run")),
        "a refitted entry changed the outputs"
    );
    // Changing one placement refits only its three fits.
    let spec = std::fs::read_to_string(dir.path().join("study.toml")).unwrap();
    std::fs::write(
        dir.path().join("study.toml"),
        spec.replace("name = \"age in gating\"", "name = \"age in gating, renamed\""),
    )
    .unwrap();
    let changed = cohortmix(dir.path(), &["compare", "study.toml", "--out", "run"]);
    let stderr = String::from_utf8_lossy(&changed.stderr);
    assert!(
        stderr.contains("3 of 6 fits reused from the cache, 3 fitted"),
        "{stderr}"
    );
}

/// A run killed (SIGKILL) after 1, 3 or 5 of its 6 fits and started again finishes with
/// the bytes of an uninterrupted run.
#[test]
fn a_killed_run_resumes_to_the_same_bytes() {
    use std::io::{BufRead, BufReader};
    let dir = small_study();
    assert!(cohortmix(dir.path(), &["compare", "study.toml", "--out", "whole"])
        .status
        .success());
    let whole = stable_bytes(&dir.path().join("whole"));
    for after in [1, 3, 5] {
        let out = format!("killed{after}");
        let mut child = Command::new(env!("CARGO_BIN_EXE_cohortmix"))
            .args(["compare", "study.toml", "--out", &out])
            .current_dir(dir.path())
            .stderr(std::process::Stdio::piped())
            .stdout(std::process::Stdio::null())
            .spawn()
            .unwrap();
        let reader = BufReader::new(child.stderr.take().unwrap());
        for line in reader.lines() {
            if line.unwrap().starts_with(&format!("[{after}/6]")) {
                break;
            }
        }
        child.kill().unwrap(); // SIGKILL on Unix
        child.wait().unwrap();
        assert!(
            !dir.path().join(&out).join("results.json").exists(),
            "the run finished before the kill"
        );
        let resumed = cohortmix(dir.path(), &["compare", "study.toml", "--out", &out]);
        assert!(resumed.status.success());
        let stderr = String::from_utf8_lossy(&resumed.stderr);
        // Fits finished before the kill are reused (the next one may have finished too).
        let reused: usize = stderr
            .lines()
            .find_map(|l| {
                l.strip_suffix(" fitted")
                    .and_then(|l| l.split(" of 6 fits reused").next())
            })
            .and_then(|n| n.trim().parse().ok())
            .unwrap_or_else(|| panic!("no cache line in {stderr}"));
        assert!(
            (after..6).contains(&reused),
            "killed after {after} fits, {reused} reused"
        );
        let got = stable_bytes(&dir.path().join(&out));
        assert_eq!(got.len(), whole.len(), "after killing at fit {after}");
        for ((f, a), (_, b)) in got.iter().zip(&whole) {
            assert!(a == b, "{f} differs after killing at fit {after} and resuming");
        }
    }
}

#[test]
fn outputs_do_not_depend_on_the_thread_count_for_fit() {
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
    for (truth, data) in [
        ("demo-data/respiratory-truth.toml", "demo-data/respiratory.csv"),
        ("demo-data/symptoms-truth.toml", "demo-data/symptoms.csv"),
    ] {
        let out = cohortmix(
            dir.path(),
            &[
                "simulate",
                root(truth).to_str().unwrap(),
                "--out",
                "demo.csv",
                "--force",
            ],
        );
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        assert_eq!(read(&dir.path().join("demo.csv")), read(&root(data)), "{data}");
    }
}

/// `simulate` leaves a file that holds other rows alone unless told `--force`, and says
/// when the file already holds exactly the rows drawn.
#[test]
fn simulate_never_overwrites_other_rows_without_force() {
    let dir = small_study();
    let data = dir.path().join("small.csv");
    let before = read(&data);
    let again = cohortmix(dir.path(), &["simulate", "truth.toml"]);
    assert!(again.status.success());
    assert!(String::from_utf8_lossy(&again.stdout).contains("already holds exactly these rows"));
    std::fs::write(&data, "edited by hand\n").unwrap();
    let refused = cohortmix(dir.path(), &["simulate", "truth.toml"]);
    assert_eq!(refused.status.code(), Some(2));
    let message = String::from_utf8_lossy(&refused.stderr);
    assert!(
        message.contains("exists and holds other rows") && message.contains("--force"),
        "{message}"
    );
    assert_eq!(read(&data), b"edited by hand\n");
    let forced = cohortmix(dir.path(), &["simulate", "truth.toml", "--force"]);
    assert!(forced.status.success());
    assert_eq!(read(&data), before);
}

/// The mixed-family demo runs end to end, checks its items and counts, and reports the
/// missing item values and the exposure.
#[test]
fn the_symptom_demo_compares_its_placements() {
    let dir = tempfile::tempdir().unwrap();
    let spec = root("configs/symptoms.toml");
    let out = cohortmix(dir.path(), &["check", spec.to_str().unwrap()]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(stdout.contains("indicators (mixed)"), "{stdout}");
    assert!(stdout.contains("component terms: smoker"), "{stdout}");
}

#[test]
fn help_shows_an_example_for_every_command() {
    let top = String::from_utf8_lossy(&cohortmix(Path::new("."), &["--help"]).stdout).to_string();
    for cmd in ["check", "fit", "compare", "predict", "simulate"] {
        let out = cohortmix(Path::new("."), &[cmd, "--help"]);
        assert!(out.status.success());
        let s = String::from_utf8_lossy(&out.stdout);
        assert!(s.contains(&format!("cohortmix {cmd} ")), "{cmd}: {s}");
        // Every input an example names is in the repository (outputs follow --out; run
        // folders are what compare writes).
        for line in s
            .lines()
            .chain(top.lines())
            .filter(|l| l.trim_start().starts_with("cohortmix "))
        {
            let words: Vec<&str> = line.split_whitespace().collect();
            for (i, w) in words.iter().enumerate() {
                let output = i > 0 && words[i - 1] == "--out";
                if (w.ends_with(".toml") || w.ends_with(".csv")) && !output {
                    assert!(
                        root(w).exists(),
                        "the example '{}' names {w}, which does not exist",
                        line.trim()
                    );
                }
            }
        }
    }
}

#[test]
fn degenerate_starts_are_recorded_and_the_run_goes_on() {
    // 40 rows, 2 indicators, up to 6 clusters: many starts leave a cluster with fewer
    // rows than its mean and covariance need.
    let dir = tempfile::tempdir().unwrap();
    let mut csv = String::from("id,a,b\n");
    for i in 0..40 {
        let x = (i % 7) as f64 + 0.1 * (i as f64).sin();
        csv.push_str(&format!("{i},{x:.4},{:.4}\n", (i % 3) as f64 + 0.05 * i as f64));
    }
    std::fs::write(dir.path().join("d.csv"), csv).unwrap();
    std::fs::write(
        dir.path().join("s.toml"),
        "[study]\ntitle = \"tiny\"\ndata = \"d.csv\"\nid = \"id\"\n[indicators]\ncolumns = [\"a\", \"b\"]\n[search]\nclusters = [1, 2, 5, 6]\nstarts = 10\n",
    )
    .unwrap();
    let out = cohortmix(dir.path(), &["fit", "s.toml", "--out", "run"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let results: serde_json::Value = serde_json::from_slice(&read(&dir.path().join("run/results.json"))).unwrap();
    let fits = results["fits"].as_array().unwrap();
    assert_eq!(fits.len(), 4);
    let degenerate_starts: usize = fits
        .iter()
        .flat_map(|f| f["starts"]["each"].as_array().unwrap())
        .filter(|s| s["termination"]["status"] == "degenerate")
        .inspect(|s| assert!(s["termination"]["reason"].as_str().unwrap().contains("cluster"), "{s}"))
        .count();
    assert!(degenerate_starts > 0, "expected some degenerate starts");
    for f in fits {
        if f["status"] == "degenerate" {
            assert!(f["reason"].as_str().unwrap().starts_with("every start failed"), "{f}");
            assert!(f["loglik"].is_null());
        } else {
            assert!(f["loglik"].is_number());
        }
    }
    // The CSV table carries every fit, failed ones included.
    assert_eq!(
        String::from_utf8(read(&dir.path().join("run/models.csv")))
            .unwrap()
            .lines()
            .count(),
        5
    );
}

#[test]
fn equal_and_fixed_proportions_have_no_gating_parameters() {
    let dir = small_study();
    let spec = STUDY.replace(
        "[[placement]]\nname = \"age in gating\"\ngating = [\"age\"]\n",
        "[[placement]]\nname = \"equal\"\nproportions = \"equal\"\nclusters = [2]\n[[placement]]\nname = \"fixed\"\nproportions = [0.7, 0.3]\nclusters = [2]\n",
    );
    std::fs::write(dir.path().join("study.toml"), spec).unwrap();
    let out = cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let results: serde_json::Value = serde_json::from_slice(&read(&dir.path().join("run/results.json"))).unwrap();
    let fit = |name: &str| {
        results["fits"]
            .as_array()
            .unwrap()
            .iter()
            .find(|f| f["placement"] == name && f["clusters"] == 2)
            .unwrap()
            .clone()
    };
    let free = fit("unadjusted");
    let (equal, fixed) = (fit("equal"), fit("fixed"));
    // Two bivariate Gaussian clusters: 2 x (2 means + 3 covariances) = 10, plus 1 share.
    assert_eq!(free["parameters"], 11);
    assert_eq!(equal["parameters"], 10);
    assert_eq!(fixed["parameters"], 10);
    assert_eq!(equal["gating_model"], "equal proportions");
    assert_eq!(fixed["gating_model"], "fixed proportions");
    // Constraining the proportions cannot raise the maximum likelihood.
    assert!(equal["loglik"].as_f64().unwrap() <= free["loglik"].as_f64().unwrap() + 1e-6);
    assert!(fixed["loglik"].as_f64().unwrap() <= free["loglik"].as_f64().unwrap() + 1e-6);
}

#[test]
fn predict_on_the_fitted_rows_writes_the_memberships_again() {
    let dir = small_study();
    assert!(cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"])
        .status
        .success());
    let out = cohortmix(dir.path(), &["predict", "run", "small.csv", "--out", "again.csv"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert_eq!(
        read(&dir.path().join("again.csv")),
        read(&dir.path().join("run/memberships.csv"))
    );
    // New data without a column the models need: exit 2, naming the column.
    let csv = String::from_utf8(read(&dir.path().join("small.csv"))).unwrap();
    std::fs::write(dir.path().join("no-age.csv"), csv.replacen(",age", ",years", 1)).unwrap();
    let out = cohortmix(dir.path(), &["predict", "run", "no-age.csv"]);
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("'age'") && stderr.contains("no-age.csv"), "{stderr}");
    // A folder that is not a run folder.
    let out = cohortmix(dir.path(), &["predict", ".", "small.csv"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("fitted-models.json"));
}

#[test]
fn a_run_whose_every_fit_fails_is_an_error_and_keeps_the_previous_files() {
    let dir = small_study();
    assert!(cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"])
        .status
        .success());
    let before = stable_bytes_of(
        &dir.path().join("run"),
        &["results.json", "models.csv", "memberships.csv"],
    );
    // All but five rows become one point: two- and three-cluster fits collapse, and the
    // one-cluster fit is dropped from the spec.
    let csv = String::from_utf8(read(&dir.path().join("small.csv"))).unwrap();
    let mut lines: Vec<String> = csv.lines().map(str::to_string).collect();
    let header: Vec<&str> = lines[0].split(',').collect();
    let (i1, i2) = (
        header.iter().position(|h| *h == "y1").unwrap(),
        header.iter().position(|h| *h == "y2").unwrap(),
    );
    for line in lines.iter_mut().skip(6) {
        let mut f: Vec<String> = line.split(',').map(str::to_string).collect();
        f[i1] = "1.5".into();
        f[i2] = "-0.5".into();
        *line = f.join(",");
    }
    std::fs::write(dir.path().join("small.csv"), lines.join("\n") + "\n").unwrap();
    let spec = std::fs::read_to_string(dir.path().join("study.toml")).unwrap();
    std::fs::write(
        dir.path().join("study.toml"),
        spec.replace("clusters = [1, 2, 3]", "clusters = [2, 3]"),
    )
    .unwrap();
    let out = cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{stderr}");
    assert!(
        stderr.contains("no fit gave a usable model") && stderr.contains("left as they were"),
        "{stderr}"
    );
    assert_eq!(
        before,
        stable_bytes_of(
            &dir.path().join("run"),
            &["results.json", "models.csv", "memberships.csv"]
        )
    );
}

fn stable_bytes_of(run: &Path, files: &[&str]) -> Vec<Vec<u8>> {
    files.iter().map(|f| read(&run.join(f))).collect()
}

/// A run folder that cannot be a folder (here: a file stands where the folder should be,
/// which fails even for a privileged user, unlike a read-only folder) is refused before
/// anything is fitted, and the file is left alone.
#[test]
fn a_file_where_the_run_folder_should_be_is_refused_and_left_alone() {
    let dir = small_study();
    std::fs::write(dir.path().join("taken"), b"not a folder").unwrap();
    let out = cohortmix(dir.path(), &["fit", "study.toml", "--out", "taken"]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(stderr.contains("the run folder taken is a file"), "{stderr}");
    assert_eq!(read(&dir.path().join("taken")), b"not a folder");
}

/// The "simulated" caution stands only on the report of a study whose spec says its data
/// are simulated.
#[test]
fn the_simulated_data_caution_appears_only_where_the_spec_says_so() {
    let dir = small_study();
    let out = cohortmix(dir.path(), &["compare", "study.toml", "--out", "real"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let caution = cohortmix::render::document::SIMULATED;
    for file in ["report.html", "summary.md"] {
        let text = String::from_utf8(read(&dir.path().join("real").join(file))).unwrap();
        assert!(
            !text.contains(caution),
            "{file} of a real study says its data are simulated"
        );
        assert!(text.contains("not diagnoses"), "{file} lost its cautions");
    }
    let spec = STUDY.replace("seed = 5\n", "seed = 5\nsimulated = true\n");
    std::fs::write(dir.path().join("simulated.toml"), spec).unwrap();
    let out = cohortmix(dir.path(), &["compare", "simulated.toml", "--out", "sim"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    for file in ["report.html", "summary.md"] {
        let text = String::from_utf8(read(&dir.path().join("sim").join(file))).unwrap();
        assert!(text.contains(caution), "{file} of a simulated study lacks the caution");
    }
}
