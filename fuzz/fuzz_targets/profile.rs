//! Instrument profiles: any text gives a profile or located errors.
#![no_main]
use libfuzzer_sys::fuzz_target;
use instrument::profile::Profile;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Err(e) = Profile::from_toml(Path::new("fuzz-profile.toml"), text) {
        assert!(!e.0.is_empty());
    }
});
