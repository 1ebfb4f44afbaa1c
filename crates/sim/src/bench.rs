//! The simulated bench's shared state: one pack, one simulated supply and
//! one simulated load wired to it, measurement error, injected faults and
//! the ground-truth counters. Time advances lazily to the clock's present
//! whenever an instrument is spoken to.

use super::battery::{LoadMode, PackCondition};
use super::config::{Faults, MeterConfig, SimConfig};
use super::lock::locked;
use super::pack::{GroupState, SimPack};
use engine::clock::Clock;
use model::pack::PackSpec;
use model::truth::TruthCounters;
use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use rand_distr::StandardNormal;
use std::sync::Arc;

/// Largest integration step of the model, seconds.
pub const MAX_DT: f64 = 1.0;

/// Measurement error of one measured quantity.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Meter {
    pub gain: f64,
    pub offset: f64,
    pub noise_sd: f64,
    pub resolution: f64,
}

impl Meter {
    pub const IDEAL: Meter = Meter {
        gain: 1.0,
        offset: 0.0,
        noise_sd: 0.0,
        resolution: 0.0,
    };

    fn apply(&self, x: f64, rng: &mut SmallRng) -> f64 {
        let noise = if self.noise_sd > 0.0 {
            let z: f64 = rng.sample(StandardNormal);
            z * self.noise_sd
        } else {
            0.0
        };
        let y = x * self.gain + self.offset + noise;
        if self.resolution > 0.0 {
            (y / self.resolution).round() * self.resolution
        } else {
            y
        }
    }
}

/// One protection of a simulated instrument: its level and whether it
/// is armed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Limit {
    pub level: f64,
    pub armed: bool,
}

/// An instrument's own protection, acting on the bench whatever the
/// controller does (SCPI-1999 `...:PROTection`): a trip switches the
/// output off and latches until cleared once its cause is gone.
#[derive(Debug, Clone, PartialEq)]
pub struct Guard {
    pub over_voltage: Limit,
    pub over_current: Limit,
    pub over_power: Limit,
    /// A load's under-voltage switch-off.
    pub under_voltage: Limit,
    /// A load's voltage-on threshold: it sinks nothing while the pack's
    /// open voltage is below this (0 = always).
    pub voltage_on: f64,
    /// Latched trips as QUEStionable bits (0 voltage, 1 current, 3 power).
    pub tripped: u16,
}

impl Guard {
    fn new(voltage_max: f64, current_max: f64, power_max: f64) -> Guard {
        Guard {
            // Over-voltage protection armed at the top of the range, as
            // instruments ship; the others off until programmed.
            over_voltage: Limit {
                level: voltage_max,
                armed: true,
            },
            over_current: Limit {
                level: current_max,
                armed: false,
            },
            over_power: Limit {
                level: power_max,
                armed: false,
            },
            under_voltage: Limit {
                level: 0.0,
                armed: false,
            },
            voltage_on: 0.0,
            tripped: 0,
        }
    }

    /// The trip a reading calls for, if any: (QUES bit, what, value, level).
    pub fn check(&self, v: f64, i: f64) -> Option<(u16, &'static str, f64, f64)> {
        use instrument::command::{QUES_CURRENT, QUES_POWER, QUES_VOLTAGE};
        let l = |x: &Limit| x.armed && x.level > 0.0;
        if l(&self.over_voltage) && v > self.over_voltage.level {
            return Some((QUES_VOLTAGE, "over-voltage", v, self.over_voltage.level));
        }
        if l(&self.under_voltage) && v < self.under_voltage.level {
            return Some((QUES_VOLTAGE, "under-voltage", v, self.under_voltage.level));
        }
        if l(&self.over_current) && i > self.over_current.level * (1.0 + 1e-9) {
            return Some((QUES_CURRENT, "over-current", i, self.over_current.level));
        }
        if l(&self.over_power) && v * i > self.over_power.level {
            return Some((QUES_POWER, "over-power", v * i, self.over_power.level));
        }
        None
    }
}

