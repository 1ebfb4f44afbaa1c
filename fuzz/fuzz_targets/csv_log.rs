//! The CSV log reader (any bench's log): rows or a located error, never a
//! panic or a hang; every row it gives has finite numbers.
#![no_main]
use libfuzzer_sys::fuzz_target;
use record::import::{stream_log, LogFormat};
use std::io::Write;

fuzz_target!(|data: &[u8]| {
    let Ok(mut f) = tempfile::NamedTempFile::new() else {
        return;
    };
    if f.write_all(data).is_err() {
        return;
    }
    let _ = stream_log(f.path(), &LogFormat::default(), |r| {
        assert!(r.t_s.is_finite() && r.voltage_v.is_finite() && r.current_a.is_finite());
    });
});
