//! Bad input: every case under tests/bad_inputs/ runs the binary and pins what the user
//! sees. A case is a folder with the inputs, `args` (the command line; default
//! `check spec.toml`), `expected.stderr` and `expected.exit`; it runs in a copy of its
//! folder, so that nothing it writes (a lock file) lands in the source tree. Run with
//! `UPDATE_SNAPSHOTS=1` to rewrite the expected files after an intended change, then
//! read the diff.

use super::common::root;
use std::process::Command;

/// Cases whose problem has no line in a file (the file itself is missing, or the
/// command line is wrong).
const NO_LOCATION: &[&str] = &[
    "missing_spec_file",
    "usage_missing_spec",
    "threads_zero",
    "spec_is_a_folder",
];

/// Cases whose problem is a whole file or folder (a saved model, an output path): the
/// message names it instead of a line.
fn names_its_file(name: &str) -> bool {
    name.starts_with("saved_")
        || name.starts_with("out_")
        || name.starts_with("predict_")
        || name.ends_with("_out_is_the_truth_spec")
        || name == "spec_output_is_the_data_folder"
}

/// Copy a case's folder (files and subfolders) into `to`.
fn copy_case(from: &std::path::Path, to: &std::path::Path) {
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let dest = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            std::fs::create_dir(&dest).unwrap();
            copy_case(&entry.path(), &dest);
        } else {
            std::fs::copy(entry.path(), dest).unwrap();
        }
    }
}

#[test]
fn every_bad_input_gets_a_pinned_message_and_exit_2() {
    let update = std::env::var_os("UPDATE_SNAPSHOTS").is_some();
    let mut cases: Vec<_> = std::fs::read_dir(root("tests/bad_inputs"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_dir())
        .collect();
    cases.sort();
    assert!(cases.len() >= 80, "only {} cases", cases.len());
    let mut failures = Vec::new();
    for case in &cases {
        let name = case.file_name().unwrap().to_string_lossy().to_string();
        let args = std::fs::read_to_string(case.join("args")).unwrap_or_else(|_| "check spec.toml".into());
        let copy = tempfile::tempdir().unwrap();
        copy_case(case, copy.path());
        let out = Command::new(env!("CARGO_BIN_EXE_cohortmix"))
            .args(args.split_whitespace())
            .current_dir(copy.path())
            .output()
            .unwrap();
        let stderr = String::from_utf8_lossy(&out.stderr).to_string();
        let code = out.status.code().unwrap_or(-1);
        assert!(!stderr.contains("panicked"), "{name} panicked:\n{stderr}");
        assert_eq!(code, 2, "{name}: exit {code}\n{stderr}");
        assert!(stderr.starts_with("error:"), "{name}: {stderr}");
        if names_its_file(&name) {
            assert!(
                stderr.contains("--> ")
                    || [".json", ".csv", ".toml", "run folder"]
                        .iter()
                        .any(|f| stderr.contains(f)),
                "{name} names no file:\n{stderr}"
            );
        } else if !NO_LOCATION.contains(&name.as_str()) {
            assert!(stderr.contains("--> "), "{name} names no file:line:column:\n{stderr}");
        }
        assert!(
            stderr.contains("help:") || name == "usage_missing_spec",
            "{name} says not how to fix it:\n{stderr}"
        );
        if update {
            std::fs::write(case.join("expected.stderr"), &stderr).unwrap();
            std::fs::write(case.join("expected.exit"), format!("{code}\n")).unwrap();
            continue;
        }
        let want = std::fs::read_to_string(case.join("expected.stderr")).unwrap_or_default();
        let want_code: i32 = std::fs::read_to_string(case.join("expected.exit"))
            .unwrap_or_default()
            .trim()
            .parse()
            .unwrap_or(-1);
        if want != stderr || want_code != code {
            failures.push(format!(
                "{name}: expected (exit {want_code})\n{want}\ngot (exit {code})\n{stderr}"
            ));
        }
    }
    assert!(
        failures.is_empty(),
        "{} case(s) changed:\n{}",
        failures.len(),
        failures.join("\n")
    );
}

/// Awkward but valid CSV is read as the plain file is: a byte-order mark, CRLF line
/// endings, and quoted fields holding commas; reading the file as a stream and reading
/// its text whole agree.
#[test]
fn a_bom_crlf_and_quoted_commas_are_read_like_plain_csv() {
    let case = root("tests/bad_inputs/non_numeric_cell");
    let spec_text = std::fs::read_to_string(case.join("spec.toml")).unwrap();
    let plain = std::fs::read_to_string(root("tests/bad_inputs/gating_with_fixed_proportions/data.csv")).unwrap();
    let awkward = format!(
        "\u{feff}{}",
        plain
            .lines()
            .enumerate()
            .map(|(i, l)| if i == 1 {
                l.replacen("w01", "\"w,01\"", 1)
            } else {
                l.to_string()
            })
            .collect::<Vec<_>>()
            .join("\r\n")
            + "\r\n"
    );
    let load = |csv: &str| {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("data.csv"), csv).unwrap();
        let study = cohortmix::spec::parse(
            &dir.path().join("spec.toml"),
            &spec_text,
            &super::common::families().infos(),
        )
        .unwrap();
        let streamed = cohortmix::data::load(&study).unwrap();
        // The file read as a stream gives what its whole text gives, hash included.
        let whole = cohortmix::data::from_text(&study, csv).unwrap();
        assert_eq!(streamed.sha256, whole.sha256);
        assert_eq!(streamed.ids, whole.ids);
        assert_eq!(
            (streamed.rows_read, &streamed.indicator_sets, &streamed.columns),
            (whole.rows_read, &whole.indicator_sets, &whole.columns)
        );
        streamed
    };
    let (a, b) = (load(&plain), load(&awkward));
    assert_eq!(&b.ids[0], "w,01");
    assert!(a.ids.iter().skip(1).eq(b.ids.iter().skip(1)));
    assert_eq!(a.indicator_sets, b.indicator_sets);
    assert_eq!(a.columns, b.columns);
}

