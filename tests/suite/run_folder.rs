//! A run folder describes exactly one run: outputs are staged and swapped in as a whole,
//! one run at a time holds the folder, the folder may not hold the inputs or someone
//! else's files, and nothing the previous folder held is lost.

use super::common::root;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

const TRUTH: &str = r#"
[simulation]
rows = 500
seed = 3
output = "small.csv"
id = "pid"
indicators = ["y1", "y2"]
[[covariate]]
name = "age"
distribution = "normal"
mean = 50
sd = 10
[[cluster]]
name = "low"
mean = { y1 = 0, y2 = 0 }
sd = { y1 = 1, y2 = 1 }
[[cluster]]
name = "high"
gating = { intercept = -1, age = 0.03 }
mean = { y1 = 3, y2 = 2 }
sd = { y1 = 1, y2 = 1.5 }
"#;

const STUDY: &str = r#"
[study]
title = "run folder checks"
data = "small.csv"
id = "pid"
seed = 5
[variables]
age = "continuous"
[indicators]
columns = ["y1", "y2"]
[search]
clusters = [1, 2]
starts = 4
[[placement]]
name = "unadjusted"
[[placement]]
name = "age in gating"
gating = ["age"]
"#;

fn command(dir: &Path, args: &[&str], env: &[(&str, &str)]) -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_cohortmix"));
    c.args(args).current_dir(dir);
    for (k, v) in env {
        c.env(k, v);
    }
    c
}

fn cohortmix(dir: &Path, args: &[&str], env: &[(&str, &str)]) -> Output {
    command(dir, args, env).output().unwrap()
}

fn ok(out: &Output) {
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
}

fn study() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("truth.toml"), TRUTH).unwrap();
    std::fs::write(dir.path().join("study.toml"), STUDY).unwrap();
    // The same study with another seed: other bytes, so old and new runs differ.
    std::fs::write(dir.path().join("other.toml"), STUDY.replace("seed = 5", "seed = 6")).unwrap();
    ok(&cohortmix(dir.path(), &["simulate", "truth.toml"], &[]));
    dir
}

/// Every file of the run as its manifest lists it, checked against the listed hashes; the
/// folder holds nothing else but `cache/` (and `predictions/`), and `figures/` nothing the
/// manifest does not list. Panics otherwise.
fn complete_run(run: &Path) -> BTreeMap<String, Vec<u8>> {
    let manifest: serde_json::Value =
        serde_json::from_slice(&std::fs::read(run.join("manifest.json")).unwrap()).unwrap();
    let mut files = BTreeMap::new();
    for f in manifest["files"].as_array().unwrap() {
        let name = f["name"].as_str().unwrap();
        let bytes = std::fs::read(run.join(name)).unwrap_or_else(|e| panic!("{name} is missing: {e}"));
        assert_eq!(
            cohortmix::numerics::sha256_hex(&bytes),
            f["sha256"].as_str().unwrap(),
            "{name} is not the file the manifest lists"
        );
        files.insert(name.to_string(), bytes);
    }
    for entry in std::fs::read_dir(run).unwrap() {
        let name = entry.unwrap().file_name().to_string_lossy().to_string();
        if name == "figures" {
            for figure in std::fs::read_dir(run.join(&name)).unwrap() {
                let inner = format!("figures/{}", figure.unwrap().file_name().to_string_lossy());
                assert!(files.contains_key(&inner), "{inner} is not part of the run");
            }
            continue;
        }
        assert!(
            files.contains_key(&name) || ["manifest.json", "cache", "predictions"].contains(&name.as_str()),
            "{name} in {} is not part of the run",
            run.display()
        );
    }
    files.insert(
        "manifest.json".into(),
        manifest["command"].as_str().unwrap().as_bytes().to_vec(),
    );
    files
}

