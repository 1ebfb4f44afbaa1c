//! Per-group analysis of a pack read group by group: each group's charge
//! to its own cutoff, its share of the mean, the spread of the groups at
//! the end of charge and of discharge, each group's resistance from the
//! pulse steps and its temperature where a sensor sits on it; the weakest
//! group named with the reason.
//!
//! The discharge ends when its first group reaches the cutoff, so only
//! that group's charge to the cutoff is measured outright. Every other
//! group's is estimated by laying its voltage curve on the cutoff group's
//! own (same chemistry, same current, same run): a group k with capacity
//! C_k that started at a state of charge s_k follows
//! V_k(Q) = U(s_k − Q/C_k) − I·R_k, so
//! V_k(Q) = V_w(q + r·Q) + o with r = C_w/C_k, q = C_w·(s_w − s_k) and
//! o = I·(R_w − R_k). The fit finds q, r and o over the discharge (the
//! first [`SKIP_S`] left out, while the polarisation builds), and group k
//! reaches its cutoff where V_w(x) = cutoff − o, at Q = (x − q)/r. Where
//! cutoff − o lies below the cutoff group's last reading, its curve is
//! carried on along its last slope (a few millivolts at most). Our own
//! method; the arithmetic is checked on an independent worked example in
//! the tests and against SciPy's least squares in `scripts/`.

use crate::StepSummary;
use model::groups::{GroupChannels, GroupSample};
use model::procedure::StepType;
use serde::{Deserialize, Serialize};

/// The start of a discharge left out of the fit, s (three time constants
/// of the slower polarisation of a typical cell, common practice).
pub const SKIP_S: f64 = 1800.0;
/// Points the fit uses from each group's curve.
const FIT_POINTS: usize = 200;

/// One group's figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GroupResult {
    pub group: u32,
    /// Charge from the discharge's start to this group's cutoff, Ah.
    pub charge_to_cutoff_ah: Option<f64>,
    /// "measured" (it ended the discharge) or "estimated" (its curve laid
    /// on the cutoff group's).
    pub how: String,
    /// Its charge to the cutoff as a share of the groups' mean, %.
    pub share_of_mean_pct: Option<f64>,
    /// Voltage at the end of the full charge and of the discharge, V.
    pub end_of_charge_v: Option<f64>,
    pub end_of_discharge_v: Option<f64>,
    /// From the pulse steps: ΔV/ΔI at the ends of the first two levels, mΩ.
    pub resistance_mohm: Option<f64>,
    /// The highest reading of a sensor on this group during the discharge.
    pub max_temperature_c: Option<f64>,
    /// The fit's RMS residual, mV (estimated groups).
    pub fit_rms_mv: Option<f64>,
    /// Its capacity against the groups' mean, %, from how fast its state
    /// of charge moved for the same charge (the fit's r = C_w/C_k): unlike
    /// the charge to the cutoff, it does not depend on how full each
    /// group was when the discharge began.
    #[serde(default)]
    pub relative_capacity_pct: Option<f64>,
}

/// The groups of one run.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct GroupsResult {
    /// The discharge the charges to cutoff are of.
    pub step: Option<u32>,
    pub groups: Vec<GroupResult>,
    pub weakest: Option<u32>,
    pub weakest_reason: Option<String>,
    /// The weakest group's share of the mean, %.
    pub weakest_share_pct: Option<f64>,
    /// (highest − lowest) charge to cutoff over the mean, %.
    pub capacity_spread_pct: Option<f64>,
    /// Highest less lowest group at the end of charge and of discharge, mV.
    pub end_of_charge_spread_mv: Option<f64>,
    pub end_of_discharge_spread_mv: Option<f64>,
    /// Temperature inputs: name, place and highest reading in the run.
    pub temperatures: Vec<SensorResult>,
    pub notes: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SensorResult {
    pub channel: u32,
    pub name: String,
    pub place: String,
    pub max_c: Option<f64>,
}

/// One pack sample as the group analysis needs it: time, step, current.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PackPoint {
    pub t_s: f64,
    pub step: u32,
    pub current_a: f64,
}

/// A voltage curve against charge delivered, Q ascending.
#[derive(Debug, Clone)]
pub struct Curve {
    pub q: Vec<f64>,
    pub v: Vec<f64>,
}

impl Curve {
    /// Voltage at charge `x` (linear between points; along the last
    /// slope past the end; `None` before the start).
    pub fn at(&self, x: f64) -> Option<f64> {
        let n = self.q.len();
        if n < 2 || x < self.q[0] {
            return None;
        }
        let i = self.q.partition_point(|&a| a <= x);
        let (a, b) = if i >= n { (n - 2, n - 1) } else { (i - 1, i) };
        let (qa, qb) = (self.q[a], self.q[b]);
        if qb <= qa {
            return Some(self.v[b]);
        }
        Some(self.v[a] + (self.v[b] - self.v[a]) * (x - qa) / (qb - qa))
    }

