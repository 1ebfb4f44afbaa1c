//! The simulated bench: a pack model behind a simulated supply and load
//! that speak SCPI text. Reachable only through a link: [`build`] returns
//! in-memory links for the engine and a [`SimHandle`] for ground truth and
//! for tests that inspect the instruments' state. The engine never imports
//! this module.

pub mod battery;
pub mod bench;
pub mod lock;
pub mod modbus_slave;
pub mod pack;
pub mod serve;
pub mod server;

pub use model::simconfig::{self as config, SimConfig};

use bench::SimBench;
use engine::clock::Clock;
use instrument::link::{InMemoryLink, LineResponder, Link};
use model::pack::PackSpec;
use model::truth::{GroundTruth, TruthCounters};
use server::{SimInstrument, SimRole, Traffic};
use std::sync::{Arc, Mutex};

/// A view of the simulated bench from outside the links.
#[derive(Clone)]
pub struct SimHandle {
    bench: Arc<Mutex<SimBench>>,
    /// Messages received by the source and the load: how many, and the
    /// last few.
    pub source_traffic: Arc<Mutex<Traffic>>,
    pub load_traffic: Arc<Mutex<Traffic>>,
}

impl SimHandle {
    /// A handle on a bench whose instruments are served elsewhere.
    pub fn from_bench(bench: Arc<Mutex<SimBench>>) -> SimHandle {
        SimHandle {
            bench,
            source_traffic: Arc::new(Mutex::new(Traffic::default())),
            load_traffic: Arc::new(Mutex::new(Traffic::default())),
        }
    }
    /// Bench seconds on the simulated clock.
    pub fn bench_time(&self) -> f64 {
        self.with(|b| b.now())
    }
    fn with<T>(&self, f: impl FnOnce(&mut SimBench) -> T) -> T {
        let mut g = lock::locked(&self.bench);
        g.advance();
        f(&mut g)
    }
    /// Integrate the pack up to the clock's present.
    pub fn advance(&self) {
        self.with(|b| b.advance())
    }

    /// The protection trips since the last call.
    pub fn take_trips(&self) -> Vec<bench::Trip> {
        self.with(|b| std::mem::take(&mut b.trips))
    }

    /// The lowest and highest true terminal voltage while current flowed.
    pub fn voltage_span(&self) -> Option<(f64, f64)> {
        self.with(|b| b.voltage_span)
    }

    pub fn source_output_on(&self) -> bool {
        self.with(|b| b.supply.output_on)
    }
    pub fn load_input_on(&self) -> bool {
        self.with(|b| b.load.input_on)
    }
    /// Times the supply and the load were switched on together.
    pub fn overlaps(&self) -> u32 {
        self.with(|b| b.overlaps)
    }
    pub fn pack_soc(&self) -> f64 {
        self.with(|b| b.pack.soc())
    }
    pub fn pack_temperature_c(&self) -> f64 {
        self.with(|b| b.pack.temperature_c())
    }
    pub fn true_capacity_ah(&self) -> f64 {
        self.with(|b| b.pack.capacity_ah())
    }
    /// Keep the pack's state in a file (see [`bench::PackState`]).
    pub fn keep_state(&self, path: std::path::PathBuf, every_s: f64) {
        self.with(|b| b.keep_state(path, every_s))
    }
    /// Put the pack in a kept state after `rest_s` open-circuit.
    pub fn restore(&self, st: &bench::PackState, rest_s: f64) {
        self.with(|b| b.restore(st, rest_s))
    }
    /// Watch for the true terminal voltage falling to `v` (see
    /// [`bench::VoltageWatch`]).
    pub fn watch_below(&self, v: f64) {
        self.with(|b| b.watch = Some(bench::VoltageWatch::new(v)))
    }
    /// When the watched level was crossed, with the truth counters then.
    pub fn crossed(&self) -> Option<(f64, TruthCounters)> {
        self.with(|b| b.watch.and_then(|w| w.crossed))
    }
    /// Keep every message the source and the load receive from now on
    /// (tests; a run of any length otherwise keeps the last few).
    pub fn keep_all_traffic(&self) {
        for t in [&self.source_traffic, &self.load_traffic] {
            if let Ok(mut g) = t.lock() {
                g.keep_all = true;
            }
        }
    }

