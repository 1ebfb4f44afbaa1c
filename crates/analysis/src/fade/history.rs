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
    pub coulombic_efficiency_pct: Option<f64>,
    pub grade: Option<String>,
    /// `run <id>` or `history.csv line N`.
    pub source: String,
    pub run_dir: Option<PathBuf>,
    /// A pack read group by group: how far its groups were apart.
    pub groups: Option<GroupSpread>,
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
