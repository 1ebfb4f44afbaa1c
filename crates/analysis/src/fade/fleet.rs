//! The fleet view: one row per pack, ranked by latest state of health
//! (best first), with resistance, fade rate, projected end of life, grade,
//! last test date and whether a test is overdue.

use super::history::PackHistory;
use super::schedule::Schedule;
use super::trend::{self, FadeAnalysis, ModelKind};
use chrono::NaiveDate;
use model::pack::Chemistry;
use serde::Serialize;

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FleetRow {
    pub rank: usize,
    pub pack_id: String,
    pub chemistry: Chemistry,
    pub series: u32,
    pub rated_capacity_ah: f64,
    pub tests: usize,
    pub last_test: Option<NaiveDate>,
    pub days_since_test: Option<i64>,
    pub overdue: bool,
    /// When the next test is due (none: now).
    pub due: Option<NaiveDate>,
    /// The rule that set the date.
    pub due_rule: String,
    /// The schedule's rule says replace the pack (IEEE 450: under 80 %).
    pub replace: bool,
    pub cycles: Option<f64>,
    pub soh_pct: Option<f64>,
    pub capacity_ah: Option<f64>,
    pub resistance_mohm: Option<f64>,
    pub resistance_growth_pct: Option<f64>,
    pub fade_pct_per_100_cycles: Option<f64>,
    pub fade_pct_per_year: Option<f64>,
    pub eol_cycles: Option<f64>,
    pub eol_date: Option<NaiveDate>,
    pub accelerating: bool,
    pub grade: Option<String>,
    /// The test the row's grade and figures come from (`run <id>` or a
    /// history line): the latest one not flagged.
    pub from_test: Option<String>,
    /// Flagged tests of the pack, each with why.
    pub flags: Vec<String>,
    /// What needs attention, in words, judged once here and shown by every
    /// fleet screen: overdue, replace, accelerating, below end of life,
    /// flagged tests. A replacement by the schedule's rule overrides the
    /// grade's duty (one row never advises both).
    pub attention: Vec<String>,
    /// The latest tests are under the end-of-life threshold, since then.
    pub below_eol_since: Option<NaiveDate>,
    /// The projected end-of-life date is before today.
    pub eol_date_past: bool,
}

/// The fleet at a date.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Fleet {
    pub today: NaiveDate,
    pub interval_days: i64,
    /// The schedule the packs are judged by, in words.
    pub schedule: String,
    pub threshold_pct: f64,
    pub rows: Vec<FleetRow>,
}

/// Resistance growth of one test: its run's own (the verdict's), else
/// its reading against the history's reference, %.
pub fn resistance_growth_pct(h: &PackHistory, p: &super::history::HistoryPoint) -> Option<f64> {
    if p.resistance_growth_pct.is_some() {
        return p.resistance_growth_pct;
    }
    let (reference, _) = h.reference_resistance()?;
    Some((p.resistance_mohm? / reference - 1.0) * 100.0)
}

pub fn row(
    h: &PackHistory,
    fade: &FadeAnalysis,
    today: NaiveDate,
    schedule: &Schedule,
) -> FleetRow {
    // The row's figures and grade come from one test: the latest not
    // flagged (a jump the measurement cannot explain improves nothing).
    let last = h.points.iter().rev().find(|p| p.flags.is_empty());
    let days = h.latest().map(|p| (today - p.date).num_days());
    let due = schedule.due(h, today);
    let slope = |k: ModelKind| {
        fade.models
            .iter()
            .find(|m| m.kind == k)
            .map(|m| m.fade_per_unit)
    };
    let flags: Vec<String> = h
        .points
        .iter()
        .flat_map(|p| {
            p.flags
                .iter()
                .map(move |f| format!("{} ({}): {f}", p.source, p.date))
        })
        .collect();
    let mut attention = Vec::new();
    if due.replace {
        attention.push(match last.and_then(|p| p.grade.as_deref()) {
            Some(g) => format!(
                "replace: {} (this overrides grade {g}'s duty in this service)",
                due.rule
            ),
            None => format!("replace: {}", due.rule),
        });
    } else if due.overdue {
        attention.push(format!("test overdue: {}", due.rule));
    }
    if fade.accelerating.is_some() {
        attention.push("fade accelerating".into());
    }
    if let Some(d) = fade.below_eol_since {
        attention.push(format!("below end of life since {d}"));
    } else if fade.eol_date.as_ref().is_some_and(|p| p.date < today) {
        attention.push("projected end of life already past".into());
    }
    if !flags.is_empty() {
        attention.push(format!(
            "{} flagged test(s): the row's figures are from {}",
            flags.len(),
            last.map(|p| p.source.as_str())
                .unwrap_or("no unflagged test")
        ));
    }
    FleetRow {
        rank: 0,
        pack_id: h.pack_id.clone(),
        chemistry: h.spec.chemistry,
        series: h.spec.series,
        rated_capacity_ah: h.spec.rated_capacity_ah,
        tests: h.points.len(),
        last_test: h.latest().map(|p| p.date),
        days_since_test: days,
        overdue: due.overdue,
        due: due.due,
        due_rule: due.rule,
        replace: due.replace,
        cycles: last.map(|p| p.cycles).filter(|c| c.is_finite()),
        soh_pct: last.map(|p| p.soh_pct),
        capacity_ah: last.map(|p| p.capacity_ah),
        resistance_mohm: last.and_then(|p| p.resistance_mohm),
        resistance_growth_pct: last.and_then(|p| resistance_growth_pct(h, p)),
        fade_pct_per_100_cycles: slope(ModelKind::LinearCycles),
        fade_pct_per_year: slope(ModelKind::LinearTime),
        eol_cycles: fade.eol_cycles.as_ref().map(|p| p.cycles),
        eol_date: fade.eol_date.as_ref().map(|p| p.date),
        accelerating: fade.accelerating.is_some(),
        grade: last.and_then(|p| p.grade.clone()),
        from_test: last.map(|p| p.source.clone()),
        flags,
        attention,
        below_eol_since: fade.below_eol_since,
        eol_date_past: fade.eol_date.as_ref().is_some_and(|p| p.date < today),
    }
}

