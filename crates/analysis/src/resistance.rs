//! DC resistance from a current step: the two-level method of IEC 61960
//! (a lower current held, then a higher one; R = ΔU / ΔI between the ends
//! of the two levels). Levels are found in the samples themselves, so the
//! same code serves our pulse steps and any log with a current step.

use model::sample::Sample;
use serde::{Deserialize, Serialize};

/// One resistance reading.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ResistanceReading {
    pub step: u32,
    pub dcir_mohm: f64,
    pub method: String,
    /// Voltage and current at the end of the first and second level.
    pub u1_v: f64,
    pub i1_a: f64,
    pub u2_v: f64,
    pub i2_a: f64,
    /// Time of the two readings, s since the run started.
    pub t1_s: f64,
    pub t2_s: f64,
    /// State of charge at the reading, %, when the log holds a full charge
    /// before it.
    #[serde(default)]
    pub soc_pct: Option<f64>,
    #[serde(skip)]
    pub ah_since_full: Option<f64>,
}

/// How the two-level reading is made.
pub const TWO_LEVEL_METHOD: &str =
    "two-level, IEC 61960 scheme: (U1 - U2) / (I2 - I1) at the ends of the levels";

/// The IEC 61960 two-level formula in pack sign convention:
/// R = (U1 − U2) / (I1 − I2). For two discharge levels (negative currents)
/// this is the standard's (U1 − U2) / (|I2| − |I1|).
pub fn two_level_ohm(u1: f64, i1: f64, u2: f64, i2: f64) -> Option<f64> {
    let di = i1 - i2;
    (di.abs() > 1e-9).then(|| (u1 - u2) / di)
}

/// Split a step's samples into runs of (nearly) constant current: a new
/// level starts where the current moves by more than 2 % of the larger
/// magnitude plus 5 mA (common practice for level detection).
pub fn current_levels(samples: &[Sample]) -> Vec<&[Sample]> {
    let mut out = Vec::new();
    let mut start = 0;
    for k in 1..samples.len() {
        let (a, b) = (samples[k - 1].current_a, samples[k].current_a);
        if (a - b).abs() > 0.02 * a.abs().max(b.abs()) + 0.005 {
            out.push(&samples[start..k]);
            start = k;
        }
    }
    if start < samples.len() {
        out.push(&samples[start..]);
    }
    out
}

/// The two-level reading from a pulse step's first two current levels.
pub fn two_level_from_step(step: u32, samples: &[Sample]) -> Option<ResistanceReading> {
    let levels = current_levels(samples);
    let (a, b) = (levels.first()?, levels.get(1)?);
    let (e1, e2) = (a.last()?, b.last()?);
    let r = two_level_ohm(e1.voltage_v, e1.current_a, e2.voltage_v, e2.current_a)?;
    Some(ResistanceReading {
        step,
        dcir_mohm: r * 1000.0,
        method: TWO_LEVEL_METHOD.into(),
        u1_v: e1.voltage_v,
        i1_a: e1.current_a,
        u2_v: e2.voltage_v,
        i2_a: e2.current_a,
        t1_s: e1.t_s,
        t2_s: e2.t_s,
        soc_pct: None,
        ah_since_full: None,
    })
}

/// How a two-level reading found in a log without step tags is made.
pub const FOUND_TWO_LEVEL_METHOD: &str =
    "two-level, IEC 61960 scheme, levels found in the log: (U1 - U2) / (I2 - I1) at the ends of the levels";

/// Shortest first (lower) level, s: long enough for the voltage to settle
/// at the low rate (IEC 61960 holds it 10 s; common practice accepts 5 s).
pub const MIN_FIRST_LEVEL_S: f64 = 5.0;
/// Second (higher) level: at least two samples over at least 0.5 s, and
/// at most 10 s: IEC 61960 holds it 1 s; a longer level's end includes
/// diffusion and is not the standard's figure (common practice takes
/// pulses of 1–10 s).
pub const MIN_SECOND_LEVEL_S: f64 = 0.5;
pub const MAX_SECOND_LEVEL_S: f64 = 10.0;
/// The higher level is at least this many times the lower one in
/// magnitude.
pub const MIN_LEVEL_RATIO: f64 = 1.5;

/// A run of (nearly) constant current: its first and last samples.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Level {
    first: (f64, f64, f64),
    last: (f64, f64, f64),
    /// Samples in it.
    n: usize,
    /// Coulomb count since the last full charge at its end.
    ah_since_full: Option<f64>,
    step: u32,
}

