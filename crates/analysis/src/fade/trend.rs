//! Capacity-fade models over a pack's history and the projection to end of
//! life. Three straight-line fits of state of health (% of rated):
//! against equivalent full cycles (cycle fade, linear in charge
//! throughput), against time, and against the square root of time
//! (calendar fade) — the forms of the fact sheet §6 (Wang et al. 2014).
//! Each carries its slope, R² and a 95 % prediction interval (Student t).

use super::history::PackHistory;
use crate::fit::LinearFit;
use chrono::{Days, NaiveDate};
use serde::Serialize;

/// Confidence level of every interval in the fade report.
pub const LEVEL: f64 = 0.95;
/// Points a fit needs before it projects anything.
pub const MIN_POINTS: usize = 3;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ModelKind {
    /// SOH against equivalent full cycles.
    LinearCycles,
    /// SOH against days since the first measurement.
    LinearTime,
    /// SOH against the square root of days since the first measurement.
    SqrtTime,
}

impl ModelKind {
    pub fn describe(&self) -> &'static str {
        match self {
            ModelKind::LinearCycles => "linear in equivalent full cycles",
            ModelKind::LinearTime => "linear in time",
            ModelKind::SqrtTime => "proportional to the square root of time (calendar fade)",
        }
    }
}

/// One fitted model.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModelResult {
    pub kind: ModelKind,
    pub description: &'static str,
    pub fit: LinearFit,
    /// Slope in readable units: % of rated per 100 cycles, per year, or
    /// per √year.
    pub fade_per_unit: f64,
    pub unit: &'static str,
}

/// Where SOH crosses the threshold, with the prediction-band bounds.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CycleProjection {
    pub cycles: f64,
    pub cycles_early: Option<f64>,
    pub cycles_late: Option<f64>,
    /// Which history the projection rests on.
    pub basis: String,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DateProjection {
    pub date: NaiveDate,
    pub date_early: Option<NaiveDate>,
    pub date_late: Option<NaiveDate>,
    pub basis: String,
}

/// The recent slope clearly steeper than the earlier one.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Acceleration {
    pub earlier_pct_per_100_cycles: f64,
    pub recent_pct_per_100_cycles: f64,
    pub ratio: f64,
}

/// Everything the fade analysis says about one pack.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FadeAnalysis {
    pub pack_id: String,
    pub threshold_pct: f64,
    pub points: usize,
    pub models: Vec<ModelResult>,
    pub eol_cycles: Option<CycleProjection>,
    pub eol_date: Option<DateProjection>,
    pub accelerating: Option<Acceleration>,
    /// Resistance against cycles, mΩ per 100 cycles, when there are readings.
    pub resistance_fit: Option<LinearFit>,
    /// The pack's latest tests are under the end-of-life threshold: since
    /// the first of them.
    pub below_eol_since: Option<NaiveDate>,
    /// The projected end-of-life date is already past (set by
    /// [`FadeAnalysis::flag_against`]).
    #[serde(default)]
    pub eol_date_past: bool,
    pub notes: Vec<String>,
}

impl FadeAnalysis {
    /// Flag a projected end-of-life date before `today`.
    pub fn flag_against(&mut self, today: NaiveDate) {
        if let Some(p) = &self.eol_date {
            if p.date < today {
                self.eol_date_past = true;
                if self.below_eol_since.is_none() {
                    self.notes.push(format!(
                        "the projected end-of-life date {} is before today ({today}): the pack is likely under {} % now; test it",
                        p.date, self.threshold_pct
                    ));
                }
            }
        }
    }
}

/// The first date of the trailing run of tests under the threshold.
fn below_since(h: &PackHistory, threshold_pct: f64) -> Option<NaiveDate> {
    h.points
        .iter()
        .rev()
        .take_while(|p| p.soh_pct < threshold_pct)
        .last()
        .map(|p| p.date)
}

fn days_between(a: NaiveDate, b: NaiveDate) -> f64 {
    (b - a).num_days() as f64
}