    /// The charge where the curve falls to `level` (searched from the
    /// end; along the last slope past it).
    pub fn charge_at_level(&self, level: f64) -> Option<f64> {
        let n = self.q.len();
        if n < 2 {
            return None;
        }
        let last = self.v[n - 1];
        if level < last {
            // Carry on along the slope of the last part of the curve.
            let j = self
                .q
                .partition_point(|&a| a < self.q[n - 1] - 0.005 * self.q[n - 1])
                .min(n - 2);
            let slope = (self.v[n - 1] - self.v[j]) / (self.q[n - 1] - self.q[j]);
            if slope >= 0.0 {
                return None;
            }
            return Some(self.q[n - 1] + (level - last) / slope);
        }
        for i in (1..n).rev() {
            if self.v[i - 1] >= level && self.v[i] <= level {
                let (va, vb) = (self.v[i - 1], self.v[i]);
                let f = if va > vb {
                    (va - level) / (va - vb)
                } else {
                    0.0
                };
                return Some(self.q[i - 1] + f * (self.q[i] - self.q[i - 1]));
            }
        }
        None
    }
}

/// The fit of one group's curve on the reference.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Lay {
    pub q: f64,
    pub r: f64,
    pub o: f64,
    pub rms_v: f64,
}

/// Lay `pts` (charge, volts) on `reference`: the (q, r, o) of least
/// squares, by a coarse grid then three finer ones around the best.
pub fn lay_on(reference: &Curve, pts: &[(f64, f64)]) -> Option<Lay> {
    let q_end = *reference.q.last()?;
    if pts.len() < 10 || q_end <= 0.0 {
        return None;
    }
    let cost = |q: f64, r: f64| -> Option<(f64, f64)> {
        let mut d = Vec::with_capacity(pts.len());
        for &(x, v) in pts {
            let at = q + r * x;
            // The reference is not carried on for the fit.
            if at > q_end {
                continue;
            }
            d.push(v - reference.at(at)?);
        }
        if d.len() * 4 < pts.len() * 3 {
            return None;
        }
        let o = d.iter().sum::<f64>() / d.len() as f64;
        let ss = d.iter().map(|e| (e - o) * (e - o)).sum::<f64>() / d.len() as f64;
        Some((ss, o))
    };
    let mut best: Option<(f64, f64, f64, f64)> = None;
    let search =
        |qc: f64, qh: f64, rc: f64, rh: f64, n: i32, best: &mut Option<(f64, f64, f64, f64)>| {
            for i in -n..=n {
                for j in -n..=n {
                    let q = qc + qh * f64::from(i) / f64::from(n);
                    let r = rc + rh * f64::from(j) / f64::from(n);
                    if r <= 0.0 {
                        continue;
                    }
                    if let Some((ss, o)) = cost(q, r) {
                        if best.is_none_or(|b| ss < b.2) {
                            *best = Some((q, r, ss, o));
                        }
                    }
                }
            }
        };
    search(0.1 * q_end, 0.4 * q_end, 1.0, 0.4, 25, &mut best);
    let (mut qh, mut rh) = (0.4 * q_end / 25.0, 0.4 / 25.0);
    for _ in 0..4 {
        let (qc, rc) = best.map(|b| (b.0, b.1))?;
        search(qc, 2.0 * qh, rc, 2.0 * rh, 10, &mut best);
        qh /= 5.0;
        rh /= 5.0;
    }
    best.map(|(q, r, ss, o)| Lay {
        q,
        r,
        o,
        rms_v: ss.sqrt(),
    })
}

/// The charge group k gives to `cutoff_v`, from its lay on the
/// reference.
pub fn charge_to_cutoff(reference: &Curve, lay: &Lay, cutoff_v: f64) -> Option<f64> {
    let x = reference.charge_at_level(cutoff_v - lay.o)?;
    Some((x - lay.q) / lay.r)
}

/// Each group's curve in one discharge: charge delivered (Ah, positive)
/// at each group scan, from the pack's current integrated by trapezoids.
fn curves_of(step: u32, pack: &[PackPoint], groups: &[&GroupSample]) -> (Vec<f64>, Vec<f64>) {
    let pts: Vec<&PackPoint> = pack.iter().filter(|p| p.step == step).collect();
    let mut q_at = Vec::with_capacity(pts.len());
    let mut q = 0.0;
    for (i, p) in pts.iter().enumerate() {
        if i > 0 {
            let a = pts[i - 1];
            q += -0.5 * (a.current_a + p.current_a) * (p.t_s - a.t_s) / 3600.0;
        }
        q_at.push((p.t_s, q));
    }
    let mut qs = Vec::with_capacity(groups.len());
    let mut ts = Vec::with_capacity(groups.len());
    for g in groups {
        let i = q_at.partition_point(|&(t, _)| t < g.t_s - 1e-6);
        let Some(&(t, qv)) = q_at.get(i) else { break };
        if (t - g.t_s).abs() > 1e-3 {
            continue;
        }
        qs.push(qv);
        ts.push(g.t_s);
    }
    (qs, ts)
}

/// What the analysis of a run's groups needs.
pub struct GroupInputs<'a> {
    pub channels: &'a GroupChannels,
    pub pack: &'a [PackPoint],
    pub groups: &'a [GroupSample],
    pub steps: &'a [StepSummary],
    /// The capacity discharge, if the run has one.
    pub capacity_step: Option<u32>,
}

