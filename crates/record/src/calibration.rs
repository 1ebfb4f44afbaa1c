//! The bench's calibration record: each reading of a station (the charge
//! current, the discharge current, the voltage) checked against a
//! reference meter, the line fitted, as found and as left against the
//! acceptance limit, the reference's identity and certificate, the ambient
//! temperature, the date and the next due date — the fields ISO/IEC
//! 17025:2017 §6.4.13 asks of an equipment record (metrology.md §3).
//!
//! Kept as `<results>/_calibration/<station>/<id>.json`; a station's
//! current calibration is its newest. Runs apply it and record which one
//! (`run.json`'s `calibration`).

use analysis::calibration::{Conformity, Line, Point};
use chrono::NaiveDate;
use model::accuracy::Spec;
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// The folder of the results root that holds calibrations.
pub const CALIBRATION_DIR: &str = "_calibration";

/// One quantity of one instrument, calibrated.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Channel {
    /// `charge current`, `discharge current` or `voltage`.
    pub quantity: String,
    /// The instrument that reads it (role and *IDN? answer).
    pub instrument: String,
    pub unit: String,
    pub points: Vec<Point>,
    /// The line reading = a·reference + b; absent where the points span
    /// too little to fit a gain (the voltage on a pack: an offset only).
    pub line: Line,
    /// Only the offset was fitted (a = 1).
    pub offset_only: bool,
    /// The acceptance limit: the instrument's stated accuracy.
    pub acceptance: Spec,
    pub as_found: Conformity,
    pub as_left: Conformity,
}

/// The reference meter and its traceability.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Reference {
    /// Its *IDN? answer.
    pub identity: String,
    pub certificate: Option<String>,
    pub certificate_due: Option<NaiveDate>,
    /// Its stated accuracy (the reference's own uncertainty in the fit).
    pub voltage: Option<Spec>,
    pub current: Option<Spec>,
}

/// A calibration of one station.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationRecord {
    /// The record layout ([`crate::schema`]).
    #[serde(default = "crate::schema::unversioned")]
    pub schema_version: u32,
    pub id: String,
    pub station: String,
    pub date: NaiveDate,
    pub next_due: NaiveDate,
    pub ambient_c: Option<f64>,
    pub operator: Option<String>,
    pub tool: String,
    pub reference: Reference,
    pub channels: Vec<Channel>,
    /// Every channel within its acceptance limit as left.
    pub passed: bool,
}

impl CalibrationRecord {
    pub fn channel(&self, quantity: &str) -> Option<&Channel> {
        self.channels.iter().find(|c| c.quantity == quantity)
    }

    /// The corrections a run applies.
    pub fn corrections(&self) -> analysis::calibration::Corrections {
        analysis::calibration::Corrections {
            charge: self.channel(CHARGE).map(|c| c.line),
            discharge: self.channel(DISCHARGE).map(|c| c.line),
            voltage: self.channel(VOLTAGE).map(|c| c.line),
        }
    }
}

pub const CHARGE: &str = "charge current";
pub const DISCHARGE: &str = "discharge current";
pub const VOLTAGE: &str = "voltage";

/// What a run records of the calibration it applied.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationUse {
    pub id: String,
    pub file: String,
    pub date: NaiveDate,
    pub next_due: NaiveDate,
    /// Past its due date on the day of the run.
    pub overdue: bool,
    pub corrections: analysis::calibration::Corrections,
}

/// The folder of a station's calibrations.
pub fn station_dir(results: &Path, station: &str) -> PathBuf {
    results.join(CALIBRATION_DIR).join(station)
}

/// The station's newest calibration, if any (a file that does not read
/// is an error: a run must not go on with a calibration it cannot read).
pub fn current(
    results: &Path,
    station: &str,
) -> Result<Option<(PathBuf, CalibrationRecord)>, crate::error::ReadError> {
    let dir = station_dir(results, station);
    let Ok(rd) = std::fs::read_dir(&dir) else {
        return Ok(None);
    };
    let mut files: Vec<PathBuf> = rd
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|e| e == "json"))
        .collect();
    files.sort();
    let Some(newest) = files.pop() else {
        return Ok(None);
    };
    let rec: CalibrationRecord = crate::schema::read_json(&newest)?;
    Ok(Some((newest, rec)))
}

impl CalibrationUse {
    pub fn of(path: &Path, rec: &CalibrationRecord, today: NaiveDate) -> CalibrationUse {
        CalibrationUse {
            id: rec.id.clone(),
            file: path.display().to_string(),
            date: rec.date,
            next_due: rec.next_due,
            overdue: today > rec.next_due,
            corrections: rec.corrections(),
        }
    }
}

/// The stated accuracy of a station with its calibration applied: where
/// the calibration's uncertainty at full scale is smaller than the spec's,
/// the reading's terms become the calibration's (normal, standard
/// uncertainties: `Spec.reading_pct` and `offset` then hold u, flagged by
/// `calibrated`).
pub fn apply_to_accuracy(acc: &mut model::accuracy::BenchAccuracy, rec: &CalibrationRecord) {
    let swap = |spec: &mut Option<Spec>, ch: Option<&Channel>| {
        let Some(ch) = ch else { return };
        let top = ch
            .points
            .iter()
            .map(|p| p.reference.abs())
            .fold(0.0, f64::max);
        let l = &ch.line;
        let u_gain = l.u_a / l.a.abs();
        // The offset's u with the linearity as a rectangle.
        let u_off = (l.u_b * l.u_b + l.residual_max * l.residual_max / 3.0).sqrt();
        let cal_u_top = (u_gain * top).hypot(u_off);
        let better = match spec {
            Some(s) => cal_u_top < s.limit_at(top) / 3f64.sqrt(),
            None => true,
        };
        if better && !ch.offset_only {
            *spec = Some(Spec {
                reading_pct: u_gain * 100.0,
                range_pct: 0.0,
                offset: u_off,
                resolution: spec.map(|s| s.resolution).unwrap_or(0.0),
                calibrated: true,
            });
        }
    };
    swap(&mut acc.charge_current, rec.channel(CHARGE));
    swap(&mut acc.discharge_current, rec.channel(DISCHARGE));
    acc.stated_by.push(format!(
        "calibration {} of {} (due {})",
        rec.id, rec.date, rec.next_due
    ));
}
