//! One test from request to record: prepare (every check before an
//! instrument is touched), open the links, drive the engine, record, resume
//! an interrupted run, and the emergency switch-off.

pub mod awake;
pub mod benchfile;
pub mod calibrate;
pub mod drive;
pub mod emergency;
pub mod error;
pub mod fields;
pub mod finish;
pub mod forecast;
pub mod links;
pub mod live;
pub mod prepare;
pub mod quick;
pub mod request;
pub mod resume;
pub mod stations;

pub use crate::session::request::{
    JobBench, PackSource, Prepared, RunOptions, RunReport, RunRequest, Speed, StationJob,
};

use crate::session::benchfile::StationSpec;
use crate::session::drive::{drive, start, Bound, Recording};
use crate::session::emergency::Emergency;
use crate::session::error::RunError;
use crate::session::links::{new_sim_bench, open_station, sim_bench_links, sim_profiles};
use crate::session::request::Hooks;
use engine::clock::{Clock, PacedClock};
use engine::control::StopHandle;
use instrument::profile::Profile;
use record::write::RunLogSink;
use sim::SimConfig;
use std::sync::Arc;

/// Where a session's instruments are.
// Built once per session and moved into it: the size difference costs nothing.
#[allow(clippy::large_enum_variant)]
pub enum Bench {
    /// A new embedded simulated bench: the built-in profiles, or a bench
    /// file's (source, load) profiles for a station whose links are `sim`.
    /// A resumed run puts the pack back in its kept state, left
    /// open-circuit for the time the run was down (s).
    Sim {
        cfg: SimConfig,
        speed: Speed,
        profiles: Option<(Profile, Profile)>,
        kept: Option<(sim::bench::PackState, f64)>,
    },
    /// A simulated bench the caller built (tests keep its handle to look
    /// at the instruments afterwards).
    SimLinks {
        cfg: SimConfig,
        clock: Arc<dyn Clock>,
        links: sim::SimLinks,
        speed_text: String,
    },
    /// A bench file's station: its links are opened only now, paced at
    /// this many bench seconds per wall second (1 = real time).
    Station {
        spec: StationSpec,
        speed_factor: f64,
    },
    /// Links the caller opened, with their clock (no truth).
    Open {
        links: links::BenchLinks,
        clock: Arc<dyn Clock>,
    },
}

/// One test: a prepared request on a bench.
pub struct Session<'a> {
    pub prepared: &'a Prepared,
    pub bench: Bench,
    pub stop: StopHandle,
    pub hooks: Hooks,
    /// Go on with an interrupted run (its folder and its log) instead of
    /// starting one.
    pub resume: Option<(Recording, RunLogSink)>,
}

