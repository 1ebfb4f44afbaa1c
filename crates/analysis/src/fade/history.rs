//! A pack's history as the fade analysis reads it: its measurements in
//! date order and the runs left out. `record::history` gathers it from the
//! results folder and a pack's `history.csv`.

use chrono::NaiveDate;
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

/// Flag each point whose state of health rose over the previous unflagged
/// point by more than the larger of [`JUMP_MIN_PCT`] and three times the
/// pack's own scatter (the RMS of the changes between its earlier
/// unflagged points, with three or more of them). Points in date order.
pub fn flag_jumps(points: &mut [HistoryPoint]) {
    let mut kept: Vec<f64> = Vec::new();
    for p in points.iter_mut() {
        if let Some(&prev) = kept.last() {
            let scatter = if kept.len() >= 3 {
                let d: Vec<f64> = kept.windows(2).map(|w| w[1] - w[0]).collect();
                (d.iter().map(|x| x * x).sum::<f64>() / d.len() as f64).sqrt()
            } else {
                0.0
            };
            let bound = JUMP_MIN_PCT.max(3.0 * scatter);
            let rise = p.soh_pct - prev;
            if rise > bound {
                p.flags.push(format!(
                    "state of health rose {rise:+.1} points over the previous test ({prev:.1} → {:.1} %), more than the {bound:.1} points a measurement can explain: not fitted or graded on; check the pack, its rating and the log",
                    p.soh_pct
                ));
                continue;
            }
        }
        kept.push(p.soh_pct);
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
