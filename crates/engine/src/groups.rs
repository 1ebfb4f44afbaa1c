//! Reading a pack's cell groups: from the scanner's raw readings to the
//! group voltages the limits and end conditions judge, with faulty
//! channels found and set aside, and the per-group limits.
//!
//! How a faulty channel is read (the rule that keeps a false reading from
//! hiding a real cutoff): a channel judged faulty never speaks for its
//! group. With direct wiring the groups must add up to the pack voltage;
//! a group whose channel is open, stuck or loose is taken as the pack
//! voltage less the other groups, which is its true voltage to within the
//! other channels' error. So a faulty channel that reads low gives no
//! false cutoff, and one that reads high (stuck while the group falls)
//! hides none. When that cannot be done — two channels lost at once, a
//! mismatch no single channel explains, a tap lost in tap wiring (it
//! bounds two groups) — the groups cannot be protected and the run stops
//! with outputs off.

use model::groups::{group_voltages_from_taps, GroupChannels, GroupSample, Wiring};
use model::procedure::Envelope;
use std::collections::VecDeque;

/// A reading this large is an overload or open input (SCPI reports
/// +9.9E37), not a voltage.
pub const OVERLOAD: f64 = 1e9;
/// A group reads within these bounds or its channel is judged open, V
/// (no cell of any chemistry here sits outside them).
pub const GROUP_READ_MIN_V: f64 = -0.05;
pub const GROUP_READ_MAX_V: f64 = 10.0;
/// A channel that repeats the very same reading this many scans while the
/// pack voltage moves by more than [`STUCK_PACK_MOVE_V`] is stuck.
pub const STUCK_SCANS: u32 = 10;
pub const STUCK_PACK_MOVE_V: f64 = 0.05;
/// The groups must add up to the pack voltage within this (the scanner's
/// and the pack reading's error, and the leads' drop when the pack
/// voltage is read at a load's terminals): 150 mV or 0.4 % of the pack,
/// whichever is larger. Our own choice, set against the simulated bench's
/// errors with a margin.
pub const SUM_TOLERANCE_V: f64 = 0.15;
pub const SUM_TOLERANCE_FRACTION: f64 = 0.004;
/// A charge ends when any group is this far above the step's per-cell
/// charge voltage, V (our own margin over a balanced pack's spread under
/// a constant voltage).
pub const GROUP_CHARGE_MARGIN_V: f64 = 0.02;
/// Temperature rise is judged over this window, s (at least half of it
/// must be covered).
pub const RISE_WINDOW_S: f64 = 60.0;

/// Why a channel is set aside.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ChannelIssue {
    Open,
    Stuck,
    Loose,
}

impl ChannelIssue {
    pub fn name(self) -> &'static str {
        match self {
            ChannelIssue::Open => "open",
            ChannelIssue::Stuck => "stuck",
            ChannelIssue::Loose => "loose",
        }
    }
}

/// Something to put in the run's events.
#[derive(Debug, Clone, PartialEq)]
pub struct Notice {
    pub channel: u32,
    pub issue: ChannelIssue,
    pub message: String,
}

/// One scan read.
#[derive(Debug, Clone, PartialEq)]
pub struct Interpreted {
    pub sample: GroupSample,
    /// New problems found this scan (each channel and issue once a run).
    pub notices: Vec<Notice>,
    /// The groups cannot be protected: why.
    pub unobservable: Option<String>,
}

/// The group voltages of one scan after faulty channels are dealt with.
struct Resolved {
    volts: Vec<f64>,
    /// The group (index) read from the pack voltage less the others.
    inferred: Option<usize>,
    unobservable: Option<String>,
}

/// Keeps what one scan needs from the ones before it.
#[derive(Debug, Clone)]
pub struct GroupMonitor {
    pub channels: GroupChannels,
    /// The temperature inputs' channels, in order (what a scan reads
    /// after the voltages).
    pub temperature_channels: Vec<u32>,
    last_raw: Vec<f64>,
    same: Vec<u32>,
    pack_at_same: Vec<f64>,
    reported: Vec<(u32, ChannelIssue)>,
    history: Vec<VecDeque<(f64, f64)>>,
    /// The last scan's mismatch (pack less the groups), V.
    last_mismatch: Option<f64>,
}

