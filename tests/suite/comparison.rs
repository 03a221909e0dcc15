//! The placement comparison: agreement measures against outside references, alignment,
//! the report's safety and its sentences.

use super::common::root;
use cohortmix::compare::{self, assign};
use cohortmix::render::words;
use cohortmix::{data, fit, render, simulate, spec};
use serde_json::Value;

fn fixture() -> Value {
    serde_json::from_str(&std::fs::read_to_string(root("tests/reference/agreement.json")).unwrap()).unwrap()
}

/// Source: scikit-learn's adjusted_rand_score on fixed label vectors
/// (tests/reference/make_agreement.py).
#[test]
fn adjusted_rand_index_matches_scikit_learn() {
    for case in fixture()["adjusted_rand_index"].as_array().unwrap() {
        let to = |v: &Value| {
            v.as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_u64().unwrap() as usize)
                .collect::<Vec<_>>()
        };
        let (a, b) = (to(&case["a"]), to(&case["b"]));
        let want = case["ari"].as_f64().unwrap();
        let got = assign::adjusted_rand_index(&a, &b);
        assert!((got - want).abs() <= 1e-12 * want.abs().max(1.0), "{got} vs {want}");
    }
}

/// Source: scipy.optimize.linear_sum_assignment(maximize=True) on seeded random matrices.
#[test]
fn assignment_matches_scipy() {
    for case in fixture()["assignment"].as_array().unwrap() {
        let w: Vec<Vec<f64>> = case["weights"]
            .as_array()
            .unwrap()
            .iter()
            .map(|r| r.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect())
            .collect();
        let got = assign::max_weight_assignment(&w);
        let total: f64 = got.iter().enumerate().map(|(r, c)| w[r][c.unwrap()]).sum();
        assert!((total - case["total"].as_f64().unwrap()).abs() < 1e-9);
        let cols: Vec<usize> = case["columns"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_u64().unwrap() as usize)
            .collect();
        assert_eq!(got.iter().map(|c| c.unwrap()).collect::<Vec<_>>(), cols);
    }
}

const TRUTH: &str = r#"
[simulation]
rows = 900
seed = 8
output = "three.csv"
id = "pid"
indicators = ["y1", "y2"]
[[covariate]]
name = "age"
distribution = "normal"
mean = 50
sd = 10
[[covariate]]
name = "group"
distribution = "categorical"
levels = ["a", "b"]
shares = [0.5, 0.5]
[[cluster]]
name = "one"
mean = { y1 = 0, y2 = 0 }
sd = { y1 = 1, y2 = 1 }
[[cluster]]
name = "two"
gating = { intercept = -2.0, age = 0.04 }
mean = { y1 = 6, y2 = 0 }
sd = { y1 = 1, y2 = 1 }
[[cluster]]
name = "three"
gating = { intercept = -0.5 }
mean = { y1 = 0, y2 = 7 }
sd = { y1 = 1, y2 = 1 }
"#;

fn study(placements: &str) -> (tempfile::TempDir, spec::Study) {
    let dir = tempfile::tempdir().unwrap();
    let truth = simulate::parse(&dir.path().join("t.toml"), TRUTH).unwrap();
    std::fs::write(&truth.output, simulate::generate(&truth).csv).unwrap();
    let text = format!(
        "[study]\ntitle = \"t\"\ndata = \"three.csv\"\nid = \"pid\"\n[variables]\nage = \"continuous\"\ngroup = \"categorical\"\n[indicators]\ncolumns = [\"y1\", \"y2\"]\n[search]\nstarts = 6\n{placements}"
    );
    let s = spec::parse(&dir.path().join("s.toml"), &text, &super::common::families().infos()).unwrap();
    (dir, s)
}

fn run(s: &spec::Study) -> (data::Dataset, Vec<fit::PreparedPlacement>, Vec<fit::FitResult>) {
    let d = data::load(s).unwrap();
    let p = fit::prepare(s, &d, &super::common::families()).unwrap();
    let f = fit::fit_grid(s, &d, &p, |_, _, _| {});
    (d, p, f)
}

/// The aligned tables (not the criteria and alignment tables, which list fitted labels).
fn aligned_tables_text(c: &compare::Comparison) -> String {
    render::tables::tables(c)
        .iter()
        .filter(|t| t.id != compare::TableId::Criteria && t.id != compare::TableId::Alignment)
        .map(|t| {
            format!(
                "{}\n{}\n{}\n{}",
                t.name(),
                t.note,
                t.header.join("|"),
                t.rows.iter().map(|r| r.join("|")).collect::<Vec<_>>().join("\n")
            )
        })
        .collect::<Vec<_>>()
        .join("\n")
}

