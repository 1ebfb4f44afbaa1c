//! The analysis as one pass over a stream of samples, with memory that does
//! not grow with the log's length: per step a handful of running figures
//! (trapezoid integrals, extremes, the two-level ends), a charge grid of
//! bounded size for the curves, the pulse tracker, and a short window of
//! sampling intervals for gap detection. What grows is one summary per step
//! and one record per flagged gap or current edge (each capped).
//!
//! The same code serves the summary at the end of a live run, `packbench
//! analyze` on our own logs, and any other bench's log.

use super::characterize::{Characterizer, Settings, SocBasis};
use super::correct::{self, CapacityTest, CorrectionPolicy};
use super::curves::{self, ChargeGrid};
use super::integrate::{spans_any, Integrator, Interruption};
use super::pulse::{self, is_jump, PulseTracker};
use super::resistance::{two_level_ohm, LevelTracker, ResistanceReading};
use super::FULL_START_TOLERANCE;
use super::{
    Analysis, CapacityResult, CurveData, CurvesSummary, CycleSummary, DvaSummary, Gap, IcaSummary,
    LogQuality, OcvPoint, OcvTable, PeakSummary, Recalibration, ResistanceResult, StepInfo,
    StepSummary,
};
use model::end::EndKind;
use model::pack::PackSpec;
use model::procedure::{ResultTag, StepType};
use model::sample::Sample;
use std::collections::HashMap;

/// Settings of the analysis a user can change.
#[derive(Debug, Clone, PartialEq)]
pub struct AnalysisOptions {
    /// Incremental-capacity voltage bin, V per cell.
    pub ica_bin_v_per_cell: f64,
    /// Gaussian smoothing of dQ/dV, standard deviation in bins (0: none).
    pub ica_smooth_bins: f64,
    /// Differential-voltage charge bin, fraction of the rated capacity.
    pub dva_bin_fraction: f64,
    /// Gaussian smoothing of dV/dQ, standard deviation in bins.
    pub dva_smooth_bins: f64,
    /// Delays after a current edge for the pulse method, s.
    pub pulse_delays_s: Vec<f64>,
    /// A gap is an interval longer than this many typical intervals.
    pub gap_factor: f64,
    pub correction: CorrectionPolicy,
    /// Without step tags (a foreign log): the largest discharge is the
    /// capacity step.
    pub detect_capacity: bool,
    /// The log came from another bench (no step records of ours).
    pub imported: bool,
    /// A foreign log's discharge cutoff, V per cell, as the operator
    /// states it: the capacity step counts as ended on its cutoff when its
    /// last voltage is at most [`CUTOFF_TOLERANCE`] above it.
    pub cutoff_v_per_cell: Option<f64>,
    /// The pack's minimum and maximum voltage for the pulse power
    /// capability, V (default: the chemistry's usual operating limits).
    pub voltage_limits_v: Option<(f64, f64)>,
    /// Power targets for the available energy, W (discharge, charge).
    pub power_targets_w: Option<(f64, f64)>,
}

/// How far above a stated cutoff a foreign log's last discharge voltage
/// may be and still count as ended on it: 1 % (30 mV on a 3.0 V cell),
/// the overshoot of one sample interval at the knee (common practice).
pub const CUTOFF_TOLERANCE: f64 = 0.01;

impl Default for AnalysisOptions {
    fn default() -> Self {
        AnalysisOptions {
            // Fact sheet §9: bins of 1–10 mV; smoothing by binning plus a
            // Gaussian (common practice).
            ica_bin_v_per_cell: 0.005,
            ica_smooth_bins: 2.0,
            dva_bin_fraction: 0.01,
            dva_smooth_bins: 2.0,
            pulse_delays_s: pulse::DEFAULT_DELAYS_S.to_vec(),
            gap_factor: 5.0,
            correction: CorrectionPolicy::default(),
            detect_capacity: false,
            imported: false,
            cutoff_v_per_cell: None,
            voltage_limits_v: None,
            power_targets_w: None,
        }
    }
}

use super::curves::{GRID_FRACTION, GRID_MAX_POINTS};
/// Intervals remembered for the typical sampling interval.
const INTERVAL_WINDOW: usize = 32;
/// A gap is also at least this long, s.
pub const MIN_GAP_S: f64 = 2.0;
/// Most gaps listed one by one.
const MAX_GAPS: usize = 1000;
/// Curves are drawn from steps no faster than this, C-rate (common practice:
/// dQ/dV wants slow steps; C/10 or slower is best, fact sheet §9).
const CURVE_MAX_RATE_C: f64 = 0.5;

/// One stretch of one step.
#[derive(Debug, Clone)]
struct StepAcc {
    step: u32,
    g: Integrator,
    n: usize,
    first: Option<Sample>,
    last: Option<Sample>,
    vmin: f64,
    vmax: f64,
    tmax: Option<f64>,
    imax: f64,
    /// Ends of the first two current levels (two-level resistance).
    level_ends: [Option<Sample>; 2],
    level: usize,
    level_i: f64,
    grid: ChargeGrid,
    ah_since_full_at_start: Option<f64>,
    /// (t, I) of a drain step, for its second-half mean.
    drain: Option<Vec<(f64, f64)>>,
    /// Run time inside the step while the run was down (resumed), s.
    down_s: f64,
    /// What the samples tell of the measurement (the uncertainty budget's
    /// data terms).
    measure: crate::uncertainty::MeasureAcc,
}

impl StepAcc {
    /// The time the step ran: its span less the time the run was down.
    fn active_s(&self) -> f64 {
        match (self.first, self.last) {
            (Some(f), Some(l)) if l.t_s > f.t_s => (l.t_s - f.t_s - self.down_s).max(0.0),
            _ => 0.0,
        }
    }

    fn new(step: u32, grid: ChargeGrid, ah_since_full: Option<f64>) -> StepAcc {
        StepAcc {
            step,
            g: Integrator::default(),
            n: 0,
            first: None,
            last: None,
            vmin: f64::INFINITY,
            vmax: f64::NEG_INFINITY,
            tmax: None,
            imax: 0.0,
            level_ends: [None, None],
            level: 0,
            level_i: 0.0,
            grid,
            ah_since_full_at_start: ah_since_full,
            drain: None,
            down_s: 0.0,
            measure: crate::uncertainty::MeasureAcc::default(),
        }
    }