impl GroupMonitor {
    pub fn new(channels: GroupChannels) -> GroupMonitor {
        let n = channels.groups();
        let k = channels.temperatures.len();
        GroupMonitor {
            temperature_channels: channels.temperatures.iter().map(|t| t.channel).collect(),
            channels,
            last_raw: vec![f64::NAN; n],
            same: vec![0; n],
            pack_at_same: vec![0.0; n],
            reported: Vec::new(),
            history: vec![VecDeque::new(); k],
            last_mismatch: None,
        }
    }

    fn notice(
        &mut self,
        out: &mut Vec<Notice>,
        channel: u32,
        issue: ChannelIssue,
        message: String,
    ) {
        if !self.reported.contains(&(channel, issue)) {
            self.reported.push((channel, issue));
            out.push(Notice {
                channel,
                issue,
                message,
            });
        }
    }

    /// Judge one scan: `raw` holds the voltage channels, then the
    /// temperature inputs, as the scanner returned them.
    pub fn interpret(
        &mut self,
        t_s: f64,
        step: u32,
        cycle: u32,
        pack_v: f64,
        raw: &[f64],
    ) -> Interpreted {
        let n = self.channels.groups();
        let (rv, rt) = raw.split_at(n.min(raw.len()));
        let mut rv = rv.to_vec();
        rv.resize(n, f64::NAN);
        let prev_raw = self.last_raw.clone();
        let mut bad = self.open_or_stuck(&rv, pack_v);
        let r = match self.channels.wiring {
            Wiring::Direct => self.resolve_direct(&rv, &prev_raw, pack_v, &mut bad),
            Wiring::Taps => self.resolve_taps(&rv, pack_v, &mut bad),
        };
        let mut notices = Vec::new();
        self.channel_notices(&mut notices, &rv, &bad, &r);
        let temps = self.temperatures(&mut notices, t_s, rt);
        Interpreted {
            sample: GroupSample {
                t_s,
                step,
                cycle,
                voltage_v: r.volts,
                temperature_c: temps,
                inferred: r.inferred.map(|k| k as u32 + 1),
            },
            notices,
            unobservable: r.unobservable,
        }
    }

    /// Open channels (overload, or a reading no group can show) and stuck
    /// ones (the very same reading while the pack moves).
    fn open_or_stuck(&mut self, rv: &[f64], pack_v: f64) -> Vec<Option<ChannelIssue>> {
        let mut bad: Vec<Option<ChannelIssue>> = vec![None; rv.len()];
        for (k, (&r, b)) in rv.iter().zip(bad.iter_mut()).enumerate() {
            let limit_hi = match self.channels.wiring {
                Wiring::Direct => GROUP_READ_MAX_V,
                Wiring::Taps => GROUP_READ_MAX_V * (k as f64 + 1.0),
            };
            if !r.is_finite() || r.abs() > OVERLOAD || !(GROUP_READ_MIN_V..=limit_hi).contains(&r) {
                *b = Some(ChannelIssue::Open);
            }
            if r.to_bits() == self.last_raw[k].to_bits() {
                self.same[k] += 1;
            } else {
                self.same[k] = 0;
                self.pack_at_same[k] = pack_v;
            }
            self.last_raw[k] = r;
            if b.is_none()
                && self.same[k] >= STUCK_SCANS
                && (pack_v - self.pack_at_same[k]).abs() > STUCK_PACK_MOVE_V
            {
                *b = Some(ChannelIssue::Stuck);
            }
        }
        bad
    }

    /// Direct wiring: one lost channel is read from the pack less the
    /// others; a mismatch one channel explains is that channel's.
    fn resolve_direct(
        &mut self,
        rv: &[f64],
        prev_raw: &[f64],
        pack_v: f64,
        bad: &mut [Option<ChannelIssue>],
    ) -> Resolved {
        let n = rv.len();
        let tol = SUM_TOLERANCE_V.max(SUM_TOLERANCE_FRACTION * pack_v.abs());
        let mut out = Resolved {
            volts: rv.to_vec(),
            inferred: None,
            unobservable: None,
        };
        let lost: Vec<usize> = (0..n).filter(|&k| bad[k].is_some()).collect();
        if lost.len() > 1 {
            out.unobservable = Some(format!(
                "channels {} cannot be read: with more than one group unseen, the groups cannot be protected",
                lost.iter()
                    .map(|&k| self.channels.voltage[k].to_string())
                    .collect::<Vec<_>>()
                    .join(", ")
            ));
        } else if let Some(&k) = lost.first() {
            let others: f64 = (0..n).filter(|&j| j != k).map(|j| rv[j]).sum();
            out.volts[k] = pack_v - others;
            out.inferred = Some(k);
        } else {
            let d = pack_v - rv.iter().sum::<f64>();
            let prev_d = self.last_mismatch.replace(d);
            if d.abs() > tol {
                match suspect(rv, prev_raw, d, prev_d, tol) {
                    Some(k) => {
                        bad[k] = Some(ChannelIssue::Loose);
                        out.volts[k] += d;
                        out.inferred = Some(k);
                    }
                    None => {
                        out.unobservable = Some(format!(
                            "the groups add up to {:.3} V against a pack voltage of {pack_v:.3} V and no single channel explains it: the groups cannot be protected",
                            pack_v - d
                        ));
                    }
                }
            }
        }
        out
    }