/// Relabelling the clusters of a fitted model changes nothing in the aligned tables.
#[test]
fn permuting_fitted_labels_leaves_the_aligned_tables_unchanged() {
    let (_dir, s) = study("[[placement]]\nname = \"plain\"\nclusters = [3]\n[[placement]]\nname = \"gated\"\ngating = [\"age\", \"group\"]\nclusters = [3]\n");
    let (d, p, mut fits) = run(&s);
    let before = aligned_tables_text(&compare::compare(
        &d,
        &p,
        &fits,
        &compare::number_clusters(&d, p.len(), &fits, &s.compare),
        &s.compare,
        compare::InferenceInput::none(),
    ));
    for order in [[2usize, 0, 1], [1, 2, 0], [0, 2, 1]] {
        let f = fits.iter_mut().find(|f| f.placement == "gated").unwrap();
        let best = f.best.as_mut().unwrap();
        best.run.model.permute(&order);
        let g = 3;
        let old = best.run.tau.clone();
        for (new, old) in best.run.tau.chunks_exact_mut(g).zip(old.chunks_exact(g)) {
            for (k, &o) in order.iter().enumerate() {
                new[k] = old[o];
            }
        }
        let after = aligned_tables_text(&compare::compare(
            &d,
            &p,
            &fits,
            &compare::number_clusters(&d, p.len(), &fits, &s.compare),
            &s.compare,
            compare::InferenceInput::none(),
        ));
        assert_eq!(before, after, "tables changed under permutation {order:?}");
    }
}

/// A placement with one more cluster than the reference (the truth has three; the
/// reference is held at two, merging two of them): the extra cluster is shown as new.
#[test]
fn an_extra_cluster_is_shown_without_a_counterpart() {
    let (_dir, s) =
        study("[[placement]]\nname = \"two\"\nclusters = [2]\n[[placement]]\nname = \"three\"\nclusters = [3]\n");
    let (d, p, fits) = run(&s);
    let c = compare::compare(
        &d,
        &p,
        &fits,
        &compare::number_clusters(&d, p.len(), &fits, &s.compare),
        &s.compare,
        compare::InferenceInput::none(),
    );
    let three = c.alignments.iter().find(|a| a.placement == "three").unwrap();
    assert_eq!(three.overlap.iter().filter(|o| o.is_none()).count(), 1, "{three:?}");
    assert!(three.aligned.contains(&3));
    let matched: Vec<f64> = three.overlap.iter().flatten().copied().collect();
    assert!(
        matched.iter().all(|o| *o > 0.95),
        "well-separated clusters overlap almost fully: {matched:?}"
    );
    let sentences: Vec<words::Sentence> = c
        .findings
        .iter()
        .map(|f| words::sentence(f, &c.cluster_names))
        .collect();
    assert!(
        sentences
            .iter()
            .any(|s| s.text.contains("no counterpart") && s.text.contains("cluster 3")),
        "{:?}",
        sentences
    );
    let alignment = render::tables::tables(&c)
        .into_iter()
        .find(|t| t.id == compare::TableId::Alignment)
        .unwrap();
    assert!(alignment.rows.iter().any(|r| r[3] == "no counterpart: new"));
    // Per-cluster agreement: the unmerged reference cluster keeps (nearly) all its rows;
    // the merged one loses the rows that went to the new cluster.
    let t = &c.cross_tables[0];
    let agree: Vec<f64> = t
        .agreement
        .iter()
        .map(|a| a.expect("both reference clusters have a counterpart"))
        .collect();
    assert!(
        agree.iter().copied().fold(0.0, f64::max) > 0.98 && agree.iter().copied().fold(1.0, f64::min) < 0.8,
        "{agree:?}"
    );
}

/// Every number a sentence quotes is printed in the tables it points to.
#[test]
fn sentences_cite_numbers_found_in_the_tables() {
    let (_dir, s) = study("[[placement]]\nname = \"plain\"\nclusters = [2, 3]\n[[placement]]\nname = \"gated\"\ngating = [\"age\", \"group\"]\nclusters = [2, 3]\n[[placement]]\nname = \"shifted\"\ncomponents = [\"age\"]\nclusters = [2, 3]\n");
    let (d, p, fits) = run(&s);
    let c = compare::compare(
        &d,
        &p,
        &fits,
        &compare::number_clusters(&d, p.len(), &fits, &s.compare),
        &s.compare,
        compare::InferenceInput::none(),
    );
    assert!(c.findings.len() >= 4, "{:?}", c.findings);
    let tables = render::tables::tables(&c);
    for finding in &c.findings {
        let sentence = words::sentence(finding, &c.cluster_names);
        let table = tables
            .iter()
            .find(|t| t.id == finding.source().table)
            .unwrap_or_else(|| panic!("no table for '{}'", sentence.source));
        assert!(sentence.source.starts_with(&table.name()), "{}", sentence.source);
        let text = format!(
            "{}\n{}",
            table.note,
            table.rows.iter().map(|r| r.join("|")).collect::<Vec<_>>().join("\n")
        );
        assert!(!sentence.numbers.is_empty());
        for n in &sentence.numbers {
            assert!(
                sentence.text.contains(n.as_str()),
                "'{}' does not quote {n}",
                sentence.text
            );
            assert!(
                text.contains(n.as_str()),
                "{n} from '{}' is not in the {}",
                sentence.text,
                table.name()
            );
        }
    }
}