fn add_days(d: NaiveDate, days: f64) -> Option<NaiveDate> {
    if !(0.0..=365.0 * 200.0).contains(&days) {
        return None;
    }
    d.checked_add_days(Days::new(days.round() as u64))
}

/// Is the recent half clearly steeper? Earlier = first half + 1, recent =
/// last half + 1 (they share the middle point). "Clearly": the recent
/// slope is at least 1.5 times the earlier one and the difference is more
/// than twice its standard error (common practice for a slope change).
pub fn acceleration(x: &[f64], y: &[f64]) -> Option<Acceleration> {
    let n = x.len();
    if n < 6 {
        return None;
    }
    let mid = n / 2;
    let early = LinearFit::fit(&x[..=mid], &y[..=mid])?;
    let recent = LinearFit::fit(&x[mid..], &y[mid..])?;
    if early.slope >= 0.0 || recent.slope >= 0.0 {
        return None;
    }
    let ratio = recent.slope / early.slope;
    let se = (early.slope_se.powi(2) + recent.slope_se.powi(2)).sqrt();
    (ratio >= 1.5 && (early.slope - recent.slope) > 2.0 * se).then_some(Acceleration {
        earlier_pct_per_100_cycles: early.slope * 100.0,
        recent_pct_per_100_cycles: recent.slope * 100.0,
        ratio,
    })
}

/// Fit the models and project end of life (SOH reaching `threshold_pct`).
pub fn analyze(h: &PackHistory, threshold_pct: f64) -> FadeAnalysis {
    let flagged = h.points.iter().filter(|p| !p.flags.is_empty()).count();
    if flagged == 0 {
        return analyze_points(h, threshold_pct);
    }
    // Flagged points are shown, not fitted (`history::flag_jumps`).
    let mut kept = h.clone();
    kept.points.retain(|p| p.flags.is_empty());
    let mut out = analyze_points(&kept, threshold_pct);
    out.notes.insert(
        0,
        format!(
            "{flagged} flagged test(s) left out of the fit (a rise the measurement cannot explain)"
        ),
    );
    out
}

