//! Instrument replies: numbers, booleans, error-queue entries. A number
//! that parses is finite and not the overload marker.
#![no_main]
use libfuzzer_sys::fuzz_target;
use instrument::scpi::{parse_bool_reply, parse_error_entry, parse_number};

fuzz_target!(|data: &[u8]| {
    let text = String::from_utf8_lossy(data);
    if let Ok(x) = parse_number(&text) {
        assert!(x.is_finite() && x.abs() < 9.9e37);
    }
    let _ = parse_bool_reply(&text);
    let _ = parse_error_entry(&text);
});