/// Tags that report.html may contain; anything else (a script above all) fails.
const ALLOWED_TAGS: &[&str] = &[
    "doctype", "html", "head", "meta", "title", "style", "body", "h1", "h2", "h3", "p", "b", "div", "ul", "li", "span",
    "table", "thead", "tbody", "tr", "th", "td", "svg", "text", "rect", "line", "polyline", "circle", "path",
];

fn tag_names(html: &str) -> Vec<String> {
    let bytes = html.as_bytes();
    let mut out = Vec::new();
    let mut i = 0;
    while i < bytes.len() {
        if bytes[i] == b'<' {
            let mut j = i + 1;
            if j < bytes.len() && (bytes[j] == b'/' || bytes[j] == b'!') {
                j += 1;
            }
            let start = j;
            while j < bytes.len() && bytes[j].is_ascii_alphanumeric() {
                j += 1;
            }
            out.push(html[start..j].to_ascii_lowercase());
            i = j;
        } else {
            i += 1;
        }
    }
    out
}

/// Column names and levels with markup, quotes and ampersands appear as text.
#[test]
fn names_from_the_data_are_escaped_in_the_report() {
    let dir = tempfile::tempdir().unwrap();
    let mut csv = String::from("id,\"<script>alert(1)</script>\",\"a&b \"\"q\"\"\",y2\n");
    let mut s = cohortmix::rng::Stream::new(1, "html");
    for i in 0..300 {
        let k = i % 2;
        // The second level, "y"&z, sorts first and so is the reference level.
        let level = if i % 3 == 0 { "<b>x</b>" } else { "\"\"\"y\"\"&z\"" };
        csv.push_str(&format!(
            "{i},{level},{:.3},{:.3}\n",
            5.0 * k as f64 + s.normal(),
            s.normal()
        ));
    }
    std::fs::write(dir.path().join("d.csv"), csv).unwrap();
    let spec_text = "[study]\ntitle = \"<i>T</i> & co\"\ndata = \"d.csv\"\nid = \"id\"\n[variables]\n\"<script>alert(1)</script>\" = \"categorical\"\n[indicators]\ncolumns = [\"a&b \\\"q\\\"\", \"y2\"]\n[search]\nclusters = [2]\nstarts = 4\n[[placement]]\nname = \"<script>p</script>\"\n[[placement]]\nname = \"gate's & <co>\"\ngating = [\"<script>alert(1)</script>\"]\n";
    std::fs::write(dir.path().join("s.toml"), spec_text).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args(["compare", "s.toml", "--out", "run"])
        .current_dir(dir.path())
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let html = std::fs::read_to_string(dir.path().join("run/report.html")).unwrap();
    for tag in tag_names(&html) {
        assert!(ALLOWED_TAGS.contains(&tag.as_str()), "unexpected tag <{tag}>");
    }
    assert!(html.contains("&lt;script&gt;alert(1)&lt;/script&gt;"));
    assert!(html.contains("a&amp;b &quot;q&quot;"));
    assert!(html.contains("&lt;b&gt;x&lt;/b&gt;"));
    assert!(html.contains("gate&#39;s &amp; &lt;co&gt;"));
    for figure in std::fs::read_dir(dir.path().join("run/figures")).unwrap() {
        let text = std::fs::read_to_string(figure.unwrap().path()).unwrap();
        let (declaration, chart) = text.split_once('\n').unwrap();
        assert!(declaration.starts_with("<?xml "), "{declaration}");
        for tag in tag_names(chart) {
            assert!(
                ALLOWED_TAGS.contains(&tag.as_str()) || ["title", "style"].contains(&tag.as_str()),
                "unexpected tag <{tag}> in a figure"
            );
        }
    }
    assert!(
        !html.contains("http://")
            || html
                .matches("http://")
                .all(|_| html.contains("xmlns=\"http://www.w3.org/2000/svg\"")),
        "only the SVG namespace may name a URL"
    );
    assert!(!html.contains("https://"));
}

