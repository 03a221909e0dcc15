//! Any text given as the data of a fixed study (every column type, items with declared
//! levels, a count, an exposure, case weights and an id) is either read or refused with
//! an error; never a panic. Designs are built from what is read, as `check` does.
#![no_main]

use cohortmix::model::family::Families;
use libfuzzer_sys::fuzz_target;
use std::path::Path;
use std::sync::OnceLock;

const SPEC: &str = r#"
[study]
title = "fuzz"
data = "fuzz.csv"
id = "pid"
weights = "w"
weight_type = "sampling"
[variables]
age = "continuous"
sex = { type = "categorical", reference = "f" }
smoker = "binary"
y = "continuous"
cough = "binary"
tight = { type = "categorical", levels = ["never", "often"] }
spells = "count"
[indicators]
family = "mixed"
columns = ["y", "cough", "tight", "spells"]
exposure = "years"
[[placement]]
name = "p"
gating = ["age", "sex"]
components = ["smoker"]
"#;

fn study() -> &'static cohortmix::spec::Study {
    static STUDY: OnceLock<cohortmix::spec::Study> = OnceLock::new();
    STUDY.get_or_init(|| cohortmix::spec::parse(Path::new("fuzz.toml"), SPEC, &Families::standard().infos()).expect("the fuzz spec is valid"))
}

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    match cohortmix::data::from_text(study(), text) {
        Ok(d) => {
            let _ = cohortmix::fit::prepare(study(), &d, &Families::standard()).map_err(|e| e.to_string());
        }
        Err(e) => {
            let _ = e.to_string();
        }
    }
});
