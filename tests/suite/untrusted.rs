//! Untrusted input that is not a spec error: saved models, cache entries and new rows
//! edited or chosen by hand, names that would inject markup or formulas, Unicode forms,
//! and inputs that are not regular files. Most runs use the small fixed study of the fuzz
//! targets (`fuzz/fixture`: 80 rows, every column type), copied into a temporary folder.

use super::common::{families, root};
use cohortmix::fit::cache::Lookup;
use cohortmix::fit::saved;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::{Duration, Instant};

fn run(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args(args)
        .current_dir(dir)
        .output()
        .unwrap()
}

fn ok(dir: &Path, args: &[&str]) -> Output {
    let out = run(dir, args);
    assert!(
        out.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    out
}

fn text(out: &Output) -> String {
    format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    )
}

/// The fuzz fixture's spec and data in a fresh folder, the spec edited by `edit`.
fn fixture(edit: impl FnOnce(String) -> String) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    let spec = std::fs::read_to_string(root("fuzz/fixture/study.toml")).unwrap();
    std::fs::write(dir.path().join("study.toml"), edit(spec)).unwrap();
    std::fs::copy(root("fuzz/fixture/data.csv"), dir.path().join("data.csv")).unwrap();
    dir
}

#[test]
fn the_fuzz_seeds_reach_the_code_behind_the_checks() {
    // A fuzz target whose seeds are refused at the first check explores little: the seeds
    // must pass every check, so the mutations start from inputs that are used.
    let fams = families();
    let saved_text = std::fs::read_to_string(root("fuzz/fixture/fitted-models.json")).unwrap();
    assert_eq!(
        saved_text,
        std::fs::read_to_string(root("fuzz/seeds/saved_model/fitted-models.json")).unwrap()
    );
    let run = saved::read_saved(Path::new("fitted-models.json"), &saved_text)
        .unwrap_or_else(|e| panic!("the fixture's saved models no longer read ({e}); refit fuzz/fixture/study.toml"));
    for seed in std::fs::read_dir(root("fuzz/seeds/predict")).unwrap() {
        let seed = seed.unwrap().path();
        let rows = std::fs::read_to_string(&seed).unwrap();
        let (study, data) = saved::new_data_from_text(&run, &seed, &rows, &fams).unwrap();
        let scored = saved::predict(&run, &study, &data, &fams).unwrap();
        assert!(scored[0].tau.iter().all(|t| t.is_finite()), "{}", seed.display());
    }

    let mut study = cohortmix::spec::parse(
        &root("fuzz/fixture/study.toml"),
        &std::fs::read_to_string(root("fuzz/fixture/study.toml")).unwrap(),
        &fams.infos(),
    )
    .unwrap();
    study.data_path = root("fuzz/fixture/data.csv");
    let data = cohortmix::data::load(&study).unwrap();
    let prepared = cohortmix::fit::prepare(&study, &data, &fams).unwrap();
    let spec = cohortmix::fit::plan(&study, &data).remove(0);
    let key = spec.key();
    let payload = std::fs::read_to_string(root("fuzz/seeds/cache_entry/entry.json"))
        .unwrap()
        .replace("@KEY@", &key);
    let entry = format!("{}\n{payload}", cohortmix::numerics::sha256_hex(payload.as_bytes()));
    match cohortmix::fit::cache::read(Path::new("entry.json"), &entry, &key, &spec, &data, &prepared[0]) {
        Lookup::Found(fit) => assert_eq!(fit.clusters, 2),
        Lookup::Corrupt(why) => panic!("the cache seed is refused ({why}); write it again from a fit of the fixture"),
        Lookup::Missing => unreachable!(),
    }
}

