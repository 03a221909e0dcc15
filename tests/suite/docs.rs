//! The documents stay true to the code: `docs/spec.md` names every key the spec accepts.
//! The keys are read from the spec reader itself (its message for an unknown key lists
//! the keys allowed in that table), so a key added to a table without a line in the
//! reference fails here.

use super::common::{families, root};

const BASE: &str = "[study]\ntitle = \"t\"\ndata = \"d.csv\"\n[indicators]\ncolumns = [\"a\", \"b\"]\n";

/// The keys allowed where `text` puts the unknown key `zz_unknown`.
fn allowed(text: &str) -> Vec<String> {
    let err = cohortmix::spec::parse(std::path::Path::new("s.toml"), text, &families().infos())
        .expect_err("an unknown key is an error")
        .to_string();
    let line = err
        .lines()
        .find_map(|l| {
            l.split("keys allowed here: ")
                .nth(1)
                .or_else(|| l.split("help: key: ").nth(1))
        })
        .unwrap_or_else(|| panic!("no list of keys in:\n{err}"));
    line.split(", ").map(|k| k.trim().to_string()).collect()
}

#[test]
fn the_spec_reference_names_every_key() {
    let tables = [
        ("top level", format!("zz_unknown = 1\n{BASE}")),
        ("[study]", BASE.replace("[study]\n", "[study]\nzz_unknown = 1\n")),
        ("[indicators]", format!("{BASE}zz_unknown = 1\n")),
        (
            "[variables] table",
            format!("{BASE}[variables]\nx = {{ type = \"binary\", zz_unknown = 1 }}\n"),
        ),
        ("[search]", format!("{BASE}[search]\nzz_unknown = 1\n")),
        (
            "[[placement]]",
            format!("{BASE}[[placement]]\nname = \"p\"\nzz_unknown = 1\n"),
        ),
        ("[compare]", format!("{BASE}[compare]\nzz_unknown = 1\n")),
        ("[inference]", format!("{BASE}[inference]\nzz_unknown = 1\n")),
        (
            "a covariance structure",
            format!("{BASE}[search]\ncovariance = [{{ zz_unknown = \"equal\" }}]\n"),
        ),
    ];
    let docs = std::fs::read_to_string(root("docs/spec.md")).unwrap();
    let mut missing = Vec::new();
    for (table, text) in &tables {
        let keys = allowed(text);
        assert!(!keys.is_empty(), "{table}: no keys read");
        for key in keys {
            let named = if *table == "top level" {
                docs.contains(&format!("`[{key}]`")) || docs.contains(&format!("`[[{key}]]`"))
            } else {
                docs.contains(&format!("`{key}`"))
            };
            if !named {
                missing.push(format!("{table}: `{key}`"));
            }
        }
    }
    assert!(
        missing.is_empty(),
        "docs/spec.md does not name:\n{}",
        missing.join("\n")
    );
}