    fn push(&mut self, s: &Sample) {
        self.g.push(s.t_s, s.voltage_v, s.current_a);
        self.measure.push(s.t_s, s.voltage_v, s.current_a);
        self.grid.push(s.t_s, s.voltage_v, s.current_a);
        self.vmin = self.vmin.min(s.voltage_v);
        self.vmax = self.vmax.max(s.voltage_v);
        self.imax = self.imax.max(s.current_a.abs());
        if let Some(t) = s.temperature_c {
            self.tmax = Some(self.tmax.map_or(t, |m: f64| m.max(t)));
        }
        if self.n == 0 {
            self.first = Some(*s);
            self.level_i = s.current_a;
        } else if is_jump(self.level_i, s.current_a, 0.005) {
            self.level += 1;
            self.level_i = s.current_a;
        }
        if self.level < 2 {
            self.level_ends[self.level] = Some(*s);
        }
        self.last = Some(*s);
        self.n += 1;
        if let Some(d) = self.drain.as_mut() {
            if d.len() < MAX_DRAIN_POINTS {
                d.push((s.t_s, s.current_a));
            }
        }
    }
}

/// Most points kept of a drain step (a week at 1 s).
const MAX_DRAIN_POINTS: usize = 604_800;

/// What preceded a capacity step.
struct StartState {
    from_full_charge: bool,
    preceded_by: String,
}

impl StartState {
    fn of(ah_since_full: Option<f64>, full_step: Option<u32>, rated_ah: f64) -> StartState {
        let of_step = full_step
            .map(|k| format!(" of step {k}"))
            .unwrap_or_default();
        match ah_since_full {
            None => StartState {
                from_full_charge: false,
                preceded_by: "no full charge before it in the log: the state of charge it started from is unknown".into(),
            },
            Some(q) if q.abs() <= FULL_START_TOLERANCE * rated_ah => StartState {
                from_full_charge: true,
                preceded_by: format!("the full charge{of_step}"),
            },
            Some(q) => StartState {
                from_full_charge: false,
                preceded_by: format!(
                    "{q:.3} Ah had been drawn since the full charge{of_step}"
                ),
            },
        }
    }
}

/// Figures of one step, merged over its stretches.
#[derive(Debug, Clone)]
struct StepDone {
    acc_first: Option<Sample>,
    acc_last: Option<Sample>,
    n: usize,
    g: Integrator,
    vmin: f64,
    vmax: f64,
    tmax: Option<f64>,
    stretches: usize,
    two_level: Option<ResistanceReading>,
    /// Run time inside the step while the run was down, s.
    down_s: f64,
    measure: crate::uncertainty::MeasureAcc,
}

/// Curves kept for a candidate step.
#[derive(Debug, Clone)]
struct Kept {
    step: u32,
    grid: ChargeGrid,
    mean_current_a: f64,
    /// Charge drawn since the last full charge when the step began, Ah
    /// (None: no full charge before it in the log).
    ah_since_full_at_start: Option<f64>,
    /// The step of that full charge.
    full_step: Option<u32>,
}

/// The streaming analyzer.
pub struct Analyzer<'a> {
    pack: &'a PackSpec,
    opts: AnalysisOptions,
    infos: HashMap<u32, StepInfo>,
    order: Vec<u32>,
    cur: Option<StepAcc>,
    done: HashMap<u32, StepDone>,
    done_order: Vec<u32>,
    prev: Option<Sample>,
    intervals: [f64; INTERVAL_WINDOW],
    n_intervals: usize,
    /// How many of the latest intervals are all equal (to the last one).
    same_intervals: usize,
    typical: Option<f64>,
    quality: LogQuality,
    gaps: Vec<Gap>,
    pulse: PulseTracker,
    levels: LevelTracker,
    ah_since_full: Option<f64>,
    last_charge: Option<Kept>,
    capacity_pick: Option<(Kept, Option<Kept>, Option<f64>)>,
    best_discharge_ah: f64,
    spare_grid: Option<ChargeGrid>,
    warnings: Vec<String>,
    cycle: u32,
    seen_discharge: bool,
    /// The step of the last full charge.
    full_step: Option<u32>,
    /// Charge delivered from the last full charge to a discharge cutoff.
    full_to_empty_ah: Option<f64>,
    /// Run times where the log resumes after an interruption: nothing is
    /// integrated across them (no current flowed while the run was down).
    breaks: Vec<Interruption>,
    /// Points of the drain step being read, kept across its stretches.
    drain_points: Option<(u32, Vec<(f64, f64)>)>,
    /// Pulse-power levels, read from the current alone.
    characterizer: Characterizer,
}