    /// Number of messages both instruments received.
    pub fn messages_received(&self) -> usize {
        let n = |m: &Arc<Mutex<Traffic>>| m.lock().map(|v| v.count).unwrap_or(0);
        n(&self.source_traffic) + n(&self.load_traffic)
    }
}

impl GroundTruth for SimHandle {
    fn counters(&self) -> TruthCounters {
        self.with(|b| b.truth())
    }
    fn model_state(&self) -> Option<model::truth::ModelState> {
        self.with(|b| {
            if b.pack.grouped {
                return None;
            }
            b.advance();
            b.pack.cells.first().map(|c| c.model_state())
        })
    }
    fn groups_to_cutoff(&self, cutoff_v: f64) -> Vec<f64> {
        self.with(|b| {
            if !b.pack.grouped {
                return Vec::new();
            }
            b.advance();
            let i = b.pack_current();
            b.pack.to_cutoff(i, cutoff_v)
        })
    }
}

/// Links to a simulated source and load on one pack.
pub struct SimLinks {
    pub source: Link,
    pub load: Link,
    /// The instruments behind the links, to open a link again after a
    /// simulated disconnect.
    pub source_responder: Arc<Mutex<dyn LineResponder>>,
    pub load_responder: Arc<Mutex<dyn LineResponder>>,
    /// A scanner on the groups' channels, when the pack is built of groups.
    pub meter: Option<Arc<Mutex<dyn LineResponder>>>,
    pub handle: SimHandle,
}

/// A new in-memory link to an instrument.
pub fn link_to(responder: &Arc<Mutex<dyn LineResponder>>) -> Link {
    Box::new(InMemoryLink::new(Arc::clone(responder)))
}

/// A reference meter on a simulated bench (for `packbench calibrate`): it
/// answers `MEAS:VOLT[:DC]?` and `MEAS:CURR[:DC]?` with the truth, so a
/// calibration recovers the bench meters' configured gain and offset.
pub fn reference_link(handle: &SimHandle) -> Link {
    let mut m = SimInstrument::new(
        Arc::clone(&handle.bench),
        SimRole::Meter,
        Arc::new(Mutex::new(Traffic::default())),
    );
    m.reference = true;
    let r: Arc<Mutex<dyn LineResponder>> = Arc::new(Mutex::new(m));
    link_to(&r)
}

/// Build a simulated bench for a pack.
pub fn build(spec: &PackSpec, cfg: &SimConfig, clock: Arc<dyn Clock>) -> SimLinks {
    let bench = Arc::new(Mutex::new(SimBench::new(spec, cfg, clock)));
    let source_traffic = Arc::new(Mutex::new(Traffic::default()));
    let load_traffic = Arc::new(Mutex::new(Traffic::default()));
    let src: Arc<Mutex<dyn LineResponder>> = Arc::new(Mutex::new(SimInstrument::new(
        Arc::clone(&bench),
        SimRole::Source,
        Arc::clone(&source_traffic),
    )));
    let load: Arc<Mutex<dyn LineResponder>> = Arc::new(Mutex::new(SimInstrument::new(
        Arc::clone(&bench),
        SimRole::Load,
        Arc::clone(&load_traffic),
    )));
    let meter: Option<Arc<Mutex<dyn LineResponder>>> = (cfg.groups.count > 0).then(|| {
        let m: Arc<Mutex<dyn LineResponder>> = Arc::new(Mutex::new(SimInstrument::new(
            Arc::clone(&bench),
            SimRole::Meter,
            Arc::new(Mutex::new(Traffic::default())),
        )));
        m
    });
    SimLinks {
        source: link_to(&src),
        load: link_to(&load),
        source_responder: src,
        load_responder: load,
        meter,
        handle: SimHandle {
            bench,
            source_traffic,
            load_traffic,
        },
    }
}
