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

/// A block's `state` in `fitted-models.json` is written by its family, outside the schema
/// above; the keys of each standard family's state are pinned here instead, so that a
/// changed state needs a new `SAVED_VERSION` too. The symptom study holds all three.
#[test]
fn every_block_state_keeps_its_keys() {
    use cohortmix::fit::saved::SAVED_VERSION;
    let families = super::common::families();
    let loaded = cohortmix::pipeline::load(&root("configs/symptoms.toml"), &families).unwrap();
    let placement = &loaded.prepared[0];
    let fd = cohortmix::fit::fit_data(&loaded.data, placement);
    let options = cohortmix::model::ModelOptions::for_study(&loaded.study, loaded.study.search.structures[0]);
    let model = cohortmix::fit::initial_model(&fd, &placement.blocks, &placement.placement, 2, options);
    let keys: Vec<(String, Vec<String>)> = model
        .components
        .blocks
        .iter()
        .map(|b| {
            let state = b.state();
            let mut keys: Vec<String> = state.as_object().unwrap().keys().cloned().collect();
            keys.sort();
            (b.info().word.to_string(), keys)
        })
        .collect();
    let pinned: &[(&str, &[&str])] = &[
        (
            "gaussian",
            &[
                "coefficients",
                "covariances",
                "floor_hits",
                "orientation",
                "structure",
                "variances",
            ],
        ),
        (
            "items",
            &[
                "empty_cells",
                "failed_steps",
                "log_probabilities",
                "logit_coefficients",
                "smoothing",
            ],
        ),
        ("counts", &["coefficients", "failed_steps", "started"]),
    ];
    let pinned: Vec<(String, Vec<String>)> = pinned
        .iter()
        .map(|(f, k)| (f.to_string(), k.iter().map(|s| s.to_string()).collect()))
        .collect();
    assert_eq!(
        keys, pinned,
        "a family's saved state changed: raise SAVED_VERSION (now {SAVED_VERSION}), describe the \
         change in docs/results-schema.md, and pin the new keys here"
    );
}