impl<'a> Session<'a> {
    /// A new test on a bench with no hooks.
    pub fn new(prepared: &'a Prepared, bench: Bench) -> Session<'a> {
        Session {
            prepared,
            bench,
            stop: StopHandle::new(),
            hooks: Hooks::default(),
            resume: None,
        }
    }

    /// A new test on a new simulated bench with the built-in profiles.
    pub fn sim(prepared: &'a Prepared, cfg: &SimConfig, speed: Speed) -> Session<'a> {
        Session::new(
            prepared,
            Bench::Sim {
                cfg: cfg.clone(),
                speed,
                profiles: None,
                kept: None,
            },
        )
    }

    pub fn with_stop(mut self, stop: StopHandle) -> Self {
        self.stop = stop;
        self
    }

    pub fn with_hooks(mut self, hooks: Hooks) -> Self {
        self.hooks = hooks;
        self
    }
}

/// The one entry point: open the bench, then start the run (or go on with
/// an interrupted one), drive it and record it. A failure before the
/// engine ran is shown on the station's board.
pub async fn run(s: Session<'_>) -> Result<RunReport, RunError> {
    let board = s.hooks.board.clone();
    let result = run_inner(s).await;
    if let (Err(e), Some(b)) = (&result, &board) {
        b.update(|l| {
            if !l.is_final() {
                l.state = crate::session::live::BoardState::Failed;
                l.alarms.push(e.to_string());
            }
        });
    }
    result
}

async fn run_inner(s: Session<'_>) -> Result<RunReport, RunError> {
    let Session {
        prepared: p,
        bench,
        stop,
        hooks,
        resume,
    } = s;
    let mut bound = bind(p, bench, hooks.coarse_clock).await?;
    bound.links.hooks = hooks;
    match resume {
        None => start(p, bound, stop).await,
        Some((rec, sink)) => drive(p, rec, sink, bound, stop).await,
    }
}

/// Open a bench's links (nothing is sent yet).
async fn bind(p: &Prepared, bench: Bench, coarse_clock: bool) -> Result<Bound, RunError> {
    Ok(match bench {
        Bench::Sim {
            cfg,
            speed,
            profiles,
            kept,
        } => {
            let (clock, links, speed_text) = new_sim_bench(p, &cfg, speed, coarse_clock);
            if let Some((k, gap_s)) = &kept {
                links.handle.restore(k, *gap_s);
            }
            let (sp, lp) = profiles.unwrap_or_else(sim_profiles);
            let (links, truth, sim) = sim_bench_links(&cfg, links, &speed_text, sp, lp, speed);
            Bound {
                links,
                clock,
                truth,
                sim,
            }
        }
        Bench::SimLinks {
            cfg,
            clock,
            links,
            speed_text,
        } => {
            let (sp, lp) = sim_profiles();
            let speed = if clock.is_simulated() {
                Speed::Max
            } else {
                Speed::Factor(1.0)
            };
            let (links, truth, sim) = sim_bench_links(&cfg, links, &speed_text, sp, lp, speed);
            Bound {
                links,
                clock,
                truth,
                sim,
            }
        }
        Bench::Station { spec, speed_factor } => {
            let mut links = open_station(&spec).await?;
            links.speed = if speed_factor == 1.0 {
                "real time".into()
            } else {
                format!("{speed_factor}x real time")
            };
            let clock: Arc<dyn Clock> = if coarse_clock {
                PacedClock::coarse(speed_factor)
            } else {
                PacedClock::new(speed_factor)
            };
            Bound {
                links,
                clock,
                truth: None,
                sim: None,
            }
        }
        Bench::Open { links, clock } => Bound {
            links,
            clock,
            truth: None,
            sim: None,
        },
    })
}

impl StationJob {
    /// This station's session: the embedded simulated bench, or the
    /// station's own links (opened only when the session runs, after
    /// everything validated). `resume` goes on with an interrupted run
    /// whose simulated pack, if any, was kept; the pack rests for `gap_s`.
    pub fn session(
        &self,
        stop: StopHandle,
        emergency: Emergency,
        coarse_clock: bool,
        resume: Option<Resumed>,
    ) -> Session<'_> {
        let hooks = Hooks {
            board: Some(self.board.clone()),
            emergency: Some(emergency),
            station: self
                .bench
                .station()
                .map(|(s, f)| (s.name.clone(), f.clone())),
            coarse_clock: coarse_clock && resume.is_none(),
        };
        let (resume, kept) = match resume {
            Some(r) => (Some((r.rec, r.sink)), r.kept.map(|k| (k, r.gap_s))),
            None => (None, None),
        };
        let resuming = resume.is_some();
        let bench = match &self.bench {
            JobBench::Station { spec, pace, .. } => Bench::Station {
                spec: spec.clone(),
                speed_factor: if resuming { 1.0 } else { *pace },
            },
            JobBench::Sim {
                cfg,
                speed,
                station,
            } => Bench::Sim {
                cfg: cfg.clone(),
                speed: *speed,
                profiles: station.as_ref().map(|(st, _)| {
                    let (a, b) = st.profiles();
                    (a.clone(), b.clone())
                }),
                kept,
            },
        };
        Session {
            prepared: &self.prepared,
            bench,
            stop,
            hooks,
            resume,
        }
    }
}

/// An interrupted run to go on with: its folder, its log, the simulated
/// pack's kept state and the time the run was down.
pub struct Resumed {
    pub rec: Recording,
    pub sink: RunLogSink,
    pub kept: Option<sim::bench::PackState>,
    pub gap_s: f64,
}