/// Analyse a run's groups.
pub fn analyze(x: &GroupInputs<'_>) -> GroupsResult {
    let n = x.channels.groups();
    let mut out = GroupsResult {
        step: x.capacity_step,
        groups: (1..=n as u32)
            .map(|g| GroupResult {
                group: g,
                charge_to_cutoff_ah: None,
                how: String::new(),
                share_of_mean_pct: None,
                end_of_charge_v: None,
                end_of_discharge_v: None,
                resistance_mohm: None,
                max_temperature_c: None,
                fit_rms_mv: None,
                relative_capacity_pct: None,
            })
            .collect(),
        ..GroupsResult::default()
    };
    let rows_of = |step: u32| -> Vec<&GroupSample> {
        x.groups
            .iter()
            .filter(|g| g.step == step && g.voltage_v.len() == n)
            .collect()
    };
    // End of charge: the last charge step before the capacity step.
    let cap = x.capacity_step;
    let charge = x
        .steps
        .iter()
        .rev()
        .find(|s| s.kind == StepType::Charge && cap.is_none_or(|c| s.step < c));
    if let Some(last) = charge.and_then(|c| rows_of(c.step).last().copied()) {
        for (k, r) in out.groups.iter_mut().enumerate() {
            r.end_of_charge_v = Some(last.voltage_v[k]);
        }
        out.end_of_charge_spread_mv = spread_mv(&last.voltage_v);
    }
    resistance(x, &mut out, n);
    sensors(x, &mut out);
    let Some(cs) = cap else {
        out.notes
            .push("no capacity discharge: no group's charge to the cutoff".into());
        return out;
    };
    let rows = rows_of(cs);
    let Some(last) = rows.last().copied() else {
        out.notes.push(format!("step {cs} has no group readings"));
        return out;
    };
    for (k, r) in out.groups.iter_mut().enumerate() {
        r.end_of_discharge_v = Some(last.voltage_v[k]);
    }
    out.end_of_discharge_spread_mv = spread_mv(&last.voltage_v);
    let ended_on_group = x
        .steps
        .iter()
        .find(|s| s.step == cs)
        .and_then(|s| s.end_kind)
        == Some(model::end::EndKind::GroupVoltageBelow);
    let (w, cutoff) = match last
        .voltage_v
        .iter()
        .enumerate()
        .min_by(|a, b| a.1.total_cmp(b.1))
    {
        Some((w, &v)) => (w, v),
        None => return out,
    };
    if !ended_on_group {
        out.notes.push(format!(
            "step {cs} did not end on a group reaching its cutoff: no group's charge to the cutoff"
        ));
        return out;
    }
    let (qs, ts) = curves_of(cs, x.pack, &rows);
    if qs.len() < 20 {
        out.notes.push(format!(
            "step {cs}: too few group readings for the analysis"
        ));
        return out;
    }
    let by_t = |t: f64| rows.iter().find(|g| (g.t_s - t).abs() < 1e-6);
    let series = |k: usize| -> Vec<(f64, f64)> {
        qs.iter()
            .zip(&ts)
            .filter_map(|(&q, &t)| by_t(t).map(|g| (q, g.voltage_v[k])))
            .collect()
    };
    let refs = series(w);
    let reference = Curve {
        q: refs.iter().map(|p| p.0).collect(),
        v: refs.iter().map(|p| p.1).collect(),
    };
    let q_end = *reference.q.last().unwrap_or(&0.0);
    let t0 = ts.first().copied().unwrap_or(0.0);
    out.groups[w].charge_to_cutoff_ah = Some(q_end);
    out.groups[w].how = "measured".into();
    // Capacities against the cutoff group's (1 for itself).
    let mut rel = vec![None; n];
    rel[w] = Some(1.0);
    for k in (0..n).filter(|&k| k != w) {
        let pts: Vec<(f64, f64)> = series(k)
            .into_iter()
            .zip(&ts)
            .filter(|(_, &t)| t - t0 >= SKIP_S)
            .map(|(p, _)| p)
            .collect();
        let step_by = (pts.len() / FIT_POINTS).max(1);
        let thin: Vec<(f64, f64)> = pts.iter().step_by(step_by).copied().collect();
        match lay_on(&reference, &thin) {
            Some(lay) => {
                let r = &mut out.groups[k];
                r.charge_to_cutoff_ah = charge_to_cutoff(&reference, &lay, cutoff);
                r.how = "estimated".into();
                r.fit_rms_mv = Some(lay.rms_v * 1000.0);
                rel[k] = Some(1.0 / lay.r);
            }
            None => {
                out.groups[k].how =
                    "not estimated (its curve does not lie on the cutoff group's)".into()
            }
        }
    }
    if rel.iter().all(Option::is_some) {
        let mean = rel.iter().flatten().sum::<f64>() / n as f64;
        for (g, c) in out.groups.iter_mut().zip(&rel) {
            g.relative_capacity_pct = c.map(|c| c / mean * 100.0);
        }
    }
    shares(&mut out, w);
    out
}

fn spread_mv(v: &[f64]) -> Option<f64> {
    let hi = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let lo = v.iter().copied().fold(f64::INFINITY, f64::min);
    (hi.is_finite() && lo.is_finite()).then_some((hi - lo) * 1000.0)
}

