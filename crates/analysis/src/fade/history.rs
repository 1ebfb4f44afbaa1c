//! A pack's history as the fade analysis reads it: its measurements in
//! date order and the runs left out. `record::history` gathers it from the
//! results folder and a pack's `history.csv`.

use chrono::{Datelike, NaiveDate};
use model::pack::PackSpec;
use model::status::RunStatus;
use serde::Serialize;
use std::path::PathBuf;

/// One measurement of the pack.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct HistoryPoint {
    pub date: NaiveDate,
    /// Equivalent full cycles at the measurement.
    pub cycles: f64,
    /// Whether `cycles` was given (true) or counted from throughput.
    pub cycles_given: bool,
    pub capacity_ah: f64,
    pub soh_pct: f64,
    pub resistance_mohm: Option<f64>,
    /// The run's verdict's resistance growth (a history line: none).
    pub resistance_growth_pct: Option<f64>,
    /// The run's verdict's IEEE 450 percent capacity (lead-acid at its
    /// rated current to its cutoff).
    pub ieee450_percent: Option<f64>,
    pub coulombic_efficiency_pct: Option<f64>,
    pub grade: Option<String>,
    /// `run <id>` or `history.csv line N`.
    pub source: String,
    pub run_dir: Option<PathBuf>,
    /// A pack read group by group: how far its groups were apart.
    pub groups: Option<GroupSpread>,
    /// A pulse-power characterization's discharge-pulse resistance at
    /// 50 % state of charge, mΩ.
    #[serde(default)]
    pub pulse_r50_mohm: Option<f64>,
    /// The state of health's expanded uncertainty (the run's reported
    /// 95 % half-width), points; none for a history line.
    pub soh_u95_pct: Option<f64>,
    /// Changes against the pack's history the measurement cannot explain
    /// ([`flag_jumps`]): a flagged point is shown, not fitted or graded on.
    pub flags: Vec<String>,
}

/// The least rise of state of health over the pack's previous measurement
/// that is flagged, SoH points: a pack's capacity does not come back by
/// itself (recovery after a long rest and the bench's uncertainty are a
/// point or two: common practice), so a larger rise is a different pack,
/// rating or method.
pub const JUMP_MIN_PCT: f64 = 5.0;

/// The scatter of a pack's measurements about its own straight-line fade
/// against time: the residual standard deviation (n − 2 degrees of
/// freedom), with three or more points.
fn scatter(kept: &[(f64, f64)]) -> f64 {
    let n = kept.len();
    if n < 3 {
        return 0.0;
    }
    let nf = n as f64;
    let mx = kept.iter().map(|p| p.0).sum::<f64>() / nf;
    let my = kept.iter().map(|p| p.1).sum::<f64>() / nf;
    let sxx: f64 = kept.iter().map(|p| (p.0 - mx).powi(2)).sum();
    // (Σ(x − x̄)·y is Sxy: Σ(x − x̄) = 0.)
    let sxy: f64 = kept.iter().map(|p| (p.0 - mx) * p.1).sum();
    let b = if sxx > 0.0 { sxy / sxx } else { 0.0 };
    let ssr: f64 = kept
        .iter()
        .map(|p| (p.1 - my - b * (p.0 - mx)).powi(2))
        .sum();
    (ssr / (nf - 2.0)).sqrt()
}

/// Flag each point whose state of health rose over the previous unflagged
/// point by more than the larger of [`JUMP_MIN_PCT`] and three times the
/// pack's own scatter about its fade ([`scatter`] of the earlier unflagged
/// points). Points in date order.
pub fn flag_jumps(points: &mut [HistoryPoint]) {
    let mut kept: Vec<(f64, f64)> = Vec::new();
    let day = |p: &HistoryPoint| p.date.num_days_from_ce() as f64;
    for p in points.iter_mut() {
        if let Some(&(_, prev)) = kept.last() {
            let bound = JUMP_MIN_PCT.max(3.0 * scatter(&kept));
            let rise = p.soh_pct - prev;
            if rise > bound {
                p.flags.push(format!(
                    "state of health rose {rise:+.1} points over the previous test ({prev:.1} → {:.1} %), more than the {bound:.1} points a measurement can explain: not fitted or graded on; check the pack, its rating and the log",
                    p.soh_pct
                ));
                continue;
            }
        }
        kept.push((day(p), p.soh_pct));
    }
}