    /// Tap wiring: a lost tap bounds two groups (the run cannot go on); a
    /// top tap that disagrees with the pack terminals gives way to them.
    fn resolve_taps(&self, rv: &[f64], pack_v: f64, bad: &mut [Option<ChannelIssue>]) -> Resolved {
        let n = rv.len();
        let tol = SUM_TOLERANCE_V.max(SUM_TOLERANCE_FRACTION * pack_v.abs());
        let mut taps = rv.to_vec();
        let mut out = Resolved {
            volts: Vec::new(),
            inferred: None,
            unobservable: None,
        };
        if let Some(k) = (0..n).find(|&k| bad[k].is_some()) {
            out.unobservable = Some(format!(
                "tap channel {} cannot be read: it bounds two groups, which cannot be protected",
                self.channels.voltage[k]
            ));
        } else if n > 0 && (pack_v - taps[n - 1]).abs() > tol {
            bad[n - 1] = Some(ChannelIssue::Loose);
            taps[n - 1] = pack_v;
            out.inferred = Some(n - 1);
        }
        out.volts = group_voltages_from_taps(&taps);
        out
    }

    /// An event for each channel set aside (once a run per channel and
    /// issue), saying how its group is read from now on.
    fn channel_notices(
        &mut self,
        notices: &mut Vec<Notice>,
        rv: &[f64],
        bad: &[Option<ChannelIssue>],
        r: &Resolved,
    ) {
        for (k, issue) in bad.iter().enumerate() {
            let Some(issue) = *issue else { continue };
            let ch = self.channels.voltage[k];
            let g = k + 1;
            let read = rv[k];
            let how = if r.inferred == Some(k) {
                format!(
                    "group {g} is taken as the pack voltage less the other groups ({:.3} V)",
                    r.volts[k]
                )
            } else {
                "the groups cannot be protected".into()
            };
            let what = match issue {
                ChannelIssue::Open => format!("reads {read:.4e}, an open or overloaded input"),
                ChannelIssue::Stuck => format!(
                    "has read {read:.4} V for {} scans while the pack moved",
                    self.same[k]
                ),
                ChannelIssue::Loose => format!(
                    "reads {read:.3} V: the groups miss the pack voltage by {:.3} V, which this channel alone explains (a loose sense lead)",
                    r.volts[k] - read
                ),
            };
            self.notice(
                notices,
                ch,
                issue,
                format!("channel {ch} (group {g}) {what}; {how}"),
            );
        }
    }

    /// The temperature inputs: an open one reads nothing (and says so
    /// once); the others go into their rise windows.
    fn temperatures(
        &mut self,
        notices: &mut Vec<Notice>,
        t_s: f64,
        rt: &[f64],
    ) -> Vec<Option<f64>> {
        let mut temps = Vec::with_capacity(self.channels.temperatures.len());
        for i in 0..self.channels.temperatures.len() {
            let r = rt.get(i).copied().unwrap_or(f64::NAN);
            if !r.is_finite() || r.abs() > OVERLOAD || !(-60.0..=400.0).contains(&r) {
                let tc = &self.channels.temperatures[i];
                let (channel, message) = (
                    tc.channel,
                    format!(
                        "temperature input '{}' (channel {}) reads {r:.4e}, an open input: its limit cannot be checked",
                        tc.name, tc.channel
                    ),
                );
                self.notice(notices, channel, ChannelIssue::Open, message);
                temps.push(None);
                continue;
            }
            let h = &mut self.history[i];
            h.push_back((t_s, r));
            while h.front().is_some_and(|&(t0, _)| t_s - t0 > RISE_WINDOW_S) {
                h.pop_front();
            }
            temps.push(Some(r));
        }
        temps
    }