/// Shares of the mean, the spread, the weakest group and why.
fn shares(out: &mut GroupsResult, ended: usize) {
    let caps: Vec<f64> = out
        .groups
        .iter()
        .filter_map(|g| g.charge_to_cutoff_ah)
        .collect();
    if caps.len() != out.groups.len() || caps.is_empty() {
        return;
    }
    let mean = caps.iter().sum::<f64>() / caps.len() as f64;
    for g in &mut out.groups {
        g.share_of_mean_pct = g.charge_to_cutoff_ah.map(|c| c / mean * 100.0);
    }
    let hi = caps.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let lo = caps.iter().copied().fold(f64::INFINITY, f64::min);
    out.capacity_spread_pct = Some((hi - lo) / mean * 100.0);
    let Some(weak) = out
        .groups
        .iter()
        .min_by(|a, b| {
            a.charge_to_cutoff_ah
                .unwrap_or(f64::INFINITY)
                .total_cmp(&b.charge_to_cutoff_ah.unwrap_or(f64::INFINITY))
        })
        .cloned()
    else {
        return;
    };
    let share = weak.share_of_mean_pct.unwrap_or(100.0);
    out.weakest = Some(weak.group);
    out.weakest_share_pct = Some(share);
    let mut why = format!(
        "group {} gives {:.1} % of the mean group's charge to the cutoff ({:.3} Ah against {:.3} Ah)",
        weak.group,
        share,
        weak.charge_to_cutoff_ah.unwrap_or(0.0),
        mean
    );
    if let Some(c) = weak.relative_capacity_pct {
        why.push_str(&format!(
            "; its capacity is about {c:.1} % of the mean (from its curve's slope)"
        ));
    }
    if weak.group as usize == ended + 1 {
        why.push_str(&format!(
            "; it ended the discharge at {:.3} V while the others averaged {:.3} V",
            weak.end_of_discharge_v.unwrap_or(f64::NAN),
            mean_of_others(&out.groups, weak.group, |g| g.end_of_discharge_v)
        ));
    }
    let rs: Vec<f64> = out
        .groups
        .iter()
        .filter_map(|g| g.resistance_mohm)
        .collect();
    if let (Some(r), false) = (weak.resistance_mohm, rs.is_empty()) {
        let m = mean_of_others(&out.groups, weak.group, |g| g.resistance_mohm);
        if r > 1.1 * m {
            why.push_str(&format!(
                "; its resistance is {r:.2} mOhm against {m:.2} mOhm for the others"
            ));
        }
    }
    out.weakest_reason = Some(why);
}