/// Fit `spec` (a demo) into a temporary run folder and score its data under the saved
/// models twice: all rows in one batch, and each row alone. The probabilities must agree
/// bit for bit.
fn rows_alone_equal_the_batch(spec: &str, data: &str) {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("run");
    ok(&root(""), &["fit", spec, "--out", out.to_str().unwrap()]);
    let fams = families();
    let run = saved::load_run(&out).unwrap();
    let all = std::fs::read_to_string(root(data)).unwrap();
    let (header, rows) = all.split_once('\n').unwrap();
    let (study, batch) = saved::new_data_from_text(&run, Path::new(data), &all, &fams).unwrap();
    let together = saved::predict(&run, &study, &batch, &fams).unwrap();
    let batch_ids: Vec<String> = (0..batch.n()).map(|i| batch.ids[i].to_string()).collect();
    let (mut scored, mut left_out) = (0, 0);
    for row in rows.lines() {
        let one = format!("{header}\n{row}\n");
        let id = row.split(',').next().unwrap();
        let i = batch_ids.iter().position(|b| b == id);
        let alone = saved::new_data_from_text(&run, Path::new(data), &one, &fams);
        let Some(i) = i else {
            // Left out of the batch for a missing value: left out alone too.
            let e = alone
                .err()
                .unwrap_or_else(|| panic!("row '{id}' is scored alone but not in the batch"));
            assert!(e.to_string().contains("has every value the fits need"), "{e}");
            left_out += 1;
            continue;
        };
        let (study, alone) = alone.unwrap();
        let single = saved::predict(&run, &study, &alone, &fams).unwrap();
        for (s, t) in single.iter().zip(&together) {
            let g = t.clusters;
            let want: Vec<u64> = t.tau[i * g..(i + 1) * g].iter().map(|x| x.to_bits()).collect();
            let got: Vec<u64> = s.tau.iter().map(|x| x.to_bits()).collect();
            assert_eq!(got, want, "{data}, row '{id}' of '{}'", t.placement);
            assert_eq!(s.numbers, t.numbers);
        }
        scored += 1;
    }
    assert_eq!(scored, batch.n());
    assert_eq!(left_out, batch.rows_excluded);
}

#[test]
fn predict_scores_each_row_as_it_would_among_others_in_the_demo() {
    rows_alone_equal_the_batch("configs/demo.toml", "demo-data/respiratory.csv");
}

#[test]
fn predict_scores_each_row_as_it_would_among_others_in_the_symptoms_study() {
    rows_alone_equal_the_batch("configs/symptoms.toml", "demo-data/symptoms.csv");
}

#[test]
fn predict_scores_one_row_a_batch_of_one_sex_and_an_outlier() {
    let dir = fixture(|s| s);
    ok(dir.path(), &["fit", "study.toml"]);
    let data = std::fs::read_to_string(dir.path().join("data.csv")).unwrap();
    let header = data.lines().next().unwrap();
    let men: Vec<&str> = data.lines().filter(|l| l.contains(",m,")).collect();
    let cases = [
        ("one.csv", format!("{header}\n{}\n", data.lines().nth(1).unwrap())),
        ("men.csv", format!("{header}\n{}\n", men.join("\n"))),
        (
            "outlier.csv",
            format!("{header}\n{}\nfar,200,m,1,1e6,1,often,400,0.5,1\n", men.join("\n")),
        ),
    ];
    for (name, rows) in cases {
        std::fs::write(dir.path().join(name), rows).unwrap();
        let out = dir.path().join(format!("scored-{name}"));
        ok(dir.path(), &["predict", "run", name, "--out", out.to_str().unwrap()]);
        let written = std::fs::read_to_string(&out).unwrap();
        let lines: Vec<&str> = written.lines().collect();
        assert_eq!(
            lines.len(),
            1 + std::fs::read_to_string(dir.path().join(name)).unwrap().lines().count() - 1
        );
        for line in &lines[1..] {
            for cell in line.split(',').skip(5) {
                let p: f64 = cell.parse().unwrap();
                assert!((0.0..=1.0).contains(&p), "{name}: {line}");
            }
        }
    }
}

