//! Any text given as new rows to score under the fixture's saved models is either scored
//! (every probability finite, in [0, 1]) or refused with an error; never a panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use std::path::Path;
use std::sync::OnceLock;

#[path = "fixture.rs"]
mod fixture;

fn saved() -> &'static cohortmix::fit::saved::SavedRun {
    static SAVED: OnceLock<cohortmix::fit::saved::SavedRun> = OnceLock::new();
    SAVED.get_or_init(|| {
        cohortmix::fit::saved::read_saved(Path::new("fitted-models.json"), fixture::SAVED)
            .expect("the fixture's saved models are valid")
    })
}

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    let families = fixture::families();
    match cohortmix::fit::saved::new_data_from_text(saved(), Path::new("new.csv"), text, &families) {
        Err(e) => {
            let _ = e.to_string();
        }
        Ok((study, rows)) => match cohortmix::fit::saved::predict(saved(), &study, &rows, &families) {
            Ok(scored) => {
                for p in &scored {
                    assert!(p.tau.iter().all(|t| t.is_finite() && (0.0..=1.0).contains(t)));
                }
            }
            Err(e) => {
                let _ = e.to_string();
            }
        },
    }
});
