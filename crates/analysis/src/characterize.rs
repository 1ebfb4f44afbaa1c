//! Pulse-power characterization: the hybrid pulse power method of the US
//! DOE/INL battery test manuals (fact sheet characterization.md §1) read
//! from any log, ours or foreign, by its current alone.
//!
//! A *level* opens at a discharge edge that follows a rest of at least
//! [`LEVEL_REST_MIN_S`] and whose discharge lasts at most
//! [`PULSE_MAX_S`]: the rest's last voltage is the open-circuit voltage
//! there. Its profile is that discharge pulse, the rest after it and a
//! charge pulse if one follows; then whatever takes the pack to the next
//! level (a partial discharge at C/3 and a rest) is its relaxation. The
//! level's figures:
//!
//! - R_dis = (V_t0 − V_t1)/(I_t0 − I_t1), t0 the last sample before the
//!   discharge pulse, t1 its end; R_chg the same over the charge pulse
//!   (t2 the last sample before it, t3 its end); also 0.1, 1 and 2 s
//!   after each edge where the sampling resolves them.
//! - Pulse power capability: P_dis = V_min·(OCV_dis − V_min)/R_dis and
//!   P_chg = V_max·(V_max − OCV_chg)/R_chg (OCV_dis = V_t0, OCV_chg =
//!   V_t2).
//! - First- and second-order Thevenin circuits fitted to the pulse window
//!   and the relaxation ([`crate::ecm`]).
//!
//! Memory: the open level's window only, thinned so that the spacing of
//! the kept samples grows with the time since the last current edge
//! ([`KEEP_PER_EDGE`] per decade-ish), whatever the log's length; the
//! levels' figures are a few numbers each.

use crate::ecm::{self, EcmFit, Point, Role};
use serde::{Deserialize, Serialize};

/// The rest before a level, at least, s (the method rests 1 h; 10 min is
/// our floor for calling a rest's last voltage an open-circuit voltage).
pub const LEVEL_REST_MIN_S: f64 = 600.0;
/// A discharge longer than this is no pulse, s (ISO 12405-4's discharge
/// is 120 s, the DOE's 10 s).
pub const PULSE_MAX_S: f64 = 180.0;
/// A rest inside the profile longer than this ends the profile, s.
pub const PROFILE_REST_MAX_S: f64 = 300.0;
/// Thinning: the kept samples' spacing is at least the time since the
/// last current edge over this, and at least [`KEEP_SPACING_MIN_S`]; so a
/// segment of length T keeps about 50·(1 + ln(T / 5 s)) samples whatever
/// its sampling (our choice: a time constant is resolved by a few dozen
/// samples a decade).
pub const KEEP_PER_EDGE: f64 = 50.0;
/// The finest spacing kept, s (the fastest sampling the method asks).
pub const KEEP_SPACING_MIN_S: f64 = 0.1;
/// The delays after an edge the method reads, s (the DOE/INL method
/// at 0.1, 1, 2 and 10 s; ISO 12405-4 also at 18 s), where the pulse
/// lasts that long.
pub const DELAYS_S: [f64; 5] = [0.1, 1.0, 2.0, 10.0, 18.0];
/// R0 is told apart from R1 when the first sample after the discharge
/// edge comes within this fraction of τ1 (R1 then adds under a tenth of
/// itself to that sample): our rule.
pub const R0_SEPARABLE_FRACTION: f64 = 0.1;

/// A second-order fit whose pair carries under this fraction of the two
/// pairs' resistance does not resolve two pairs (our rule).
pub const UNRESOLVED_PAIR_FRACTION: f64 = 0.02;

/// Settings: the pack's voltage limits for the power capability, the
/// current below which the pack is at rest, the pack's size.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    pub voltage_min_v: f64,
    pub voltage_max_v: f64,
    pub rest_current_a: f64,
    pub series: u32,
    pub rated_ah: f64,
}

/// The resistance over one pulse.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PulseFigure {
    /// Mean current over the pulse, A (signed, positive into the pack).
    pub current_a: f64,
    pub duration_s: f64,
    /// The voltage before the pulse's edge, V.
    pub voltage_before_v: f64,
    /// ΔV/ΔI at the pulse's end, mΩ.
    pub resistance_mohm: f64,
    /// (delay s, mΩ) where the sampling resolves it.
    pub at_delays: Vec<(f64, f64)>,
    /// The first sample after the edge, s after it.
    pub first_sample_s: f64,
}

/// One state-of-charge level.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Level {
    /// Time of the last sample before the discharge pulse, s.
    pub t_s: f64,
    /// Charge taken out since the full charge, Ah (None: the log has no
    /// full charge before it; counted from the log's start).
    pub ah_from_full: Option<f64>,
    /// Charge taken out since the log's start, Ah.
    pub ah_from_start: f64,
    /// Energy the pack delivered since the full charge (or the log's
    /// start), Wh.
    pub wh_from_full: f64,
    /// State of charge, % of the capacity basis (filled in at the end).
    pub soc_pct: f64,
    /// The rest's last voltage before the pulse, V.
    pub ocv_v: f64,
    /// How long the pack rested before, s.
    pub rest_s: f64,
    pub temperature_c: Option<f64>,
    pub discharge: PulseFigure,
    pub charge: Option<PulseFigure>,
    /// The charge pulse's current against 0.75 of the discharge's: below
    /// 0.97 of it, the pulse was reduced (to hold the voltage limit).
    pub charge_reduced: bool,
    pub power_discharge_w: Option<f64>,
    pub power_charge_w: Option<f64>,
    pub ecm1: Option<EcmFit>,
    pub ecm2: Option<EcmFit>,
    /// R0 is told apart from R1 (see [`R0_SEPARABLE_FRACTION`]).
    pub r0_separable: bool,
    pub flags: Vec<String>,
}

/// What the state of charge is counted against.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SocBasis {
    pub capacity_ah: f64,
    /// "measured" (the run's capacity step, to its cutoff) or "rated".
    pub source: String,
}

/// Available energy between the levels where the power targets are met.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AvailableEnergy {
    pub target_discharge_w: f64,
    pub target_charge_w: f64,
    /// The depth of discharge range where both are met, %.
    pub dod_from_pct: f64,
    pub dod_to_pct: f64,
    pub energy_wh: f64,
}

/// The whole characterization of a log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Characterization {
    pub settings: Settings,
    pub basis: SocBasis,
    pub levels: Vec<Level>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub available_energy: Option<AvailableEnergy>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Seg {
    Rest,
    Dis,
    Chg,
}