/// What an interrupted run may leave beside the folder.
fn leftovers(dir: &Path) -> Vec<String> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
        .filter(|n| n.contains(".staging-") || n.contains(".previous-") || n.contains(".partial"))
        .collect()
}

#[test]
fn a_fit_into_a_compared_folder_leaves_no_stale_report() {
    let dir = study();
    ok(&cohortmix(dir.path(), &["compare", "study.toml", "--out", "run"], &[]));
    assert!(dir.path().join("run/report.html").exists());
    ok(&cohortmix(dir.path(), &["fit", "other.toml", "--out", "run"], &[]));
    let files = complete_run(&dir.path().join("run"));
    assert!(
        !dir.path().join("run/report.html").exists(),
        "the earlier report is still there"
    );
    assert!(!dir.path().join("run/summary.md").exists());
    assert!(!files.contains_key("report.html"));
    let results: serde_json::Value = serde_json::from_slice(&files["results.json"]).unwrap();
    assert_eq!(results["study"]["seed"], 6);
    assert!(results.get("comparison").is_none());
    assert!(leftovers(dir.path()).is_empty(), "{:?}", leftovers(dir.path()));
}

/// A failure at any step of the commit leaves the previous run byte for byte, and says so.
#[test]
fn a_failure_at_any_step_of_the_commit_leaves_the_previous_run() {
    for fault in ["staged:fail", "linked:fail", "no-exchange,moved-aside:fail"] {
        let dir = study();
        ok(&cohortmix(dir.path(), &["compare", "study.toml", "--out", "run"], &[]));
        let before = complete_run(&dir.path().join("run"));
        let out = cohortmix(
            dir.path(),
            &["compare", "other.toml", "--out", "run"],
            &[("COHORTMIX_TEST_FAULT", fault)],
        );
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(1), "{fault}: {stderr}");
        assert!(stderr.contains("failure injected"), "{fault}: {stderr}");
        assert!(stderr.contains("was left as it was"), "{fault}: {stderr}");
        assert_eq!(complete_run(&dir.path().join("run")), before, "{fault}");
        assert!(leftovers(dir.path()).is_empty(), "{fault}: {:?}", leftovers(dir.path()));
    }
}

/// A kill at any step of the commit (an abort there) leaves the whole previous run or the
/// whole new one, and the next run clears what the killed one left.
#[test]
fn a_kill_at_any_step_of_the_commit_leaves_one_whole_run() {
    for fault in [
        "staged",
        "linked",
        "swapped",
        "no-exchange,moved-aside",
        "no-exchange,swapped",
    ] {
        let dir = study();
        let run = dir.path().join("run");
        ok(&cohortmix(dir.path(), &["compare", "study.toml", "--out", "run"], &[]));
        let old = complete_run(&run);
        // The new run, made in another folder for reference.
        ok(&cohortmix(
            dir.path(),
            &["compare", "other.toml", "--out", "reference"],
            &[],
        ));
        let new = complete_run(&dir.path().join("reference"));
        let out = cohortmix(
            dir.path(),
            &["compare", "other.toml", "--out", "run"],
            &[("COHORTMIX_TEST_FAULT", fault)],
        );
        assert!(!out.status.success(), "{fault}: the run was not stopped");
        // Where a kill leaves no folder (between two renames), the next run puts the
        // previous one back before anything else.
        if run.exists() {
            let now = complete_run(&run);
            let same = |a: &BTreeMap<String, Vec<u8>>, b: &BTreeMap<String, Vec<u8>>| {
                a.iter()
                    .filter(|(k, _)| *k != "manifest.json")
                    .eq(b.iter().filter(|(k, _)| *k != "manifest.json"))
            };
            assert!(
                same(&now, &old) || same(&now, &new),
                "{fault}: neither the old run nor the new one"
            );
        } else {
            assert_eq!(fault, "no-exchange,moved-aside");
        }
        let again = cohortmix(dir.path(), &["compare", "other.toml", "--out", "run"], &[]);
        ok(&again);
        let files = complete_run(&run);
        assert_eq!(files["results.json"], new["results.json"], "{fault}");
        assert!(leftovers(dir.path()).is_empty(), "{fault}: {:?}", leftovers(dir.path()));
    }
}