/// A protection that tripped on the bench.
#[derive(Debug, Clone, PartialEq)]
pub struct Trip {
    pub bench_s: f64,
    /// "supply" or "load".
    pub side: &'static str,
    pub what: &'static str,
    pub value: f64,
    pub level: f64,
    /// The true terminal voltage then.
    pub pack_voltage_v: f64,
}

#[derive(Debug, Clone)]
pub struct SupplyState {
    pub output_on: bool,
    pub voltage_set: f64,
    pub current_set: f64,
    pub voltage_max: f64,
    pub current_max: f64,
    pub volts: Meter,
    pub amps: Meter,
    pub guard: Guard,
}

#[derive(Debug, Clone)]
pub struct LoadState {
    pub input_on: bool,
    pub mode: LoadMode,
    pub current_set: f64,
    pub power_set: f64,
    pub resistance_set: f64,
    pub voltage_max: f64,
    pub current_max: f64,
    pub power_max: f64,
    pub resistance_max: f64,
    /// The constant-voltage setpoint (`FUNC VOLT`).
    pub voltage_set: f64,
    pub volts: Meter,
    pub amps: Meter,
    pub guard: Guard,
}

/// Everything on the simulated bench.
pub struct SimBench {
    clock: Arc<dyn Clock>,
    pub pack: SimPack,
    pub supply: SupplyState,
    pub load: LoadState,
    pub thermometer: Meter,
    pub voltmeter: Meter,
    pub faults: Faults,
    last_t: f64,
    truth: TruthCounters,
    /// Times the supply output and the load input were on together.
    pub overlaps: u32,
    rng: SmallRng,
    checkpoint: Option<Checkpoint>,
    /// Watches for the true terminal voltage falling to a level.
    pub watch: Option<VoltageWatch>,
    /// Protection trips not yet reported (drained by the server's log).
    pub trips: Vec<Trip>,
    /// The lowest and highest true terminal voltage while current flowed.
    pub voltage_span: Option<(f64, f64)>,
    /// The scanning voltmeter on the groups' channels.
    pub scanner: Meter,
    pub channel_faults: Vec<model::simconfig::ChannelFault>,
    /// The values stuck channels repeat.
    stuck: Vec<(u32, f64)>,
    /// Scans taken (a loose lead drops out on every other one).
    pub scans: u64,
    /// The group a heat fault warms (the first with a sensor), if any.
    heat_group: Option<u32>,
    /// The pack current and group voltages at a bench time (one scan
    /// reads many channels at one moment).
    pub(crate) scan_cache: Option<(f64, f64, Vec<f64>)>,
}

/// The first time the true terminal voltage fell to a level, and the
/// truth counters then (interpolated between integration steps).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct VoltageWatch {
    pub below_v: f64,
    pub crossed: Option<(f64, TruthCounters)>,
    last: Option<(f64, f64, TruthCounters)>,
}

impl VoltageWatch {
    pub fn new(below_v: f64) -> VoltageWatch {
        VoltageWatch {
            below_v,
            crossed: None,
            last: None,
        }
    }
}

/// The simulated pack's state, kept in a file as the run goes, so a run
/// whose controller died can go on with the same pack (a real pack keeps
/// its charge when the controller stops; the simulated one lives in the
/// controller's process).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PackState {
    /// The record layout (`record::schema`).
    #[serde(default = "record::schema::unversioned")]
    pub schema_version: u32,
    /// Bench time of the state, s.
    pub t_s: f64,
    pub soc: f64,
    pub v1: f64,
    pub v2: f64,
    /// Surface-charge polarisation left by a lead-acid charge, V per cell.
    #[serde(default)]
    pub v_surface: f64,
    pub temperature_c: f64,
    pub truth_charge_ah: f64,
    pub truth_energy_wh: f64,
    /// Each group's state, when the pack is built of groups.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub groups: Vec<GroupState>,
}

/// Where the pack's state is kept, and the thread that writes it.
struct Checkpoint {
    path: std::path::PathBuf,
    every_s: f64,
    last_s: f64,
    writer: StateWriter,
}

type StateSlot = (
    std::sync::Mutex<(Option<PackState>, bool)>,
    std::sync::Condvar,
);