impl Level {
    fn duration(&self) -> f64 {
        self.last.0 - self.first.0
    }
}

/// Finds the two-level pattern of IEC 61960 in any log, step tags or not:
/// two adjacent levels of constant current in the same direction, the
/// second higher, each long enough and flat enough (within 2 % + 5 mA of
/// its first current throughout, as [`current_levels`]). Sample by sample,
/// in bounded memory.
#[derive(Debug, Clone, Default)]
pub struct LevelTracker {
    /// The level before the current one, if it ended where this began.
    before: Option<Level>,
    open: Option<Level>,
    readings: Vec<ResistanceReading>,
}

/// Most two-level readings kept from one log.
pub const MAX_FOUND_READINGS: usize = 1000;

impl LevelTracker {
    /// A new sample. `ah_since_full`: the coulomb count since the last
    /// full charge (for the state of charge of a reading).
    pub fn push(&mut self, t: f64, v: f64, i: f64, step: u32, ah_since_full: Option<f64>) {
        let sample = (t, v, i);
        match self.open.as_mut() {
            Some(o) if !level_jump(o.first.2, i) => {
                o.last = sample;
                o.n += 1;
                o.ah_since_full = ah_since_full;
                return;
            }
            _ => {}
        }
        // A new level begins here: the one that ended is judged with the
        // one before it.
        if let Some(ended) = self.open.take() {
            if let Some(first) = self.before {
                self.judge(first, ended);
            }
            self.before = Some(ended);
        }
        self.open = Some(Level {
            first: sample,
            last: sample,
            n: 1,
            ah_since_full,
            step,
        });
    }

    /// The log was interrupted (a resumed run): levels do not join across.
    pub fn break_segment(&mut self) {
        self.finish_open();
        self.before = None;
    }

    fn finish_open(&mut self) {
        if let (Some(first), Some(ended)) = (self.before, self.open.take()) {
            self.judge(first, ended);
        }
    }

    fn judge(&mut self, a: Level, b: Level) {
        let (i1, i2) = (a.first.2, b.first.2);
        let same_direction = i1 * i2 > 0.0;
        let ok = same_direction
            && i2.abs() >= MIN_LEVEL_RATIO * i1.abs()
            && a.duration() >= MIN_FIRST_LEVEL_S
            && a.n >= 2
            && b.n >= 2
            && b.duration() >= MIN_SECOND_LEVEL_S
            && b.duration() <= MAX_SECOND_LEVEL_S;
        if !ok || self.readings.len() >= MAX_FOUND_READINGS {
            return;
        }
        let ((t1, u1, i1), (t2, u2, i2)) = (a.last, b.last);
        if let Some(r) = two_level_ohm(u1, i1, u2, i2) {
            self.readings.push(ResistanceReading {
                step: b.step,
                dcir_mohm: r * 1000.0,
                method: format!(
                    "{FOUND_TWO_LEVEL_METHOD}: {:.4} A for {:.1} s, then {:.4} A for {:.1} s",
                    a.first.2,
                    a.duration(),
                    b.first.2,
                    b.duration()
                ),
                u1_v: u1,
                i1_a: i1,
                u2_v: u2,
                i2_a: i2,
                t1_s: t1,
                t2_s: t2,
                soc_pct: None,
                ah_since_full: b.ah_since_full,
            });
        }
    }

    /// End of the log: every reading found.
    pub fn finish(mut self) -> Vec<ResistanceReading> {
        self.finish_open();
        self.readings
    }
}