/// Cells that `[study] missing_codes` lists are missing like empty ones: the rows they
/// are in leave the fits, counted per column, while a number that merely starts like a
/// code is read as a number. Without the key, the same cell is an error that names it.
#[test]
fn listed_missing_codes_are_read_as_missing() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("data.csv"),
        "age,y\n30,1.0\n.,2.0\n45,n/a\n-99,3.0\n-99.5,4.0\n50,5.0\n",
    )
    .unwrap();
    let spec = |codes: &str| {
        format!(
            "[study]\ntitle = \"codes\"\ndata = \"data.csv\"\n{codes}\n[variables]\nage = \"continuous\"\n[indicators]\ncolumns = [\"y\"]\n[search]\nclusters = [1]\n[[placement]]\nname = \"p\"\ngating = [\"age\"]\n"
        )
    };
    let families = super::common::families();
    let parse = |text: &str| cohortmix::spec::parse(&dir.path().join("spec.toml"), text, &families.infos()).unwrap();
    let data = cohortmix::data::load(&parse(&spec("missing_codes = [\".\", \"n/a\", \"-99\"]"))).unwrap();
    assert_eq!((data.rows_read, data.rows_excluded), (6, 3));
    assert!(data.missing_by_column.contains(&("age".to_string(), 2)));
    assert!(data.missing_by_column.contains(&("y".to_string(), 1)));
    let Some(cohortmix::data::Column::Numeric { values, .. }) = data.columns.get("age") else {
        panic!("age is numeric")
    };
    assert_eq!(values, &vec![30.0, -99.5, 50.0]);
    let message = cohortmix::data::load(&parse(&spec(""))).unwrap_err().to_string();
    assert!(
        message.contains("'n/a' in column 'y' is not a number") && message.contains("missing_codes"),
        "{message}"
    );
}