    /// Each temperature input's rise over the last minute, K/s, where at
    /// least half a minute is covered.
    pub fn rises(&self) -> Vec<Option<f64>> {
        self.history
            .iter()
            .map(|h| {
                let (&(t0, x0), &(t1, x1)) = (h.front()?, h.back()?);
                (t1 - t0 >= RISE_WINDOW_S / 2.0).then(|| (x1 - x0) / (t1 - t0))
            })
            .collect()
    }
}

/// The one channel that explains a mismatch `d` (pack less the groups):
/// first, when the scan before added up, the channel whose own change
/// since then accounts for the new mismatch (a lead that just came
/// loose); else the one channel whose reading, moved by `d`, comes back
/// to the others' median. `None` when no channel, or more than one, fits:
/// then nothing is inferred.
fn suspect(volts: &[f64], prev: &[f64], d: f64, prev_d: Option<f64>, tol: f64) -> Option<usize> {
    if let Some(pd) = prev_d.filter(|pd| pd.abs() <= tol) {
        let dd = d - pd;
        let jumped: Vec<usize> = (0..volts.len())
            .filter(|&k| {
                let step = volts[k] - prev.get(k).copied().unwrap_or(f64::NAN);
                step.is_finite() && (step + dd).abs() < 0.5 * dd.abs()
            })
            .collect();
        if jumped.len() == 1 {
            return Some(jumped[0]);
        }
    }
    let mut sorted: Vec<f64> = volts.to_vec();
    sorted.sort_by(f64::total_cmp);
    let median = sorted[sorted.len() / 2];
    let fits: Vec<usize> = (0..volts.len())
        .filter(|&k| {
            (volts[k] - median).abs() > 0.5 * d.abs()
                && (volts[k] + d - median).abs() < 0.5 * d.abs()
        })
        .collect();
    (fits.len() == 1).then(|| fits[0])
}

/// A crossed per-group or per-sensor limit.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupBreach {
    pub limit: &'static str,
    pub value: f64,
    pub threshold: f64,
    pub message: String,
}

/// Check the groups and temperature inputs against the envelope: each
/// group's voltage, each input's own upper limit (else the envelope's)
/// and its rise.
pub fn check(
    s: &GroupSample,
    rises: &[Option<f64>],
    channels: &GroupChannels,
    env: &Envelope,
) -> Option<GroupBreach> {
    for (k, &v) in s.voltage_v.iter().enumerate() {
        let g = k + 1;
        if let Some(hi) = env.group_voltage_max_v.filter(|&hi| v > hi) {
            return Some(GroupBreach {
                limit: "group_voltage_max",
                value: v,
                threshold: hi,
                message: format!("group {g} at {v:.4} V, above group_voltage_max {hi:.4} V"),
            });
        }
        if let Some(lo) = env.group_voltage_min_v.filter(|&lo| v < lo) {
            return Some(GroupBreach {
                limit: "group_voltage_min",
                value: v,
                threshold: lo,
                message: format!("group {g} at {v:.4} V, below group_voltage_min {lo:.4} V"),
            });
        }
    }
    for (i, tc) in channels.temperatures.iter().enumerate() {
        let Some(Some(t)) = s.temperature_c.get(i) else {
            continue;
        };
        let hi = tc.max_c.unwrap_or(env.temperature_max_c);
        if *t > hi {
            return Some(GroupBreach {
                limit: "temperature_max",
                value: *t,
                threshold: hi,
                message: format!(
                    "temperature '{}' ({}) at {t:.2} degC, above its limit {hi:.2} degC",
                    tc.name, tc.place
                ),
            });
        }
        if let (Some(max), Some(Some(r))) = (env.temperature_rise_max_k_per_s, rises.get(i)) {
            if *r > max {
                return Some(GroupBreach {
                    limit: "temperature_rise_max",
                    value: r * 60.0,
                    threshold: max * 60.0,
                    message: format!(
                        "temperature '{}' ({}) rising {:.2} degC/min, above temperature_rise_max {:.2} degC/min",
                        tc.name,
                        tc.place,
                        r * 60.0,
                        max * 60.0
                    ),
                });
            }
        }
    }
    None
}