/// A gating covariate that perfectly predicts membership is reported as separation, with
/// its remedy, not as an effect of size 0 or infinity; and it is never "the strongest
/// effect".
#[test]
fn a_covariate_that_separates_clusters_is_reported_as_separation() {
    let dir = tempfile::tempdir().unwrap();
    let mut rng = cohortmix::rng::Stream::new(11, "separation test");
    let mut csv = String::from("id,x,age,y\n");
    for i in 0..200 {
        let x = i % 2;
        let age = 30.0 + 20.0 * rng.uniform();
        let y = 8.0 * x as f64 + rng.normal();
        csv.push_str(&format!("r{i},{x},{age:.1},{y:.4}\n"));
    }
    std::fs::write(dir.path().join("data.csv"), csv).unwrap();
    std::fs::write(
        dir.path().join("study.toml"),
        "[study]\ntitle = \"separation\"\ndata = \"data.csv\"\nid = \"id\"\noutput = \"run\"\n\
         [variables]\nx = \"binary\"\nage = \"continuous\"\n\
         [indicators]\ncolumns = [\"y\"]\n[search]\nstarts = 5\n\
         [[placement]]\nname = \"x drives membership\"\nclusters = [2]\ngating = [\"x\", \"age\"]\n",
    )
    .unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args(["compare", "study.toml"])
        .current_dir(dir.path())
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let results: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.path().join("run/results.json")).unwrap()).unwrap();
    let effects = results["comparison"]["gating_effects"].as_array().unwrap();
    let by_term = |t: &str| effects.iter().find(|e| e["term"] == t).unwrap();
    assert_eq!(by_term("x")["separation"], true, "{effects:?}");
    assert_eq!(by_term("age")["separation"], false, "{effects:?}");
    let sentences: Vec<&str> = results["comparison"]["sentences"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["text"].as_str().unwrap())
        .collect();
    assert!(
        sentences
            .iter()
            .any(|s| s.contains("x (1 vs 0) (nearly) perfectly separates") && s.contains("gating ridge")),
        "{sentences:?}"
    );
    assert!(!sentences.iter().any(|s| s.contains("each unit of x")), "{sentences:?}");
    let report = std::fs::read_to_string(dir.path().join("run/report.html")).unwrap();
    assert!(report.contains("separation: not estimable"));
}

/// The three-step table's corrected intervals are the fit's own (with step 1's part), the
/// same numbers results.json gives the fit's gating effects, not step 3's errors alone.
#[test]
fn three_step_intervals_in_the_comparison_are_the_fits_own() {
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args([
            "compare",
            super::common::root("configs/symptoms.toml").to_str().unwrap(),
            "--out",
            "run",
        ])
        .current_dir(dir.path())
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let results: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.path().join("run/results.json")).unwrap()).unwrap();
    let rows = results["comparison"]["three_step"].as_array().unwrap();
    assert!(!rows.is_empty(), "the symptoms study has a three-step placement");
    for row in rows {
        let fit = results["fits"]
            .as_array()
            .unwrap()
            .iter()
            .find(|f| {
                f["placement"] == row["placement"] && f["step_three"]["errors_include_step_one"] == "step-1-added"
            })
            .expect("the compared three-step fit, with step 1 in its errors");
        let effect = fit["effects"]
            .as_array()
            .unwrap()
            .iter()
            .find(|e| e["block"] == "gating" && e["cluster"] == row["cluster"] && e["term"] == row["term"])
            .unwrap();
        for key in ["estimate", "lower", "upper"] {
            let (a, b) = (row["corrected"][key].as_f64().unwrap(), effect[key].as_f64().unwrap());
            assert!(
                (a - b).abs() <= 1e-12 * b.abs(),
                "{} {}: {key} {a} against {b}",
                row["cluster"],
                row["term"]
            );
        }
    }
}

/// Terms read in the study's words: a label and unit from `[variables]` with the amount an
/// effect is per, a binary covariate as 1 against 0, a categorical level against the
/// reference; and the reference values of the profiles name each covariate's value.
#[test]
fn terms_read_in_the_words_of_the_study() {
    use cohortmix::compare::terms::{reference_values, term_words};
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("d.csv"),
        "y,age,smoker,sex\n1.0,30,0,female\n2.0,50,1,male\n3.0,40,1,female\n",
    )
    .unwrap();
    let text = r#"
[study]
title = "words"
data = "d.csv"
[variables]
age = { type = "continuous", label = "age at entry", unit = "years" }
smoker = { type = "binary", label = "current smoker" }
sex = { type = "categorical", reference = "female" }
[indicators]
columns = ["y"]
[search]
clusters = [1]
[[placement]]
name = "all"
gating = ["age", "smoker", "sex"]
"#;
    let families = super::common::families();
    let study = spec::parse(&dir.path().join("s.toml"), text, &families.infos()).unwrap();
    let data = data::load(&study).unwrap();
    let term = |name: &str, covariate: &str| data::Term {
        name: name.to_string(),
        covariate: Some(covariate.to_string()),
        center: 0.0,
        scale: 1.0,
    };
    let age = term_words(&term("age", "age"), &data, &study.words);
    assert_eq!(age.with_per(10.0), "age at entry, per 10 years");
    assert_eq!(age.with_per(1.0), "age at entry (years), per unit");
    assert_eq!(render::per_phrase(10.0, &age), "10 years of age at entry");
    let smoker = term_words(&term("smoker", "smoker"), &data, &study.words);
    assert_eq!(smoker.with_per(1.0), "current smoker (1 vs 0)");
    let sex = term_words(&term("sex=male", "sex"), &data, &study.words);
    assert_eq!(sex.with_per(1.0), "sex (male vs female)");
    let names = ["age".to_string(), "smoker".to_string(), "sex".to_string()];
    assert_eq!(
        reference_values(&names, &data, &study.words),
        "profiles at the reference covariate values: age at entry 40.0 years (sample mean), current smoker 0, sex female (reference level)"
    );
}

