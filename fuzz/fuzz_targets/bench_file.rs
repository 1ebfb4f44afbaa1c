//! Bench files: any text gives a bench or located errors, never a panic.
#![no_main]
use libfuzzer_sys::fuzz_target;
use packbench::session::benchfile::BenchFile;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    match BenchFile::parse(Path::new("/nonexistent/fuzz-bench.toml"), text) {
        Ok(b) => assert!(!b.stations.is_empty()),
        Err(e) => assert!(!e.0.is_empty()),
    }
});
