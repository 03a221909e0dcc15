//! Any text given as the cache entry of the fixture's fit (the target adds the checksum
//! line and the key, so that edits with a recomputed checksum are what is fuzzed) is either taken,
//! with a log-likelihood its parameters give, or refused as corrupt; never a panic.
#![no_main]

use cohortmix::fit::cache::Lookup;
use libfuzzer_sys::fuzz_target;
use std::path::Path;
use std::sync::OnceLock;

#[path = "fixture.rs"]
mod fixture;

struct Setup {
    data: cohortmix::data::Dataset,
    prepared: Vec<cohortmix::fit::PreparedPlacement>,
    spec: cohortmix::fit::FitSpec,
}

fn setup() -> &'static Setup {
    static SETUP: OnceLock<Setup> = OnceLock::new();
    SETUP.get_or_init(|| {
        let study = fixture::study();
        let data = cohortmix::data::from_text(&study, fixture::DATA).expect("the fixture data are valid");
        let prepared = cohortmix::fit::prepare(&study, &data, &fixture::families()).expect("the fixture prepares");
        let spec = cohortmix::fit::plan(&study, &data).remove(0);
        Setup { data, prepared, spec }
    })
}

fuzz_target!(|data: &[u8]| {
    let Ok(payload) = std::str::from_utf8(data) else { return };
    let s = setup();
    // The seed entry names its fit `@KEY@`, which stands for the fit's key (which holds
    // the program version, so it changes with every release).
    let key = s.spec.key();
    let payload = payload.replace("@KEY@", &key);
    let text = format!("{}\n{payload}", cohortmix::numerics::sha256_hex(payload.as_bytes()));
    match cohortmix::fit::cache::read(Path::new("cache/entry.json"), &text, &key, &s.spec, &s.data, &s.prepared[0]) {
        Lookup::Found(fit) => {
            if let Some(best) = &fit.best {
                assert!(best.run.loglik.is_finite());
            }
        }
        Lookup::Corrupt(why) => assert!(!why.is_empty()),
        Lookup::Missing => {}
    }
});
