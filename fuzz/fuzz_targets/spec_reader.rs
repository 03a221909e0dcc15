//! Any text given as a study spec is either a valid study or an error with a location;
//! never a panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    if let Err(e) = cohortmix::spec::parse(
        Path::new("fuzz.toml"),
        text,
        &cohortmix::model::family::Families::standard().infos(),
    ) {
        // Rendering the message must not panic either (it slices the spec text).
        let _ = e.to_string();
    }
});