#[derive(Debug, Clone, Copy)]
struct S {
    t: f64,
    v: f64,
    i: f64,
    temp: Option<f64>,
    q: f64,
    wh: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Phase {
    /// In the discharge pulse.
    Discharge,
    /// The rest after it.
    Between,
    /// The charge pulse.
    Charge,
    /// After the profile.
    After,
}

#[derive(Debug)]
struct Open {
    pre: S,
    rest_s: f64,
    q_full: Option<f64>,
    wh_full: f64,
    phase: Phase,
    /// Indices into `points`.
    dis_end: Option<usize>,
    chg_before: Option<usize>,
    chg_end: Option<usize>,
    points: Vec<Point>,
    raw: Vec<S>,
    last_kept: f64,
    edge_t: f64,
}

impl Level {
    /// The circuit's R0 of the fit of `order`, Ω: only where the sampling
    /// tells it apart from R1 ([`R0_SEPARABLE_FRACTION`]).
    pub fn circuit_r0_ohm(&self, order: usize) -> Option<f64> {
        let f = if order == 1 { &self.ecm1 } else { &self.ecm2 };
        f.as_ref().filter(|_| self.r0_separable).map(|f| f.r0_ohm)
    }
}

impl Characterization {
    /// The method's discharge-pulse resistance at a state of charge, mΩ:
    /// linear between the two levels around it (none outside them).
    pub fn discharge_resistance_at(&self, soc_pct: f64) -> Option<f64> {
        let mut pts: Vec<(f64, f64)> = self
            .levels
            .iter()
            .map(|l| (l.soc_pct, l.discharge.resistance_mohm))
            .collect();
        pts.sort_by(|a, b| a.0.total_cmp(&b.0));
        pts.windows(2).find_map(|w| {
            let ((x0, y0), (x1, y1)) = (w[0], w[1]);
            (x0 <= soc_pct && soc_pct <= x1 && x1 > x0)
                .then(|| y0 + (y1 - y0) * (soc_pct - x0) / (x1 - x0))
        })
    }
}

/// Streams a log into levels.
#[derive(Debug)]
pub struct Characterizer {
    settings: Settings,
    prev: Option<S>,
    seg: Option<(Seg, f64)>,
    q: f64,
    wh: f64,
    q_full: Option<f64>,
    wh_full: f64,
    open: Option<Open>,
    levels: Vec<Level>,
    /// The most samples a level's window held.
    peak_window: usize,
}

impl Characterizer {
    pub fn new(settings: Settings) -> Characterizer {
        Characterizer {
            settings,
            prev: None,
            seg: None,
            q: 0.0,
            wh: 0.0,
            q_full: None,
            wh_full: 0.0,
            open: None,
            levels: Vec::new(),
            peak_window: 0,
        }
    }

    fn class(&self, i: f64) -> Seg {
        if i > self.settings.rest_current_a {
            Seg::Chg
        } else if i < -self.settings.rest_current_a {
            Seg::Dis
        } else {
            Seg::Rest
        }
    }

    /// One sample: time s, volts, amps (positive into the pack), °C.
    pub fn push(&mut self, t: f64, v: f64, i: f64, temp: Option<f64>) {
        if !(t.is_finite() && v.is_finite() && i.is_finite()) {
            return;
        }
        if let Some(p) = self.prev {
            // (Two samples at one time stamp are the two sides of an
            // edge: both count.)
            if t < p.t {
                return;
            }
            let dt = t - p.t;
            self.q += 0.5 * (p.i + i) * dt / 3600.0;
            self.wh += 0.5 * (p.i * p.v + i * v) * dt / 3600.0;
        }
        let s = S {
            t,
            v,
            i,
            temp,
            q: self.q,
            wh: self.wh,
        };
        let class = self.class(i);
        let changed = self.seg.is_none_or(|(c, _)| c != class);
        if changed {
            self.on_edge(class);
            self.seg = Some((class, self.prev.map_or(t, |p| p.t)));
        }
        if let Some((Seg::Dis, start)) = self.seg {
            // A discharge this long is no pulse: the open level was a
            // capacity or partial discharge.
            if t - start > PULSE_MAX_S {
                if let Some(o) = &self.open {
                    if o.phase == Phase::Discharge {
                        self.open = None;
                    }
                }
            }
        }
        self.keep(&s, changed);
        self.prev = Some(s);
    }

    /// A change of segment, seen at its first sample `s`.
    fn on_edge(&mut self, class: Seg) {
        let Some(prev) = self.prev else { return };
        let (old, start) = self.seg.unwrap_or((Seg::Rest, prev.t));
        // The sample before an edge is always kept.
        if let Some(o) = self.open.as_mut() {
            if o.raw.last().is_none_or(|k| k.t < prev.t) {
                let role = match (o.phase, old) {
                    (Phase::After, Seg::Rest) => Role::Relaxation,
                    (ph, _) => role_of(ph),
                };
                push_point(o, &prev, role);
            }
        }
        // A long charge is a full charge (or a recharge): the levels end,
        // and the state of charge counts from its end.
        if old == Seg::Chg && prev.t - start > PULSE_MAX_S {
            self.close();
            self.q_full = Some(prev.q);
            self.wh_full = prev.wh;
        }
        if old == Seg::Rest && class == Seg::Dis && prev.t - start >= LEVEL_REST_MIN_S {
            self.close();
            self.open = Some(Open {
                pre: prev,
                rest_s: prev.t - start,
                q_full: self.q_full,
                wh_full: self.wh_full,
                phase: Phase::Discharge,
                dis_end: None,
                chg_before: None,
                chg_end: None,
                points: Vec::new(),
                raw: Vec::new(),
                last_kept: prev.t,
                edge_t: prev.t,
            });
            let o = self.open.as_mut().expect("just opened");
            push_point(o, &prev, Role::Pulse);
            return;
        }
        let Some(o) = self.open.as_mut() else { return };
        o.edge_t = prev.t;
        let last = o.points.len() - 1;
        o.phase = match (o.phase, class) {
            (Phase::Discharge, Seg::Rest) => {
                o.dis_end = Some(last);
                Phase::Between
            }
            (Phase::Discharge, Seg::Chg) => {
                o.dis_end = Some(last);
                o.chg_before = Some(last);
                Phase::Charge
            }
            (Phase::Between, Seg::Chg) => {
                o.chg_before = Some(last);
                Phase::Charge
            }
            (Phase::Charge, _) => {
                o.chg_end = Some(last);
                Phase::After
            }
            (Phase::Between, Seg::Dis) => Phase::After,
            (Phase::After, Seg::Dis | Seg::Chg) => {
                // Only the last relaxation counts: earlier ones drive.
                for p in &mut o.points {
                    if p.role == Role::Relaxation {
                        p.role = Role::Drive;
                    }
                }
                Phase::After
            }
            (ph, _) => ph,
        };
    }

    fn keep(&mut self, s: &S, edge: bool) {
        let seg = self.seg.map(|x| x.0);
        let Some(o) = self.open.as_mut() else { return };
        if o.phase == Phase::Between && s.t - o.edge_t > PROFILE_REST_MAX_S {
            o.phase = Phase::After;
        }
        let gap = ((s.t - o.edge_t) / KEEP_PER_EDGE).max(KEEP_SPACING_MIN_S - 1e-9);
        if !edge && s.t - o.last_kept < gap {
            return;
        }
        let role = match (o.phase, seg) {
            (Phase::After, Some(Seg::Rest)) => Role::Relaxation,
            (ph, _) => role_of(ph),
        };
        push_point(o, s, role);
    }