/// The first group at or below a per-group cutoff: (group, volts).
pub fn first_below(s: &GroupSample, cutoff_v: f64) -> Option<(u32, f64)> {
    s.voltage_v
        .iter()
        .enumerate()
        .filter(|(_, &v)| v <= cutoff_v)
        .min_by(|a, b| a.1.total_cmp(b.1))
        .map(|(k, &v)| (k as u32 + 1, v))
}

/// The highest group at or above a per-group level: (group, volts).
pub fn first_above(s: &GroupSample, level_v: f64) -> Option<(u32, f64)> {
    s.voltage_v
        .iter()
        .enumerate()
        .filter(|(_, &v)| v >= level_v)
        .max_by(|a, b| a.1.total_cmp(b.1))
        .map(|(k, &v)| (k as u32 + 1, v))
}

#[cfg(test)]
mod tests {
    use super::*;
    use model::groups::TemperatureChannel;

    fn chans(n: u32, wiring: Wiring) -> GroupChannels {
        GroupChannels {
            wiring,
            voltage: (101..101 + n).collect(),
            temperatures: vec![TemperatureChannel {
                channel: 207,
                name: "group 7 surface".into(),
                place: "on group 7".into(),
                group: Some(7),
                max_c: Some(50.0),
            }],
        }
    }

    fn env() -> Envelope {
        Envelope {
            voltage_max_v: 54.6,
            voltage_min_v: 32.5,
            current_max_a: 10.0,
            temperature_max_c: 55.0,
            temperature_min_c: None,
            charge_max_ah: 12.0,
            step_time_max_s: 36_000.0,
            group_voltage_max_v: Some(4.25),
            group_voltage_min_v: Some(2.9),
            temperature_rise_max_k_per_s: Some(1.0 / 60.0),
        }
    }

    fn scan(v: &[f64], t: f64) -> Vec<f64> {
        let mut r = v.to_vec();
        r.push(t);
        r
    }

    #[test]
    fn sound_channels_pass_through() {
        let mut m = GroupMonitor::new(chans(4, Wiring::Direct));
        let v = [3.70, 3.71, 3.69, 3.70];
        let out = m.interpret(0.0, 1, 1, 14.80, &scan(&v, 25.0));
        assert_eq!(out.sample.voltage_v, v);
        assert!(out.notices.is_empty() && out.unobservable.is_none());
        assert_eq!(out.sample.inferred, None);
    }

    /// An open channel: its group is the pack less the others, so a real
    /// cutoff on that group is still seen.
    #[test]
    fn an_open_channel_is_inferred_from_the_pack() {
        let mut m = GroupMonitor::new(chans(4, Wiring::Direct));
        let out = m.interpret(0.0, 1, 1, 12.90, &scan(&[3.30, 9.9e37, 3.30, 3.30], 25.0));
        assert!((out.sample.voltage_v[1] - 3.00).abs() < 1e-9, "{out:?}");
        assert_eq!(out.sample.inferred, Some(2));
        assert_eq!(out.notices.len(), 1);
        assert!(out.notices[0].message.contains("channel 102 (group 2)"));
        assert_eq!(
            first_below(&out.sample, 3.001),
            Some((2, out.sample.voltage_v[1]))
        );
        // Reported once a run.
        let again = m.interpret(1.0, 1, 1, 12.90, &scan(&[3.30, 9.9e37, 3.30, 3.30], 25.0));
        assert!(again.notices.is_empty());
        // Two lost: the groups cannot be protected.
        let two = m.interpret(2.0, 1, 1, 12.90, &scan(&[9.9e37, 9.9e37, 3.30, 3.30], 25.0));
        assert!(two.unobservable.is_some());
    }

    /// A loose lead reading 0.5 V low gives no false cutoff: the mismatch
    /// names the channel and its group is read from the pack voltage.
    #[test]
    fn a_loose_lead_gives_no_false_cutoff() {
        let mut m = GroupMonitor::new(chans(4, Wiring::Direct));
        let out = m.interpret(0.0, 1, 1, 14.40, &scan(&[3.60, 3.10, 3.60, 3.60], 25.0));
        assert_eq!(out.sample.inferred, Some(2));
        assert!((out.sample.voltage_v[1] - 3.60).abs() < 1e-9);
        assert_eq!(first_below(&out.sample, 3.2), None);
        assert_eq!(out.notices[0].issue, ChannelIssue::Loose);
        // A truly low group adds up: it is believed.
        let real = m.interpret(1.0, 1, 1, 13.90, &scan(&[3.60, 3.10, 3.60, 3.60], 25.0));
        assert_eq!(real.sample.inferred, None);
        assert_eq!(first_below(&real.sample, 3.2), Some((2, 3.10)));
    }