/// Writes the kept state off the caller's thread (the one the stations
/// share), atomically and synced with its folder; only the newest state
/// waiting is written.
struct StateWriter {
    slot: Arc<StateSlot>,
}

impl StateWriter {
    fn start(path: std::path::PathBuf) -> StateWriter {
        let slot: Arc<StateSlot> = Arc::new((
            std::sync::Mutex::new((None, false)),
            std::sync::Condvar::new(),
        ));
        let theirs = Arc::clone(&slot);
        let spawned = std::thread::Builder::new()
            .name("sim-state".into())
            .spawn(move || loop {
                let next = {
                    let (m, cv) = &*theirs;
                    let mut g = locked(m);
                    while g.0.is_none() && !g.1 {
                        g = match cv.wait(g) {
                            Ok(g) => g,
                            Err(p) => p.into_inner(),
                        };
                    }
                    match g.0.take() {
                        Some(st) => st,
                        None => return,
                    }
                };
                write_state_file(&path, &next);
            });
        if spawned.is_err() {
            // No thread: the states are simply not kept beyond the first.
            if let Ok(mut g) = slot.0.lock() {
                g.1 = true;
            }
        }
        StateWriter { slot }
    }

    fn send(&self, state: PackState) {
        let (m, cv) = &*self.slot;
        if let Ok(mut g) = m.lock() {
            if !g.1 {
                g.0 = Some(state);
                cv.notify_one();
            }
        }
    }
}

impl Drop for StateWriter {
    fn drop(&mut self) {
        let (m, cv) = &*self.slot;
        if let Ok(mut g) = m.lock() {
            g.1 = true;
            cv.notify_one();
        }
    }
}

/// Write a state aside, sync it, rename it over the old one and sync the
/// folder: never half a state, and the name survives a power cut.
fn write_state_file(path: &std::path::Path, state: &PackState) {
    if let Ok(bytes) = serde_json::to_vec(state) {
        let _ = record::write::atomic_write(path, &bytes);
    }
}

fn meter(cfg: &MeterConfig, ideal: bool) -> Meter {
    if ideal {
        Meter::IDEAL
    } else {
        Meter {
            gain: 1.0 + cfg.gain_error_pct / 100.0,
            offset: cfg.offset,
            noise_sd: cfg.noise,
            resolution: cfg.resolution,
        }
    }
}

impl SimBench {
    pub fn new(spec: &PackSpec, cfg: &SimConfig, clock: Arc<dyn Clock>) -> SimBench {
        let cond = PackCondition {
            capacity_factor: cfg.pack.capacity_factor,
            resistance_factor: cfg.pack.resistance_factor,
            initial_soc: cfg.pack.initial_soc,
            ambient_c: cfg.pack.ambient_c,
            standby_drain_a: cfg.pack.standby_drain_a,
        };
        let last_t = clock.now();
        SimBench {
            clock,
            pack: SimPack::new(spec, cond, &cfg.groups, cfg.seed),
            supply: SupplyState {
                output_on: false,
                voltage_set: 0.0,
                current_set: 0.0,
                voltage_max: 150.0,
                current_max: 60.0,
                volts: meter(&cfg.source.voltage, cfg.ideal),
                amps: meter(&cfg.source.current, cfg.ideal),
                guard: Guard::new(150.0, 60.0, 3000.0),
            },
            load: LoadState {
                input_on: false,
                mode: LoadMode::Current,
                current_set: 0.0,
                power_set: 0.0,
                resistance_set: 10_000.0,
                voltage_max: 150.0,
                current_max: 60.0,
                power_max: 1500.0,
                resistance_max: 10_000.0,
                voltage_set: 0.0,
                volts: meter(&cfg.load.voltage, cfg.ideal),
                amps: meter(&cfg.load.current, cfg.ideal),
                guard: Guard::new(150.0, 60.0, 1500.0),
            },
            thermometer: meter(&cfg.temperature, cfg.ideal),
            voltmeter: meter(&cfg.meter, cfg.ideal),
            faults: cfg.faults.clone(),
            last_t,
            truth: TruthCounters::default(),
            overlaps: 0,
            rng: SmallRng::seed_from_u64(cfg.seed),
            checkpoint: None,
            watch: None,
            trips: Vec::new(),
            voltage_span: None,
            scanner: meter(&cfg.groups.scanner, cfg.ideal),
            channel_faults: cfg.groups.faults.clone(),
            stuck: Vec::new(),
            scans: 0,
            heat_group: cfg.groups.sensors.first().copied(),
            scan_cache: None,
        }
    }