/// Table 1 agrees with the cluster sizes (its posterior-weighted counts are the shares of
/// the rows, its most-likely counts the rows assigned), its means are the posterior-weighted
/// means computed here from the posteriors, and each categorical column's level shares add
/// up to 1 in every cluster.
#[test]
fn table_one_agrees_with_the_sizes_and_the_posteriors() {
    let (_dir, s) = study("[[placement]]\nname = \"plain\"\nclusters = [3]\n[[placement]]\nname = \"gated\"\ngating = [\"age\", \"group\"]\nclusters = [3]\n");
    let (d, p, fits) = run(&s);
    let numbering = compare::number_clusters(&d, p.len(), &fits, &s.compare);
    let c = compare::compare(&d, &p, &fits, &numbering, &s.compare, compare::InferenceInput::none());
    let n = d.weights.len() as f64;
    let data::Column::Numeric { values: age, .. } = &d.columns["age"] else {
        panic!("age is numeric")
    };
    for l in &numbering.labelled {
        let f = &fits[l.fit];
        let tau = &f.best.as_ref().unwrap().run.tau;
        for (k, &number) in l.aligned.iter().enumerate() {
            let cell = |variable: &str, level: Option<&str>| {
                c.table_one
                    .iter()
                    .find(|t| {
                        t.placement == f.placement
                            && t.cluster == number
                            && t.variable == variable
                            && t.level.as_deref() == level
                    })
                    .unwrap_or_else(|| panic!("{} cluster {number} {variable}", f.placement))
            };
            let profile = c
                .profiles
                .iter()
                .find(|p| p.placement == f.placement && p.cluster == number)
                .unwrap();
            let rows = cell(compare::table_one::ROWS, None);
            assert_eq!(rows.weighted.share, Some(profile.share));
            assert_eq!(rows.most_likely.n, profile.count as f64);
            let a = cell("age", None);
            assert!((a.weighted.n - profile.share * n).abs() < 1e-9 * n);
            assert_eq!(a.most_likely.n, profile.count as f64);
            let (sw, swx) = (0..age.len()).fold((0.0, 0.0), |(w, wx), i| {
                (w + tau[i * 3 + k], wx + tau[i * 3 + k] * age[i])
            });
            assert!((a.weighted.mean.unwrap() - swx / sw).abs() < 1e-9, "{:?}", a.weighted);
            let shares: f64 = ["a", "b"]
                .iter()
                .map(|l| cell("group", Some(l)).weighted.share.unwrap())
                .sum();
            assert!((shares - 1.0).abs() < 1e-12);
        }
    }
}

/// The membership curves run along the numeric gating covariate with the largest joint
/// Wald statistic: with standard errors, `dose` (a strong effect) though `age` (none) is
/// listed first; without them, the first listed.
#[test]
fn membership_curves_follow_the_strongest_covariate() {
    let dir = tempfile::tempdir().unwrap();
    let truth_text = TRUTH
        .replace(
            "[[cluster]]\nname = \"one\"",
            "[[covariate]]\nname = \"dose\"\ndistribution = \"normal\"\nmean = 0\nsd = 1\n[[cluster]]\nname = \"one\"",
        )
        .replace(
            "gating = { intercept = -2.0, age = 0.04 }",
            "gating = { intercept = -1.0, dose = 1.5 }",
        );
    let truth = simulate::parse(&dir.path().join("t.toml"), &truth_text).unwrap();
    std::fs::write(&truth.output, simulate::generate(&truth).csv).unwrap();
    let text = "[study]\ntitle = \"t\"\ndata = \"three.csv\"\nid = \"pid\"\n[variables]\nage = \"continuous\"\ndose = \"continuous\"\ngroup = \"categorical\"\n[indicators]\ncolumns = [\"y1\", \"y2\"]\n[search]\nstarts = 6\n[[placement]]\nname = \"gated\"\ngating = [\"age\", \"dose\"]\nclusters = [3]\n";
    let s = spec::parse(&dir.path().join("s.toml"), text, &super::common::families().infos()).unwrap();
    let (d, p, fits) = run(&s);
    let numbering = compare::number_clusters(&d, p.len(), &fits, &s.compare);
    let without = compare::compare(&d, &p, &fits, &numbering, &s.compare, compare::InferenceInput::none());
    assert_eq!(without.effect_curves[0].covariate, "age");
    let by_fit = cohortmix::inference::for_fits(&s, &d, &p, &fits, &[0]);
    let input = compare::InferenceInput {
        by_fit: &by_fit,
        ..compare::InferenceInput::none()
    };
    let with = compare::compare(&d, &p, &fits, &numbering, &s.compare, input);
    let statistic = |c: &str| {
        with.gating_tests
            .iter()
            .find(|t| t.test.covariate == c)
            .unwrap()
            .test
            .statistic
    };
    println!("Wald: age {:.1}, dose {:.1}", statistic("age"), statistic("dose"));
    assert!(statistic("dose") > statistic("age"));
    assert_eq!(with.effect_curves[0].covariate, "dose");
}