    /// Close the open level: its figures and fits.
    fn close(&mut self) {
        let Some(o) = self.open.take() else { return };
        self.peak_window = self.peak_window.max(o.points.len());
        if let Some(level) = level_of(&self.settings, o) {
            self.levels.push(level);
        }
    }

    /// The most samples one level's window has held so far (the reading's
    /// memory: bounded by the thinning, not by the log's length).
    pub fn peak_window(&self) -> usize {
        self.peak_window
            .max(self.open.as_ref().map_or(0, |o| o.points.len()))
    }

    /// The levels, with the state of charge counted against `capacity`
    /// (the run's measured capacity, or the rated one), and the available
    /// energy where power targets are given (W, discharge and charge).
    pub fn finish(mut self, basis: SocBasis, targets: Option<(f64, f64)>) -> Characterization {
        self.close();
        for l in &mut self.levels {
            let out = l.ah_from_full.unwrap_or(l.ah_from_start);
            l.soc_pct = 100.0 * (1.0 - out / basis.capacity_ah.max(1e-12));
            if l.ah_from_full.is_none() {
                l.flags.push(
                    "no full charge before this level in the log: counted from the log's start, taken as full".into(),
                );
            }
        }
        let available_energy = targets.and_then(|t| available_energy(&self.levels, t, &basis));
        Characterization {
            settings: self.settings,
            basis,
            levels: self.levels,
            available_energy,
        }
    }
}

fn role_of(ph: Phase) -> Role {
    match ph {
        Phase::After => Role::Drive,
        _ => Role::Pulse,
    }
}

fn push_point(o: &mut Open, s: &S, role: Role) {
    o.points.push(Point {
        t_s: s.t,
        voltage_v: s.v,
        current_a: s.i,
        role,
        ocv_v: o.pre.v,
        q_ah: s.q - o.pre.q,
    });
    o.raw.push(*s);
    o.last_kept = s.t;
}

/// ΔV/ΔI from `before` to a sample, mΩ.
fn dvdi(before: &S, s: &S) -> Option<f64> {
    let di = s.i - before.i;
    (di.abs() > 1e-9).then(|| 1000.0 * (s.v - before.v) / di)
}

/// The pulse from `raw[b]` (the sample before its edge) to `raw[e]`.
fn pulse_figure(raw: &[S], b: usize, e: usize) -> Option<PulseFigure> {
    let (before, end) = (&raw[b], &raw[e]);
    if e <= b {
        return None;
    }
    let seg = &raw[b + 1..=e];
    let dur = end.t - before.t;
    let mean_i = seg.iter().map(|s| s.i).sum::<f64>() / seg.len() as f64;
    let mut at = Vec::new();
    for d in DELAYS_S {
        let target = before.t + d;
        if target > end.t {
            continue;
        }
        // A sample at the delay (5 % late at most), or two around it no
        // further apart than half the delay.
        let k = seg.partition_point(|s| s.t < target - 1e-9);
        let v = match (k.checked_sub(1).map(|j| &seg[j]), seg.get(k)) {
            (_, Some(s)) if s.t - target <= 0.05 * d => dvdi(before, s),
            (Some(a), Some(c)) if c.t - a.t <= 0.5 * d && a.t > before.t => {
                let f = (target - a.t) / (c.t - a.t);
                let s = S {
                    t: target,
                    v: a.v + f * (c.v - a.v),
                    i: a.i + f * (c.i - a.i),
                    ..*a
                };
                dvdi(before, &s)
            }
            _ => None,
        };
        if let Some(r) = v {
            at.push((d, r));
        }
    }
    Some(PulseFigure {
        current_a: mean_i,
        duration_s: dur,
        voltage_before_v: before.v,
        resistance_mohm: dvdi(before, end)?,
        at_delays: at,
        first_sample_s: seg[0].t - before.t,
    })
}

fn level_of(st: &Settings, o: Open) -> Option<Level> {
    let dis_end = o.dis_end?;
    let discharge = pulse_figure(&o.raw, 0, dis_end)?;
    let charge = match (o.chg_before, o.chg_end) {
        (Some(b), Some(e)) => pulse_figure(&o.raw, b, e),
        _ => None,
    };
    let mut flags = Vec::new();
    let charge_reduced = charge
        .as_ref()
        .is_some_and(|c| c.current_a < 0.97 * 0.75 * discharge.current_a.abs());
    if charge_reduced {
        flags.push(
            "the charge pulse was under 0.75 of the discharge current (reduced to hold the maximum voltage)".into(),
        );
    }
    let has_relaxation = o.points.iter().any(|p| p.role == Role::Relaxation);
    let (ecm1, ecm2) = if has_relaxation {
        (ecm::fit(&o.points, 1), ecm::fit(&o.points, 2))
    } else {
        flags.push("no rest after the level's partial discharge: no circuit fitted".into());
        (None, None)
    };
    if let Some(f) = &ecm2 {
        if !resolves_its_pairs(f) {
            flags.push(
                "the second-order fit does not resolve two RC pairs (one carries almost nothing or is not determined): use the first-order table".into(),
            );
        }
    }
    // The fit takes the pack as relaxed when the level begins: a rest
    // shorter than five of the slowest time constants leaves more than
    // 0.7 % of that pair's voltage, and biases its figures (our rule).
    let slowest = ecm2
        .as_ref()
        .or(ecm1.as_ref())
        .and_then(|f| f.pairs.iter().map(|p| p.tau_s).reduce(f64::max));
    if let Some(tau) = slowest.filter(|t| o.rest_s < 5.0 * t) {
        flags.push(format!(
            "the rest before the level ({:.0} min) is under five of the slowest time constant ({tau:.0} s): the pack was not relaxed, the circuit's figures are biased",
            o.rest_s / 60.0
        ));
    }
    let tau1 = ecm2
        .as_ref()
        .or(ecm1.as_ref())
        .and_then(|f| f.pairs.first())
        .map(|p| p.tau_s);
    let r0_separable = tau1.is_some_and(|t| discharge.first_sample_s <= R0_SEPARABLE_FRACTION * t);
    if tau1.is_some() && !r0_separable {
        flags.push(format!(
            "R0 not told apart from R1: the first sample after the edge came {:.2} s after it, more than {R0_SEPARABLE_FRACTION} of τ1",
            discharge.first_sample_s
        ));
    }
    let r_dis = discharge.resistance_mohm / 1000.0;
    let power_discharge_w = (r_dis > 0.0)
        .then(|| st.voltage_min_v * (discharge.voltage_before_v - st.voltage_min_v) / r_dis);
    let power_charge_w = charge.as_ref().and_then(|c| {
        let r = c.resistance_mohm / 1000.0;
        (r > 0.0).then(|| st.voltage_max_v * (st.voltage_max_v - c.voltage_before_v) / r)
    });
    Some(Level {
        t_s: o.pre.t,
        ah_from_full: o.q_full.map(|q| q - o.pre.q),
        ah_from_start: -o.pre.q,
        wh_from_full: o.wh_full - o.pre.wh,
        soc_pct: f64::NAN,
        ocv_v: o.pre.v,
        rest_s: o.rest_s,
        temperature_c: o.pre.temp,
        discharge,
        charge,
        charge_reduced,
        power_discharge_w,
        power_charge_w,
        ecm1,
        ecm2,
        r0_separable,
        flags,
    })
}

/// Whether each of a fit's pairs carries at least
/// [`UNRESOLVED_PAIR_FRACTION`] of the pairs' resistance and is
/// determined (its resistance's standard uncertainty at most half of it).
fn resolves_its_pairs(f: &EcmFit) -> bool {
    let total: f64 = f.pairs.iter().map(|p| p.r_ohm.abs()).sum();
    !f.pairs
        .iter()
        .any(|p| p.r_ohm < UNRESOLVED_PAIR_FRACTION * total || p.u_r_ohm > 0.5 * p.r_ohm.abs())
}

/// (depth of discharge %, discharge power W, charge power W, energy Wh).
type PowerPoint = (f64, f64, f64, f64);

/// The depth-of-discharge range where both power targets are met, by
/// linear interpolation between levels, and the energy the pack gave
/// over it (from the levels' energy counts): the method's available
/// energy.
fn available_energy(
    levels: &[Level],
    targets: (f64, f64),
    basis: &SocBasis,
) -> Option<AvailableEnergy> {
    let mut pts: Vec<PowerPoint> = levels
        .iter()
        .filter_map(|l| {
            Some((
                100.0 - l.soc_pct,
                l.power_discharge_w?,
                l.power_charge_w?,
                l.wh_from_full,
            ))
        })
        .collect();
    pts.sort_by(|a, b| a.0.total_cmp(&b.0));
    if pts.len() < 2 {
        return None;
    }
    // Discharge power falls with depth: the deepest depth where it is met.
    // Charge power rises with depth: the shallowest where it is met.
    let cross = |f: &dyn Fn(&PowerPoint) -> f64, target: f64| -> Vec<f64> {
        let mut out = Vec::new();
        for w in pts.windows(2) {
            let (a, b) = (f(&w[0]) - target, f(&w[1]) - target);
            if a == 0.0 {
                out.push(w[0].0);
            }
            if a * b < 0.0 {
                out.push(w[0].0 + (w[1].0 - w[0].0) * a / (a - b));
            }
        }
        out
    };
    let dis_ok_to = if pts.last().is_some_and(|p| p.1 >= targets.0) {
        pts.last()?.0
    } else {
        cross(&|p| p.1, targets.0).into_iter().reduce(f64::max)?
    };
    let chg_ok_from = if pts[0].2 >= targets.1 {
        pts[0].0
    } else {
        cross(&|p| p.2, targets.1).into_iter().reduce(f64::min)?
    };
    if chg_ok_from >= dis_ok_to {
        return Some(AvailableEnergy {
            target_discharge_w: targets.0,
            target_charge_w: targets.1,
            dod_from_pct: chg_ok_from,
            dod_to_pct: chg_ok_from,
            energy_wh: 0.0,
        });
    }
    let wh_at = |dod: f64| -> f64 {
        let k = pts.partition_point(|p| p.0 < dod).clamp(1, pts.len() - 1);
        let (a, b) = (&pts[k - 1], &pts[k]);
        let f = if b.0 > a.0 {
            (dod - a.0) / (b.0 - a.0)
        } else {
            0.0
        };
        a.3 + f * (b.3 - a.3)
    };
    let _ = basis;
    Some(AvailableEnergy {
        target_discharge_w: targets.0,
        target_charge_w: targets.1,
        dod_from_pct: chg_ok_from,
        dod_to_pct: dis_ok_to,
        energy_wh: (wh_at(dis_ok_to) - wh_at(chg_ok_from)).abs(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    const Q: f64 = 14.0;
    const R0: f64 = 0.045;
    const R1: f64 = 0.018;
    const T1: f64 = 30.0;
    const R2: f64 = 0.012;
    const T2: f64 = 600.0;

    fn ocv(soc: f64) -> f64 {
        30.0 + 12.0 * soc
    }

    /// A two-pair Thevenin pack stepped exactly (current held between
    /// samples), logged as the bench logs: at each edge the old current's
    /// last sample, then the new one's at the same time.
    struct Pack {
        t: f64,
        soc: f64,
        v1: f64,
        v2: f64,
        rows: Vec<(f64, f64, f64)>,
    }

    impl Pack {
        fn new() -> Pack {
            Pack {
                t: 0.0,
                soc: 1.0,
                v1: 0.0,
                v2: 0.0,
                rows: Vec::new(),
            }
        }
        fn v(&self, i: f64) -> f64 {
            ocv(self.soc) + i * R0 + self.v1 + self.v2
        }
        fn seg(&mut self, dur: f64, i: f64, dt: f64) {
            self.rows.push((self.t, self.v(i), i));
            for _ in 0..(dur / dt).round() as usize {
                let (a1, a2) = ((-dt / T1).exp(), (-dt / T2).exp());
                self.v1 = self.v1 * a1 + i * R1 * (1.0 - a1);
                self.v2 = self.v2 * a2 + i * R2 * (1.0 - a2);
                self.soc += i * dt / 3600.0 / Q;
                self.t += dt;
                self.rows.push((self.t, self.v(i), i));
            }
        }
        fn level(&mut self, rest: f64) {
            self.seg(rest, 0.0, 1.0);
            self.seg(10.0, -Q, 0.1);
            self.seg(40.0, 0.0, 0.1);
            self.seg(10.0, 0.75 * Q, 0.1);
            self.seg(1080.0, -Q / 3.0, 10.0);
        }
    }

    fn settings() -> Settings {
        Settings {
            voltage_min_v: 30.0,
            voltage_max_v: 42.0,
            rest_current_a: 0.14,
            series: 10,
            rated_ah: Q,
        }
    }

    fn read(rows: &[(f64, f64, f64)], targets: Option<(f64, f64)>) -> Characterization {
        let mut c = Characterizer::new(settings());
        for &(t, v, i) in rows {
            c.push(t, v, i, None);
        }
        c.finish(
            SocBasis {
                capacity_ah: Q,
                source: "rated".into(),
            },
            targets,
        )
    }

    /// The method's resistance over the 10 s pulse in closed form: R0, each
    /// pair's rise over 10 s, and the OCV's own fall as the pulse takes
    /// charge out (12 V per unit of state of charge here).
    #[test]
    fn pulse_resistance_and_power_match_their_closed_forms() {
        let mut p = Pack::new();
        for _ in 0..3 {
            p.level(3600.0);
        }
        p.seg(3600.0, 0.0, 1.0);
        let c = read(&p.rows, None);
        assert_eq!(c.levels.len(), 3);
        let drift = 12.0 * (Q * 10.0 / 3600.0 / Q) / Q;
        let want = R0 + R1 * (1.0 - (-10.0 / T1).exp()) + R2 * (1.0 - (-10.0 / T2).exp()) + drift;
        for l in &c.levels {
            let r = l.discharge.resistance_mohm / 1000.0;
            // (The pairs are not fully relaxed after the 1 h rest: e^(−6)
            // of R2's share remains, a few µΩ.)
            assert!((r / want - 1.0).abs() < 1e-3, "{r} against {want}");
            let p_dis = 30.0 * (l.ocv_v - 30.0) / r;
            assert!((l.power_discharge_w.unwrap() / p_dis - 1.0).abs() < 1e-12);
            // The charge pulse's: V_max·(V_max − OCV_chg)/R_chg.
            let c = l.charge.as_ref().expect("a charge pulse");
            let p_chg = 42.0 * (42.0 - c.voltage_before_v) / (c.resistance_mohm / 1000.0);
            assert!((l.power_charge_w.unwrap() / p_chg - 1.0).abs() < 1e-12);
            // 0.1 s after the edge: R0 and 0.1 s of R1 and R2's rise.
            let (_, r01) = l.discharge.at_delays[0];
            let want01 = R0
                + R1 * (1.0 - (-0.1 / T1).exp())
                + R2 * (1.0 - (-0.1 / T2).exp())
                + 12.0 * (0.1 / 3600.0) / Q;
            assert!(
                (r01 / 1000.0 / want01 - 1.0).abs() < 5e-3,
                "{r01} against {want01}"
            );
            let f = l.ecm2.as_ref().unwrap();
            assert!((f.r0_ohm / R0 - 1.0).abs() < 2e-3, "{f:?}");
            assert!((f.pairs[0].r_ohm / R1 - 1.0).abs() < 5e-3, "{f:?}");
            assert!((f.pairs[1].tau_s / T2 - 1.0).abs() < 1e-2, "{f:?}");
            assert!(l.r0_separable);
            // (No charge in this log: counted from its start, and said.)
            assert_eq!(l.flags.len(), 1, "{:?}", l.flags);
            assert!(l.flags[0].starts_with("no full charge"));
        }
        // A tenth of the capacity apart (C/3 for 18 min, less the pulses'
        // net 35 mAh).
        let step = c.levels[0].soc_pct - c.levels[1].soc_pct;
        assert!(
            (step - (10.0 + 100.0 * 0.25 * Q * 10.0 / 3600.0 / Q)).abs() < 1e-6,
            "{step}"
        );
    }

    /// A rest shorter than five of the slowest time constant (600 s here)
    /// leaves the pack unrelaxed: the level is flagged; an hour is enough.
    #[test]
    fn a_rest_under_five_time_constants_is_flagged() {
        let flagged = |rest: f64| {
            let mut p = Pack::new();
            p.level(rest);
            p.seg(3600.0, 0.0, 1.0);
            let c = read(&p.rows, None);
            c.levels[0]
                .flags
                .iter()
                .any(|f| f.contains("under five of the slowest time constant"))
        };
        assert!(flagged(2000.0));
        assert!(!flagged(3600.0));
    }

    /// A level needs its rest and a short discharge: a pulse after 5 min
    /// of rest, or a 200 s discharge, is none.
    #[test]
    fn short_rests_and_long_discharges_are_no_levels() {
        let mut p = Pack::new();
        p.level(300.0);
        p.seg(3600.0, 0.0, 1.0);
        p.seg(200.0, -Q, 0.1);
        p.seg(3600.0, 0.0, 1.0);
        assert!(read(&p.rows, None).levels.is_empty());
    }

    /// Available energy on a hand-worked table: discharge power met down
    /// to 60 % depth, charge power from 20 %; the energy between them from
    /// the levels' counts.
    #[test]
    fn available_energy_between_the_depths_where_both_targets_are_met() {
        let mk = |dod, pd, pc, wh| table_level(dod, 50.0, pd, pc, wh);
        let levels = vec![
            mk(0.0, 6000.0, 0.0, 0.0),
            mk(40.0, 5000.0, 4000.0, 200.0),
            mk(80.0, 3000.0, 6000.0, 400.0),
        ];
        let basis = SocBasis {
            capacity_ah: Q,
            source: "rated".into(),
        };
        let a = available_energy(&levels, (4000.0, 2000.0), &basis).unwrap();
        // Discharge: 5000 at 40 %, 3000 at 80 %: 4000 met to 60 %.
        assert!((a.dod_to_pct - 60.0).abs() < 1e-9);
        // Charge: 0 at 0 %, 4000 at 40 %: 2000 met from 20 %.
        assert!((a.dod_from_pct - 20.0).abs() < 1e-9);
        // Energy: 300 Wh at 60 %, 100 Wh at 20 %.
        assert!((a.energy_wh - 200.0).abs() < 1e-9);
    }

    /// A level for the table's arithmetic: depth of discharge %, discharge
    /// resistance mΩ, powers W, energy out since full Wh.
    fn table_level(dod: f64, r_mohm: f64, pd: f64, pc: f64, wh: f64) -> Level {
        Level {
            t_s: 0.0,
            ah_from_full: Some(dod / 100.0 * Q),
            ah_from_start: 0.0,
            wh_from_full: wh,
            soc_pct: 100.0 - dod,
            ocv_v: 0.0,
            rest_s: 3600.0,
            temperature_c: None,
            discharge: PulseFigure {
                current_a: -Q,
                duration_s: 10.0,
                voltage_before_v: 0.0,
                resistance_mohm: r_mohm,
                at_delays: Vec::new(),
                first_sample_s: 0.0,
            },
            charge: None,
            charge_reduced: false,
            power_discharge_w: Some(pd),
            power_charge_w: Some(pc),
            ecm1: None,
            ecm2: None,
            r0_separable: true,
            flags: Vec::new(),
        }
    }

    fn basis() -> SocBasis {
        SocBasis {
            capacity_ah: Q,
            source: "rated".into(),
        }
    }

    /// Energy by the trapezoid on the rows between two indices, Wh.
    fn wh_between(rows: &[(f64, f64, f64)], from: usize, to: usize) -> f64 {
        rows[from..=to]
            .windows(2)
            .map(|w| 0.5 * (w[0].1 * w[0].2 + w[1].1 * w[1].2) * (w[1].0 - w[0].0) / 3600.0)
            .sum()
    }

    /// The row index of the last sample at `t` with current `i`.
    fn row_at(rows: &[(f64, f64, f64)], t: f64, i: f64) -> usize {
        rows.iter()
            .rposition(|r| r.0 == t && r.2 == i)
            .expect("a row at that time and current")
    }

    /// A charge longer than the longest pulse is a full charge: the
    /// levels' charge and energy count from its last sample (worked here
    /// from the rows: the current is held between samples, so the
    /// charge is exact and the energy is the trapezoid of V·I).
    #[test]
    fn levels_count_charge_and_energy_from_the_end_of_a_full_charge() {
        let mut p = Pack::new();
        p.soc = 0.9;
        p.seg(1800.0, Q / 3.0, 1.0);
        let full_end = p.t;
        p.level(3600.0);
        p.level(3600.0);
        p.seg(3600.0, 0.0, 1.0);
        let c = read(&p.rows, None);
        assert_eq!(c.levels.len(), 2);
        let full = row_at(&p.rows, full_end, Q / 3.0);
        // Level 1 starts after the rest: nothing out since full.
        let l1 = &c.levels[0];
        assert_eq!(l1.ah_from_full, Some(0.0));
        assert!((l1.soc_pct - 100.0).abs() < 1e-12);
        assert!(l1.flags.iter().all(|f| !f.starts_with("no full charge")));
        // Level 2: the pulses and 18 min at C/3 out.
        let l2 = &c.levels[1];
        let out = Q * 10.0 / 3600.0 - 0.75 * Q * 10.0 / 3600.0 + Q / 3.0 * 1080.0 / 3600.0;
        let got = l2.ah_from_full.expect("counted from full");
        assert!((got - out).abs() < 1e-12, "{got} against {out}");
        assert!((l2.soc_pct - 100.0 * (1.0 - out / Q)).abs() < 1e-9);
        for l in &c.levels {
            let pre = row_at(&p.rows, l.t_s, 0.0);
            let wh = -wh_between(&p.rows, full, pre);
            assert!(
                (l.wh_from_full - wh).abs() < 1e-9,
                "{} against {wh}",
                l.wh_from_full
            );
        }
        assert!(l2.wh_from_full > 1.0);
    }

    /// A charge of exactly the longest pulse (180 s) is a pulse, not a
    /// full charge; a discharge of exactly 180 s is still a level's
    /// pulse, one second more is not.
    #[test]
    fn the_longest_pulse_is_a_pulse() {
        let mut p = Pack::new();
        p.soc = 0.9;
        p.seg(PULSE_MAX_S, Q / 3.0, 1.0);
        p.level(3600.0);
        p.seg(3600.0, 0.0, 1.0);
        let c = read(&p.rows, None);
        assert_eq!(c.levels.len(), 1);
        assert_eq!(c.levels[0].ah_from_full, None);
        for (dur, levels) in [(PULSE_MAX_S, 1), (PULSE_MAX_S + 1.0, 0)] {
            let mut p = Pack::new();
            p.seg(3600.0, 0.0, 1.0);
            p.seg(dur, -Q, 1.0);
            p.seg(600.0, 0.0, 1.0);
            let c = read(&p.rows, None);
            assert_eq!(c.levels.len(), levels, "a {dur} s discharge");
            if let Some(l) = c.levels.first() {
                assert_eq!(l.discharge.duration_s, dur);
            }
        }
    }

    /// The pulse's figures where the sampling misses a delay: two samples
    /// around it, no further apart than half the delay, interpolated
    /// (voltage and current linear in time here, so the interpolation is
    /// exact and the figure is the closed form at the delay).
    #[test]
    fn a_pulse_read_between_its_samples() {
        let v = |t: f64| 39.5 - 0.01 * t;
        let i = |t: f64| -10.0 - 0.1 * t;
        let s = |t: f64, v: f64, i: f64| S {
            t,
            v,
            i,
            temp: None,
            q: 0.0,
            wh: 0.0,
        };
        let mut raw = vec![s(0.0, 40.0, 0.0)];
        for k in 1..=25 {
            let t = f64::from(k) * 0.4;
            raw.push(s(t, v(t), i(t)));
        }
        let f = pulse_figure(&raw, 0, 25).expect("a pulse");
        assert!((f.duration_s - 10.0).abs() < 1e-12);
        assert!((f.first_sample_s - 0.4).abs() < 1e-12);
        // The mean of the 25 samples' currents: −10 − 0.1 × 5.2 s.
        assert!((f.current_a - (-10.52)).abs() < 1e-9, "{}", f.current_a);
        let r = |t: f64| 1000.0 * (v(t) - 40.0) / i(t);
        assert!((f.resistance_mohm - r(10.0)).abs() < 1e-9);
        // 0.1 s: no sample within 5 % and none before it; 1 s between
        // 0.8 and 1.2 s; 2 and 10 s on samples; 18 s past the end.
        let delays: Vec<f64> = f.at_delays.iter().map(|d| d.0).collect();
        assert_eq!(delays, [1.0, 2.0, 10.0]);
        for &(d, got) in &f.at_delays {
            assert!((got - r(d)).abs() < 1e-9, "{d} s: {got} against {}", r(d));
        }
        // Samples 1 s apart around the 1 s delay are too far apart (more
        // than half of it).
        let sparse = vec![
            s(0.0, 40.0, 0.0),
            s(0.5, v(0.5), i(0.5)),
            s(1.5, v(1.5), i(1.5)),
            s(2.0, v(2.0), i(2.0)),
        ];
        let f = pulse_figure(&sparse, 0, 3).expect("a pulse");
        let delays: Vec<f64> = f.at_delays.iter().map(|d| d.0).collect();
        assert_eq!(delays, [2.0]);
        // A pulse from a current already flowing (a second level): ΔV over
        // the change of current, not over the current.
        let mut second = raw.clone();
        second[0].i = -4.0;
        let f = pulse_figure(&second, 0, 25).expect("a pulse");
        let r2 = 1000.0 * (v(10.0) - 40.0) / (i(10.0) + 4.0);
        assert!(
            (f.resistance_mohm - r2).abs() < 1e-9,
            "{} against {r2}",
            f.resistance_mohm
        );
    }

    /// The discharge resistance at a state of charge, linear between the
    /// levels around it, none outside them.
    #[test]
    fn the_discharge_resistance_between_levels() {
        let c = Characterization {
            settings: settings(),
            basis: basis(),
            levels: vec![
                table_level(60.0, 70.0, 1.0, 1.0, 0.0),
                table_level(20.0, 50.0, 1.0, 1.0, 0.0),
                table_level(40.0, 56.0, 1.0, 1.0, 0.0),
            ],
            available_energy: None,
        };
        // SoC 40, 60, 80 % → 70, 56, 50 mΩ.
        let at = |soc: f64| c.discharge_resistance_at(soc);
        assert_eq!(at(40.0), Some(70.0));
        assert_eq!(at(80.0), Some(50.0));
        assert!((at(50.0).unwrap() - 63.0).abs() < 1e-12);
        assert!((at(75.0).unwrap() - 51.5).abs() < 1e-12);
        assert_eq!(at(39.9), None);
        assert_eq!(at(80.1), None);
    }

    /// The circuit's R0 only where the sampling separates it from R1.
    #[test]
    fn the_circuits_r0_only_where_the_sampling_separates_it() {
        let mut p = Pack::new();
        p.level(3600.0);
        p.seg(3600.0, 0.0, 1.0);
        let c = read(&p.rows, None);
        let l = &c.levels[0];
        assert!(l.r0_separable);
        assert_eq!(l.circuit_r0_ohm(1), l.ecm1.as_ref().map(|f| f.r0_ohm));
        assert_eq!(l.circuit_r0_ohm(2), l.ecm2.as_ref().map(|f| f.r0_ohm));
        assert!(l.circuit_r0_ohm(1) != l.circuit_r0_ohm(2));
        let late = Level {
            r0_separable: false,
            ..l.clone()
        };
        assert_eq!(late.circuit_r0_ohm(2), None);
    }

    /// The energy between the two depths where the energy count is not
    /// linear in depth: each end interpolated within its own interval.
    #[test]
    fn available_energy_interpolates_the_energy_within_each_interval() {
        let levels = vec![
            table_level(0.0, 50.0, 6000.0, 2000.0, 0.0),
            table_level(40.0, 50.0, 5000.0, 4000.0, 150.0),
            table_level(80.0, 50.0, 3000.0, 6000.0, 400.0),
        ];
        let a = available_energy(&levels, (4000.0, 2000.0), &basis()).unwrap();
        // Charge power met from 0 % (the first level meets it exactly).
        assert_eq!(a.dod_from_pct, 0.0);
        assert!((a.dod_to_pct - 60.0).abs() < 1e-9);
        // 150 + (400 − 150)/2 at 60 %, 0 at 0 %.
        assert!((a.energy_wh - 275.0).abs() < 1e-9, "{}", a.energy_wh);
        let a = available_energy(&levels, (4000.0, 3000.0), &basis()).unwrap();
        // Charge: 2000 at 0 %, 4000 at 40 %: 3000 from 20 %; 75 Wh there.
        assert!((a.dod_from_pct - 20.0).abs() < 1e-9);
        assert!((a.energy_wh - 200.0).abs() < 1e-9, "{}", a.energy_wh);
    }

    /// Two levels at one state of charge: the reading there comes from
    /// the interval that has a width, never from the zero-width one (0/0).
    #[test]
    fn the_discharge_resistance_where_two_levels_share_a_state_of_charge() {
        let c = Characterization {
            settings: settings(),
            basis: basis(),
            levels: vec![
                table_level(60.0, 70.0, 1.0, 1.0, 0.0),
                table_level(60.0, 70.0, 1.0, 1.0, 0.0),
                table_level(40.0, 56.0, 1.0, 1.0, 0.0),
            ],
            available_energy: None,
        };
        assert_eq!(c.discharge_resistance_at(40.0), Some(70.0));
        assert_eq!(c.discharge_resistance_at(60.0), Some(56.0));
    }

    /// A delay read between two samples no further apart than half of it:
    /// 2 s between samples at 1.6 and 2.4 s (0.8 s apart, under 1 s) is
    /// interpolated; 10 s between 8 and 12 s (4 s apart) too; 10 s
    /// between 4 and 16 s is not (12 s apart, over 5 s), nor 1 s between
    /// 0.5 and 1.6 s.
    #[test]
    fn a_delay_is_read_between_samples_up_to_half_of_it_apart() {
        let v = |t: f64| 39.5 - 0.01 * t;
        let i = |t: f64| -10.0 - 0.1 * t;
        let s = |t: f64| S {
            t,
            v: if t == 0.0 { 40.0 } else { v(t) },
            i: if t == 0.0 { 0.0 } else { i(t) },
            temp: None,
            q: 0.0,
            wh: 0.0,
        };
        let r = |t: f64| 1000.0 * (v(t) - 40.0) / i(t);
        let raw: Vec<S> = [0.0, 0.5, 1.6, 2.4, 8.0, 12.0, 20.0]
            .into_iter()
            .map(s)
            .collect();
        let f = pulse_figure(&raw, 0, raw.len() - 1).expect("a pulse");
        let delays: Vec<f64> = f.at_delays.iter().map(|d| d.0).collect();
        // (18 s between 12 and 20 s: 8 s apart, under 9 s.)
        assert_eq!(delays, [2.0, 10.0, 18.0]);
        for &(d, got) in &f.at_delays {
            assert!((got - r(d)).abs() < 1e-9, "{d} s: {got} against {}", r(d));
        }
        let raw: Vec<S> = [0.0, 4.0, 16.0, 20.0].into_iter().map(s).collect();
        let f = pulse_figure(&raw, 0, raw.len() - 1).expect("a pulse");
        let delays: Vec<f64> = f.at_delays.iter().map(|d| d.0).collect();
        assert_eq!(delays, [18.0]);
    }

    /// A sample with a time, voltage or current that is not a number, or
    /// one earlier than the last, is skipped: the levels read exactly as
    /// from the clean log.
    #[test]
    fn samples_not_numbers_or_back_in_time_are_skipped() {
        let mut p = Pack::new();
        p.level(3600.0);
        p.level(3600.0);
        p.seg(3600.0, 0.0, 1.0);
        let clean = read(&p.rows, None);
        assert_eq!(clean.levels.len(), 2);
        let mut rows = Vec::new();
        for (k, &r) in p.rows.iter().enumerate() {
            rows.push(r);
            // In rests, pulses and relaxations alike.
            if k % 97 == 5 {
                let (t, v, i) = r;
                rows.push((t + 0.05, f64::NAN, -50.0));
                rows.push((t + 0.05, 50.0, f64::NAN));
                rows.push((t + 0.05, f64::INFINITY, 0.0));
                rows.push((f64::NAN, v, i));
                rows.push((t - 0.5, v + 3.0, -50.0));
            }
        }
        let dirty = read(&rows, None);
        assert_eq!(dirty, clean);
    }

    /// A current of exactly the rest threshold, either way, is rest: an
    /// hour at ±0.14 A before the pulse is the level's rest (not a
    /// charge or discharge of an hour).
    #[test]
    fn the_rest_threshold_itself_is_rest() {
        for i in [0.14, -0.14] {
            let mut p = Pack::new();
            p.seg(3600.0, i, 1.0);
            p.seg(10.0, -Q, 0.1);
            p.seg(600.0, 0.0, 1.0);
            let c = read(&p.rows, None);
            assert_eq!(c.levels.len(), 1, "rest at {i} A");
            assert_eq!(c.levels[0].rest_s, 3600.0);
        }
        // Just over it, an hour's charge is a full charge and no rest.
        let mut p = Pack::new();
        p.seg(3600.0, 0.1401, 1.0);
        p.seg(10.0, -Q, 0.1);
        p.seg(600.0, 0.0, 1.0);
        assert!(read(&p.rows, None).levels.is_empty());
    }

    /// A rest of exactly the least rest (600 s) opens a level; a second
    /// less does not.
    #[test]
    fn the_least_rest_opens_a_level() {
        for (rest, n) in [(LEVEL_REST_MIN_S, 1), (LEVEL_REST_MIN_S - 1.0, 0)] {
            let mut p = Pack::new();
            p.seg(60.0, -Q / 3.0, 1.0);
            p.seg(rest, 0.0, 1.0);
            p.seg(10.0, -Q, 0.1);
            p.seg(600.0, 0.0, 1.0);
            let c = read(&p.rows, None);
            assert_eq!(c.levels.len(), n, "after {rest} s of rest");
            // The rest is counted from its own start (60 s into the log).
            if let Some(l) = c.levels.first() {
                assert_eq!(l.rest_s, rest);
            }
        }
    }

    /// The rest between the discharge and the charge pulse may last up to
    /// 300 s; a longer one ends the profile, and the charge after it is
    /// no pulse of the level.
    #[test]
    fn a_charge_pulse_after_the_longest_rest_between() {
        for (between, has_charge) in [
            (PROFILE_REST_MAX_S, true),
            (PROFILE_REST_MAX_S + 1.0, false),
        ] {
            let mut p = Pack::new();
            p.seg(3600.0, 0.0, 1.0);
            p.seg(10.0, -Q, 0.1);
            p.seg(between, 0.0, 1.0);
            p.seg(10.0, 0.75 * Q, 0.1);
            p.seg(1080.0, -Q / 3.0, 10.0);
            p.seg(3600.0, 0.0, 1.0);
            let c = read(&p.rows, None);
            assert_eq!(c.levels.len(), 1);
            assert_eq!(
                c.levels[0].charge.is_some(),
                has_charge,
                "after {between} s between"
            );
        }
    }

    /// The relaxation the circuits are fitted to is the last rest of the
    /// level: a partial discharge interrupted by a short rest drives the
    /// pairs through that rest (its voltages do not count as settled), so
    /// the noise-free model is still fitted to within a microvolt and
    /// returns its own parameters.
    #[test]
    fn only_the_last_rest_of_a_level_is_its_relaxation() {
        let mut p = Pack::new();
        p.seg(3600.0, 0.0, 1.0);
        p.seg(10.0, -Q, 0.1);
        p.seg(40.0, 0.0, 0.1);
        p.seg(10.0, 0.75 * Q, 0.1);
        p.seg(600.0, -Q / 3.0, 10.0);
        p.seg(120.0, 0.0, 1.0);
        p.seg(480.0, -Q / 3.0, 10.0);
        p.seg(3600.0, 0.0, 1.0);
        let c = read(&p.rows, None);
        let f = c.levels[0].ecm2.as_ref().expect("a second-order fit");
        assert!(f.rms_v < 1e-6, "{f:?}");
        assert!((f.r0_ohm / R0 - 1.0).abs() < 2e-3, "{f:?}");
        assert!((f.pairs[1].tau_s / T2 - 1.0).abs() < 1e-2, "{f:?}");
    }

    /// Thinning, checked on every kept sample of a level's window (sampled
    /// every 10 ms at times k/100 s): two
    /// kept samples in one segment are at least max((t − edge)/50, 0.1 s)
    /// apart, and the sample before the later one was not yet that far
    /// (none kept late); no sample is kept twice; and a segment of length
    /// T keeps about 1 + 5 s/0.1 s + 50·ln(T/5 s) samples (the integral of
    /// 1/spacing, less the spacing's rounding up to the sampling: within
    /// 8 %). The window's count is the reading's peak.
    #[test]
    fn a_levels_window_keeps_samples_spaced_by_the_time_since_the_edge() {
        let mut c = Characterizer::new(settings());
        let dt = 0.01;
        // (start, end, current): rest, 10 s pulse, 290 s rest.
        let segs: [(f64, f64, f64); 3] = [
            (0.0, 3600.0, 0.0),
            (3600.0, 3610.0, -Q),
            (3610.0, 3900.0, 0.0),
        ];
        let mut k0 = 0i64;
        for (start, end, i) in segs {
            let n = ((end - start) / dt).round() as i64;
            // A bench row at the edge: the new current at the old time.
            let first = if start == 0.0 { 0 } else { k0 };
            for k in first..=k0 + n {
                let t = k as f64 / 100.0;
                if start == 0.0 && k % 100 != 0 {
                    continue;
                }
                c.push(t, 36.0 + 0.05 * i, i, None);
            }
            k0 += n;
        }
        let o = c.open.as_ref().expect("an open level");
        assert_eq!(c.peak_window(), o.points.len());
        let gap = |t: f64, edge: f64| ((t - edge) / KEEP_PER_EDGE).max(KEEP_SPACING_MIN_S);
        for (edge, end) in [(3600.0, 3610.0), (3610.0, 3900.0)] {
            let kept: Vec<&Point> = o
                .points
                .iter()
                .filter(|p| p.t_s > edge + 1e-9 && p.t_s <= end + 1e-9)
                .collect();
            for w in kept.windows(2) {
                let (a, b) = (w[0].t_s, w[1].t_s);
                if (b - end).abs() < 1e-9 {
                    // (The sample before the next edge is always kept.)
                    continue;
                }
                assert!(b - a >= gap(b, edge) - 1e-9, "{a} → {b} after {edge}");
                // (A sample due exactly at its spacing may go either way
                // on rounding: a nanosecond's slack.)
                assert!(
                    b - dt - a < gap(b - dt, edge) + 1e-9,
                    "{a} → {b} after {edge}: {} was due",
                    b - dt
                );
            }
            let t = end - edge;
            let want = 1.0 + 5.0 / 0.1 + 50.0 * (t / 5.0).ln();
            let n = kept.len() as f64;
            assert!(
                n <= want + 2.0 && n > 0.92 * want,
                "{n} kept over {t} s, about {want}"
            );
        }
        for w in o.points.windows(2) {
            assert!(
                w[1].t_s > w[0].t_s || w[1].current_a != w[0].current_a,
                "{:?} twice",
                w[1]
            );
        }
        // Both sides of the pulse's end are kept: its last sample (the
        // pulse's figure is read there) and the rest's first.
        for i in [-Q, 0.0] {
            assert!(
                o.points
                    .iter()
                    .any(|p| (p.t_s - 3610.0).abs() < 1e-9 && p.current_a == i),
                "no sample at the edge with {i} A"
            );
        }
    }

    /// A second-order fit resolves its pairs when each carries at least
    /// 2 % of the pairs' resistance and its resistance is known to half of
    /// itself: the boundaries of both, and a negative pair.
    #[test]
    fn a_fit_resolves_its_pairs_by_share_and_by_uncertainty() {
        let pair = |r: f64, u: f64| ecm::RcPair {
            r_ohm: r,
            u_r_ohm: u,
            tau_s: 30.0,
            u_tau_s: 1.0,
            c_f: 30.0 / r,
            u_c_f: 1.0,
        };
        let fit = |pairs: Vec<ecm::RcPair>| EcmFit {
            order: 2,
            r0_ohm: 0.02,
            u_r0_ohm: 1e-5,
            pairs,
            settled_v: 36.0,
            ocv_slope_v_per_ah: 0.1,
            rms_v: 1e-4,
            points: 500,
            starts: 5,
            starts_agreeing: 5,
        };
        // 0.2 of 10 mΩ is 2 %: resolved; 0.19 of 9.99 is not.
        assert!(resolves_its_pairs(&fit(vec![
            pair(0.0098, 1e-5),
            pair(0.0002, 1e-6)
        ])));
        assert!(!resolves_its_pairs(&fit(vec![
            pair(0.0098, 1e-5),
            pair(0.00019, 1e-6)
        ])));
        // Known to exactly half of itself: resolved; a little worse: not.
        assert!(resolves_its_pairs(&fit(vec![
            pair(0.008, 0.004),
            pair(0.006, 1e-5)
        ])));
        assert!(!resolves_its_pairs(&fit(vec![
            pair(0.008, 0.0041),
            pair(0.006, 1e-5)
        ])));
        assert!(!resolves_its_pairs(&fit(vec![
            pair(0.008, 1e-5),
            pair(0.006, 0.0031)
        ])));
        // A negative pair carries less than nothing.
        assert!(!resolves_its_pairs(&fit(vec![
            pair(0.012, 1e-5),
            pair(-0.002, 1e-6)
        ])));
    }
}