    /// Keep the pack's state in `path`, rewritten every `every_s` bench
    /// seconds as time advances.
    pub fn keep_state(&mut self, path: std::path::PathBuf, every_s: f64) {
        // The first state is written here, before the run starts; later
        // ones by the writer thread.
        let state = self.state();
        write_state_file(&path, &state);
        self.checkpoint = Some(Checkpoint {
            writer: StateWriter::start(path.clone()),
            path,
            every_s,
            last_s: state.t_s,
        });
    }

    pub fn state(&self) -> PackState {
        PackState {
            schema_version: record::schema::SCHEMA_VERSION,
            t_s: self.last_t,
            soc: self.pack.cells[0].soc,
            v1: self.pack.cells[0].v1,
            v2: self.pack.cells[0].v2,
            v_surface: self.pack.cells[0].v_surface,
            temperature_c: self.pack.cells[0].temperature_c,
            truth_charge_ah: self.truth.charge_ah,
            truth_energy_wh: self.truth.energy_wh,
            groups: self.pack.group_states(),
        }
    }

    /// Put the pack in a kept state, then let it stand open-circuit for
    /// `rest_s` (the time the run was down): its polarisation relaxes and
    /// it cools; its electronics, if any, go on drawing.
    pub fn restore(&mut self, st: &PackState, rest_s: f64) {
        let c = &mut self.pack.cells[0];
        c.soc = st.soc;
        c.v1 = st.v1;
        c.v2 = st.v2;
        c.v_surface = st.v_surface;
        c.temperature_c = st.temperature_c;
        self.pack.restore_groups(&st.groups);
        if rest_s > 0.0 {
            let _ = self.pack.step(rest_s, 0.0);
        }
    }

    fn write_state(&mut self) {
        let state = self.state();
        if let Some(c) = self.checkpoint.as_mut() {
            c.last_s = state.t_s;
            c.writer.send(state);
        }
    }

    /// Where the state is kept, if it is.
    pub fn state_path(&self) -> Option<&std::path::Path> {
        self.checkpoint.as_ref().map(|c| c.path.as_path())
    }

    pub fn now(&self) -> f64 {
        self.clock.now()
    }

    /// Is the supply holding its current limit (CC) rather than its
    /// voltage (CV)? One model evaluation, no solving.
    pub fn supply_in_cc(&self) -> bool {
        let v = self.supply.voltage_set * (1.0 + self.faults.source_voltage_error_pct / 100.0);
        self.supply.current_set > 0.0 && self.pack.terminal_voltage(self.supply.current_set) <= v
    }

    /// Current the supply drives (≥ 0).
    fn supply_current(&self) -> f64 {
        if !self.supply.output_on {
            return 0.0;
        }
        let v = self.supply.voltage_set * (1.0 + self.faults.source_voltage_error_pct / 100.0);
        self.pack.supply_current(v, self.supply.current_set)
    }

    /// Current the load sinks, as a pack current (≤ 0).
    fn load_current(&self) -> f64 {
        if !self.load.input_on {
            return 0.0;
        }
        if self.load.guard.voltage_on > 0.0 && self.pack.open_voltage() < self.load.guard.voltage_on
        {
            return 0.0;
        }
        let value = match self.load.mode {
            LoadMode::Current => self.load.current_set,
            LoadMode::Power => self.load.power_set,
            LoadMode::Resistance => self.load.resistance_set,
            LoadMode::Voltage => self.load.voltage_set,
        };
        let i = self.pack.load_current(self.load.mode, value);
        // A load sinks no more than its rating.
        i.max(-self.load.current_max)
    }