/// Rank packs by latest state of health (best first) into the fleet view.
pub fn rank(
    histories: &[PackHistory],
    today: NaiveDate,
    schedule: &Schedule,
    threshold_pct: f64,
) -> Fleet {
    let mut rows = Vec::new();
    for h in histories {
        let fade = trend::analyze(h, threshold_pct);
        rows.push(row(h, &fade, today, schedule));
    }
    rows.sort_by(|a, b| {
        b.soh_pct
            .unwrap_or(f64::NEG_INFINITY)
            .total_cmp(&a.soh_pct.unwrap_or(f64::NEG_INFINITY))
            .then_with(|| a.pack_id.cmp(&b.pack_id))
    });
    for (i, r) in rows.iter_mut().enumerate() {
        r.rank = i + 1;
    }
    Fleet {
        today,
        interval_days: schedule.interval_days,
        schedule: schedule.name(),
        threshold_pct,
        rows,
    }
}

/// CSV rendering of the fleet.
pub fn to_csv(f: &Fleet) -> Result<String, csv::Error> {
    let mut w = csv::Writer::from_writer(Vec::new());
    w.write_record([
        "rank",
        "pack_id",
        "chemistry",
        "series",
        "rated_capacity_ah",
        "tests",
        "last_test",
        "days_since_test",
        "overdue",
        "cycles",
        "soh_pct",
        "capacity_ah",
        "resistance_mohm",
        "resistance_growth_pct",
        "fade_pct_per_100_cycles",
        "fade_pct_per_year",
        "eol_cycles",
        "eol_date",
        "accelerating",
        "grade",
        "below_eol_since",
        "eol_date_past",
        "due",
        "due_rule",
        "replace",
    ])?;
    let o = |v: Option<f64>, d: usize| v.map(|x| format!("{x:.d$}")).unwrap_or_default();
    for r in &f.rows {
        w.write_record([
            r.rank.to_string(),
            r.pack_id.clone(),
            r.chemistry.to_string(),
            r.series.to_string(),
            format!("{}", r.rated_capacity_ah),
            r.tests.to_string(),
            r.last_test.map(|d| d.to_string()).unwrap_or_default(),
            r.days_since_test.map(|d| d.to_string()).unwrap_or_default(),
            r.overdue.to_string(),
            o(r.cycles, 1),
            o(r.soh_pct, 2),
            o(r.capacity_ah, 4),
            o(r.resistance_mohm, 2),
            o(r.resistance_growth_pct, 1),
            o(r.fade_pct_per_100_cycles, 4),
            o(r.fade_pct_per_year, 3),
            o(r.eol_cycles, 0),
            r.eol_date.map(|d| d.to_string()).unwrap_or_default(),
            r.accelerating.to_string(),
            r.grade.clone().unwrap_or_default(),
            r.below_eol_since.map(|d| d.to_string()).unwrap_or_default(),
            r.eol_date_past.to_string(),
            r.due.map(|d| d.to_string()).unwrap_or_default(),
            r.due_rule.clone(),
            r.replace.to_string(),
        ])?;
    }
    let bytes = w.into_inner().map_err(|e| e.into_error())?;
    Ok(String::from_utf8_lossy(&bytes).into_owned())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fade::history::HistoryPoint;
    use model::pack::{Chemistry, PackSpec};

    fn point(day: i64, soh: f64, r: Option<f64>) -> HistoryPoint {
        HistoryPoint {
            date: NaiveDate::from_ymd_opt(2025, 1, 1).unwrap() + chrono::Duration::days(day),
            cycles: day as f64,
            cycles_given: true,
            capacity_ah: soh * 0.14,
            soh_pct: soh,
            resistance_mohm: r,
            resistance_growth_pct: None,
            ieee450_percent: None,
            coulombic_efficiency_pct: None,
            grade: Some("A".into()),
            source: format!("day {day}"),
            run_dir: None,
            groups: None,
            pulse_r50_mohm: None,
            soh_u95_pct: None,
            flags: Vec::new(),
        }
    }

    fn history(id: &str, points: Vec<HistoryPoint>, rated_r: Option<f64>) -> PackHistory {
        PackHistory {
            pack_id: id.into(),
            spec: PackSpec {
                chemistry: Chemistry::LiIon,
                series: 10,
                rated_capacity_ah: 14.0,
                rated_energy_wh: None,
                rated_rate_c: None,
                rated_resistance_mohm: rated_r,
            },
            points,
            left_out: Vec::new(),
        }
    }

    /// Two packs ranked by their latest state of health; growth against
    /// the rated resistance, else the first reading (50 → 60 mΩ: +20 %);
    /// overdue by the interval; a projected end of life already past; the
    /// CSV has a row per pack under its header.
    #[test]
    fn rows_ranked_with_growth_due_dates_and_attention() {
        let a = history(
            "FR-A",
            vec![
                point(0, 95.0, Some(50.0)),
                point(100, 93.0, Some(55.0)),
                point(200, 91.0, Some(60.0)),
            ],
            None,
        );
        let b = history(
            "FR-B",
            vec![
                point(0, 90.0, Some(40.0)),
                point(300, 85.0, Some(44.0)),
                point(600, 80.5, Some(48.0)),
            ],
            Some(40.0),
        );
        let today = NaiveDate::from_ymd_opt(2026, 10, 1).unwrap();
        let f = rank(
            &[b.clone(), a.clone()],
            today,
            &Schedule::interval(92),
            80.0,
        );
        assert_eq!(f.schedule, "every 92 days");
        assert_eq!((f.interval_days, f.threshold_pct), (92, 80.0));
        let ids: Vec<&str> = f.rows.iter().map(|r| r.pack_id.as_str()).collect();
        assert_eq!(ids, ["FR-A", "FR-B"]);
        assert_eq!(f.rows.iter().map(|r| r.rank).collect::<Vec<_>>(), [1, 2]);
        let ra = &f.rows[0];
        assert!(
            (ra.resistance_growth_pct.unwrap() - 20.0).abs() < 1e-9,
            "{ra:?}"
        );
        assert!((f.rows[1].resistance_growth_pct.unwrap() - 20.0).abs() < 1e-9);
        // Last tests on day 200 (2025-07-20) and 600 (2026-08-24).
        assert_eq!(
            ra.days_since_test,
            Some((today - ra.last_test.unwrap()).num_days())
        );
        assert!(ra.overdue && !f.rows[1].overdue);
        assert!(
            ra.attention.iter().any(|x| x.starts_with("test overdue")),
            "{:?}",
            ra.attention
        );
        // FR-B falls 1.5 % per 100 days: 80 % is reached soon after
        // day 600; today is past the projected date.
        let rb = &f.rows[1];
        assert!(rb.eol_date.is_some_and(|d| d < today), "{rb:?}");
        assert!(rb.eol_date_past);
        // On the projected day itself it is not yet past.
        let fade_b = crate::fade::trend::analyze(&b, 80.0);
        let on_the_day = fade_b.eol_date.as_ref().unwrap().date;
        let r = row(&b, &fade_b, on_the_day, &Schedule::interval(92));
        assert!(
            !r.attention.iter().any(|x| x.contains("already past")),
            "{:?}",
            r.attention
        );
        assert!(
            rb.attention
                .iter()
                .any(|x| x == "projected end of life already past"),
            "{:?}",
            rb.attention
        );
        let csv = to_csv(&f).unwrap();
        let lines: Vec<&str> = csv.lines().collect();
        assert_eq!(lines.len(), 3);
        assert!(lines[0].starts_with("rank,pack_id,chemistry,series"));
        assert!(
            lines[1].starts_with("1,FR-A,li-ion,10,14,3,2025-07-20,"),
            "{}",
            lines[1]
        );
        // A test's own growth (its verdict's) wins over the reference.
        let mut own = point(300, 90.0, Some(70.0));
        own.resistance_growth_pct = Some(33.0);
        assert_eq!(resistance_growth_pct(&a, &own), Some(33.0));
        assert_eq!(resistance_growth_pct(&a, &point(300, 90.0, None)), None);
        // The reference: rated first, else the first reading.
        assert_eq!(b.reference_resistance(), Some((40.0, "rated")));
        assert_eq!(a.reference_resistance(), Some((50.0, "first test")));
        assert_eq!(
            history("C", vec![point(0, 90.0, None)], None).reference_resistance(),
            None
        );
    }
}
