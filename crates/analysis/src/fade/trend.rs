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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fade::history::HistoryPoint;
    use model::pack::{Chemistry, PackSpec};

    fn history(points: &[(i64, f64, f64)]) -> PackHistory {
        let first: NaiveDate = "2025-01-01".parse().unwrap();
        PackHistory {
            pack_id: "FR-T09".into(),
            spec: PackSpec {
                chemistry: Chemistry::LiIon,
                series: 10,
                rated_capacity_ah: 14.0,
                rated_energy_wh: None,
                rated_rate_c: None,
                rated_resistance_mohm: None,
            },
            points: points
                .iter()
                .map(|&(day, cycles, soh)| HistoryPoint {
                    date: first + chrono::Duration::days(day),
                    cycles,
                    cycles_given: true,
                    capacity_ah: soh * 0.14,
                    soh_pct: soh,
                    resistance_mohm: cycles.is_finite().then_some(20.0 + 0.01 * cycles),
                    resistance_growth_pct: None,
                    ieee450_percent: None,
                    coulombic_efficiency_pct: None,
                    grade: None,
                    source: format!("day {day}"),
                    run_dir: None,
                    groups: None,
                    pulse_r50_mohm: None,
                    soh_u95_pct: None,
                    flags: Vec::new(),
                })
                .collect(),
            left_out: Vec::new(),
        }
    }

    /// Seven tests 91 days and 100 cycles apart, the fade of
    /// `fit::tests::a_noisy_fade_agrees_with_scipy`: its numbers from SciPy
    /// 1.17.1 (linregress, t.ppf, brentq). The end of life at 80 %:
    /// 1094.52 cycles (band 1052.23 to 1140.03); in days the same × 0.91:
    /// 996.0 (957.5 to 1037.4) after 2025-01-01, so 2027-09-24
    /// (2027-08-17 to 2027-11-04). Fades per unit: −1.825 % per 100 cycles,
    /// −7.3251 % per year (scipy: slope per day × 365.25), −8.9864 % per
    /// √year. The earlier half's slope −0.0190, the recent −0.0175: not
    /// accelerating. The resistance 20 + 0.01·n mΩ: 0.01 mΩ per cycle.
    #[test]
    fn projections_agree_with_scipy() {
        let y = [100.0, 98.1, 96.5, 94.2, 92.8, 90.9, 89.0];
        let pts: Vec<(i64, f64, f64)> = (0..7)
            .map(|k| (91 * k as i64, 100.0 * k as f64, y[k]))
            .collect();
        let a = analyze(&history(&pts), 80.0);
        assert_eq!(a.points, 7);
        assert!(a.notes.is_empty(), "{:?}", a.notes);
        let per: Vec<(ModelKind, f64)> =
            a.models.iter().map(|m| (m.kind, m.fade_per_unit)).collect();
        assert_eq!(per.len(), 3);
        assert_eq!(per[0].0, ModelKind::LinearCycles);
        assert!((per[0].1 + 1.825).abs() < 1e-10, "{per:?}");
        assert!((per[1].1 + 7.325_068_681_318_678).abs() < 1e-9, "{per:?}");
        assert!((per[2].1 + 8.986_423_228_433_964).abs() < 1e-9, "{per:?}");
        assert!((a.models[2].fit.r_squared - 0.913_106_419_754_687_5).abs() < 1e-9);
        let c = a.eol_cycles.as_ref().unwrap();
        assert!((c.cycles - 1_094.520_547_945_205_6).abs() < 1e-9, "{c:?}");
        assert!(
            (c.cycles_early.unwrap() - 1_052.225_416_622_141).abs() < 1e-6,
            "{c:?}"
        );
        assert!(
            (c.cycles_late.unwrap() - 1_140.031_093_970_452).abs() < 1e-6,
            "{c:?}"
        );
        assert_eq!(c.basis, "all 7 measurements");
        let d = a.eol_date.as_ref().unwrap();
        let day = |s: &str| s.parse::<NaiveDate>().unwrap();
        assert_eq!(d.date, day("2027-09-24"));
        assert_eq!(d.date_early, Some(day("2027-08-17")));
        assert_eq!(d.date_late, Some(day("2027-11-04")));
        assert!(a.accelerating.is_none());
        let r = a.resistance_fit.as_ref().unwrap();
        assert!((r.slope - 0.01).abs() < 1e-12 && (r.intercept - 20.0).abs() < 1e-9);
        assert_eq!(a.below_eol_since, None);
        // Judged on a day after the projected date: flagged, with a note.
        let mut late = a.clone();
        late.flag_against(day("2027-10-01"));
        assert!(late.eol_date_past);
        assert!(
            late.notes.iter().any(|n| n.contains("before today")),
            "{:?}",
            late.notes
        );
        let mut early = a.clone();
        early.flag_against(day("2027-09-24"));
        assert!(!early.eol_date_past, "on the day itself: not past");
    }

    /// A knee: −0.01 %/cycle to 500 cycles, then −0.04 %/cycle (exact
    /// lines). The recent half (500 to 900 cycles) is four times steeper:
    /// accelerating, and projected on it: 95 − 0.04·(n − 500) = 80 at
    /// n = 875 cycles (the line through the knee would say 1611).
    #[test]
    fn a_knee_is_found_and_projected_on_the_recent_half() {
        let pts: Vec<(i64, f64, f64)> = (0..10)
            .map(|k| {
                let n = 100.0 * k as f64;
                let soh = if n <= 500.0 {
                    100.0 - 0.01 * n
                } else {
                    95.0 - 0.04 * (n - 500.0)
                };
                (30 * k as i64, n, soh)
            })
            .collect();
        let a = analyze(&history(&pts), 80.0);
        let acc = a.accelerating.as_ref().unwrap();
        assert!(
            (acc.earlier_pct_per_100_cycles + 1.0).abs() < 1e-9,
            "{acc:?}"
        );
        assert!(
            (acc.recent_pct_per_100_cycles + 4.0).abs() < 1e-9,
            "{acc:?}"
        );
        assert!((acc.ratio - 4.0).abs() < 1e-9);
        let c = a.eol_cycles.as_ref().unwrap();
        assert!((c.cycles - 875.0).abs() < 1e-9, "{c:?}");
        assert_eq!(c.basis, "recent 5 measurements");
        assert!(a.notes.iter().any(|n| n.contains("accelerating")));
        // A steady fade of the same start is not accelerating.
        let steady: Vec<(i64, f64, f64)> = (0..10)
            .map(|k| {
                (
                    30 * k as i64,
                    100.0 * k as f64,
                    100.0 - 0.001 * k as f64 * 100.0 + if k % 2 == 0 { 0.1 } else { -0.1 },
                )
            })
            .collect();
        assert!(analyze(&history(&steady), 80.0).accelerating.is_none());
        assert!(
            acceleration(&[0.0, 1.0, 2.0, 3.0, 4.0], &[5.0, 4.0, 3.0, 1.0, -1.0]).is_none(),
            "under six points"
        );
    }

    /// Too few tests project nothing; tests under the threshold at the end
    /// are "below since" the first of them; an unknown cycle count leaves
    /// a point out of the cycle fit only; a rising history projects no end.
    #[test]
    fn what_is_not_projected_says_why() {
        let a = analyze(&history(&[(0, 0.0, 95.0), (90, 100.0, 93.0)]), 80.0);
        assert!(a.models.is_empty() && a.eol_cycles.is_none());
        assert!(a.notes[0].contains("2 measurement(s)"), "{:?}", a.notes);
        let a = analyze(
            &history(&[
                (0, 0.0, 85.0),
                (90, 100.0, 82.0),
                (180, 200.0, 79.0),
                (270, 300.0, 77.0),
            ]),
            80.0,
        );
        assert_eq!(a.below_eol_since, Some("2025-06-30".parse().unwrap()));
        assert!(
            a.notes[0].contains("below end of life (80 % of rated) since 2025-06-30: 77.0 %"),
            "{:?}",
            a.notes
        );
        let a = analyze(
            &history(&[
                (0, 0.0, 95.0),
                (90, f64::NAN, 94.0),
                (180, 200.0, 93.0),
                (270, 300.0, 92.0),
            ]),
            80.0,
        );
        assert!(
            a.notes
                .iter()
                .any(|n| n.contains("1 measurement(s) without a cycle count")),
            "{:?}",
            a.notes
        );
        assert_eq!(a.models.len(), 3);
        assert_eq!(a.models[0].fit.n, 3);
        assert_eq!(a.models[1].fit.n, 4);
        let a = analyze(
            &history(&[(0, 0.0, 90.0), (90, 100.0, 91.0), (180, 200.0, 92.0)]),
            80.0,
        );
        assert!(a.eol_cycles.is_none() && a.eol_date.is_none());
        assert!(a.notes.iter().any(|n| n.contains("no falling trend")));
        // A flagged point is left out of the fit and said to be.
        let mut h = history(&[
            (0, 0.0, 95.0),
            (90, 100.0, 93.0),
            (180, 200.0, 99.0),
            (270, 300.0, 89.0),
        ]);
        h.points[2].flags.push("rose".into());
        let a = analyze(&h, 80.0);
        assert_eq!(a.points, 3);
        assert!(
            a.notes[0].starts_with("1 flagged test(s) left out"),
            "{:?}",
            a.notes
        );
    }

    /// A test at exactly the end of life is not below it; a flat history
    /// (slope exactly 0) projects nothing and says so.
    #[test]
    fn at_the_threshold_is_not_below_and_flat_is_no_trend() {
        let a = analyze(
            &history(&[(0, 0.0, 85.0), (90, 100.0, 82.0), (180, 200.0, 80.0)]),
            80.0,
        );
        assert_eq!(a.below_eol_since, None);
        let a = analyze(
            &history(&[(0, 0.0, 90.0), (90, 100.0, 90.0), (180, 200.0, 90.0)]),
            80.0,
        );
        assert_eq!(a.models[0].fit.slope, 0.0);
        assert!(a.eol_cycles.is_none());
        assert!(
            a.notes
                .iter()
                .any(|n| n.contains("no falling trend against cycles")),
            "{:?}",
            a.notes
        );
    }

    /// Each model says what it is, in the words the report prints.
    #[test]
    fn each_model_describes_itself() {
        assert_eq!(
            ModelKind::LinearCycles.describe(),
            "linear in equivalent full cycles"
        );
        assert_eq!(ModelKind::LinearTime.describe(), "linear in time");
        assert!(ModelKind::SqrtTime
            .describe()
            .contains("square root of time"));
    }

    /// Acceleration needs six tests; the recent half 1.5 times steeper is
    /// not enough when the difference is within twice its standard error
    /// (both halves' errors added in quadrature). Worked with the fits the
    /// rule takes (`LinearFit`, checked against SciPy in `fit`).
    #[test]
    fn acceleration_is_a_clear_change_of_slope() {
        // Six points: −1 per 100 then −3 per 100 (mid = 3, shared).
        let x = [0.0, 100.0, 200.0, 300.0, 400.0, 500.0];
        let y = [100.0, 99.0, 98.0, 97.0, 94.0, 91.0];
        let a = acceleration(&x, &y).expect("clean: clear");
        assert!((a.ratio - 3.0).abs() < 1e-9, "{a:?}");
        assert!((a.earlier_pct_per_100_cycles + 1.0).abs() < 1e-9);
        assert!((a.recent_pct_per_100_cycles + 3.0).abs() < 1e-9);
        assert!(acceleration(&x[..5], &y[..5]).is_none());
        // Noisy: the recent half is 1.82 × steeper (−0.0066 and −0.0120
        // per cycle), but the difference 0.0054 is within 2 × √(se₁² +
        // se₂²) = 0.0064 (scipy.stats.linregress 1.17.1 on both halves).
        let y = [100.0, 98.6, 99.2, 97.6, 96.2, 95.2];
        let (e, r) = (
            LinearFit::fit(&x[..=3], &y[..=3]).unwrap(),
            LinearFit::fit(&x[3..], &y[3..]).unwrap(),
        );
        assert!((e.slope + 0.0066).abs() < 1e-12 && (r.slope + 0.012).abs() < 1e-12);
        let two_se = 2.0 * (e.slope_se.powi(2) + r.slope_se.powi(2)).sqrt();
        assert!(
            (two_se - 0.006_404_165_311_212_19).abs() < 1e-12,
            "{two_se}"
        );
        assert!(acceleration(&x, &y).is_none());
        // Both halves scattered: 1.56 × steeper (−0.0080 and −0.0125), the
        // difference 0.0045 within 2 × √(se₁² + se₂²) = 0.00572 though
        // over 2 × √(se₁² − se₂²) = 0.00026 (scipy.stats.linregress 1.17.1).
        let y = [99.7, 99.3, 98.8, 97.2, 95.6, 94.7];
        let (e, r) = (
            LinearFit::fit(&x[..=3], &y[..=3]).unwrap(),
            LinearFit::fit(&x[3..], &y[3..]).unwrap(),
        );
        assert!((e.slope + 0.008).abs() < 1e-12 && (r.slope + 0.0125).abs() < 1e-12);
        let two_se = 2.0 * (e.slope_se.powi(2) + r.slope_se.powi(2)).sqrt();
        assert!(
            (two_se - 0.005_721_305_212_391_128).abs() < 1e-12,
            "{two_se}"
        );
        assert!(acceleration(&x, &y).is_none());
    }
}