    /// A stuck channel that would hide a falling group is caught once the
    /// pack has moved, and the group read from the pack.
    #[test]
    fn a_stuck_channel_hides_no_cutoff() {
        let mut m = GroupMonitor::new(chans(4, Wiring::Direct));
        let mut last = None;
        for i in 0..=STUCK_SCANS {
            // The sound channels follow their groups down; channel 102
            // keeps its first reading while its group falls faster.
            let x = 3.40 - 0.001 * f64::from(i);
            let g2 = 3.40 - 0.01 * f64::from(i);
            let pack = 3.0 * x + g2;
            let raw = scan(&[x, 3.40, x, x], 25.0);
            last = Some(m.interpret(f64::from(i), 1, 1, pack, &raw));
        }
        let out = last.unwrap();
        assert_eq!(out.sample.inferred, Some(2), "{out:?}");
        assert!((out.sample.voltage_v[1] - 3.30).abs() < 1e-9, "{out:?}");
        assert_eq!(
            first_below(&out.sample, 3.35),
            Some((2, out.sample.voltage_v[1]))
        );
        assert!(out.notices.iter().any(|n| n.issue == ChannelIssue::Stuck));
    }

    /// Taps: group n = tap n − tap n−1; a lost tap stops the run.
    #[test]
    fn taps_give_differences_and_a_lost_tap_stops() {
        let mut m = GroupMonitor::new(chans(4, Wiring::Taps));
        let out = m.interpret(
            0.0,
            1,
            1,
            16.020,
            &scan(&[4.012, 8.031, 11.998, 16.020], 25.0),
        );
        let want = [4.012, 4.019, 3.967, 4.022];
        for (a, b) in out.sample.voltage_v.iter().zip(want) {
            assert!((a - b).abs() < 1e-9);
        }
        let lost = m.interpret(
            1.0,
            1,
            1,
            16.02,
            &scan(&[4.012, 9.9e37, 11.998, 16.020], 25.0),
        );
        assert!(lost.unobservable.unwrap().contains("tap channel 102"));
    }

    /// Each new limit alone, naming its group or sensor.
    #[test]
    fn each_group_limit_trips_alone_and_names_its_group() {
        let c = chans(4, Wiring::Direct);
        let s = |v: [f64; 4], t: f64| GroupSample {
            t_s: 0.0,
            step: 1,
            cycle: 1,
            voltage_v: v.to_vec(),
            temperature_c: vec![Some(t)],
            inferred: None,
        };
        let ok = s([3.7, 3.7, 3.7, 3.7], 30.0);
        assert_eq!(check(&ok, &[Some(0.0)], &c, &env()), None);
        let b = check(&s([3.7, 3.7, 4.26, 3.7], 30.0), &[None], &c, &env()).unwrap();
        assert_eq!(b.limit, "group_voltage_max");
        assert!(b.message.contains("group 3"));
        let b = check(&s([3.7, 2.89, 3.7, 3.7], 30.0), &[None], &c, &env()).unwrap();
        assert_eq!(b.limit, "group_voltage_min");
        assert!(b.message.contains("group 2"));
        let b = check(&s([3.7, 3.7, 3.7, 3.7], 50.5), &[None], &c, &env()).unwrap();
        assert_eq!(b.limit, "temperature_max");
        assert!(b.message.contains("group 7 surface"), "{}", b.message);
        let b = check(&ok, &[Some(1.5 / 60.0)], &c, &env()).unwrap();
        assert_eq!(b.limit, "temperature_rise_max");
        assert!(b.message.contains("group 7 surface"));
    }

    #[test]
    fn rise_is_judged_over_a_minute() {
        let mut m = GroupMonitor::new(chans(4, Wiring::Direct));
        for i in 0..=60 {
            let t = 25.0 + 2.0 * f64::from(i) / 60.0;
            m.interpret(f64::from(i), 1, 1, 14.8, &scan(&[3.7; 4], t));
        }
        let r = m.rises()[0].unwrap() * 60.0;
        assert!((r - 2.0).abs() < 1e-9, "{r}");
    }
}
