//! The safety-envelope matrix: every limit packbench offers against every
//! step kind, each limit alone (the others left wide, the optional ones
//! unset). The simulated pack is driven past the limit — physically where
//! the step can do it (a supply regulating high, a pack run flat, an
//! internal heat source, a cold room, a long charge), by a reading fault
//! (a failing sense lead, shunt or sensor) where the step itself cannot —
//! and the run must stop on that limit with both outputs off and confirmed.
//! Where a limit does not apply to a kind, the run must go on.

use engine::clock::{Clock, SimClock};
use engine::control::StopHandle;
use engine::event::Event;
use engine::state::RunState;
use packbench::session::request::PackSource;
use packbench::session::request::RunRequest;
use record::read::read_events;
use sim::config::{Quantity, ReadingFault};
use sim::{self, SimConfig};
use std::sync::Arc;

const LIMITS: [&str; 7] = [
    "voltage_max",
    "voltage_min",
    "current_max",
    "temperature_max",
    "temperature_min",
    "charge_max",
    "step_time_max",
];

const KINDS: [&str; 5] = ["charge", "discharge", "rest", "pulse", "drain"];

/// What a case expects.
#[derive(Debug)]
enum Expect {
    /// The run stops on this limit.
    Trip,
    /// The limit does not apply to this kind: the run completes.
    Goes(&'static str),
    /// The step cannot cross the limit; why.
    NotReachable(&'static str),
}

struct Case {
    /// The tight value of the tested limit.
    value: &'static str,
    step: String,
    cfg: SimConfig,
    expect: Expect,
}

fn step_text(kind: &str, ends_time_only: bool) -> String {
    match kind {
        "charge" => "  kind = \"charge\"\n  current = \"0.5C\"\n  voltage = \"4.2V/cell\"\n  ends = [\"current < 0.02C\", \"time > 10h\"]".into(),
        "discharge" if ends_time_only => "  kind = \"discharge\"\n  current = \"0.5C\"\n  ends = [\"time > 10h\"]".into(),
        "discharge" => "  kind = \"discharge\"\n  current = \"0.5C\"\n  ends = [\"voltage < 3.0V/cell\", \"time > 10h\"]".into(),
        "rest" => "  kind = \"rest\"\n  ends = [\"time > 2h\"]".into(),
        "pulse" => "  kind = \"pulse\"\n  levels = [{ current = \"0.5C\", duration = \"1h\" }, { current = \"-0.5C\", duration = \"1h\" }]".into(),
        "drain" => "  kind = \"drain\"\n  ends = [\"time > 2h\"]".into(),
        other => panic!("{other}"),
    }
}

fn reading(q: Quantity, offset: f64) -> ReadingFault {
    ReadingFault {
        quantity: q,
        offset,
        after_s: 600.0,
    }
}

fn case(limit: &str, kind: &str) -> Case {
    let mut cfg = SimConfig::ideal();
    cfg.pack.initial_soc = 0.6;
    let mut step = step_text(kind, false);
    let mut expect = Expect::Trip;
    let value = match limit {
        "voltage_max" => {
            match kind {
                // The supply regulates 3 % above its setpoint.
                "charge" | "pulse" => {
                    cfg.faults.source_voltage_error_pct = 3.0;
                    cfg.pack.initial_soc = 0.9;
                }
                _ => cfg.faults.reading.push(reading(Quantity::Voltage, 10.0)),
            }
            "4.25V/cell"
        }
        "voltage_min" => {
            match kind {
                // Run flat: a discharge with no voltage end, a long pulse.
                "discharge" => {
                    step = step_text(kind, true);
                    cfg.pack.initial_soc = 0.3;
                }
                "pulse" => {
                    step =
                        "  kind = \"pulse\"\n  levels = [{ current = \"-1C\", duration = \"2h\" }]"
                            .into();
                    cfg.pack.initial_soc = 0.3;
                }
                _ => cfg.faults.reading.push(reading(Quantity::Voltage, -15.0)),
            }
            "2.8V/cell"
        }
        "current_max" => {
            match kind {
                "rest" => {
                    expect = Expect::NotReachable(
                        "a rest reads no current: both outputs are switched off and confirmed by read-back as it starts",
                    )
                }
                // Setpoints above current_max are refused by validation, so
                // an over-current is a shunt or a regulator failing.
                _ => cfg.faults.reading.push(reading(Quantity::Current, 20.0)),
            }
            "1C"
        }
        "temperature_max" => {
            // An internal fault heats the pack.
            cfg.faults.heat_w = 400.0;
            cfg.faults.heat_after_s = Some(300.0);
            "45degC"
        }
        "temperature_min" => {
            // A cold room: the pack starts at -10 degC.
            cfg.pack.ambient_c = -10.0;
            match kind {
                "discharge" | "rest" => {
                    expect = Expect::Goes(
                        "temperature_min applies while charging: a cold discharge or rest goes on",
                    )
                }
                // The drain step's holding current goes into the pack.
                "drain" => cfg.pack.standby_drain_a = 0.005,
                _ => {}
            }
            "0degC"
        }
        "charge_max" => match kind {
            "discharge" | "rest" => {
                expect = Expect::Goes("no charge goes into the pack");
                "10%"
            }
            "drain" => {
                // 5 mA for two hours is 10 mAh; the cap is 1.4 mAh.
                cfg.pack.standby_drain_a = 0.005;
                "0.01%"
            }
            _ => {
                cfg.pack.initial_soc = 0.2;
                "10%"
            }
        },
        "step_time_max" => {
            // Every step here lasts longer than 30 min.
            "30min"
        }
        other => panic!("{other}"),
    };
    Case {
        value,
        step,
        cfg,
        expect,
    }
}

/// The procedure: every other limit wide, the optional ones unset.
fn procedure(limit: &str, value: &str, step: &str) -> String {
    let mut env = vec![
        ("voltage_max", "4.45V/cell"),
        ("voltage_min", "2.0V/cell"),
        ("current_max", "3C"),
        ("temperature_max", "80degC"),
    ];
    match env.iter_mut().find(|(k, _)| *k == limit) {
        Some(e) => e.1 = value,
        None => env.push((limit, value)),
    }
    let mut text = String::from("title = \"envelope matrix\"\n[envelope]\n");
    for (k, v) in env {
        text.push_str(&format!("{k} = \"{v}\"\n"));
    }
    text.push_str(&format!(
        "[sampling]\nevery = \"5s\"\n[[phase]]\nname = \"m\"\n  [[phase.step]]\n{step}\n"
    ));
    text
}

#[test]
fn every_limit_stops_every_step_kind_it_applies_to() {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let mut table = String::new();
    let mut trips = 0;
    for limit in LIMITS {
        for kind in KINDS {
            let c = case(limit, kind);
            if let Expect::NotReachable(why) = &c.expect {
                table.push_str(&format!("{limit:<16} {kind:<10} not reachable: {why}\n"));
                continue;
            }
            let dir = tempfile::tempdir().unwrap();
            let path = dir.path().join("m.toml");
            std::fs::write(&path, procedure(limit, c.value, &c.step)).unwrap();
            let p = packbench::session::prepare::prepare(&RunRequest {
                procedure: path.clone(),
                pack_id: "M1".into(),
                pack: PackSource::Given(packbench::session::request::default_sim_pack()),
                results: dir.path().to_path_buf(),
                options: Default::default(),
            })
            .unwrap_or_else(|e| panic!("{limit} x {kind}: {e}"));
            // The tested limit is the only one the procedure tightened.
            let clock: Arc<dyn Clock> = SimClock::new();
            let links = sim::build(&p.pack, &c.cfg, Arc::clone(&clock));
            let h = links.handle.clone();
            let r = rt
                .block_on(packbench::session::run(
                    packbench::session::Session::new(
                        &p,
                        packbench::session::Bench::SimLinks {
                            cfg: c.cfg.clone(),
                            clock,
                            links,
                            speed_text: "max".into(),
                        },
                    )
                    .with_stop(StopHandle::new()),
                ))
                .unwrap();
            let events = read_events(&r.run_dir.join("events.jsonl")).unwrap();
            let breach = events.iter().find_map(|e| match e {
                Event::Breach {
                    limit,
                    value,
                    threshold,
                    step,
                    ..
                } => Some((limit.clone(), *value, *threshold, *step)),
                _ => None,
            });
            match &c.expect {
                Expect::Trip => {
                    let (got, value, threshold, step) = breach.unwrap_or_else(|| {
                        panic!("{limit} x {kind}: no breach ({:?})", r.outcome.reason)
                    });
                    assert_eq!(got, limit, "{limit} x {kind}: stopped on {got}");
                    assert_eq!(step, 1, "{limit} x {kind}: in the step, not before it");
                    assert_eq!(r.outcome.status, RunState::Aborted, "{limit} x {kind}");
                    assert!(
                        !h.source_output_on() && !h.load_input_on(),
                        "{limit} x {kind}: output on"
                    );
                    assert!(
                        r.outcome.source_off_confirmed && r.outcome.load_off_confirmed,
                        "{limit} x {kind}: off not confirmed"
                    );
                    trips += 1;
                    table.push_str(&format!(
                        "{limit:<16} {kind:<10} stopped: {value:.4} against {threshold:.4}\n"
                    ));
                }
                Expect::Goes(why) => {
                    assert!(breach.is_none(), "{limit} x {kind}: {breach:?}");
                    assert_eq!(r.outcome.status, RunState::Completed, "{limit} x {kind}");
                    table.push_str(&format!("{limit:<16} {kind:<10} goes on: {why}\n"));
                }
                Expect::NotReachable(_) => unreachable!(),
            }
        }
    }
    eprintln!("{table}");
    assert_eq!(trips, 30, "{table}");
}