fn cache_entry(run: &Path) -> PathBuf {
    let entries: Vec<PathBuf> = std::fs::read_dir(run.join("cache"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    assert_eq!(entries.len(), 1);
    entries[0].clone()
}

/// Edit the payload of a cache entry by `edit` and write it back with a recomputed checksum,
/// as someone who knows the format would.
fn tamper(entry: &Path, edit: impl FnOnce(&mut serde_json::Value)) {
    let text = std::fs::read_to_string(entry).unwrap();
    let (_, payload) = text.split_once('\n').unwrap();
    let mut v: serde_json::Value = serde_json::from_str(payload).unwrap();
    edit(&mut v);
    let payload = serde_json::to_string(&v).unwrap();
    let sum = cohortmix::numerics::sha256_hex(payload.as_bytes());
    std::fs::write(entry, format!("{sum}\n{payload}")).unwrap();
}

#[test]
fn an_edited_cache_entry_with_a_recomputed_checksum_is_refitted() {
    let dir = fixture(|s| s);
    ok(dir.path(), &["fit", "study.toml"]);
    let run = dir.path().join("run");
    let first = std::fs::read(run.join("results.json")).unwrap();
    let again = text(&ok(dir.path(), &["fit", "study.toml"]));
    assert!(again.contains("1 of 1") || again.contains("reused"), "{again}");

    type Edit = fn(&mut serde_json::Value);
    let edits: [(&str, Edit); 3] = [
        ("reaching", |v| v["best"]["reaching"] = 1_000_000.into()),
        ("a mean", |v| {
            let text = serde_json::to_string(&v["best"]["model"]).unwrap();
            // The first Gaussian coefficient (a cluster's mean) changed: the parameters no
            // longer give the recorded log-likelihood.
            let at = text
                .find("coefficients")
                .expect("a saved Gaussian block has coefficients");
            let start = at + text[at..].find(|c: char| c.is_ascii_digit()).unwrap();
            let end = start + text[start..].find(|c: char| !(c.is_ascii_digit() || c == '.')).unwrap();
            let edited = format!("{}{}{}", &text[..start], "7", &text[end..]);
            v["best"]["model"] = serde_json::from_str(&edited).unwrap();
        }),
        ("the row count", |v| v["n_rows"] = 81.into()),
    ];
    for (what, edit) in edits {
        tamper(&cache_entry(&run), edit);
        let out = ok(dir.path(), &["fit", "study.toml"]);
        let said = text(&out);
        assert!(
            said.contains("a cached fit was refused and refitted"),
            "an entry with {what} edited is not reported as refitted: {said}"
        );
        let now = std::fs::read(run.join("results.json")).unwrap();
        assert_eq!(
            strip_timing(&now),
            strip_timing(&first),
            "the refit after {what} was edited differs"
        );
    }
}

/// results.json without the fields that differ between identical runs (times, cache use).
fn strip_timing(bytes: &[u8]) -> serde_json::Value {
    let mut v: serde_json::Value = serde_json::from_slice(bytes).unwrap();
    fn walk(v: &mut serde_json::Value) {
        match v {
            serde_json::Value::Object(m) => {
                m.retain(|k, _| !k.contains("seconds") && !k.contains("cache") && k != "reused");
                m.values_mut().for_each(walk);
            }
            serde_json::Value::Array(a) => a.iter_mut().for_each(walk),
            _ => {}
        }
    }
    walk(&mut v);
    v
}

#[test]
fn names_from_the_spec_and_data_cannot_inject_markup_or_formulas() {
    let dir = fixture(|s| {
        s.replace(
            "title = \"fuzz fixture\"",
            "title = \"<script>alert(1)</script> [click](javascript:alert(2)) # not a heading\"",
        )
        .replace(
            "name = \"p\"",
            "name = \"=HYPERLINK(\\\"http://x\\\") <img src=x onerror=alert(3)>\"",
        )
    });
    let data = std::fs::read_to_string(dir.path().join("data.csv")).unwrap();
    std::fs::write(dir.path().join("data.csv"), data.replacen("\np1,", "\n@SUM(1+1),", 1)).unwrap();
    ok(dir.path(), &["compare", "study.toml"]);
    let run = dir.path().join("run");

    let summary = std::fs::read_to_string(run.join("summary.md")).unwrap();
    // Every character that Markdown or HTML would read as markup is escaped.
    let unescaped = |c: char| summary.match_indices(c).any(|(at, _)| !summary[..at].ends_with('\\'));
    assert!(!unescaped('<'), "summary.md holds '<' unescaped");
    assert!(summary.contains("\\<img src=x onerror=alert(3)\\>"));
    assert!(!summary.contains("[click](") && !summary.contains("\n# not"));
    assert!(
        summary.contains("\\<script\\>"),
        "the title is not in summary.md, escaped"
    );
    let html = std::fs::read_to_string(run.join("report.html")).unwrap();
    assert!(!html.contains("<script>alert") && !html.contains("<img src=x"));

    let models = std::fs::read_to_string(run.join("models.csv")).unwrap();
    assert!(
        models
            .lines()
            .skip(1)
            .all(|l| l.starts_with("\"'=HYPERLINK") || l.starts_with("'=HYPERLINK")),
        "{models}"
    );
    let members = std::fs::read_to_string(run.join("memberships.csv")).unwrap();
    assert!(
        members.contains(",'@SUM(1+1),"),
        "the id is not neutralised in memberships.csv"
    );
    assert!(!members.lines().any(|l| l.starts_with('=')));
}

#[test]
fn levels_match_in_either_unicode_form_and_case_twins_are_warned_of() {
    // The spec names the reference level with a decomposed é (e + combining acute), the
    // data with a precomposed one; both are the same level after normalisation.
    let decomposed = "fe\u{301}";
    let precomposed = "f\u{e9}";
    let dir = fixture(|s| s.replace("reference = \"f\"", &format!("reference = \"{decomposed}\"")));
    let data = std::fs::read_to_string(dir.path().join("data.csv")).unwrap();
    let data = data.replace(",f,", &format!(",{precomposed},"));
    std::fs::write(dir.path().join("data.csv"), &data).unwrap();
    let said = text(&ok(dir.path(), &["check", "study.toml"]));
    assert!(!said.to_lowercase().contains("warning"), "{said}");

    // "m" and "M" are two levels, and the user hears of it.
    let twins = data.replacen(",m,", ",M,", 3);
    std::fs::write(dir.path().join("data.csv"), twins).unwrap();
    let said = text(&ok(dir.path(), &["check", "study.toml"]));
    assert!(said.contains("'m'") && said.contains("'M'"), "{said}");
}

/// Run with a deadline: a reader that blocks on a FIFO would hang the test otherwise.
fn run_within(dir: &Path, args: &[&str], limit: Duration) -> Output {
    let mut child = Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args(args)
        .current_dir(dir)
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let start = Instant::now();
    while child.try_wait().unwrap().is_none() {
        if start.elapsed() > limit {
            child.kill().unwrap();
            panic!("{args:?} still runs after {limit:?}");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    child.wait_with_output().unwrap()
}

#[test]
fn a_fifo_as_spec_or_data_is_refused_without_waiting_for_a_writer() {
    let dir = fixture(|s| s.replace("data = \"data.csv\"", "data = \"pipe.csv\""));
    for name in ["pipe.csv", "pipe.toml"] {
        let made = Command::new("mkfifo").arg(dir.path().join(name)).status().unwrap();
        assert!(made.success());
    }
    for (args, named) in [
        (["check", "study.toml"], "pipe.csv"),
        (["check", "pipe.toml"], "pipe.toml"),
    ] {
        let out = run_within(dir.path(), &args, Duration::from_secs(20));
        assert_eq!(out.status.code(), Some(2), "{}", text(&out));
        let said = text(&out);
        assert!(said.contains(named) && said.contains("not a file"), "{said}");
    }
}

#[test]
fn a_spec_or_a_data_line_past_its_size_limit_is_refused() {
    let dir = fixture(|s| {
        format!(
            "{s}\n# {}\n",
            "x".repeat(cohortmix::spec::limits::MAX_SPEC_BYTES as usize)
        )
    });
    let out = run_within(dir.path(), &["check", "study.toml"], Duration::from_secs(20));
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out).contains("study.toml"), "{}", text(&out));

    let dir = fixture(|s| s);
    let data = std::fs::read_to_string(dir.path().join("data.csv")).unwrap();
    let long = format!("{data}p999,40,m,1,80,1,never,1,1,1{}\n", "0".repeat(2 << 20));
    std::fs::write(dir.path().join("data.csv"), long).unwrap();
    let out = run_within(dir.path(), &["check", "study.toml"], Duration::from_secs(20));
    assert_eq!(out.status.code(), Some(2));
    let said = text(&out);
    assert!(said.contains("data.csv") && said.contains("line 82"), "{said}");
    assert!(
        said.len() < 4000,
        "the message quotes the whole line: {} bytes",
        said.len()
    );
}