    /// The instruments' own protection, checked after each integration
    /// step: a trip switches the output off at once.
    fn check_guards(&mut self, v: f64, i_supply: f64, i_load: f64) {
        let t = self.last_t;
        let sides = [
            (
                "supply",
                self.supply.output_on,
                i_supply,
                &self.supply.guard,
            ),
            ("load", self.load.input_on, i_load, &self.load.guard),
        ];
        let mut hits = Vec::new();
        for (side, on, i, guard) in sides {
            if !on {
                continue;
            }
            if let Some((bit, what, value, level)) = guard.check(v, i) {
                hits.push((side, bit, what, value, level));
            }
        }
        for (side, bit, what, value, level) in hits {
            let guard = if side == "supply" {
                self.supply.output_on = false;
                &mut self.supply.guard
            } else {
                self.load.input_on = false;
                &mut self.load.guard
            };
            guard.tripped |= bit;
            self.trips.push(Trip {
                bench_s: t,
                side,
                what,
                value,
                level,
                pack_voltage_v: v,
            });
        }
    }

    /// The larger power rating of the two instruments, W.
    pub fn supply_power_max(&self) -> f64 {
        self.load.power_max.max(3000.0)
    }

    /// Pack current now (positive into the pack).
    pub fn pack_current(&self) -> f64 {
        self.supply_current() + self.load_current()
    }

    /// Integrate the model up to the clock's present.
    pub fn advance(&mut self) {
        let t = self.clock.now();
        while self.last_t < t {
            let dt = (t - self.last_t).min(MAX_DT);
            if let Some(after) = self.faults.heat_after_s {
                if self.last_t >= after {
                    let on = self.heat_group;
                    self.pack.set_fault_heat(self.faults.heat_w, on);
                }
            }
            let (i_supply, i_load) = (self.supply_current(), self.load_current());
            let i = i_supply + i_load;
            let (ah, wh) = self.pack.step(dt, i);
            self.truth.charge_ah += ah;
            self.truth.energy_wh += wh;
            self.last_t += dt;
            if self.watch.is_some() {
                self.check_watch();
            }
            if self.supply.output_on || self.load.input_on {
                // At the step's end, with the currents that flowed in it.
                let v = self.pack.terminal_voltage(i);
                self.voltage_span = Some(match self.voltage_span {
                    Some((lo, hi)) => (lo.min(v), hi.max(v)),
                    None => (v, v),
                });
                self.check_guards(v, i_supply, -i_load);
            }
        }
        if self
            .checkpoint
            .as_ref()
            .is_some_and(|c| self.last_t - c.last_s >= c.every_s)
        {
            self.write_state();
        }
    }

    fn check_watch(&mut self) {
        let v = self.terminal_voltage();
        let (t, truth) = (self.last_t, self.truth);
        let Some(w) = self.watch.as_mut() else { return };
        if w.crossed.is_none() && v <= w.below_v {
            w.crossed = Some(match w.last {
                Some((t0, v0, c0)) if v0 > v => {
                    let f = ((v0 - w.below_v) / (v0 - v)).clamp(0.0, 1.0);
                    (
                        t0 + f * (t - t0),
                        TruthCounters {
                            charge_ah: c0.charge_ah + f * (truth.charge_ah - c0.charge_ah),
                            energy_wh: c0.energy_wh + f * (truth.energy_wh - c0.energy_wh),
                        },
                    )
                }
                _ => (t, truth),
            });
        }
        w.last = Some((t, v, truth));
    }

    pub fn truth(&self) -> TruthCounters {
        self.truth
    }

    pub fn terminal_voltage(&self) -> f64 {
        self.pack.terminal_voltage(self.pack_current())
    }

    /// What the reading faults in force add to a quantity.
    fn reading_shift(&self, q: super::config::Quantity) -> f64 {
        let now = self.clock.now();
        self.faults
            .reading
            .iter()
            .filter(|f| f.quantity == q && now >= f.after_s)
            .map(|f| f.offset)
            .sum()
    }