/// Whether current `i` has left the level that began at `level` (the rule
/// of [`current_levels`]).
fn level_jump(level: f64, i: f64) -> bool {
    (level - i).abs() > 0.02 * level.abs().max(i.abs()) + 0.005
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fact_sheet_check_values() {
        // Standards fact sheet §1 [D], IEC 61960 scheme: Cn = 2.5 Ah,
        // I1 = 0.5 A, I2 = 2.5 A, U1 = 3.700 V, U2 = 3.620 V → 40 mΩ.
        let r = two_level_ohm(3.700, -0.5, 3.620, -2.5).unwrap();
        assert!((r - 0.040).abs() < 1e-12);
        // Sign guard from the same sheet: magnitudes or signed, R > 0.
        let r = two_level_ohm(3.700, 0.5, 3.620, 2.5).unwrap();
        assert!(
            (r + 0.040).abs() < 1e-12,
            "charge-sign inputs give the mirrored value"
        );
        // Forum pack example (fact sheet §1, [C-weak]): (14.8 − 13.7) / (85 − 5) = 13.75 mΩ.
        let r = two_level_ohm(14.8, -5.0, 13.7, -85.0).unwrap();
        assert!((r - 0.01375).abs() < 1e-12);
        assert!(two_level_ohm(3.7, -1.0, 3.6, -1.0).is_none());
    }

    #[test]
    fn levels_are_found_in_the_samples() {
        let mk = |t: f64, v: f64, i: f64| Sample {
            t_s: t,
            step: 3,
            cycle: 1,
            voltage_v: v,
            current_a: i,
            temperature_c: None,
        };
        let mut s = Vec::new();
        for k in 0..=10 {
            s.push(mk(k as f64, 3.70 - 0.0001 * k as f64, -0.5));
        }
        s.push(mk(10.0, 3.62, -2.5));
        s.push(mk(11.0, 3.619, -2.5));
        s.push(mk(11.0, 3.68, 0.0));
        let r = two_level_from_step(3, &s).unwrap();
        assert_eq!((r.t1_s, r.t2_s), (10.0, 11.0));
        assert!((r.dcir_mohm - (3.699 - 3.619) / 2.0 * 1000.0).abs() < 1e-9);
        // A level is a move of more than 2 % of the larger current plus
        // 5 mA: at 10 A, 0.25 A is one (0.205 A the bound), 0.2 A none.
        let at = |i: &[f64]| -> usize {
            let s: Vec<Sample> = i
                .iter()
                .enumerate()
                .map(|(k, &i)| mk(k as f64, 3.7, i))
                .collect();
            current_levels(&s).len()
        };
        assert_eq!(at(&[-10.0, -10.0, -10.25, -10.25]), 2);
        assert_eq!(at(&[-10.0, -10.0, -10.2, -10.2]), 1);
    }

    /// A tagless log: rest, 0.2 It for 10 s, 1 It for 1 s, rest (the
    /// IEC 61960 pattern; Cn = 5 Ah, R = 30 mΩ, every 0.1 s): one reading,
    /// from the level ends; a single edge, a long second level and a
    /// level in the other direction give none.
    #[test]
    fn the_two_level_pattern_is_found_without_tags() {
        let run = |levels: &[(f64, f64)]| {
            let mut tr = LevelTracker::default();
            let mut t = 0.0;
            for &(i, secs) in levels {
                let n = (secs * 10.0).round() as usize;
                for k in 0..n {
                    // Ohmic drop plus a slow sag within the level.
                    let v = 3.7 + 0.030 * i - 0.0001 * k as f64;
                    tr.push(t, v, i, 1, None);
                    t += 0.1;
                }
            }
            tr.finish()
        };
        let r = run(&[(0.0, 30.0), (-1.0, 10.0), (-5.0, 1.0), (0.0, 30.0)]);
        assert_eq!(r.len(), 1, "{r:?}");
        // Level ends: U1 = 3.7 − 0.030 − 0.0099, U2 = 3.7 − 0.150 − 0.0009.
        let (u1, u2) = (3.7 - 0.030 - 0.0099, 3.7 - 0.150 - 0.0009);
        let want = (u1 - u2) / (5.0 - 1.0) * 1000.0;
        assert!(
            (r[0].dcir_mohm - want).abs() < 1e-9,
            "{} {want}",
            r[0].dcir_mohm
        );
        assert!((r[0].t2_s - r[0].t1_s - 1.0).abs() < 1e-9);
        // A single edge from rest: no two levels in one direction.
        assert!(run(&[(0.0, 30.0), (-5.0, 1.0), (0.0, 30.0)]).is_empty());
        // The second level too long for the standard's reading.
        assert!(run(&[(0.0, 30.0), (-1.0, 10.0), (-5.0, 60.0)]).is_empty());
        // The first level too short.
        assert!(run(&[(0.0, 30.0), (-1.0, 2.0), (-5.0, 1.0), (0.0, 5.0)]).is_empty());
        // A charge level after a discharge one.
        assert!(run(&[(-1.0, 10.0), (5.0, 1.0), (0.0, 5.0)]).is_empty());
        // Charge levels work the same way (R positive).
        let c = run(&[(1.0, 10.0), (5.0, 1.0), (0.0, 5.0)]);
        assert_eq!(c.len(), 1);
        assert!(c[0].dcir_mohm > 0.0);
    }

    /// Each rule of the found pattern at its boundary, sampled every
    /// 1/8 s (exact in binary, so a level's span is exact): a level of n
    /// samples spans (n − 1)/8 s. The first level's 5 s, the second's
    /// 0.5 s and 10 s, the ratio 1.5, and the level rule's 2 % + 5 mA.
    #[test]
    fn each_rule_of_the_found_pattern_holds_at_its_boundary() {
        let run = |levels: &[(f64, usize)]| {
            let mut tr = LevelTracker::default();
            let mut k = 0u32;
            for &(i, n) in levels {
                for _ in 0..n {
                    tr.push(f64::from(k) / 8.0, 3.7 + 0.03 * i, i, 1, Some(0.5));
                    k += 1;
                }
            }
            tr.finish()
        };
        let rest = (0.0, 40);
        let found = |first: (f64, usize), second: (f64, usize)| {
            !run(&[rest, first, second, rest]).is_empty()
        };
        // First level: 41 samples = 5.0 s (enough), 40 = 4.875 s (not).
        assert!(found((-1.0, 41), (-2.0, 9)));
        assert!(!found((-1.0, 40), (-2.0, 9)));
        // Second level: 5 samples = 0.5 s (enough), 4 = 0.375 s (not);
        // 81 = 10.0 s (at most), 82 = 10.125 s (too long).
        assert!(found((-1.0, 41), (-2.0, 5)));
        assert!(!found((-1.0, 41), (-2.0, 4)));
        assert!(found((-1.0, 41), (-2.0, 81)));
        assert!(!found((-1.0, 41), (-2.0, 82)));
        // Ratio: 1.5 times (enough), 1.45 (not), from 2 A.
        assert!(found((-2.0, 41), (-3.0, 9)));
        assert!(!found((-2.0, 41), (-2.9, 9)));
        // A log that ends on the second level: judged at its end.
        assert_eq!(run(&[rest, (-1.0, 41), (-2.0, 9)]).len(), 1);
        // The reading, its times and its charge count.
        let r = run(&[rest, (-1.0, 41), (-2.0, 9), rest]);
        assert_eq!(r.len(), 1);
        assert!((r[0].dcir_mohm - 30.0).abs() < 1e-9, "{}", r[0].dcir_mohm);
        // The first level ends at sample 80 (10 s), the second at 89.
        assert_eq!((r[0].t1_s, r[0].t2_s), (10.0, 11.125), "{r:?}");
        assert_eq!((r[0].i1_a, r[0].i2_a), (-1.0, -2.0));
        assert_eq!(r[0].ah_since_full, Some(0.5));
        assert!(
            r[0].method
                .contains("-1.0000 A for 5.0 s, then -2.0000 A for 1.0 s"),
            "{}",
            r[0].method
        );
        // A break ends the levels: nothing joins across it.
        let mut tr = LevelTracker::default();
        for k in 0..51 {
            tr.push(k as f64 * 0.1, 3.67, -1.0, 1, None);
        }
        tr.break_segment();
        for k in 0..11 {
            tr.push(100.0 + k as f64 * 0.1, 3.64, -2.0, 1, None);
        }
        assert!(tr.finish().is_empty());
        // The level rule: 2 % of the larger plus 5 mA.
        assert!(!level_jump(1.0, 1.024));
        assert!(level_jump(1.0, 1.027));
        assert!(!level_jump(-1.0, -0.976));
        assert!(!level_jump(0.0, 0.005));
        assert!(level_jump(0.0, 0.0052)); // 0.0052 > 0.02 × 0.0052 + 0.005
        let mk = |i: f64| Sample {
            t_s: 0.0,
            step: 1,
            cycle: 0,
            voltage_v: 3.7,
            current_a: i,
            temperature_c: None,
        };
        let s = [mk(1.0), mk(1.024), mk(1.06), mk(1.06)];
        assert_eq!(
            current_levels(&s)
                .iter()
                .map(|l| l.len())
                .collect::<Vec<_>>(),
            [2, 2]
        );
        assert!(two_level_from_step(1, &s[..2]).is_none(), "one level");
    }
}