impl<'a> Analyzer<'a> {
    pub fn new(pack: &'a PackSpec, infos: &[StepInfo], opts: AnalysisOptions) -> Analyzer<'a> {
        let mut map = HashMap::new();
        let mut order = Vec::new();
        for i in infos {
            if map.insert(i.step, i.clone()).is_none() {
                order.push(i.step);
            }
        }
        let pulse = PulseTracker::new(&opts.pulse_delays_s, pack.rated_capacity_ah);
        let n = f64::from(pack.series);
        let (lo, hi) = pack.chemistry.operating_limits_v_per_cell();
        let (voltage_min_v, voltage_max_v) = opts.voltage_limits_v.unwrap_or((lo * n, hi * n));
        let characterizer = Characterizer::new(Settings {
            voltage_min_v,
            voltage_max_v,
            // At rest below 1 % of the rated capacity's current (0.01C),
            // and at least 1 mA (common practice for a bench's zero).
            rest_current_a: (0.01 * pack.rated_capacity_ah).max(0.001),
            series: pack.series,
            rated_ah: pack.rated_capacity_ah,
        });
        Analyzer {
            pack,
            opts,
            infos: map,
            order,
            cur: None,
            done: HashMap::new(),
            done_order: Vec::new(),
            prev: None,
            intervals: [0.0; INTERVAL_WINDOW],
            n_intervals: 0,
            same_intervals: 0,
            typical: None,
            quality: LogQuality::default(),
            gaps: Vec::new(),
            pulse,
            levels: LevelTracker::default(),
            ah_since_full: None,
            last_charge: None,
            capacity_pick: None,
            best_discharge_ah: 0.0,
            spare_grid: None,
            warnings: Vec::new(),
            cycle: 0,
            seen_discharge: false,
            full_to_empty_ah: None,
            full_step: None,
            breaks: Vec::new(),
            drain_points: None,
            characterizer,
        }
    }

    /// Run times at which the log resumes after an interruption.
    pub fn set_breaks(&mut self, breaks: Vec<Interruption>) {
        self.breaks = breaks;
    }

    /// Add (or complete) the record of a step; a foreign log's steps are
    /// found while it is read.
    pub fn set_info(&mut self, info: StepInfo) {
        if !self.infos.contains_key(&info.step) {
            self.order.push(info.step);
        }
        self.infos.insert(info.step, info);
    }

    fn new_grid(&mut self) -> ChargeGrid {
        match self.spare_grid.take() {
            Some(mut g) => {
                g.reset();
                g
            }
            None => ChargeGrid::new(GRID_FRACTION * self.pack.rated_capacity_ah, GRID_MAX_POINTS),
        }
    }

    /// The median of the step's recent sampling intervals, recomputed
    /// every few intervals (a sort per sample would dominate the cost).
    fn typical_interval(&mut self) -> Option<f64> {
        if self.n_intervals < 4 {
            return None;
        }
        if self.n_intervals < 16 || self.n_intervals.is_multiple_of(8) || self.typical.is_none() {
            let n = self.n_intervals.min(INTERVAL_WINDOW);
            if self.same_intervals >= n {
                // One value fills the window: it is the median.
                self.typical = Some(self.intervals[(self.n_intervals - 1) % INTERVAL_WINDOW]);
            } else {
                let mut w = self.intervals;
                let w = &mut w[..n];
                w.sort_unstable_by(f64::total_cmp);
                self.typical = Some(w[n / 2]);
            }
        }
        self.typical
    }

    /// Count a row left out because it repeats the time of the row before
    /// with other values (a foreign log whose steps are found from the
    /// current: such a row would start a step of no duration).
    ///
    /// The pulse-power reading still takes it: two rows at one time are the
    /// two sides of a current edge, and the equivalent circuit needs the
    /// moment the current changed.
    pub fn skip_repeated_time(&mut self, s: &Sample) {
        self.characterizer
            .push(s.t_s, s.voltage_v, s.current_a, s.temperature_c);
        self.quality.rows += 1;
        self.quality.repeated_timestamps += 1;
        self.quality.repeated_dropped += 1;
    }

    /// Add the next sample of the log.
    pub fn push(&mut self, s: &Sample) {
        self.quality.rows += 1;
        let mut resumed = None;
        if let Some(p) = self.prev {
            let dt = s.t_s - p.t_s;
            if dt < 0.0 {
                self.quality.out_of_order_dropped += 1;
                return;
            }
            resumed = spans_any(&self.breaks, p.t_s, s.t_s).then_some(dt);
        }
        self.characterizer
            .push(s.t_s, s.voltage_v, s.current_a, s.temperature_c);
        if let Some(down) = resumed {
            // A resumed run: no gap, no charge across the interruption,
            // and the time it was down is no time the step ran.
            self.n_intervals = 0;
            self.typical = None;
            if let Some(c) = self.cur.as_mut() {
                c.g.break_segment();
                c.grid.break_segment();
                c.measure.break_segment();
                if c.step == s.step {
                    c.down_s += down;
                }
            }
            self.pulse.break_segment();
            self.levels.break_segment();
            self.prev = None;
        }
        if let Some(p) = self.prev {
            let dt = s.t_s - p.t_s;
            if dt == 0.0 && p == *s {
                self.quality.duplicates_dropped += 1;
                return;
            }
            if p.step != s.step {
                // A new step: its own sampling rate is learnt afresh.
                self.n_intervals = 0;
                self.typical = None;
            } else if dt == 0.0 {
                self.quality.repeated_timestamps += 1;
            } else {
                // Gaps are judged against the step's own sampling rate
                // (a pulse sampled fast next to a slow step is no gap).
                if let Some(typ) = self.typical_interval() {
                    if dt > self.opts.gap_factor * typ && dt >= MIN_GAP_S {
                        self.quality.gaps += 1;
                        let across = (p.current_a + s.current_a) * 0.5 * dt / 3600.0;
                        self.quality.charge_in_gaps_ah += across.abs();
                        if self.gaps.len() < MAX_GAPS {
                            self.gaps.push(Gap {
                                step: s.step,
                                from_s: p.t_s,
                                to_s: s.t_s,
                                duration_s: dt,
                                typical_interval_s: typ,
                                charge_across_ah: across,
                            });
                        }
                    }
                }
                let last = (self.n_intervals + INTERVAL_WINDOW - 1) % INTERVAL_WINDOW;
                if self.n_intervals > 0 && self.intervals[last] == dt {
                    self.same_intervals += 1;
                } else {
                    self.same_intervals = 1;
                }
                self.intervals[self.n_intervals % INTERVAL_WINDOW] = dt;
                self.n_intervals += 1;
            }
            // Coulomb count since the last full charge (discharge positive).
            if let Some(a) = self.ah_since_full.as_mut() {
                *a -= (p.current_a + s.current_a) * 0.5 * dt / 3600.0;
            }
        }
        let new_step = self.cur.as_ref().is_none_or(|c| c.step != s.step);
        if new_step {
            self.close_step();
            let grid = self.new_grid();
            let mut acc = StepAcc::new(s.step, grid, self.ah_since_full);
            if self
                .infos
                .get(&s.step)
                .is_some_and(|i| i.kind == StepType::Drain)
            {
                acc.drain = Some(match self.drain_points.take() {
                    Some((step, pts)) if step == s.step => pts,
                    _ => Vec::new(),
                });
            }
            self.cur = Some(acc);
        }
        if let Some(c) = self.cur.as_mut() {
            c.push(s);
        }
        self.pulse
            .push(s.t_s, s.voltage_v, s.current_a, s.step, self.ah_since_full);
        if self.opts.imported {
            self.levels
                .push(s.t_s, s.voltage_v, s.current_a, s.step, self.ah_since_full);
        }
        self.prev = Some(*s);
    }

    /// A step's kind: from its record, or (a foreign log) from its mean
    /// current: rest under C/100, else charge or discharge by its sign.
    /// A foreign log's steps get their record here, numbered into cycles
    /// as ours are (a cycle starts at a charge that follows a discharge).
    fn kind_of(&mut self, step: u32, acc: &StepAcc) -> StepType {
        if let Some(i) = self.infos.get(&step) {
            return i.kind;
        }
        let span = acc.active_s();
        let mean = if span > 0.0 {
            acc.g.ah * 3600.0 / span
        } else {
            0.0
        };
        let kind = if mean.abs() < 0.01 * self.pack.rated_capacity_ah {
            StepType::Rest
        } else if mean > 0.0 {
            StepType::Charge
        } else {
            StepType::Discharge
        };
        if kind == StepType::Charge && self.seen_discharge {
            self.cycle += 1;
            self.seen_discharge = false;
        }
        if kind == StepType::Discharge {
            self.seen_discharge = true;
        }
        self.set_info(StepInfo {
            step,
            phase: String::new(),
            cycle: self.cycle,
            kind,
            name: None,
            result: None,
            end_kind: None,
            end_reason: None,
        });
        kind
    }

    fn close_step(&mut self) {
        let Some(mut acc) = self.cur.take() else {
            return;
        };
        let step = acc.step;
        if let Some(pts) = acc.drain.take() {
            self.drain_points = Some((step, pts));
        }
        let kind = self.kind_of(step, &acc);
        let info = self.infos.get(&step).cloned();
        let two_level = match (&acc.level_ends[0], &acc.level_ends[1]) {
            (Some(a), Some(b)) if acc.level >= 1 => {
                two_level_ohm(a.voltage_v, a.current_a, b.voltage_v, b.current_a).map(|r| {
                    ResistanceReading {
                        step,
                        dcir_mohm: r * 1000.0,
                        method: super::resistance::TWO_LEVEL_METHOD.into(),
                        u1_v: a.voltage_v,
                        i1_a: a.current_a,
                        u2_v: b.voltage_v,
                        i2_a: b.current_a,
                        t1_s: a.t_s,
                        t2_s: b.t_s,
                        soc_pct: None,
                        ah_since_full: acc.ah_since_full_at_start,
                    }
                })
            }
            _ => None,
        };
        // Full charge: a charge that ended on its taper or its −ΔV.
        if kind == StepType::Charge {
            let full = match &info {
                Some(i) if !self.opts.imported => {
                    matches!(
                        i.end_kind,
                        Some(EndKind::CurrentBelow)
                            | Some(EndKind::PeakDrop)
                            | Some(EndKind::GroupVoltageAbove)
                    )
                }
                _ => {
                    // A foreign log: a constant-voltage taper to under a
                    // fifth of the step's highest current.
                    acc.last.is_some_and(|l| {
                        l.current_a.abs() < 0.2 * acc.imax
                            && l.voltage_v >= acc.vmax - 0.005 * acc.vmax
                    })
                }
            };
            if full {
                self.ah_since_full = Some(0.0);
                self.full_step = Some(step);
            }
        }
        let active = acc.active_s();
        let mean_current = if active > 0.0 {
            acc.g.ah * 3600.0 / active
        } else {
            0.0
        };
        if kind == StepType::Discharge
            && info
                .as_ref()
                .and_then(|i| i.end_kind)
                .is_some_and(|k| k.is_cutoff())
        {
            if let Some(q) = self.ah_since_full {
                self.full_to_empty_ah = Some(q);
            }
        }
        let tagged = info.as_ref().and_then(|i| i.result) == Some(ResultTag::Capacity);
        let pick = kind == StepType::Discharge
            && if self.opts.detect_capacity {
                acc.g.ah_out > self.best_discharge_ah
            } else {
                tagged
            };
        // The step's charge grid is moved, not copied: into the last
        // charge, into the capacity pick, or back to be reused.
        let grid = std::mem::replace(&mut acc.grid, ChargeGrid::new(1.0, 0));
        let kept = Kept {
            step,
            grid,
            ah_since_full_at_start: acc.ah_since_full_at_start,
            full_step: self.full_step,
            mean_current_a: mean_current,
        };
        if kind == StepType::Charge && acc.g.ah_in > 0.0 {
            if let Some(old) = self.last_charge.replace(kept) {
                self.spare_grid = Some(old.grid);
            }
        } else if pick {
            self.best_discharge_ah = acc.g.ah_out;
            let t0 = acc.first.and_then(|f| f.temperature_c);
            let before = self.last_charge.clone();
            if let Some((old, _, _)) = self.capacity_pick.replace((kept, before, t0)) {
                self.spare_grid = Some(old.grid);
            }
        } else {
            self.spare_grid = Some(kept.grid);
        }
        match self.done.get_mut(&step) {
            Some(d) => {
                d.stretches += 1;
                d.n += acc.n;
                d.g.ah += acc.g.ah;
                d.g.wh += acc.g.wh;
                d.g.ah_in += acc.g.ah_in;
                d.g.ah_out += acc.g.ah_out;
                d.g.wh_in += acc.g.wh_in;
                d.g.wh_out += acc.g.wh_out;
                d.vmin = d.vmin.min(acc.vmin);
                d.vmax = d.vmax.max(acc.vmax);
                d.tmax = match (d.tmax, acc.tmax) {
                    (Some(a), Some(b)) => Some(a.max(b)),
                    (a, b) => a.or(b),
                };
                d.acc_last = acc.last;
                d.down_s += acc.down_s;
                d.measure.merge(&acc.measure);
            }
            None => {
                self.done_order.push(step);
                self.done.insert(
                    step,
                    StepDone {
                        acc_first: acc.first,
                        acc_last: acc.last,
                        n: acc.n,
                        g: acc.g,
                        vmin: acc.vmin,
                        vmax: acc.vmax,
                        tmax: acc.tmax,
                        stretches: 1,
                        two_level,
                        down_s: acc.down_s,
                        measure: acc.measure.clone(),
                    },
                );
            }
        }
    }

    /// The end of the log: every figure.
    pub fn finish(mut self) -> Analysis {
        self.close_step();
        let pack = self.pack;
        let mut warnings = std::mem::take(&mut self.warnings);
        let (summaries, mut two_levels) = self.step_summaries(&mut warnings);
        let cycles = cycles_of(&summaries, self.opts.imported, &mut warnings);
        let (capacity, recalibration, curves_summary, curve_data) =
            self.capacity(&summaries, &mut warnings);
        // Pulse readings: state of charge against the measured capacity
        // (or the rated one when there is none).
        let (mut pulse_readings, dropped) = self.pulse.finish();
        if dropped > 0 {
            warnings.push(format!(
                "{dropped} more current edges were not listed (at most {} are kept)",
                pulse::MAX_READINGS
            ));
        }
        // The charge the pack holds: the capacity step's, else what it gave
        // from a full charge to a cutoff, else the rated capacity.
        let c_ref = capacity
            .as_ref()
            .map(|c| c.measured_ah)
            .or(self.full_to_empty_ah.filter(|q| *q > 0.0))
            .unwrap_or(pack.rated_capacity_ah);
        // (The coulomb count is working state only: records read back from
        // disk carry the state of charge, not it.)
        let soc = |q: Option<f64>| q.map(|q| (100.0 * (1.0 - q / c_ref)).clamp(-5.0, 105.0));
        for r in &mut pulse_readings {
            r.soc_pct = soc(r.ah_since_full.take());
        }
        for r in &mut two_levels {
            r.soc_pct = soc(r.ah_since_full.take());
        }
        let mut found = std::mem::take(&mut self.levels).finish();
        for r in &mut found {
            r.soc_pct = soc(r.ah_since_full.take());
        }
        let resistance = resistance_figure(two_levels, found, &pulse_readings, self.opts.imported);
        let capacity_ah = capacity.as_ref().map(|c| c.measured_ah);
        let standby_drain = self.drain_points.take().and_then(|(step, pts)| {
            let (mean_a, window_s, samples) = super::second_half_mean(&pts)?;
            let cap = capacity_ah.unwrap_or(pack.rated_capacity_ah);
            let current_ma = mean_a * 1000.0;
            Some(super::DrainResult {
                step,
                current_ma,
                pct_per_month: super::drain_pct_per_month(current_ma, cap),
                capacity_ref_ah: cap,
                window_s,
                samples,
            })
        });
        let quality = self.quality.clone();
        quality_warnings(&quality, self.opts.gap_factor, &mut warnings);
        // The pulse levels' state of charge: against the capacity this
        // log measured from a full charge to its cutoff, else the rated.
        let basis = match capacity
            .as_ref()
            .filter(|c| c.ended_on_cutoff == Some(true) && c.from_full_charge)
        {
            Some(c) => SocBasis {
                capacity_ah: c.measured_ah,
                source: format!("measured (step {}, to its cutoff)", c.step),
            },
            None => SocBasis {
                capacity_ah: pack.rated_capacity_ah,
                source: "rated (no capacity measured to a cutoff in this log)".into(),
            },
        };
        let characterizer = std::mem::replace(
            &mut self.characterizer,
            Characterizer::new(Settings {
                voltage_min_v: 0.0,
                voltage_max_v: 0.0,
                rest_current_a: 0.0,
                series: 1,
                rated_ah: 0.0,
            }),
        );
        let characterization = Some(characterizer.finish(basis, self.opts.power_targets_w))
            .filter(|c| !c.levels.is_empty());
        Analysis {
            characterization,
            capacity,
            resistance,
            steps: summaries,
            cycles,
            warnings,
            pulse: pulse_readings,
            curves: curves_summary,
            curve_data,
            recalibration,
            gaps: self.gaps,
            quality,
            standby_drain,
            groups: None,
        }
    }

    /// Each step's summary in the order of their records (a foreign log's
    /// in the order seen), and the two-level resistance readings.
    fn step_summaries(
        &mut self,
        warnings: &mut Vec<String>,
    ) -> (Vec<StepSummary>, Vec<ResistanceReading>) {
        let mut summaries = Vec::new();
        let mut two_levels = Vec::new();
        let order: Vec<u32> = if self.order.is_empty() {
            self.done_order.clone()
        } else {
            self.order.clone()
        };
        for step in &order {
            let Some(info) = self.infos.get(step).cloned().or_else(|| {
                self.done.get(step).map(|_| StepInfo {
                    step: *step,
                    phase: String::new(),
                    cycle: 0,
                    kind: StepType::Unknown,
                    name: None,
                    result: None,
                    end_kind: None,
                    end_reason: None,
                })
            }) else {
                continue;
            };
            let d = self.done.get(step);
            if let Some(d) = d {
                if d.stretches > 1 {
                    warnings.push(format!(
                        "step {} appears in {} separate stretches of the log; they are summed",
                        step, d.stretches
                    ));
                }
            }
            summaries.push(step_summary(&info, d));
            if info.result == Some(ResultTag::Dcir) {
                let complete = !matches!(
                    info.end_kind,
                    None | Some(EndKind::Aborted) | Some(EndKind::Interrupted)
                );
                match d.and_then(|d| d.two_level.clone()) {
                    Some(r) if complete => two_levels.push(r),
                    _ => warnings.push(format!(
                        "the resistance step {} gave no reading (unfinished, or fewer than two current levels)",
                        info.step
                    )),
                }
            }
        }
        (summaries, two_levels)
    }

    /// The capacity figure of the step picked as the capacity step, the
    /// recalibration it allows, and its curves.
    fn capacity(
        &mut self,
        summaries: &[StepSummary],
        warnings: &mut Vec<String>,
    ) -> (
        Option<CapacityResult>,
        Option<Recalibration>,
        Option<CurvesSummary>,
        CurveData,
    ) {
        let pack = self.pack;
        let mut capacity = None;
        let mut curves_summary = None;
        let mut curve_data = CurveData::default();
        let mut recalibration = None;
        if let Some((kept, charge, t0)) = self.capacity_pick.take() {
            let info = self.infos.get(&kept.step).cloned();
            let s = summaries.iter().find(|x| x.step == kept.step).cloned();
            if let Some(s) = s {
                let complete = self.opts.imported
                    || !matches!(
                        info.as_ref().and_then(|i| i.end_kind),
                        None | Some(EndKind::Aborted) | Some(EndKind::Interrupted)
                    );
                if !complete {
                    warnings.push(format!(
                        "the capacity step {} did not finish; no capacity is reported",
                        kept.step
                    ));
                } else {
                    let ended_on_cutoff = if self.opts.imported {
                        let series = f64::from(pack.series.max(1));
                        match (self.opts.cutoff_v_per_cell, s.end_voltage_v) {
                            (Some(cut), Some(v)) => {
                                let on = v <= cut * series * (1.0 + CUTOFF_TOLERANCE);
                                if !on {
                                    warnings.push(format!(
                                        "the capacity step {} (the largest discharge) ended at {:.3} V/cell, above the stated cutoff {cut:.3} V/cell (+{:.0} %): the capacity is a lower bound",
                                        kept.step, v / series, CUTOFF_TOLERANCE * 100.0
                                    ));
                                }
                                Some(on)
                            }
                            _ => {
                                warnings.push(format!(
                                    "step {} (the largest discharge) is taken as the capacity step; a foreign log does not say whether it ended on its cutoff (state it with --cutoff, e.g. --cutoff 3.0V/cell)",
                                    kept.step
                                ));
                                None
                            }
                        }
                    } else {
                        Some(
                            info.as_ref()
                                .and_then(|i| i.end_kind)
                                .is_some_and(|k| k.is_cutoff()),
                        )
                    };
                    if ended_on_cutoff == Some(false) && !self.opts.imported {
                        warnings.push(format!(
                            "the capacity step {} ended on '{}', not on its cutoff voltage: the capacity is a lower bound",
                            kept.step,
                            info.as_ref().and_then(|i| i.end_reason.clone()).unwrap_or_default()
                        ));
                    }
                    let (c, r) =
                        capacity_result(pack, &kept, &s, t0, ended_on_cutoff, &self.opts, warnings);
                    recalibration = r;
                    capacity = Some(c);
                    let (cs, data) = self.curves(&kept, charge.as_ref(), warnings);
                    curves_summary = Some(cs);
                    curve_data = data;
                }
            }
        }
        (capacity, recalibration, curves_summary, curve_data)
    }

    fn curves(
        &self,
        dis: &Kept,
        charge: Option<&Kept>,
        warnings: &mut Vec<String>,
    ) -> (CurvesSummary, CurveData) {
        let pack = self.pack;
        let series = pack.series.max(1) as f64;
        let bin_v = self.opts.ica_bin_v_per_cell * series;
        let dva_bin = self.opts.dva_bin_fraction * pack.rated_capacity_ah;
        let mut sum = CurvesSummary::default();
        let mut data = CurveData::default();
        let mut parts: Vec<(&Kept, &str)> = Vec::new();
        if let Some(c) = charge {
            parts.push((c, "charge"));
        }
        parts.push((dis, "discharge"));
        for (k, dir) in parts {
            let rate = k.mean_current_a.abs() / pack.rated_capacity_ah;
            // (A step at exactly the limit sums to a hair over it.)
            if rate > CURVE_MAX_RATE_C * (1.0 + 1e-9) {
                warnings.push(format!(
                    "no dQ/dV or dV/dQ for the {dir} step {}: at {rate:.2}C it is too fast (at most {CURVE_MAX_RATE_C}C)",
                    k.step
                ));
                continue;
            }
            let ica = curves::ica(&k.grid, bin_v, self.opts.ica_smooth_bins);
            sum.ica.push(IcaSummary {
                step: k.step,
                direction: dir.into(),
                rate_c: rate,
                bin_mv_per_cell: self.opts.ica_bin_v_per_cell * 1000.0,
                smoothing_bins: self.opts.ica_smooth_bins,
                peaks: peak_summaries(&ica, series),
            });
            for (idx, (v, y)) in ica.points.iter().enumerate() {
                data.ica
                    .push((k.step, dir.to_string(), *v, *y, ica.smoothed[idx]));
            }
            let dva = curves::dva(&k.grid, dva_bin, self.opts.dva_smooth_bins);
            sum.dva.push(DvaSummary {
                step: k.step,
                direction: dir.into(),
                bin_ah: dva_bin,
                smoothing_bins: self.opts.dva_smooth_bins,
                peaks: peak_summaries(&dva, 1.0),
            });
            for (idx, (q, y)) in dva.points.iter().enumerate() {
                data.dva
                    .push((k.step, dir.to_string(), *q, *y, dva.smoothed[idx]));
            }
        }
        // Open-circuit voltage: the average of a slow charge from empty and
        // the slow discharge from full at each state of charge.
        if let Some(c) = charge {
            let (qc, qd) = (
                c.grid.end.map(|e| e.0).unwrap_or(0.0),
                dis.grid.end.map(|e| e.0).unwrap_or(0.0),
            );
            if qc > 0.0 && qd > 0.0 {
                let mut points = Vec::new();
                for k in 0..=20 {
                    let soc = k as f64 * 5.0;
                    let vc = c.grid.voltage_at(soc / 100.0 * qc);
                    let vd = dis.grid.voltage_at((1.0 - soc / 100.0) * qd);
                    if let (Some(vc), Some(vd)) = (vc, vd) {
                        points.push(OcvPoint {
                            soc_pct: soc,
                            charge_v: vc,
                            discharge_v: vd,
                            ocv_v: 0.5 * (vc + vd),
                            ocv_per_cell_v: 0.5 * (vc + vd) / series,
                        });
                    }
                }
                let rc = c.mean_current_a.abs() / pack.rated_capacity_ah;
                let rd = dis.mean_current_a.abs() / pack.rated_capacity_ah;
                if rc.max(rd) > 0.1 {
                    // What the charge's own end does to the table's top,
                    // by how it ended.
                    let top = match self.infos.get(&c.step).and_then(|i| i.end_kind) {
                        Some(EndKind::CurrentBelow) => {
                            " (and its constant-voltage end of charge flattens its top)"
                        }
                        Some(EndKind::PeakDrop) => {
                            " (and its −ΔV end of charge, past the voltage peak, bends its top)"
                        }
                        _ => "",
                    };
                    warnings.push(format!(
                        "the open-circuit-voltage table comes from steps at {rc:.2}C and {rd:.2}C: above C/10 the average still holds some polarisation{top}"
                    ));
                }
                data.ocv = points.clone();
                sum.ocv = Some(OcvTable {
                    charge_step: c.step,
                    discharge_step: dis.step,
                    charge_rate_c: rc,
                    discharge_rate_c: rd,
                    points,
                });
            }
        }
        (sum, data)
    }
}

/// The main peaks of a differential curve; positions also per cell
/// (`per` cells; 1 for a charge axis).
fn peak_summaries(d: &curves::Differential, per: f64) -> Vec<PeakSummary> {
    d.peaks
        .iter()
        .map(|p| PeakSummary {
            position: d.points[p.index].0,
            position_per_cell: d.points[p.index].0 / per,
            height: p.height,
            prominence: p.prominence,
        })
        .collect()
}

fn step_summary(info: &StepInfo, d: Option<&StepDone>) -> StepSummary {
    let empty = Integrator::default();
    let g = d.map(|d| d.g).unwrap_or(empty);
    let first = d.and_then(|d| d.acc_first);
    let last = d.and_then(|d| d.acc_last);
    let start = first.map(|s| s.t_s).unwrap_or(0.0);
    let end = last.map(|s| s.t_s).unwrap_or(start);
    // The time the step ran: current flowed only while the run was up.
    let down = d.map(|d| d.down_s).unwrap_or(0.0);
    let duration = (end - start - down).max(0.0);
    let mean_current = (duration > 0.0).then(|| g.ah * 3600.0 / duration);
    let (vmin, vmax) = d.map(|d| (d.vmin, d.vmax)).unwrap_or((f64::NAN, f64::NAN));
    StepSummary {
        step: info.step,
        phase: info.phase.clone(),
        cycle: info.cycle,
        kind: info.kind,
        name: info.name.clone(),
        samples: d.map(|d| d.n).unwrap_or(0),
        start_s: start,
        duration_s: duration,
        down_s: down,
        charge_ah: g.ah,
        energy_wh: g.wh,
        charge_in_ah: g.ah_in,
        charge_out_ah: g.ah_out,
        energy_in_wh: g.wh_in,
        energy_out_wh: g.wh_out,
        start_voltage_v: first.map(|s| s.voltage_v),
        end_voltage_v: last.map(|s| s.voltage_v),
        min_voltage_v: vmin.is_finite().then_some(vmin),
        max_voltage_v: vmax.is_finite().then_some(vmax),
        mean_current_a: mean_current,
        max_temperature_c: d.and_then(|d| d.tmax),
        end_kind: info.end_kind,
        end_reason: info.end_reason.clone(),
        measure: d.map(|d| d.measure.finish()),
    }
}

/// Cycles: charge and discharge steps; pulse steps count both ways.
/// Whether a step of our own log ran to one of its ends (a foreign log's
/// steps are taken as they are).
fn finished(s: &StepSummary, imported: bool) -> bool {
    imported
        || !matches!(
            s.end_kind,
            None | Some(EndKind::Aborted) | Some(EndKind::Interrupted)
        )
}

/// The capacity figure of a finished capacity step: corrected to rated
/// conditions, with its start state, and the recalibration it allows when
/// it started from a full charge.
fn capacity_result(
    pack: &PackSpec,
    kept: &Kept,
    s: &StepSummary,
    t0: Option<f64>,
    ended_on_cutoff: Option<bool>,
    opts: &AnalysisOptions,
    warnings: &mut Vec<String>,
) -> (CapacityResult, Option<Recalibration>) {
    let mean = if s.duration_s > 0.0 {
        s.charge_out_ah * 3600.0 / s.duration_s
    } else {
        0.0
    };
    let start = StartState::of(
        kept.ah_since_full_at_start,
        kept.full_step,
        pack.rated_capacity_ah,
    );
    if !start.from_full_charge {
        warnings.push(format!(
                "the capacity step {} did not start from a full charge ({}): its figure is what the pack gave from where it was, not its capacity; no state of health, grade or new nominal is taken from it",
                kept.step, start.preceded_by
            ));
    }
    let rated_rate = pack
        .rated_rate_c
        .unwrap_or_else(|| pack.chemistry.default_rated_rate_c());
    let test = CapacityTest {
        chemistry: pack.chemistry,
        measured_ah: s.charge_out_ah,
        mean_current_a: mean,
        duration_s: s.duration_s,
        initial_temperature_c: t0,
        rated_ah: pack.rated_capacity_ah,
        rated_rate_c: rated_rate,
    };
    let (corrected, corrections) = correct::correct(&test, &opts.correction);
    let ieee450 = (pack.chemistry == model::pack::Chemistry::LeadAcid
        && ended_on_cutoff == Some(true)
        && (mean / (rated_rate * pack.rated_capacity_ah) - 1.0).abs() <= 0.02)
        .then_some(t0)
        .flatten()
        .map(|t| correct::ieee450_percent(s.duration_s / 3600.0, 1.0 / rated_rate, t));
    let c = CapacityResult {
        step: s.step,
        measured_ah: s.charge_out_ah,
        measured_wh: s.energy_out_wh,
        rated_ah: Some(pack.rated_capacity_ah),
        mean_current_a: mean,
        c_rate: Some(mean / pack.rated_capacity_ah),
        duration_s: s.duration_s,
        end_voltage_v: s.end_voltage_v,
        ended_on_cutoff,
        corrected_ah: Some(corrected),
        corrections,
        initial_temperature_c: t0,
        ieee450_percent: ieee450,
        from_full_charge: start.from_full_charge,
        preceded_by: start.preceded_by.clone(),
    };
    // A new nominal only from a full charge to a known cutoff.
    let recalibration =
        (start.from_full_charge && ended_on_cutoff == Some(true)).then(|| Recalibration {
            full_charge_capacity_ah: corrected,
            suggested_nominal_ah: (corrected * 1000.0).round() / 1000.0,
            measured_ah: s.charge_out_ah,
            energy_wh: s.energy_out_wh,
            rate_c: mean / pack.rated_capacity_ah,
            current_a: mean,
            end_voltage_v: s.end_voltage_v,
            initial_temperature_c: t0,
            ended_on_cutoff: true,
            conditions: format!(
                "discharge at {:.3} A ({:.3}C) to {} from a full charge, {}; {}",
                mean,
                mean / pack.rated_capacity_ah,
                s.end_voltage_v
                    .map(|v| format!("{v:.3} V"))
                    .unwrap_or_else(|| "its end".into()),
                t0.map(|t| format!("starting at {t:.1} °C"))
                    .unwrap_or_else(|| "temperature not logged".into()),
                c.conditions()
            ),
        });
    (c, recalibration)
}

/// Warnings about the log itself: gaps, duplicated, repeated and
/// out-of-order rows.
fn quality_warnings(quality: &LogQuality, gap_factor: f64, warnings: &mut Vec<String>) {
    if quality.gaps > 0 {
        warnings.push(format!(
            "{} gap(s) in the log longer than {} typical sampling intervals; charge and energy are integrated across them by the trapezoid (current and power taken as straight lines between the samples either side); {:.4} Ah of the figures lies in gaps",
            quality.gaps, gap_factor, quality.charge_in_gaps_ah
        ));
    }
    if quality.duplicates_dropped > 0 {
        warnings.push(format!(
            "{} duplicated row(s) were left out",
            quality.duplicates_dropped
        ));
    }
    if quality.repeated_dropped > 0 {
        warnings.push(format!(
            "{} row(s) repeated the time of the row before with other values and were left out (the first row at each time is kept)",
            quality.repeated_dropped
        ));
    }
    if quality.out_of_order_dropped > 0 {
        warnings.push(format!(
            "{} row(s) with a time earlier than the row before were left out",
            quality.out_of_order_dropped
        ));
    }
}

fn cycles_of(
    summaries: &[StepSummary],
    imported: bool,
    warnings: &mut Vec<String>,
) -> Vec<CycleSummary> {
    let mut cycles: Vec<CycleSummary> = Vec::new();
    // Cycles with a charge or discharge step that did not finish, and
    // cycles with a finished discharge.
    let mut unfinished: Vec<u32> = Vec::new();
    let mut discharged: Vec<u32> = Vec::new();
    // Cycles whose charge started from empty: the charge or discharge step
    // before the cycle's first charge was a finished discharge, ended on
    // its cutoff (in a foreign log, whose ends are not known: finished).
    let mut from_empty: Vec<u32> = Vec::new();
    let mut charged: Vec<u32> = Vec::new();
    let mut last: Option<&StepSummary> = None;
    for s in summaries {
        if !matches!(s.kind, StepType::Charge | StepType::Discharge) {
            continue;
        }
        if s.kind == StepType::Charge && !charged.contains(&s.cycle) {
            charged.push(s.cycle);
            let emptied = last.is_some_and(|p| {
                p.kind == StepType::Discharge
                    && finished(p, imported)
                    && (imported || p.end_kind.is_some_and(|k| k.is_cutoff()))
            });
            if emptied {
                from_empty.push(s.cycle);
            }
        }
        last = Some(s);
        let c = match cycles.iter_mut().position(|c| c.cycle == s.cycle) {
            Some(k) => &mut cycles[k],
            None => {
                cycles.push(CycleSummary {
                    cycle: s.cycle,
                    charge_ah: 0.0,
                    discharge_ah: 0.0,
                    charge_wh: 0.0,
                    discharge_wh: 0.0,
                    coulombic_efficiency_pct: None,
                    energy_efficiency_pct: None,
                });
                let n = cycles.len() - 1;
                &mut cycles[n]
            }
        };
        if !finished(s, imported) {
            unfinished.push(s.cycle);
        } else if s.kind == StepType::Discharge {
            discharged.push(s.cycle);
        }
        c.charge_ah += s.charge_in_ah;
        c.discharge_ah += s.charge_out_ah;
        c.charge_wh += s.energy_in_wh;
        c.discharge_wh += s.energy_out_wh;
    }
    for c in &mut cycles {
        // A cycle that never finished its discharge has no efficiency.
        let complete = discharged.contains(&c.cycle) && !unfinished.contains(&c.cycle);
        if complete && c.charge_ah > 0.0 && !from_empty.contains(&c.cycle) {
            // The charge topped up a pack that was not empty: the ratio of
            // discharge to charge says nothing of the pack's efficiency.
            warnings.push(format!(
                "cycle {}: no coulombic or energy efficiency: its charge did not start from empty (no discharge to the cutoff before it)",
                c.cycle
            ));
            continue;
        }
        if complete && c.charge_ah > 0.0 && c.discharge_ah > 0.0 {
            let ce = c.discharge_ah / c.charge_ah * 100.0;
            c.coulombic_efficiency_pct = Some(ce);
            c.energy_efficiency_pct =
                (c.charge_wh > 0.0).then(|| c.discharge_wh / c.charge_wh * 100.0);
            if ce > 100.0 {
                // Fact sheet §8: CE above 100 % points at a current-sensor
                // offset or an incomplete discharge before the charge.
                warnings.push(format!(
                    "cycle {}: coulombic efficiency {ce:.2} % is above 100 % (current offset, or the pack was not empty before the charge)",
                    c.cycle
                ));
            }
        }
    }
    cycles
}

/// The pack's resistance figure: a two-level reading (IEC 61960 scheme)
/// from the steps that asked for one, the one nearest half charge; for a
/// foreign log without such steps, a two-level pattern found in the log
/// (nearest half charge), else the pulse method 1 s after the largest
/// discharge edge nearest half charge.
fn resistance_figure(
    two_levels: Vec<ResistanceReading>,
    found: Vec<ResistanceReading>,
    pulses: &[super::pulse::PulseReading],
    imported: bool,
) -> Option<ResistanceResult> {
    let dist = |soc: Option<f64>| soc.map(|s| (s - 50.0).abs()).unwrap_or(f64::INFINITY);
    let nearest_half = |rs: &[ResistanceReading]| {
        rs.iter()
            .enumerate()
            .min_by(|a, b| {
                dist(a.1.soc_pct)
                    .total_cmp(&dist(b.1.soc_pct))
                    .then(a.0.cmp(&b.0))
            })
            .map(|(_, r)| r.clone())
    };
    let at = |soc: Option<f64>| {
        soc.map(|s| format!(" at {s:.0} % state of charge"))
            .unwrap_or_default()
    };
    if !two_levels.is_empty() {
        let best = nearest_half(&two_levels)?;
        return Some(ResistanceResult {
            dcir_mohm: best.dcir_mohm,
            method: format!("{}{}", best.method, at(best.soc_pct)),
            why: "the procedure's resistance steps (two current levels each)".into(),
            readings: two_levels,
        });
    }
    if !imported {
        return None;
    }
    if !found.is_empty() {
        let best = nearest_half(&found)?;
        return Some(ResistanceResult {
            dcir_mohm: best.dcir_mohm,
            method: format!("{}{}", best.method, at(best.soc_pct)),
            why: format!(
                "{} two-level pattern(s) found in the log, the one nearest half charge taken; preferred over the pulse method, whose ΔV/ΔI after a single edge includes diffusion",
                found.len()
            ),
            readings: found,
        });
    }
    let best = pulses
        .iter()
        .filter(|p| p.current_after_a < p.current_before_a)
        .filter_map(|p| p.values.iter().find(|v| v.delay_s == 1.0).map(|v| (p, v)))
        .min_by(|a, b| dist(a.0.soc_pct).total_cmp(&dist(b.0.soc_pct)))?;
    Some(ResistanceResult {
        dcir_mohm: best.1.resistance_mohm,
        method: format!("pulse method: ΔV/ΔI 1 s after a discharge edge{}", at(best.0.soc_pct)),
        why: "no two current levels in one direction in the log (IEC 61960 pattern), so a single edge's response".into(),
        readings: Vec::new(),
    })
}

#[cfg(test)]
#[path = "stream_tests.rs"]
mod worked_tests;

#[cfg(test)]
mod tests {
    use super::*;

    /// Each kind of log trouble gets its own warning, with its count; a
    /// clean log gets none.
    #[test]
    fn quality_warnings_name_each_trouble() {
        let mut w = Vec::new();
        quality_warnings(&LogQuality::default(), 5.0, &mut w);
        assert!(w.is_empty());
        let q = LogQuality {
            gaps: 2,
            charge_in_gaps_ah: 0.25,
            duplicates_dropped: 3,
            repeated_dropped: 4,
            out_of_order_dropped: 5,
            ..LogQuality::default()
        };
        quality_warnings(&q, 5.0, &mut w);
        assert_eq!(w.len(), 4, "{w:?}");
        assert!(
            w[0].starts_with("2 gap(s)")
                && w[0].contains("5 typical")
                && w[0].contains("0.2500 Ah")
        );
        assert!(w[1].starts_with("3 duplicated"));
        assert!(w[2].starts_with("4 row(s) repeated"));
        assert!(w[3].starts_with("5 row(s) with a time earlier"));
    }
}
