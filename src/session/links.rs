//! Opening a station's links: the embedded simulated bench or a bench
//! file's real instruments (nothing is sent yet).

use crate::session::benchfile::Drivers;
use crate::session::benchfile::StationSpec;
use crate::session::error::RunError;
use crate::session::request::Hooks;
use crate::session::request::Prepared;
use crate::session::request::Speed;
use engine::clock::{Clock, PacedClock, SimClock};
use instrument::link::{Link, SharedLink};
use instrument::profile::{Profile, ProfileRole};
use instrument::scpi::Reopen;
use instrument::transport::{self, LinkSpec};
use instrument::Attach;
use model::truth::GroundTruth;
use sim::{self, SimConfig};
use std::sync::Arc;

/// Reply timeout on the in-memory link to the simulated bench, ms.
pub const SIM_TIMEOUT_MS: u64 = 200;

/// The built-in source and load profiles for the in-memory links to the
/// simulated bench. The in-memory link answers at once or never: a short
/// timeout keeps fault tests quick without changing any behaviour.
pub fn sim_profiles() -> (Profile, Profile) {
    let mut sp = Profile::builtin(ProfileRole::Source);
    let mut lp = Profile::builtin(ProfileRole::Load);
    sp.transport.timeout_ms = SIM_TIMEOUT_MS;
    lp.transport.timeout_ms = SIM_TIMEOUT_MS;
    (sp, lp)
}

/// A new simulated bench for a prepared test: its clock, links and pace.
pub fn new_sim_bench(
    p: &Prepared,
    cfg: &SimConfig,
    speed: Speed,
    coarse: bool,
) -> (Arc<dyn Clock>, sim::SimLinks, String) {
    let clock: Arc<dyn Clock> = match speed {
        Speed::Max => SimClock::new(),
        Speed::Factor(f) if coarse => PacedClock::coarse(f),
        Speed::Factor(f) => PacedClock::new(f),
    };
    let links = sim::build(&p.pack, cfg, Arc::clone(&clock));
    let speed_text = match speed {
        Speed::Max => "max (simulation clock)".to_string(),
        Speed::Factor(f) => format!("{f}x real time"),
    };
    (clock, links, speed_text)
}

/// A reopen function for an in-memory link to a simulated instrument.
pub fn sim_reopen(r: &Arc<std::sync::Mutex<dyn instrument::link::LineResponder>>) -> Reopen {
    let r = Arc::clone(r);
    Arc::new(move || {
        let link = sim::link_to(&r);
        Box::pin(async move { Ok(link) })
    })
}

/// The simulated bench's links, its truth and its record.
pub fn sim_bench_links(
    cfg: &SimConfig,
    links: sim::SimLinks,
    speed_text: &str,
    source_profile: Profile,
    load_profile: Profile,
    speed: Speed,
) -> (BenchLinks, Option<Arc<dyn GroundTruth>>, Option<SimRun>) {
    // The simulated instruments declare the accuracy within which the
    // simulator applies their errors.
    let [src_acc, load_acc, _] = cfg.declared();
    let (mut source_profile, mut load_profile) = (source_profile, load_profile);
    source_profile.accuracy = src_acc;
    load_profile.accuracy = load_acc;
    let handle = links.handle.clone();
    let truth: Arc<dyn GroundTruth> = Arc::new(handle.clone());
    let cap = handle.true_capacity_ah();
    (
        BenchLinks {
            source: BoundLink {
                link: links.source,
                profile: source_profile,
                text: "sim".into(),
                attach: Attach {
                    trace: None,
                    reopen: Some(sim_reopen(&links.source_responder)),
                },
            },
            load: BoundLink {
                link: links.load,
                profile: load_profile,
                text: "sim".into(),
                attach: Attach {
                    trace: None,
                    reopen: Some(sim_reopen(&links.load_responder)),
                },
            },
            // A simulated pack built of groups has a scanner on them.
            meter: links.meter.as_ref().map(|r| BoundLink {
                link: sim::link_to(r),
                profile: Profile::from_toml(
                    std::path::Path::new("generic-scpi-scanner.toml"),
                    instrument::profile::GENERIC_SCANNER,
                )
                .map(|mut p| {
                    p.accuracy = model::accuracy::Declared {
                        voltage: Some(cfg.groups.scanner.stated_spec()),
                        temperature_c: Some(cfg.temperature.stated_spec().offset),
                        ..Default::default()
                    };
                    p
                })
                .unwrap_or_else(|_| Profile::builtin(instrument::profile::ProfileRole::Meter)),
                text: "sim".into(),
                attach: Attach {
                    trace: None,
                    reopen: Some(sim_reopen(r)),
                },
            }),
            groups: (cfg.groups.count > 0).then(|| {
                model::groups::GroupChannels::sim_default(
                    cfg.groups.count,
                    cfg.groups.wiring,
                    &cfg.groups.sensors,
                )
            }),
            shared: false,
            kind: SIMULATED.into(),
            speed: speed_text.to_string(),
            hooks: Hooks::default(),
        },
        Some(truth),
        Some(SimRun {
            config: cfg.clone(),
            true_capacity_ah: cap,
            handle,
            speed_factor: match speed {
                Speed::Max => None,
                Speed::Factor(f) => Some(f),
            },
        }),
    )
}