/// Two runs into one folder never interleave: the second refuses while the first holds
/// the folder, or with --wait starts when it is done; the folder then holds one whole run.
#[test]
fn two_runs_into_one_folder_never_mix() {
    let run = tempfile::tempdir().unwrap();
    let out = run.path().join("demo");
    let out_text = out.to_str().unwrap();
    let start = |extra: &[&str]| {
        let mut args = vec!["compare", "configs/demo.toml", "--out", out_text, "--fresh"];
        args.extend_from_slice(extra);
        command(&root(""), &args, &[])
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap()
    };
    // The lock file appears when the first run holds the folder; the second starts then.
    let lock = run.path().join(".demo.lock");
    let first = start(&[]);
    while !lock.exists() {
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    std::thread::sleep(std::time::Duration::from_millis(300));
    let refused = start(&[]).wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&refused.stderr);
    assert_eq!(refused.status.code(), Some(1), "{stderr}");
    assert!(stderr.contains("another cohortmix run is writing"), "{stderr}");
    assert!(stderr.contains("--wait"), "{stderr}");
    let waiting = start(&["--wait"]);
    ok(&first.wait_with_output().unwrap());
    let waited = waiting.wait_with_output().unwrap();
    ok(&waited);
    assert!(String::from_utf8_lossy(&waited.stderr).contains("waiting for it to finish"));
    let files = complete_run(&out);
    let results: serde_json::Value = serde_json::from_slice(&files["results.json"]).unwrap();
    let rows = results["study"]["rows_used"].as_u64().unwrap() as usize;
    let memberships = String::from_utf8(files["memberships.csv"].clone()).unwrap();
    assert_eq!(
        memberships.lines().count(),
        1 + 4 * rows,
        "one set of memberships per placement"
    );
    assert!(leftovers(run.path()).is_empty(), "{:?}", leftovers(run.path()));
}