/// The choice of cluster count is qualified in words: on data drawn with three clusters,
/// a range that stops at two makes the choice sit at its edge, and a range that starts at
/// four does too (fewer were not tried). Each sentence points at the compared fit's row.
#[test]
fn a_cluster_count_at_the_edge_of_the_fitted_range_is_said() {
    let (_dir, s) = study("[[placement]]\nname = \"short\"\nclusters = [1, 2]\n[[placement]]\nname = \"high\"\nclusters = [4, 5]\n[[placement]]\nname = \"wide\"\nclusters = [1, 2, 3, 4, 5]\n");
    let (d, p, fits) = run(&s);
    let c = compare::compare(
        &d,
        &p,
        &fits,
        &compare::number_clusters(&d, p.len(), &fits, &s.compare),
        &s.compare,
        compare::InferenceInput::none(),
    );
    let edges: Vec<(&str, usize, bool)> = c
        .findings
        .iter()
        .filter_map(|f| match f {
            compare::Finding::EdgeOfRange {
                placement,
                clusters,
                largest,
                ..
            } => Some((placement.as_str(), *clusters, *largest)),
            _ => None,
        })
        .collect();
    assert_eq!(edges, vec![("short", 2, true), ("high", 4, false)], "{:?}", c.findings);
    let chosen_wide = c.criteria.iter().find(|r| r.placement == "wide" && r.chosen).unwrap();
    assert_eq!(chosen_wide.clusters, 3);
    for f in c
        .findings
        .iter()
        .filter(|f| matches!(f, compare::Finding::EdgeOfRange { .. }))
    {
        let sentence = words::sentence(f, &c.cluster_names);
        assert!(sentence.text.contains("wider range"), "{}", sentence.text);
        assert!(
            sentence.source.starts_with("criteria table, placement"),
            "{}",
            sentence.source
        );
    }
}

/// Criteria that choose another count than BIC are named with their values, and a best
/// optimum reached by a single start is said; the bootstrap test's absence is said once.
#[test]
fn disagreeing_criteria_and_a_lone_start_are_said() {
    use compare::{Criteria, Finding};
    let row = |placement: &str, clusters: usize, bic: f64, aic: f64, icl: f64, reached: usize, chosen: bool| Criteria {
        placement: placement.into(),
        clusters,
        covariance: "unconstrained".into(),
        status: "converged".into(),
        loglik: Some(0.0),
        parameters: 1,
        bic: Some(bic),
        aic: Some(aic),
        sabic: Some(bic),
        icl: Some(icl),
        bic_entropy: Some(icl),
        bic_weight: None,
        relative_entropy: None,
        average_posterior: Vec::new(),
        smallest_share: None,
        smallest_count: None,
        starts_reaching_best: reached,
        starts: 20,
        chosen,
    };
    let (_dir, s) = study("[[placement]]\nname = \"a\"\nclusters = [2]\n");
    let (d, p, fits) = run(&s);
    let mut c = compare::compare(
        &d,
        &p,
        &fits,
        &compare::number_clusters(&d, p.len(), &fits, &s.compare),
        &s.compare,
        compare::InferenceInput::none(),
    );
    c.criteria = vec![
        row("a", 1, 130.0, 125.0, 129.0, 20, false),
        row("a", 2, 100.0, 90.0, 101.0, 1, true),
        row("a", 3, 110.0, 80.0, 120.0, 3, false),
        row("b", 1, 300.0, 290.0, 299.0, 20, false),
        row("b", 2, 200.0, 190.0, 201.0, 9, true),
        row("b", 3, 250.0, 180.0, 260.0, 5, false),
    ];
    c.cluster_count_tests.clear();
    let found = compare::findings(&c);
    let disagree: Vec<&Finding> = found
        .iter()
        .filter(|f| matches!(f, Finding::CriteriaDisagree { .. }))
        .collect();
    assert_eq!(disagree.len(), 2);
    let texts: Vec<String> = disagree
        .iter()
        .map(|f| words::sentence(f, &c.cluster_names).text)
        .collect();
    assert!(
        texts[0].contains("BIC chooses 2") && texts[0].contains("would choose 3 (AIC 80.0)"),
        "{}",
        texts[0]
    );
    assert!(!texts[0].contains("ICL would"), "ICL agrees with BIC: {}", texts[0]);
    assert!(texts[0].contains("cluster_count_replicates") && !texts[1].contains("cluster_count_replicates"));
    let lone: Vec<String> = found
        .iter()
        .filter(|f| matches!(f, Finding::FewStarts { .. }))
        .map(|f| words::sentence(f, &c.cluster_names).text)
        .collect();
    assert_eq!(lone.len(), 1, "{lone:?}");
    assert!(
        lone[0].contains("'a'") && lone[0].contains("1/20 starts"),
        "{}",
        lone[0]
    );
}