fn mean_of_others(gs: &[GroupResult], skip: u32, f: impl Fn(&GroupResult) -> Option<f64>) -> f64 {
    let v: Vec<f64> = gs
        .iter()
        .filter(|g| g.group != skip)
        .filter_map(f)
        .collect();
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

/// Each group's resistance from the first pulse step: ΔV/ΔI between the
/// ends of its first two current levels (the two-level scheme, applied
/// to each group's own voltage).
fn resistance(x: &GroupInputs<'_>, out: &mut GroupsResult, n: usize) {
    let Some(p) = x.steps.iter().find(|s| s.kind == StepType::Pulse) else {
        return;
    };
    let pack: Vec<&PackPoint> = x.pack.iter().filter(|s| s.step == p.step).collect();
    let rows: Vec<&GroupSample> = x
        .groups
        .iter()
        .filter(|g| g.step == p.step && g.voltage_v.len() == n)
        .collect();
    // The level edges: where the current jumps by more than 10 % of the
    // largest current in the step.
    let imax = pack.iter().map(|s| s.current_a.abs()).fold(0.0, f64::max);
    let mut ends: Vec<usize> = Vec::new();
    for i in 1..pack.len() {
        if (pack[i].current_a - pack[i - 1].current_a).abs() > 0.1 * imax {
            ends.push(i - 1);
        }
    }
    ends.push(pack.len().saturating_sub(1));
    let (Some(&a), Some(&b)) = (ends.first(), ends.get(1)) else {
        return;
    };
    let (pa, pb) = (pack[a], pack[b]);
    let di = pa.current_a - pb.current_a;
    if di.abs() < 1e-6 {
        return;
    }
    let at = |t: f64| rows.iter().find(|g| (g.t_s - t).abs() < 1e-6);
    let (Some(ga), Some(gb)) = (at(pa.t_s), at(pb.t_s)) else {
        return;
    };
    for (k, r) in out.groups.iter_mut().enumerate() {
        r.resistance_mohm = Some((ga.voltage_v[k] - gb.voltage_v[k]) / di * 1000.0);
    }
}

/// The temperature inputs: each one's highest reading, and each group's
/// sensor's highest during the capacity discharge.
fn sensors(x: &GroupInputs<'_>, out: &mut GroupsResult) {
    for (i, tc) in x.channels.temperatures.iter().enumerate() {
        let max_all = x
            .groups
            .iter()
            .filter_map(|g| g.temperature_c.get(i).copied().flatten())
            .fold(None, |m: Option<f64>, t| Some(m.map_or(t, |m| m.max(t))));
        out.temperatures.push(SensorResult {
            channel: tc.channel,
            name: tc.name.clone(),
            place: tc.place.clone(),
            max_c: max_all,
        });
        if let Some(g) = tc.group {
            let during = x
                .groups
                .iter()
                .filter(|r| Some(r.step) == x.capacity_step)
                .filter_map(|r| r.temperature_c.get(i).copied().flatten())
                .fold(None, |m: Option<f64>, t| Some(m.map_or(t, |m| m.max(t))));
            if let Some(r) = out.groups.get_mut(g as usize - 1) {
                r.max_temperature_c = during;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// An open-circuit curve of our own for the worked example (not a
    /// chemistry's table): U(s) = 3.0 + 1.2·s − 0.25·e^(−12·s) + 0.1·s³.
    fn u(s: f64) -> f64 {
        3.0 + 1.2 * s - 0.25 * (-12.0 * s).exp() + 0.1 * s.powi(3)
    }

    /// Worked example computed independently (by the closed form, not by
    /// the fit): two groups on a 2 A discharge; the reference of 8.8 Ah
    /// starts full (s = 1.0) with 12 mΩ, group k of 10.0 Ah starts at
    /// s = 0.95 with 10 mΩ. The cutoff is 3.0 V under load.
    ///
    /// The reference reaches the cutoff where U(s) = 3.0 + 2·0.012 = 3.024 V;
    /// group k where U(s) = 3.0 + 2·0.010 = 3.020 V. Solving U(s) = L by
    /// bisection (independently of the fit below) gives s_w and s_k; group
    /// k's charge to its cutoff is 10.0·(0.95 − s_k) Ah.
    #[test]
    fn laying_a_curve_on_the_reference_matches_the_worked_example() {
        let i = 2.0;
        let (cw, sw0, rw) = (8.8, 1.0, 0.012);
        let (ck, sk0, rk) = (10.0, 0.95, 0.010);
        let solve = |level: f64| {
            let (mut lo, mut hi) = (0.0, 1.0);
            for _ in 0..80 {
                let m = 0.5 * (lo + hi);
                if u(m) > level {
                    hi = m;
                } else {
                    lo = m;
                }
            }
            0.5 * (lo + hi)
        };
        let s_w = solve(3.0 + i * rw);
        let s_k = solve(3.0 + i * rk);
        let q_w = cw * (sw0 - s_w);
        let want_k = ck * (sk0 - s_k);
        // The curves, sampled every 0.01 Ah like a 1 Hz log at ~36 A·s.
        let mut reference = Curve {
            q: Vec::new(),
            v: Vec::new(),
        };
        let mut pts = Vec::new();
        let mut q = 0.0;
        while q <= q_w + 1e-12 {
            reference.q.push(q);
            reference.v.push(u(sw0 - q / cw) - i * rw);
            pts.push((q, u(sk0 - q / ck) - i * rk));
            q += 0.01;
        }
        let lay = lay_on(&reference, &pts[60..]).expect("lay");
        // r = C_w/C_k, q = C_w·(s_w − s_k), o = I·(R_w − R_k).
        assert!((lay.r - cw / ck).abs() < 2e-3, "{lay:?}");
        assert!((lay.q - cw * (sw0 - sk0)).abs() < 0.02, "{lay:?}");
        assert!((lay.o - i * (rw - rk)).abs() < 5e-4, "{lay:?}");
        let got = charge_to_cutoff(&reference, &lay, 3.0).expect("charge");
        assert!(
            (got / want_k - 1.0).abs() < 0.003,
            "estimated {got:.4} Ah against the worked example's {want_k:.4} Ah"
        );
        // And the reference's own figure is its measured end.
        assert!((q_w - reference.q.last().copied().unwrap_or(0.0)).abs() < 0.011);
    }

    #[test]
    fn a_curve_is_read_between_and_past_its_points() {
        let c = Curve {
            q: vec![0.0, 1.0, 2.0],
            v: vec![4.0, 3.5, 3.0],
        };
        assert_eq!(c.at(0.5), Some(3.75));
        // Five points: past the end along the last two (3.0 → 2.0 V per
        // Ah from 3 to 4 Ah): 1.5 V at 4.5 Ah.
        let five = Curve {
            q: vec![0.0, 1.0, 2.0, 3.0, 4.0],
            v: vec![4.0, 3.8, 3.5, 3.0, 2.0],
        };
        assert_eq!(five.at(4.5), Some(1.5));
        assert_eq!(five.at(2.5), Some(3.25));
        assert_eq!(c.at(-0.1), None);
        assert!((c.charge_at_level(3.25).unwrap() - 1.5).abs() < 1e-12);
        // Past the end along the last slope.
        assert!((c.charge_at_level(2.9).unwrap() - 2.2).abs() < 1e-9);
    }

    fn summary(step: u32, kind: &str, end: &str) -> StepSummary {
        serde_json::from_value(serde_json::json!({
            "step": step, "phase": "p", "cycle": 1, "kind": kind, "name": null,
            "samples": 10, "start_s": 0.0, "duration_s": 10.0, "charge_ah": 0.0,
            "energy_wh": 0.0, "charge_in_ah": 0.0, "charge_out_ah": 0.0,
            "energy_in_wh": 0.0, "energy_out_wh": 0.0, "start_voltage_v": null,
            "end_voltage_v": null, "min_voltage_v": null, "max_voltage_v": null,
            "mean_current_a": null, "max_temperature_c": null, "end_kind": end,
            "end_reason": null
        }))
        .unwrap()
    }

    /// The three groups' run: channels, pack points, group rows, step
    /// summaries, and the charge when group 1 reached 3.0 V.
    type Run = (
        GroupChannels,
        Vec<PackPoint>,
        Vec<GroupSample>,
        Vec<StepSummary>,
        f64,
    );

    fn three_group_run(groups: &[(f64, f64, f64); 3], i: f64) -> Run {
        let channels = GroupChannels {
            wiring: model::groups::Wiring::Direct,
            voltage: vec![101, 102, 103],
            temperatures: vec![model::groups::TemperatureChannel {
                channel: 201,
                name: "surface".into(),
                place: "group 2".into(),
                group: Some(2),
                max_c: None,
            }],
        };
        let mut pack = Vec::new();
        let mut rows = Vec::new();
        let mut row = |t: f64, step: u32, i_a: f64, v: Vec<f64>, temp: f64| {
            pack.push(PackPoint {
                t_s: t,
                step,
                current_a: i_a,
            });
            rows.push(GroupSample {
                t_s: t,
                step,
                cycle: 1,
                voltage_v: v,
                temperature_c: vec![Some(temp)],
                inferred: None,
            });
        };
        // Step 1: the end of the charge.
        row(0.0, 1, 0.5, vec![4.19, 4.18, 4.2], 35.0);
        row(1.0, 1, 0.3, vec![4.2, 4.19, 4.205], 40.0);
        // Step 2: two levels.
        for k in 0..20 {
            let ia = if k < 10 { -1.0 } else { -3.0 };
            let v = groups.iter().map(|g| 3.8 + ia * g.2).collect();
            row(100.0 + f64::from(k), 2, ia, v, 30.0);
        }
        // Step 3: the discharge until group 1 reaches 3.0 V.
        let mut k = 0;
        loop {
            let q = 0.01 * f64::from(k);
            let v: Vec<f64> = groups
                .iter()
                .map(|&(c, s0, r)| u(s0 - q / c) - i * r)
                .collect();
            let t = 1000.0 + 18.0 * f64::from(k);
            row(t, 3, -i, v.clone(), 25.0 + 6.0 * q / 9.0);
            if v[0] <= 3.0 {
                break;
            }
            k += 1;
        }
        let steps = vec![
            summary(1, "charge", "current_below"),
            summary(2, "pulse", "levels_done"),
            summary(3, "discharge", "group_voltage_below"),
        ];
        (channels, pack, rows, steps, 0.01 * f64::from(k))
    }

    /// A whole run of three groups worked from the closed form: each group
    /// k follows V_k(Q) = U(s_k − Q/C_k) − I·R_k on a 2 A discharge
    /// sampled every 18 s (0.01 Ah). Group 1 (8.8 Ah, full, 12 mΩ) ends
    /// it at 3.0 V; groups 2 (10 Ah from 95 %, 10 mΩ) and 3 (10 Ah, full,
    /// 10 mΩ) reach their cutoff where U(s) = 3.02 V, found by bisection
    /// here. A pulse of 1 A then 3 A gives each group's R; a sensor on
    /// group 2 reads 40 °C in the charge and 31 °C at most in the
    /// discharge; the charge ends at 4.200, 4.190 and 4.205 V (15 mV).
    #[test]
    fn three_groups_worked_from_the_closed_form() {
        let i = 2.0;
        let groups = [(8.8, 1.0, 0.012), (10.0, 0.95, 0.010), (10.0, 1.0, 0.010)];
        let solve = |level: f64| {
            let (mut lo, mut hi) = (0.0, 1.0);
            for _ in 0..80 {
                let m = 0.5 * (lo + hi);
                if u(m) > level {
                    hi = m
                } else {
                    lo = m
                }
            }
            0.5 * (lo + hi)
        };
        let (channels, pack, rows, steps, q_end) = three_group_run(&groups, i);
        let g = analyze(&GroupInputs {
            channels: &channels,
            pack: &pack,
            groups: &rows,
            steps: &steps,
            capacity_step: Some(3),
        });
        let want = [
            q_end,
            10.0 * (0.95 - solve(3.0 + i * 0.010)),
            10.0 * (1.0 - solve(3.0 + i * 0.010)),
        ];
        for (r, w) in g.groups.iter().zip(want) {
            let got = r.charge_to_cutoff_ah.unwrap();
            assert!(
                (got / w - 1.0).abs() < 0.003,
                "group {}: {got} against {w}",
                r.group
            );
        }
        assert_eq!(g.groups[0].how, "measured");
        assert_eq!(g.groups[1].how, "estimated");
        assert!(g.groups[1].fit_rms_mv.unwrap() < 2.0);
        // Shares and spread from the figures found.
        let caps: Vec<f64> = g
            .groups
            .iter()
            .map(|r| r.charge_to_cutoff_ah.unwrap())
            .collect();
        let mean = caps.iter().sum::<f64>() / 3.0;
        for (r, c) in g.groups.iter().zip(&caps) {
            assert!((r.share_of_mean_pct.unwrap() - c / mean * 100.0).abs() < 1e-9);
        }
        let (hi, lo) = (
            caps.iter().copied().fold(0.0, f64::max),
            caps.iter().copied().fold(f64::INFINITY, f64::min),
        );
        assert!((g.capacity_spread_pct.unwrap() - (hi - lo) / mean * 100.0).abs() < 1e-9);
        assert_eq!(g.weakest, Some(1));
        let why = g.weakest_reason.as_deref().unwrap();
        assert!(why.starts_with("group 1 gives"), "{why}");
        assert!(why.contains("it ended the discharge at"), "{why}");
        assert!(
            why.contains("its resistance is 12.00 mOhm against 10.00 mOhm"),
            "{why}"
        );
        // Relative capacities: 1, 10/8.8, 10/8.8 against their mean.
        let rel = [1.0, 10.0 / 8.8, 10.0 / 8.8];
        let rm = rel.iter().sum::<f64>() / 3.0;
        for (r, c) in g.groups.iter().zip(rel) {
            assert!(
                (r.relative_capacity_pct.unwrap() - c / rm * 100.0).abs() < 0.3,
                "{r:?}"
            );
        }
        // Each group's resistance from the pulse: R_k exactly.
        for (r, (_, _, rk)) in g.groups.iter().zip(groups) {
            assert!(
                (r.resistance_mohm.unwrap() - rk * 1000.0).abs() < 1e-9,
                "{r:?}"
            );
        }
        // End of charge and discharge, spreads, sensors.
        assert_eq!(g.groups[2].end_of_charge_v, Some(4.205));
        assert!((g.end_of_charge_spread_mv.unwrap() - 15.0).abs() < 1e-9);
        let last = rows.last().unwrap();
        let eod = (last.voltage_v.iter().copied().fold(0.0, f64::max)
            - last.voltage_v.iter().copied().fold(f64::INFINITY, f64::min))
            * 1000.0;
        assert!((g.end_of_discharge_spread_mv.unwrap() - eod).abs() < 1e-9);
        assert_eq!(g.groups[0].end_of_discharge_v, Some(last.voltage_v[0]));
        assert_eq!(g.temperatures[0].max_c, Some(40.0));
        assert_eq!(
            (g.temperatures[0].channel, g.temperatures[0].name.as_str()),
            (201, "surface")
        );
        let t2 = g.groups[1].max_temperature_c.unwrap();
        assert!((t2 - (25.0 + 6.0 * q_end / 9.0)).abs() < 1e-9, "{t2}");
        assert_eq!(g.groups[0].max_temperature_c, None);
    }

    #[test]
    fn without_a_capacity_step_ended_by_a_group_no_charges_are_taken() {
        let groups = [(8.8, 1.0, 0.012), (10.0, 0.95, 0.010), (10.0, 1.0, 0.010)];
        let (channels, pack, rows, steps, _) = three_group_run(&groups, 2.0);
        // Without a capacity step, or one that did not end on a group:
        // the charges are not taken, and said.
        let none = analyze(&GroupInputs {
            channels: &channels,
            pack: &pack,
            groups: &rows,
            steps: &steps,
            capacity_step: None,
        });
        assert!(none.groups.iter().all(|r| r.charge_to_cutoff_ah.is_none()));
        assert!(none.notes[0].contains("no capacity discharge"));
        let steps2 = [
            steps[0].clone(),
            steps[1].clone(),
            summary(3, "discharge", "voltage_below"),
        ];
        let off = analyze(&GroupInputs {
            channels: &channels,
            pack: &pack,
            groups: &rows,
            steps: &steps2,
            capacity_step: Some(3),
        });
        assert!(
            off.notes[0].contains("did not end on a group"),
            "{:?}",
            off.notes
        );
        assert!(off.groups.iter().all(|r| r.charge_to_cutoff_ah.is_none()));
    }

    fn result(group: u32, charge_ah: f64, r_mohm: f64) -> GroupResult {
        GroupResult {
            group,
            charge_to_cutoff_ah: Some(charge_ah),
            how: "measured".into(),
            share_of_mean_pct: None,
            end_of_charge_v: None,
            end_of_discharge_v: None,
            resistance_mohm: Some(r_mohm),
            max_temperature_c: None,
            fit_rms_mv: None,
            relative_capacity_pct: None,
        }
    }

    /// The weakest group's reason names its resistance only when it is
    /// more than 1.1 times the others' mean: 10.9 mΩ against 10 is not
    /// named, 11.2 is.
    #[test]
    fn the_weakest_groups_resistance_is_named_only_when_it_is_high() {
        for (r, named) in [(10.9, false), (11.2, true)] {
            let mut out = GroupsResult {
                step: Some(3),
                groups: vec![
                    result(1, 9.0, r),
                    result(2, 10.0, 10.0),
                    result(3, 10.2, 10.0),
                ],
                ..GroupsResult::default()
            };
            // (Group 4 ended the discharge: none of these.)
            shares(&mut out, 3);
            let why = out.weakest_reason.expect("a weakest group");
            assert_eq!(why.contains("its resistance is"), named, "{why}");
            assert!(!why.contains("ended the discharge"), "{why}");
        }
    }

    /// A curve is read from its first point on (none before it), linearly
    /// between points and along its last slope past its end.
    #[test]
    fn a_curve_is_read_from_its_start_and_past_its_end_along_its_last_slope() {
        let c = Curve {
            q: vec![1.0, 2.0, 3.0],
            v: vec![4.0, 3.8, 3.4],
        };
        assert_eq!(c.at(0.999), None);
        assert_eq!(c.at(0.0), None);
        assert_eq!(c.at(1.0), Some(4.0));
        assert!((c.at(1.5).unwrap() - 3.9).abs() < 1e-12);
        assert!((c.at(2.5).unwrap() - 3.6).abs() < 1e-12);
        assert!((c.at(3.5).unwrap() - 3.2).abs() < 1e-12);
        // Two points are a curve; one is not.
        let two = Curve {
            q: vec![1.0, 2.0],
            v: vec![4.0, 3.8],
        };
        assert!((two.at(1.5).unwrap() - 3.9).abs() < 1e-12);
        let one = Curve {
            q: vec![1.0],
            v: vec![4.0],
        };
        assert_eq!(one.at(1.0), None);
    }

    /// Where a curve rises again at its end (a bump), a level equal to its
    /// last voltage is where the curve first falls through it, searched
    /// from the end, not carried on along a slope that does not fall.
    #[test]
    fn a_level_at_the_last_voltage_of_a_curve_that_rises_at_its_end() {
        let c = Curve {
            q: vec![0.0, 1.0, 2.0],
            v: vec![4.0, 3.5, 3.6],
        };
        let q = c.charge_at_level(3.6).expect("a crossing");
        assert!((q - 0.8).abs() < 1e-12, "{q}");
        // Below the last voltage, along a rising end: none.
        assert_eq!(c.charge_at_level(3.4), None);
    }

    /// A group's points that land past the reference's end are left out
    /// of the lay (the reference is not carried on): a group whose curve
    /// bends down past there (a knee the reference does not have) is
    /// still laid exactly, q = 0.5 Ah, r = 1.1, o = 10 mV.
    #[test]
    fn a_lay_leaves_out_what_falls_past_the_reference() {
        let f = |q: f64| 3.3 + 0.9 * (-q / 3.0).exp() - 0.02 * q;
        let reference = Curve {
            q: (0..=200).map(|k| f64::from(k) * 0.05).collect(),
            v: (0..=200).map(|k| f(f64::from(k) * 0.05)).collect(),
        };
        let (q0, r, o) = (0.5, 1.1, 0.010);
        let pts: Vec<(f64, f64)> = (0..=200)
            .map(|k| {
                let x = f64::from(k) * 0.05;
                let at = q0 + r * x;
                let knee = if at > 10.0 { 0.3 * (at - 10.0) } else { 0.0 };
                (x, f(at) + o - knee)
            })
            .collect();
        let lay = lay_on(&reference, &pts).expect("a lay");
        assert!((lay.q - q0).abs() < 1e-3, "{lay:?}");
        // (The search's grid and the reference's linear reading between
        // its points, 50 mAh apart, leave about 10 µV.)
        assert!((lay.r - r).abs() < 5e-4, "{lay:?}");
        assert!((lay.o - o).abs() < 2e-4, "{lay:?}");
        assert!(lay.rms_v < 5e-5, "{lay:?}");
    }

    /// A lay needs three quarters of the group's points on the reference:
    /// a group of 40 Ah laid on a reference of 10 Ah has none (at the
    /// search's narrowest scale, 0.6, and its lowest start, −3 Ah, under
    /// 55 % of its points land on it).
    #[test]
    fn no_lay_with_too_few_points_on_the_reference() {
        let f = |q: f64| 3.3 + 0.9 * (-q / 3.0).exp() - 0.02 * q;
        let reference = Curve {
            q: (0..=200).map(|k| f64::from(k) * 0.05).collect(),
            v: (0..=200).map(|k| f(f64::from(k) * 0.05)).collect(),
        };
        let pts: Vec<(f64, f64)> = (0..=200)
            .map(|k| {
                let x = f64::from(k) * 0.2;
                (x, f(0.25 * x))
            })
            .collect();
        assert_eq!(lay_on(&reference, &pts), None);
    }

    /// Below its last voltage a curve is carried on along the slope of its
    /// last 0.5 % of charge, not of the whole nor of its last interval: a
    /// knee v = 4 − 0.05·q − 10·(q − 9.9)² past 9.9 Ah, 10 Ah sampled
    /// every 20 mAh. The last 0.5 % (50 mAh) begins at the point at 9.96 Ah
    /// (3.466 V; 3.400 V at 10 Ah): −1.65 V/Ah, so 3.235 V is 0.1 Ah on.
    #[test]
    fn a_curve_is_carried_on_along_the_slope_of_its_end() {
        let v = |q: f64| 4.0 - 0.05 * q - 10.0 * (q - 9.9).max(0.0).powi(2);
        let c = Curve {
            q: (0..=500).map(|k| f64::from(k) * 0.02).collect(),
            v: (0..=500).map(|k| v(f64::from(k) * 0.02)).collect(),
        };
        let q = c.charge_at_level(3.4 - 0.165).expect("carried on");
        assert!((q - 10.1).abs() < 1e-9, "{q}");
    }

    /// Each group scan takes the pack's charge at the pack sample of its
    /// own time (up to a millisecond before it); a scan with none is left
    /// out (one 0.5 ms before a sample is read there, 2 ms after is not), and
    /// the reading stops at the first scan past the pack's samples.
    #[test]
    fn group_scans_take_the_charge_at_their_own_pack_sample() {
        let pack: Vec<PackPoint> = (0..=4)
            .map(|k| PackPoint {
                t_s: 10.0 * f64::from(k),
                step: 3,
                current_a: -3.6,
            })
            .chain([PackPoint {
                t_s: 45.0,
                step: 4,
                current_a: 0.0,
            }])
            .collect();
        let scan = |t_s: f64| GroupSample {
            t_s,
            step: 3,
            cycle: 1,
            voltage_v: vec![3.6, 3.6],
            temperature_c: Vec::new(),
            inferred: None,
        };
        let scans: Vec<GroupSample> = [10.0, 15.0, 19.9995, 30.002, 40.0, 50.0, 20.0]
            .into_iter()
            .map(scan)
            .collect();
        let refs: Vec<&GroupSample> = scans.iter().collect();
        let (qs, ts) = curves_of(3, &pack, &refs);
        // 3.6 A for 10 s is 10 mAh.
        assert_eq!(ts, [10.0, 19.9995, 40.0]);
        for (q, want) in qs.iter().zip([0.01, 0.02, 0.04]) {
            assert!((q - want).abs() < 1e-12, "{qs:?}");
        }
    }
}
