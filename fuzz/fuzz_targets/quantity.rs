//! Quantities as written on a bench ("4.2V/cell", "0.5C", "1h30m").
#![no_main]
use libfuzzer_sys::fuzz_target;
use model::units;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let _ = units::parse(text);
    let _ = units::voltage(text);
    let _ = units::current(text);
    if let Ok(d) = units::duration(text) {
        assert!(!d.is_nan());
    }
    let _ = units::charge(text);
    let _ = units::temperature_c(text);
});