/// Every number on a cluster card is the one Table 1 and the criteria table print for that
/// cluster: size and each line against Table 1's column of the cluster, certainty against
/// the compared fit's "mean top posterior by cluster".
#[test]
fn cluster_cards_print_table_one_numbers() {
    let (_dir, s) = study("[[placement]]\nname = \"plain\"\nclusters = [3]\n[[placement]]\nname = \"gated\"\ngating = [\"age\", \"group\"]\nclusters = [3]\n");
    let (d, p, fits) = run(&s);
    let c = compare::compare(
        &d,
        &p,
        &fits,
        &compare::number_clusters(&d, p.len(), &fits, &s.compare),
        &s.compare,
        compare::InferenceInput::none(),
    );
    let cards = render::document::cards(&c);
    assert_eq!(cards.len(), 3);
    let tables = render::tables::tables(&c);
    let table_one = tables
        .iter()
        .find(|t| {
            t.id == compare::TableId::TableOne {
                placement: c.reference.clone(),
            }
        })
        .expect("Table 1 of the reference");
    let criteria = tables.iter().find(|t| t.id == compare::TableId::Criteria).unwrap();
    let certainty_column = criteria
        .header
        .iter()
        .position(|h| h == "mean top posterior by cluster")
        .unwrap();
    let compared_column = criteria.header.iter().position(|h| h == "compared").unwrap();
    let compared = criteria
        .rows
        .iter()
        .find(|r| r[0] == c.reference && r[compared_column] == "✓")
        .unwrap();
    let mut checked = 0;
    for card in &cards {
        let column = table_one
            .header
            .iter()
            .position(|h| *h == format!("cluster {}", card.cluster))
            .unwrap();
        let cell = |label: &str| {
            table_one
                .rows
                .iter()
                .find(|r| r[0] == label)
                .map(|r| r[column].clone())
                .unwrap_or_else(|| panic!("no Table 1 line '{label}'"))
        };
        assert_eq!(card.size, cell("rows"));
        for (label, value) in &card.lines {
            assert_eq!(*value, cell(label), "cluster {}, {label}", card.cluster);
            checked += 1;
        }
        let certainty = card.certainty.as_ref().expect("a certainty");
        assert!(
            compared[certainty_column].contains(&format!("{}: {certainty}", card.cluster)),
            "{certainty} against {}",
            compared[certainty_column]
        );
    }
    // Two indicators, age and the group's two levels on every card.
    assert_eq!(checked, 3 * 5, "{checked} lines");
}

/// The split steps of the reference placement: one per pair of consecutive counts, each
/// count's clusters in the run's numbers, the counts' rows adding up to the cohort at every
/// step, and one step's larger fit the next step's smaller one.
#[test]
fn split_steps_carry_every_row_from_one_count_to_the_next() {
    let (_dir, s) = study("[[placement]]\nname = \"plain\"\nclusters = [1, 2, 3, 4]\n");
    let (d, p, fits) = run(&s);
    let numbering = compare::number_clusters(&d, p.len(), &fits, &s.compare);
    let c = compare::compare(&d, &p, &fits, &numbering, &s.compare, compare::InferenceInput::none());
    assert_eq!(
        c.splits.iter().map(|x| (x.from, x.to)).collect::<Vec<_>>(),
        [(1, 2), (2, 3), (3, 4)]
    );
    let total: f64 = d.weights.iter().sum();
    for (i, step) in c.splits.iter().enumerate() {
        let sum: f64 = step.counts.iter().flatten().sum();
        assert!((sum - total).abs() < 1e-9, "{sum} against {total}");
        let mut numbers = step.to_clusters.clone();
        numbers.sort_unstable();
        numbers.dedup();
        assert_eq!(numbers.len(), step.to, "numbers are distinct");
        if let Some(next) = c.splits.get(i + 1) {
            assert_eq!(step.to_clusters, next.from_clusters);
            for (b, _) in step.to_clusters.iter().enumerate() {
                let into: f64 = step.counts.iter().map(|row| row[b]).sum();
                let out_of: f64 = next.counts[b].iter().sum();
                assert!(
                    (into - out_of).abs() < 1e-9,
                    "cluster {} holds {into} then {out_of}",
                    step.to_clusters[b]
                );
            }
        }
    }
    // The compared count's clusters carry the numbers every other file uses.
    let compared = c.criteria.iter().find(|r| r.chosen).unwrap();
    let step = c.splits.iter().find(|x| x.to == compared.clusters).unwrap();
    let mut numbers = step.to_clusters.clone();
    numbers.sort_unstable();
    assert_eq!(numbers, (1..=compared.clusters).collect::<Vec<_>>());
}