/// How far a pack's groups were apart in one test.
#[derive(Debug, Clone, PartialEq, Serialize, serde::Deserialize)]
pub struct GroupSpread {
    pub weakest: Option<u32>,
    pub weakest_share_pct: Option<f64>,
    pub capacity_spread_pct: Option<f64>,
    pub end_of_charge_spread_mv: Option<f64>,
    pub end_of_discharge_spread_mv: Option<f64>,
}

impl GroupSpread {
    pub fn of(g: &crate::groups::GroupsResult) -> GroupSpread {
        GroupSpread {
            weakest: g.weakest,
            weakest_share_pct: g.weakest_share_pct,
            capacity_spread_pct: g.capacity_spread_pct,
            end_of_charge_spread_mv: g.end_of_charge_spread_mv,
            end_of_discharge_spread_mv: g.end_of_discharge_spread_mv,
        }
    }
}

/// A run left out of the fits.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LeftOut {
    pub run_id: String,
    pub status: RunStatus,
    pub reason: String,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PackHistory {
    pub pack_id: String,
    pub spec: PackSpec,
    pub points: Vec<HistoryPoint>,
    pub left_out: Vec<LeftOut>,
}

impl PackHistory {
    pub fn latest(&self) -> Option<&HistoryPoint> {
        self.points.last()
    }

    /// The reference resistance for growth: the rated one if the spec has
    /// it, else the pack's first reading.
    pub fn reference_resistance(&self) -> Option<(f64, &'static str)> {
        if let Some(r) = self.spec.rated_resistance_mohm {
            return Some((r, "rated"));
        }
        self.points
            .iter()
            .find_map(|p| p.resistance_mohm)
            .map(|r| (r, "first test"))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn point(date: &str, soh: f64) -> HistoryPoint {
        HistoryPoint {
            pulse_r50_mohm: None,
            soh_u95_pct: None,
            date: date.parse().unwrap(),
            cycles: f64::NAN,
            cycles_given: false,
            capacity_ah: soh / 10.0,
            soh_pct: soh,
            resistance_mohm: None,
            resistance_growth_pct: None,
            ieee450_percent: None,
            coulombic_efficiency_pct: None,
            grade: None,
            source: date.into(),
            run_dir: None,
            groups: None,
            flags: Vec::new(),
        }
    }

    #[test]
    fn a_rise_the_measurement_cannot_explain_is_flagged() {
        // A steady fade, then a test 14.8 points above the last: flagged;
        // the next, on the fade again, is not (it is compared with the
        // last unflagged point).
        let mut p = vec![
            point("2025-01-01", 90.0),
            point("2025-06-01", 84.3),
            point("2026-01-01", 77.9),
            point("2026-06-01", 92.7),
            point("2026-09-01", 76.5),
        ];
        flag_jumps(&mut p);
        let flagged: Vec<bool> = p.iter().map(|x| !x.flags.is_empty()).collect();
        assert_eq!(flagged, [false, false, false, true, false]);
        assert!(p[3].flags[0].contains("+14.8 points"), "{}", p[3].flags[0]);
        // A rise within 5 points (recovery, the bench) is not.
        let mut q = vec![point("2025-01-01", 90.0), point("2025-06-01", 94.9)];
        flag_jumps(&mut q);
        assert!(q[1].flags.is_empty());
        // A pack that scatters widely about its fade gets a wider bound:
        // residuals of ±4 points give a bound over 5.
        let mut r = vec![
            point("2025-01-01", 90.0),
            point("2025-02-01", 82.0),
            point("2025-03-01", 90.0),
            point("2025-04-01", 82.0),
            point("2025-05-01", 88.0),
        ];
        flag_jumps(&mut r);
        assert!(r[4].flags.is_empty(), "{:?}", r[4].flags);
    }

    /// The scatter (the residual SD about the straight-line fade) worked
    /// by hand; under three points, or on a straight line, none.
    #[test]
    fn the_scatter_and_the_jump_bound_by_hand() {
        let s = scatter(&[(0.0, 91.0), (1.0, 89.0), (2.0, 91.0), (3.0, 89.0)]);
        // The fit of those points has slope −0.4 (not flat): worked out,
        // x̄ = 1.5, ȳ = 90, Sxx = 5, Sxy = −2, b = −0.4; residuals 0.4,
        // −1.2, 1.2, −0.4: Σ = 3.2; s = √(3.2/2).
        assert!((s - 1.6f64.sqrt()).abs() < 1e-12, "{s}");
        assert_eq!(scatter(&[(0.0, 90.0), (1.0, 80.0)]), 0.0);
        assert_eq!(scatter(&[(0.0, 90.0), (1.0, 89.0), (2.0, 88.0)]), 0.0);
    }
}