    pub fn measure_supply(&mut self) -> (f64, f64) {
        use super::config::Quantity as Q;
        let v = self.terminal_voltage();
        let i = self.supply_current();
        let (dv, di) = (
            self.reading_shift(Q::Voltage),
            self.reading_shift(Q::Current),
        );
        (
            self.supply.volts.apply(v, &mut self.rng) + dv,
            self.supply.amps.apply(i, &mut self.rng) + di,
        )
    }

    pub fn measure_load(&mut self) -> (f64, f64) {
        use super::config::Quantity as Q;
        let v = self.terminal_voltage();
        let i = -self.load_current();
        let (dv, di) = (
            self.reading_shift(Q::Voltage),
            self.reading_shift(Q::Current),
        );
        (
            self.load.volts.apply(v, &mut self.rng) + dv,
            self.load.amps.apply(i, &mut self.rng) + di,
        )
    }

    /// The separate voltmeter at the pack terminals.
    pub fn measure_meter(&mut self) -> f64 {
        let v = self.terminal_voltage();
        self.voltmeter.apply(v, &mut self.rng)
            + self.reading_shift(super::config::Quantity::Voltage)
    }

    /// One scanner channel (see [`model::groups::GroupChannels::sim_default`]
    /// for the wiring); `None` for a channel with nothing on it.
    pub fn measure_channel(&mut self, ch: u32) -> Option<f64> {
        use model::groups::{
            Wiring, SIM_AMBIENT_CHANNEL, SIM_BUSBAR_CHANNEL, SIM_SURFACE_BASE, SIM_VOLTAGE_BASE,
        };
        use model::simconfig::ChannelFaultKind as K;
        let n = self.pack.cells.len() as u32;
        if !self.pack.grouped {
            return None;
        }
        let now = self.clock.now();
        let (i, vs) = match &self.scan_cache {
            Some((t, i, vs)) if *t == self.last_t => (*i, vs.clone()),
            _ => {
                let i = self.pack_current();
                let vs = self.pack.group_voltages(i);
                self.scan_cache = Some((self.last_t, i, vs.clone()));
                (i, vs)
            }
        };
        let truth = if ch > SIM_VOLTAGE_BASE && ch <= SIM_VOLTAGE_BASE + n {
            let g = (ch - SIM_VOLTAGE_BASE) as usize;
            let v = match self.pack.wiring {
                Wiring::Direct => vs[g - 1],
                Wiring::Taps => vs[..g].iter().sum(),
            };
            self.scanner.apply(v, &mut self.rng)
        } else if ch > SIM_SURFACE_BASE && ch <= SIM_SURFACE_BASE + n {
            let t = self.pack.cells[(ch - SIM_SURFACE_BASE - 1) as usize].temperature_c;
            self.thermometer.apply(t, &mut self.rng)
        } else if ch == SIM_BUSBAR_CHANNEL {
            // The busbar runs a little above the cells with current in it.
            let t = self.pack.temperature_c() + 0.05 * i.abs();
            self.thermometer.apply(t, &mut self.rng)
        } else if ch == SIM_AMBIENT_CHANNEL {
            let t = self.pack.ambient_c();
            self.thermometer.apply(t, &mut self.rng)
        } else {
            return None;
        };
        let fault = self
            .channel_faults
            .iter()
            .find(|f| f.channel == ch && now >= f.after_s)
            .map(|f| f.kind);
        Some(match fault {
            None => truth,
            // An open input reads overload, the SCPI +9.9E37.
            Some(K::Open) => 9.9e37,
            Some(K::Stuck) => match self.stuck.iter().find(|(c, _)| *c == ch) {
                Some(&(_, v)) => v,
                None => {
                    self.stuck.push((ch, truth));
                    truth
                }
            },
            Some(K::Loose) if self.scans % 2 == 1 => truth - 0.35,
            Some(K::Loose) => truth,
        })
    }

    pub fn measure_temperature(&mut self) -> f64 {
        let t = self.pack.temperature_c();
        self.thermometer.apply(t, &mut self.rng)
            + self.reading_shift(super::config::Quantity::Temperature)
    }
}