/// Each placement's cluster-count probabilities are its criteria rows' BIC weights summed
/// by count (they add to 1, and the compared count is the criteria table's), the report's
/// count chart prints them as the criteria table prints a weight, and every chart of the
/// report is also a file in `figures/` that holds the chart byte for byte.
#[test]
fn count_probabilities_are_the_bic_weights_and_figures_are_the_report_charts() {
    let dir = tempfile::tempdir().unwrap();
    let mut csv = String::from("id,x,age,y1,y2\n");
    let mut rng = cohortmix::rng::Stream::new(11, "counts");
    for i in 0..400 {
        let k = i % 3;
        let x = usize::from(rng.uniform() < 0.3 + 0.2 * k as f64);
        let age = 30.0 + 20.0 * rng.uniform();
        let y1 = 3.0 * k as f64 + rng.normal();
        let y2 = [0.0, 2.0, -1.0][k] + rng.normal();
        csv.push_str(&format!("r{i},{x},{age:.1},{y1:.4},{y2:.4}\n"));
    }
    std::fs::write(dir.path().join("data.csv"), csv).unwrap();
    std::fs::write(
        dir.path().join("study.toml"),
        "[study]\ntitle = \"counts\"\ndata = \"data.csv\"\nid = \"id\"\noutput = \"run\"\n\
         [variables]\nx = \"binary\"\nage = \"continuous\"\n\
         [indicators]\ncolumns = [\"y1\", \"y2\"]\n[search]\nclusters = [1, 2, 3, 4]\nstarts = 4\n\
         covariance = [{ orientation = \"axes\" }, {}]\n\
         [[placement]]\nname = \"plain\"\n[[placement]]\nname = \"x and age drive membership\"\ngating = [\"x\", \"age\"]\n",
    )
    .unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_cohortmix"))
        .args(["compare", "study.toml"])
        .current_dir(dir.path())
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let run = dir.path().join("run");
    let results: serde_json::Value = serde_json::from_slice(&std::fs::read(run.join("results.json")).unwrap()).unwrap();
    let criteria = results["comparison"]["criteria"].as_array().unwrap();
    let counts = results["comparison"]["count_probabilities"].as_array().unwrap();
    let report = std::fs::read_to_string(run.join("report.html")).unwrap();
    let chart_at = report.find("aria-label=\"How sure BIC is").expect("the count chart");
    let chart = &report[chart_at..chart_at + report[chart_at..].find("</svg>").unwrap()];
    for placement in ["plain", "x and age drive membership"] {
        let mine: Vec<&serde_json::Value> = counts.iter().filter(|c| c["placement"] == placement).collect();
        assert_eq!(mine.len(), 4, "{placement}: {mine:?}");
        let total: f64 = mine.iter().map(|c| c["probability"].as_f64().unwrap()).sum();
        assert!((total - 1.0).abs() < 1e-12, "{placement}: {total}");
        for c in &mine {
            let g = c["clusters"].as_u64().unwrap();
            let rows: Vec<&serde_json::Value> = criteria
                .iter()
                .filter(|r| r["placement"] == placement && r["clusters"].as_u64() == Some(g))
                .collect();
            let summed: f64 = rows.iter().filter_map(|r| r["bic_weight"].as_f64()).sum();
            let p = c["probability"].as_f64().unwrap();
            assert!((p - summed).abs() < 1e-15, "{placement}, {g}: {p} against {summed}");
            assert_eq!(c["chosen"].as_bool(), Some(rows.iter().any(|r| r["chosen"] == true)));
            let printed = if p < 0.0005 {
                "&lt;0.001".to_string()
            } else {
                format!("{p:.3}")
            };
            assert!(
                chart.contains(&format!(">{printed}</text>")),
                "{placement}, {g}: {printed} not in the chart"
            );
        }
        assert_eq!(mine.iter().filter(|c| c["chosen"] == true).count(), 1);
    }
    // Every chart of the page is a figure file, in page order, holding the chart exactly.
    let open = "<svg xmlns=\"http://www.w3.org/2000/svg\"";
    let charts: Vec<&str> = report
        .match_indices(open)
        .map(|(at, _)| &report[at..at + report[at..].find("</svg>").unwrap() + "</svg>".len()])
        .collect();
    let mut names: Vec<String> = std::fs::read_dir(run.join("figures"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().to_string())
        .collect();
    names.sort();
    assert!(charts.len() >= 5, "{} charts", charts.len());
    assert_eq!(names.len(), charts.len(), "{names:?}");
    for (name, chart) in names.iter().zip(&charts) {
        let file = std::fs::read_to_string(run.join("figures").join(name)).unwrap();
        let body = file.split_once('\n').unwrap().1;
        let tag_end = body.find('>').unwrap() + 1;
        assert_eq!(&body[..tag_end], &chart[..chart.find('>').unwrap() + 1], "{name}");
        let added_end = body.find("fill=\"#fff\"/>").unwrap() + "fill=\"#fff\"/>".len();
        assert_eq!(
            &body[added_end..body.len() - 1],
            &chart[chart.find('>').unwrap() + 1..],
            "{name}"
        );
        assert!(body[tag_end..added_end].starts_with("<title>"), "{name}");
    }
}