/// [`analyze`] of every point of a history.
fn analyze_points(h: &PackHistory, threshold_pct: f64) -> FadeAnalysis {
    let mut notes = Vec::new();
    // Every point has a date; a point whose cycle count is unknown (an
    // empty cell of a history file) is left out of the cycle fit only.
    let pts: Vec<_> = h.points.iter().collect();
    let cpts: Vec<_> = h.points.iter().filter(|p| p.cycles.is_finite()).collect();
    let mut out = FadeAnalysis {
        pack_id: h.pack_id.clone(),
        threshold_pct,
        points: pts.len(),
        models: Vec::new(),
        eol_cycles: None,
        eol_date: None,
        accelerating: None,
        resistance_fit: None,
        below_eol_since: below_since(h, threshold_pct),
        eol_date_past: false,
        notes: Vec::new(),
    };
    if let (Some(since), Some(last)) = (out.below_eol_since, h.points.last()) {
        notes.push(format!(
            "below end of life ({threshold_pct} % of rated) since {since}: {:.1} % at the latest test ({})",
            last.soh_pct, last.date
        ));
    }
    if pts.len() < MIN_POINTS {
        notes.push(format!(
            "{} measurement(s): at least {MIN_POINTS} are needed to fit a fade model; nothing is projected",
            pts.len()
        ));
        out.notes = notes;
        return out;
    }
    if cpts.len() < pts.len() {
        notes.push(format!(
            "{} measurement(s) without a cycle count are left out of the fit against cycles (kept in the fits against time)",
            pts.len() - cpts.len()
        ));
    }
    let first_date = pts[0].date;
    let cycles: Vec<f64> = cpts.iter().map(|p| p.cycles).collect();
    let soh_c: Vec<f64> = cpts.iter().map(|p| p.soh_pct).collect();
    let days: Vec<f64> = pts
        .iter()
        .map(|p| days_between(first_date, p.date))
        .collect();
    let sqrt_days: Vec<f64> = days.iter().map(|d| d.max(0.0).sqrt()).collect();
    let soh: Vec<f64> = pts.iter().map(|p| p.soh_pct).collect();
    let mut cycle_fit = None;
    let mut time_fit = None;
    for (kind, x, y) in [
        (ModelKind::LinearCycles, &cycles, &soh_c),
        (ModelKind::LinearTime, &days, &soh),
        (ModelKind::SqrtTime, &sqrt_days, &soh),
    ] {
        if x.len() < MIN_POINTS {
            notes.push(format!(
                "no fit {}: {} measurement(s) with a value, at least {MIN_POINTS} needed",
                kind.describe(),
                x.len()
            ));
            continue;
        }
        match LinearFit::fit(x, y) {
            Some(fit) => {
                let (per, unit) = match kind {
                    ModelKind::LinearCycles => (fit.slope * 100.0, "% of rated per 100 cycles"),
                    ModelKind::LinearTime => (fit.slope * 365.25, "% of rated per year"),
                    ModelKind::SqrtTime => {
                        (fit.slope * 365.25f64.sqrt(), "% of rated per sqrt(year)")
                    }
                };
                if kind == ModelKind::LinearCycles {
                    cycle_fit = Some(fit.clone());
                }
                if kind == ModelKind::LinearTime {
                    time_fit = Some(fit.clone());
                }
                out.models.push(ModelResult {
                    kind,
                    description: kind.describe(),
                    fit,
                    fade_per_unit: per,
                    unit,
                });
            }
            None => notes.push(format!(
                "no fit {}: the points do not spread",
                kind.describe()
            )),
        }
    }
    out.accelerating = (cycles.len() >= MIN_POINTS)
        .then(|| acceleration(&cycles, &soh_c))
        .flatten();
    // Projection: on the recent half when the fade accelerates (a straight
    // line through a knee would promise too much life).
    let (basis, cfit, tfit) = if out.accelerating.is_some() {
        let mid = cycles.len() / 2;
        let mid_d = days.len() / 2;
        notes.push(
            "fade is accelerating: the projections use the recent half of the history".into(),
        );
        (
            format!("recent {} measurements", days.len() - mid_d),
            LinearFit::fit(&cycles[mid..], &soh_c[mid..]),
            LinearFit::fit(&days[mid_d..], &soh[mid_d..]),
        )
    } else {
        (
            format!("all {} measurements", days.len()),
            cycle_fit,
            time_fit,
        )
    };
    let last_c = *cycles.last().unwrap_or(&0.0);
    let last_d = *days.last().unwrap_or(&0.0);
    if let Some(f) = cfit.filter(|f| f.slope < 0.0) {
        if let Some(x) = f.solve_x(threshold_pct) {
            let horizon = last_c + 20.0 * (x - last_c).abs().max(100.0);
            let (early, late) = f.band_crossings(threshold_pct, LEVEL, cycles[0], horizon);
            out.eol_cycles = Some(CycleProjection {
                cycles: x,
                cycles_early: early,
                cycles_late: late,
                basis: basis.clone(),
            });
        }
    } else {
        notes.push("no falling trend against cycles: no end-of-life cycle count projected".into());
    }
    if let Some(f) = tfit.filter(|f| f.slope < 0.0) {
        if let Some(x) = f.solve_x(threshold_pct) {
            let horizon = last_d + 20.0 * (x - last_d).abs().max(365.0);
            let (early, late) = f.band_crossings(threshold_pct, LEVEL, days[0], horizon);
            if let Some(date) = add_days(first_date, x) {
                out.eol_date = Some(DateProjection {
                    date,
                    date_early: early.and_then(|d| add_days(first_date, d)),
                    date_late: late.and_then(|d| add_days(first_date, d)),
                    basis,
                });
            }
        }
    }
    let rpts: Vec<(f64, f64)> = cpts
        .iter()
        .filter_map(|p| p.resistance_mohm.map(|r| (p.cycles, r)))
        .collect();
    if rpts.len() >= MIN_POINTS {
        let (x, y): (Vec<f64>, Vec<f64>) = rpts.into_iter().unzip();
        out.resistance_fit = LinearFit::fit(&x, &y);
    }
    out.notes = notes;
    out
}