/// The bench kind recorded for the embedded simulated bench.
pub const SIMULATED: &str = "simulated";

/// A run on the embedded simulated bench.
#[derive(Clone)]
pub struct SimRun {
    pub config: SimConfig,
    pub true_capacity_ah: f64,
    pub handle: sim::SimHandle,
    /// Bench seconds per wall second when paced.
    pub speed_factor: Option<f64>,
}

/// One instrument's open link, its profile and how to describe it.
pub struct BoundLink {
    pub link: Link,
    pub profile: Profile,
    pub text: String,
    pub attach: Attach,
}

/// The links of a station and how to describe them.
pub struct BenchLinks {
    pub source: BoundLink,
    pub load: BoundLink,
    pub meter: Option<BoundLink>,
    /// The cell groups and temperature inputs on the meter's channels.
    pub groups: Option<model::groups::GroupChannels>,
    /// Source and load are one source-sink instrument on one link.
    pub shared: bool,
    pub kind: String,
    pub speed: String,
    pub hooks: Hooks,
}

pub fn reopen_for(role: &'static str, spec: &LinkSpec, profile: &Profile) -> Reopen {
    let spec = spec.clone();
    let profile = profile.clone();
    Arc::new(move || {
        let spec = spec.clone();
        let profile = profile.clone();
        Box::pin(async move { transport::open_for(role, &spec, &profile).await })
    })
}

/// Open the links of a station (no message is sent yet).
pub async fn open_station(station: &StationSpec) -> Result<BenchLinks, RunError> {
    let meter = match &station.meter {
        Some(m) => Some(BoundLink {
            link: transport::open_for("meter", &m.link, &m.profile).await?,
            profile: m.profile.clone(),
            text: m.link_text.clone(),
            attach: Attach {
                trace: None,
                reopen: Some(reopen_for("meter", &m.link, &m.profile)),
            },
        }),
        None => None,
    };
    match &station.drivers {
        Drivers::Pair { source, load } => {
            let s = transport::open_for("source", &source.link, &source.profile).await?;
            let l = transport::open_for("load", &load.link, &load.profile).await?;
            Ok(BenchLinks {
                source: BoundLink {
                    link: s,
                    profile: source.profile.clone(),
                    text: source.link_text.clone(),
                    attach: Attach {
                        trace: None,
                        reopen: Some(reopen_for("source", &source.link, &source.profile)),
                    },
                },
                load: BoundLink {
                    link: l,
                    profile: load.profile.clone(),
                    text: load.link_text.clone(),
                    attach: Attach {
                        trace: None,
                        reopen: Some(reopen_for("load", &load.link, &load.profile)),
                    },
                },
                meter,
                groups: station.groups.clone(),
                shared: false,
                kind: format!("station {}", station.name),
                speed: "real time".into(),
                hooks: Hooks::default(),
            })
        }
        Drivers::SourceSink(b) => {
            let raw = transport::open_for("source-sink", &b.link, &b.profile).await?;
            let shared = SharedLink::new(raw);
            let inner = reopen_for("source-sink", &b.link, &b.profile);
            let slot = shared.clone();
            // Reopening puts the new link into the shared slot, so both
            // roles use it.
            let reopen: Reopen = Arc::new(move || {
                let inner = Arc::clone(&inner);
                let slot = slot.clone();
                Box::pin(async move {
                    // The old port closed before the new one opens (an
                    // exclusive serial port cannot be opened twice).
                    if let Ok(mut g) = slot.0.lock() {
                        *g = Box::new(tokio::io::empty());
                    }
                    let link = inner().await?;
                    if let Ok(mut g) = slot.0.lock() {
                        *g = link;
                    }
                    let l: Link = Box::new(slot);
                    Ok(l)
                })
            });
            let bound = |attach_reopen: Reopen| BoundLink {
                link: Box::new(shared.clone()),
                profile: b.profile.clone(),
                text: b.link_text.clone(),
                attach: Attach {
                    trace: None,
                    reopen: Some(attach_reopen),
                },
            };
            Ok(BenchLinks {
                source: bound(Arc::clone(&reopen)),
                load: bound(reopen),
                meter,
                groups: station.groups.clone(),
                shared: true,
                kind: format!("station {}", station.name),
                speed: "real time".into(),
                hooks: Hooks::default(),
            })
        }
    }
}
