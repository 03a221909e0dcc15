//! Any text given as a run's saved models is either read and used to score the fixture's
//! rows, or refused with an error naming the file; never a panic, a hang or a
//! non-finite membership probability.
#![no_main]

use libfuzzer_sys::fuzz_target;
use std::path::Path;

#[path = "fixture.rs"]
mod fixture;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    let families = fixture::families();
    let path = Path::new("run/fitted-models.json");
    match cohortmix::fit::saved::read_saved(path, text) {
        Err(e) => assert!(e.to_string().contains("fitted-models.json"), "{e}"),
        Ok(saved) => {
            let Ok((study, rows)) =
                cohortmix::fit::saved::new_data_from_text(&saved, Path::new("new.csv"), fixture::DATA, &families)
            else {
                return;
            };
            if let Ok(scored) = cohortmix::fit::saved::predict(&saved, &study, &rows, &families) {
                for p in &scored {
                    assert!(p.tau.iter().all(|t| t.is_finite() && (0.0..=1.0).contains(t)));
                }
            }
        }
    }
});
