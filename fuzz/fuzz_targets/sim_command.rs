//! The simulated instruments' SCPI command parser and executor: any lines
//! to a simulated source and load; replies or errors, never a panic.
#![no_main]
use libfuzzer_sys::fuzz_target;
use engine::clock::{Clock, SimClock};
use sim::{self, SimConfig};
use std::sync::Arc;

fuzz_target!(|data: &[u8]| {
    let text = String::from_utf8_lossy(data);
    let clock: Arc<dyn Clock> = SimClock::new();
    let links = sim::build(&packbench::session::request::default_sim_pack(), &SimConfig::default(), clock);
    for (k, line) in text.split('\n').take(200).enumerate() {
        let r = if k % 2 == 0 { &links.source_responder } else { &links.load_responder };
        let mut g = match r.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        let _ = g.respond(line);
    }
});
