//! The fixed study the saved-model, cache-entry and predict targets share
//! (`fuzz/fixture`): its spec, data, and the models and cache entry a fit of it wrote.
#![allow(dead_code)]

use cohortmix::model::family::Families;
use std::path::Path;

pub const SPEC: &str = include_str!("../fixture/study.toml");
pub const DATA: &str = include_str!("../fixture/data.csv");
pub const SAVED: &str = include_str!("../fixture/fitted-models.json");

pub fn families() -> Families {
    Families::standard()
}

pub fn study() -> cohortmix::spec::Study {
    let mut study = cohortmix::spec::parse(Path::new("fuzz/fixture/study.toml"), SPEC, &families().infos())
        .expect("the fixture spec is valid");
    study.data_path = Path::new("fuzz/fixture/data.csv").to_path_buf();
    study
}
