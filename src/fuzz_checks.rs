//! The properties each fuzz target checks, one function per target, so
//! the fuzz targets (`fuzz/fuzz_targets/`) and the test that replays their
//! seeds and every crash found (`tests/it/fuzz_seeds.rs`) run the same
//! code. Each panics when its property fails.

use engine::clock::{Clock, SimClock};
use instrument::profile::Profile;
use instrument::scpi::{parse_bool_reply, parse_error_entry, parse_number};
use model::pack::{Chemistry, PackSpec};
use model::procedure::validate::plan_from_text;
use model::procedure::{DischargeMode, StepKind};
use model::simconfig::SimConfig;
use model::units;
use record::import::{stream_log, LogFormat};
use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

/// One target's property: panics when it fails.
pub type Check = fn(&[u8]);

/// The targets, by name, as the fuzz crate and the seed folders name them.
pub const TARGETS: [(&str, Check); 7] = [
    ("procedure", procedure),
    ("bench_file", bench_file),
    ("profile", profile),
    ("quantity", quantity),
    ("scpi_reply", scpi_reply),
    ("sim_command", sim_command),
    ("csv_log", csv_log),
];

/// An accepted plan keeps every setpoint inside its envelope and gives
/// every step an end (two packs: li-ion and lead-acid).
pub fn procedure(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    for (chemistry, series, rated) in [
        (Chemistry::LiIon, 10, 14.0),
        (Chemistry::LeadAcid, 6, 100.0),
    ] {
        let pack = PackSpec {
            chemistry,
            series,
            rated_capacity_ah: rated,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
        let Ok(plan) = plan_from_text(Path::new("fuzz.toml"), text, &pack) else {
            continue;
        };
        let env = &plan.envelope;
        assert!(env.voltage_min_v < env.voltage_max_v);
        for st in &plan.steps {
            assert!(!st.ends.is_empty() || matches!(st.kind, StepKind::Pulse { .. }));
            match &st.kind {
                StepKind::Charge {
                    current_a,
                    voltage_v,
                } => {
                    assert!(*current_a > 0.0 && *current_a <= env.current_max_a);
                    assert!(*voltage_v < env.voltage_max_v);
                }
                StepKind::Discharge {
                    load: DischargeMode::Current { current_a },
                } => {
                    assert!(*current_a > 0.0 && *current_a <= env.current_max_a);
                }
                StepKind::Pulse { levels } => {
                    for l in levels {
                        assert!(l.current_a.abs() <= env.current_max_a);
                        assert!(l.duration_s > 0.0);
                    }
                }
                _ => {}
            }
        }
    }
}

/// A bench file gives stations or located errors, never neither.
pub fn bench_file(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let path = Path::new("/nonexistent/fuzz-bench.toml");
    match crate::session::benchfile::BenchFile::parse(path, text) {
        Ok(b) => assert!(!b.stations.is_empty()),
        Err(e) => assert!(!e.0.is_empty()),
    }
}

/// An instrument profile parses or gives located errors.
pub fn profile(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Err(e) = Profile::from_toml(Path::new("fuzz-profile.toml"), text) {
        assert!(!e.0.is_empty());
    }
}

/// Quantities as written on a bench: no panic, no NaN duration.
pub fn quantity(data: &[u8]) {
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
}

/// An instrument's reply: a number is finite and never the overload marker.
pub fn scpi_reply(data: &[u8]) {
    let text = String::from_utf8_lossy(data);
    if let Ok(x) = parse_number(&text) {
        assert!(x.is_finite() && x.abs() < 9.9e37);
    }
    let _ = parse_bool_reply(&text);
    let _ = parse_error_entry(&text);
}

/// The simulated instruments take any message without a panic.
pub fn sim_command(data: &[u8]) {
    let text = String::from_utf8_lossy(data);
    let clock: Arc<dyn Clock> = SimClock::new();
    let links = sim::build(
        &crate::session::request::default_sim_pack(),
        &SimConfig::default(),
        clock,
    );
    for (k, line) in text.split('\n').take(200).enumerate() {
        let r = if k % 2 == 0 {
            &links.source_responder
        } else {
            &links.load_responder
        };
        let mut g = match r.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        let _ = g.respond(line);
    }
}

/// Any bench's log: every row it gives is finite.
pub fn csv_log(data: &[u8]) {
    static N: AtomicU64 = AtomicU64::new(0);
    let path = std::env::temp_dir().join(format!(
        "packbench-fuzz-{}-{}.csv",
        std::process::id(),
        N.fetch_add(1, Ordering::Relaxed)
    ));
    if std::fs::write(&path, data).is_err() {
        return;
    }
    let _ = stream_log(&path, &LogFormat::default(), |r| {
        assert!(r.t_s.is_finite() && r.voltage_v.is_finite() && r.current_a.is_finite());
    });
    let _ = std::fs::remove_file(&path);
}
