//! The layouts of `results.json` and `fitted-models.json` are pinned: the JSON schema of
//! what each writer writes, derived from its types, must equal the file committed for
//! the current layout version (`tests/schema/`). Changing a layout therefore needs a new
//! version: the pinned file of an existing version is never rewritten.

use super::common::root;

/// The schema without its words (descriptions, titles): only the layout is pinned, so a
/// changed doc comment does not need a new version.
fn layout(v: &mut serde_json::Value) {
    match v {
        serde_json::Value::Object(m) => {
            m.remove("description");
            m.remove("title");
            m.remove("$schema");
            m.values_mut().for_each(layout);
        }
        serde_json::Value::Array(a) => a.iter_mut().for_each(layout),
        _ => {}
    }
}

fn check_pinned(what: &str, version: u32, schema: schemars::Schema) {
    let mut value = schema.to_value();
    layout(&mut value);
    let text = serde_json::to_string_pretty(&value).unwrap() + "\n";
    let path = root(&format!("tests/schema/{what}-v{version}.json"));
    match std::fs::read_to_string(&path) {
        Ok(pinned) => assert!(
            pinned == text,
            "the layout of {what} differs from the one pinned for version {version} ({}): \
             raise its version, describe the change in docs/results-schema.md, and pin the \
             new layout with UPDATE_SNAPSHOTS=1",
            path.display()
        ),
        Err(_) if std::env::var_os("UPDATE_SNAPSHOTS").is_some() => {
            std::fs::create_dir_all(path.parent().unwrap()).unwrap();
            std::fs::write(&path, text).unwrap();
        }
        Err(e) => panic!(
            "no layout pinned for {what} version {version} ({}: {e}); pin it with UPDATE_SNAPSHOTS=1",
            path.display()
        ),
    }
}

#[test]
fn results_json_layout_is_pinned_to_its_version() {
    check_pinned(
        "results",
        cohortmix::pipeline::output::SCHEMA_VERSION,
        schemars::schema_for!(cohortmix::render::json::ResultsFile<'static>),
    );
}

#[test]
fn fitted_models_layout_is_pinned_to_its_version() {
    check_pinned(
        "fitted-models",
        cohortmix::fit::saved::SAVED_VERSION,
        schemars::schema_for!(cohortmix::fit::saved::SavedRun),
    );
}