/// Links planted where temporary files might go are never written through.
#[test]
fn planted_links_are_never_followed() {
    let dir = study();
    ok(&cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"], &[]));
    let victim = dir.path().join("victim.txt");
    std::fs::write(&victim, b"keep me").unwrap();
    let cache = dir.path().join("run/cache");
    let key = std::fs::read_dir(&cache).unwrap().next().unwrap().unwrap().file_name();
    let key = key.to_string_lossy().trim_end_matches(".json").to_string();
    let planted: Vec<PathBuf> = vec![
        dir.path().join("run/.models.csv.partial"),
        dir.path().join("run/.results.json.partial"),
        cache.join(format!("{key}.json.partial")),
        cache.join(format!(".{key}.partial")),
    ];
    for p in &planted {
        std::os::unix::fs::symlink(&victim, p).unwrap();
    }
    ok(&cohortmix(
        dir.path(),
        &["fit", "other.toml", "--out", "run", "--fresh"],
        &[],
    ));
    assert_eq!(std::fs::read(&victim).unwrap(), b"keep me");
    // The run's folder was replaced; the links stood in the previous one, which held
    // files that are not a run's, so it was moved aside whole.
    let aside: Vec<String> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
        .filter(|n| n.starts_with("run.replaced-"))
        .collect();
    assert_eq!(aside.len(), 1, "{aside:?}");
    complete_run(&dir.path().join("run"));
}

/// The run folder may not hold the data or the spec, be a root, or be someone else's
/// folder without --force; `~` is the home folder.
#[test]
fn output_paths_are_checked() {
    let dir = study();
    let data_before = std::fs::read(dir.path().join("small.csv")).unwrap();
    for out in [".", "..", "/"] {
        let o = cohortmix(dir.path(), &["fit", "study.toml", "--out", out], &[]);
        let stderr = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{out}: {stderr}");
        assert!(
            stderr.contains("an input of the run") || stderr.contains("file system root"),
            "{out}: {stderr}"
        );
    }
    // The spec says output = "." (the data's folder).
    std::fs::write(
        dir.path().join("here.toml"),
        STUDY.replace("seed = 5", "seed = 5\noutput = \".\""),
    )
    .unwrap();
    let o = cohortmix(dir.path(), &["fit", "here.toml"], &[]);
    assert_eq!(o.status.code(), Some(2), "{}", String::from_utf8_lossy(&o.stderr));
    assert_eq!(std::fs::read(dir.path().join("small.csv")).unwrap(), data_before);

    // Someone else's folder: refused, then taken with --force, its files moved aside.
    std::fs::create_dir(dir.path().join("notes")).unwrap();
    std::fs::write(dir.path().join("notes/mine.txt"), b"my notes").unwrap();
    let o = cohortmix(dir.path(), &["fit", "study.toml", "--out", "notes"], &[]);
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("not a cohortmix run (mine.txt)") && stderr.contains("--force"),
        "{stderr}"
    );
    assert_eq!(std::fs::read(dir.path().join("notes/mine.txt")).unwrap(), b"my notes");
    let o = cohortmix(dir.path(), &["fit", "study.toml", "--out", "notes", "--force"], &[]);
    ok(&o);
    assert!(String::from_utf8_lossy(&o.stdout).contains("moved to"));
    complete_run(&dir.path().join("notes"));
    let aside = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.file_name().unwrap().to_string_lossy().starts_with("notes.replaced-"))
        .expect("the folder's files were moved aside");
    assert_eq!(std::fs::read(aside.join("mine.txt")).unwrap(), b"my notes");

    // `~` is $HOME; `~name` is refused.
    let home = tempfile::tempdir().unwrap();
    let home_text = home.path().to_str().unwrap();
    ok(&cohortmix(
        dir.path(),
        &["fit", "study.toml", "--out", "~/runs/small"],
        &[("HOME", home_text)],
    ));
    complete_run(&home.path().join("runs/small"));
    assert!(!dir.path().join("~").exists());
    let o = cohortmix(dir.path(), &["fit", "study.toml", "--out", "~"], &[("HOME", home_text)]);
    assert_eq!(o.status.code(), Some(2), "{}", String::from_utf8_lossy(&o.stderr));
    let o = cohortmix(
        dir.path(),
        &["fit", "study.toml", "--out", "~nobody/x"],
        &[("HOME", home_text)],
    );
    assert_eq!(o.status.code(), Some(2), "{}", String::from_utf8_lossy(&o.stderr));
}

/// Predictions written into a run folder belong to its models: a rerun moves them aside
/// with the previous run rather than leaving them beside the new models or deleting them.
#[test]
fn a_rerun_moves_earlier_predictions_aside() {
    let dir = study();
    ok(&cohortmix(dir.path(), &["fit", "study.toml", "--out", "run"], &[]));
    ok(&cohortmix(dir.path(), &["predict", "run", "small.csv"], &[]));
    let predicted = std::fs::read(dir.path().join("run/predictions/small.csv")).unwrap();
    ok(&cohortmix(dir.path(), &["fit", "other.toml", "--out", "run"], &[]));
    assert!(!dir.path().join("run/predictions").exists());
    let aside = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.file_name().unwrap().to_string_lossy().starts_with("run.replaced-"))
        .expect("the previous run was moved aside");
    assert_eq!(std::fs::read(aside.join("predictions/small.csv")).unwrap(), predicted);
    // A prediction may not overwrite its input.
    let o = cohortmix(dir.path(), &["predict", "run", "small.csv", "--out", "small.csv"], &[]);
    assert_eq!(o.status.code(), Some(2), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(!std::fs::read(dir.path().join("small.csv")).unwrap().is_empty());
}
