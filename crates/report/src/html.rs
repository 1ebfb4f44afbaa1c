//! Single-file HTML reports with inline SVG plots: per run (with a grade
//! card a shop can print and attach to the pack), per pack (fade), per
//! fleet. No scripts, no external resources. Presentation only.

use super::svg::{self, Band, Chart, HLine, Mark, Series};
use analysis::curves;
use analysis::fade::fleet::Fleet;
use analysis::fade::history::PackHistory;
use analysis::fade::trend::FadeAnalysis;
use model::units::HumanDuration;
use record::Summary;
use std::fmt::Write;

use crate::charts::ChartData;
pub use crate::charts::MAX_POINTS;

pub use crate::markup::escape;

const STYLE: &str = r#"
body { font-family: sans-serif; margin: 24px auto; max-width: 1000px; color: #222; }
h1 { font-size: 22px; margin-bottom: 4px; } h2 { font-size: 17px; margin-top: 28px; border-bottom: 1px solid #ccc; }
.sub { color: #555; margin-top: 0; }
table { border-collapse: collapse; margin: 8px 0; font-size: 13px; }
th, td { border: 1px solid #ccc; padding: 3px 8px; text-align: right; white-space: nowrap; }
th { background: #f2f2f2; } td.l, th.l { text-align: left; }
td.wrap { white-space: normal; max-width: 46em; }
td.flag { white-space: normal; min-width: 14em; }
.status-completed { color: #1a7f1a; } .status-aborted, .status-interrupted { color: #b00; }
.card { border: 2px solid #222; padding: 12px 16px; width: 420px; page-break-inside: avoid; }
.card .grade { font-size: 56px; font-weight: bold; float: right; margin-left: 12px; line-height: 1; }
.card dl { display: grid; grid-template-columns: auto auto; gap: 2px 12px; margin: 6px 0; font-size: 13px; }
.card dt { color: #555; } .card dd { margin: 0; font-weight: bold; }
.warn { color: #8a5a00; } .flag { color: #b00; font-weight: bold; }
tr.weak td { background: #fde8e8; }
svg { display: block; margin: 8px 0; max-width: 100%; height: auto; }
@media print { body { margin: 0; } h2 { page-break-after: avoid; } }
"#;

fn page(title: &str, body: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>{}</title><style>{STYLE}</style></head><body>\n{body}\n<p class=\"sub\">Written by packbench {}.</p></body></html>\n",
        escape(title),
        env!("CARGO_PKG_VERSION")
    )
}

/// How a report links to the others: as the files of a results folder
/// (a report opened from the disk), or as the console's pages.
#[derive(Debug, Clone, PartialEq)]
pub enum Links {
    /// The path from the page to the folder its links start from (the
    /// pack's folder for a pack's report, the results folder for the
    /// fleet's), "" when the page is in it, else ending in '/'.
    Files(String),
    /// The console's pages (`/packs/…`).
    Console,
}

impl Links {
    /// A pack's page: its fade report.
    pub fn pack(&self, pack: &str) -> String {
        match self {
            Links::Files(base) => format!("{base}{pack}/fade.html"),
            Links::Console => format!("/packs/{pack}"),
        }
    }

    /// A run's report, from its pack's page.
    pub fn run(&self, pack: &str, run: &str) -> String {
        match self {
            Links::Files(base) => format!("{base}{run}/report.html"),
            Links::Console => format!("/packs/{pack}/runs/{run}"),
        }
    }

    /// A run's label (the console prints them).
    pub fn label(&self, pack: &str, run: &str) -> Option<String> {
        match self {
            Links::Files(_) => None,
            Links::Console => Some(format!("/packs/{pack}/runs/{run}/label")),
        }
    }
}

fn f(v: Option<f64>, d: usize) -> String {
    crate::text::opt_or(v, d, "–")
}

/// The printable grade card of a run.
fn grade_card(s: &Summary) -> String {
    let mut o = String::new();
    let v = &s.verdict;
    let u = &v.uncertainty;
    let label = v.grade_label().unwrap_or("–");
    let _ = write!(
        o,
        "<div class=\"card\"><div class=\"grade\">{}</div><b>Pack {}</b><br>{} {}S, {}<br>tested {}",
        escape(label),
        escape(&s.pack_id),
        s.pack.chemistry.name(),
        s.pack.series,
        crate::text::rated_text(s),
        escape(&s.test_date.to_string())
    );
    let _ = write!(o, "<dl>");
    let rows = [
        (
            "State of health",
            Some(format!(
                "{}{}",
                v.soh_pct.show(1, " %"),
                if v.soh_pct.get().is_some() {
                    crate::pm(&u.soh_pct)
                } else {
                    String::new()
                }
            )),
        ),
        (
            // The capacity the state of health is computed from, and what
            // was done to it.
            "Capacity (corrected)",
            Some(match v.corrected_ah.get() {
                Some(c) => format!("{c:.3} Ah{}: {}", crate::pm(&u.corrected_ah), v.conditions),
                None => v.corrected_ah.show(3, " Ah"),
            }),
        ),
        (
            "Measured capacity",
            v.measured_ah.get().map(|a| {
                format!(
                    "{a:.3} Ah{} / {} Wh{}",
                    crate::pm(&u.measured_ah),
                    f(v.measured_wh.get(), 1),
                    crate::pm(&u.measured_wh)
                )
            }),
        ),
        (
            "At",
            s.capacity.as_ref().map(|c| {
                format!(
                    "{} to {} V",
                    v.test_rate_c.show(2, "C"),
                    f(c.end_voltage_v, 2)
                )
            }),
        ),
        (
            "New nominal for the BMS",
            Some(v.new_nominal_ah.show(3, " Ah")),
        ),
        (
            "DC resistance",
            Some(format!(
                "{}{}",
                v.resistance_mohm.show(1, " mΩ"),
                if v.resistance_mohm.get().is_some() {
                    crate::pm(&u.resistance_mohm)
                } else {
                    String::new()
                }
            )),
        ),
        (
            "Resistance growth",
            Some(v.resistance_growth_pct.show(1, " %")),
        ),
        (
            "Coulombic efficiency",
            Some(match v.efficiency_cycle {
                Some(c) => format!(
                    "{}{} (cycle {c})",
                    v.coulombic_efficiency_pct.show(2, " %"),
                    crate::pm(&u.coulombic_efficiency_pct)
                ),
                None => v.coulombic_efficiency_pct.show(2, " %"),
            }),
        ),
        (
            "Weakest group",
            s.groups.as_ref().and_then(|g| {
                g.weakest
                    .map(|w| format!("group {w}: {} % of the mean", f(g.weakest_share_pct, 1)))
            }),
        ),
        ("Cycles", s.cycle_count.map(|c| format!("{c:.0}"))),
        (
            "BMS capacity error",
            s.bms
                .as_ref()
                .and_then(|b| b.capacity_error_pct)
                .map(|e| format!("{e:+.1} %")),
        ),
    ];
    for (k, v) in rows {
        let _ = write!(
            o,
            "<dt>{k}</dt><dd>{}</dd>",
            escape(&v.unwrap_or_else(|| "–".into()))
        );
    }
    let _ = write!(o, "</dl>");
    if let Some(w) = v.grade.why() {
        let _ = write!(o, "<div><i>not graded: {}</i></div>", escape(w.words()));
    }
    for flag in &v.flags {
        let _ = write!(o, "<div class=\"flag\">{}</div>", escape(flag));
    }
    if let Some(g) = v.grade.value() {
        let _ = write!(
            o,
            "<div><i>{}</i></div><ul style=\"font-size:12px;margin:4px 0 0 16px;padding:0\">",
            escape(&g.meaning)
        );
        for r in &g.reasons {
            let _ = write!(o, "<li>{}</li>", escape(r));
        }
        let _ = write!(
            o,
            "</ul><div style=\"font-size:11px;color:#555\">policy: {}</div>",
            escape(&g.policy)
        );
        decision_note(&mut o, g);
    }
    let _ = write!(
        o,
        "<div style=\"font-size:11px;color:#555\">run {}</div></div>",
        escape(&s.run_id)
    );
    o
}

/// The grade's decision rule on the card: conditional or retest, the rule,
/// the probability at the nearest boundary.
fn decision_note(o: &mut String, g: &analysis::fade::grade::Grade) {
    if let Some(d) = &g.decision {
        if d.conditional {
            let _ = write!(
                o,
                "<div class=\"flag\">{}</div>",
                if d.retest { "RETEST" } else { "CONDITIONAL" }
            );
        }
        let _ = write!(
            o,
            "<div style=\"font-size:11px;color:#555\">decision rule: {}<br>{}</div>",
            escape(&d.rule),
            escape(&d.line())
        );
    }
}

/// A differential curve: the binned values as dots, the smoothed curve,
/// and its main peaks.
fn differential_chart(b: &mut String, title: &str, x: &str, y: &str, d: &curves::Differential) {
    if d.points.len() < 3 {
        return;
    }
    let mut c = Chart::new(title, x, y);
    c.series.push(Series {
        name: "binned".into(),
        points: d.points.clone(),
        color: svg::GREY_,
        mark: Mark::Dots,
    });
    c.series.push(Series {
        name: "smoothed".into(),
        points: d
            .points
            .iter()
            .zip(&d.smoothed)
            .map(|(p, y)| (p.0, *y))
            .collect(),
        color: svg::PURPLE_,
        mark: Mark::Line,
    });
    if !d.peaks.is_empty() {
        c.series.push(Series {
            name: "main peaks".into(),
            points: d
                .peaks
                .iter()
                .map(|p| (d.points[p.index].0, p.height))
                .collect(),
            color: svg::RED_,
            mark: Mark::Dots,
        });
    }
    b.push_str(&svg::render(&c));
}

/// The report of one run.
pub fn run_report(s: &Summary, charts: &ChartData) -> String {
    let mut b = String::new();
    let _ = write!(
        b,
        "<h1>Capacity test of pack {}</h1><p class=\"sub\">{} · test date {} · run {} · <span class=\"status-{st}\">{st}</span></p>",
        escape(&s.pack_id),
        escape(&s.procedure_title),
        escape(&s.test_date.to_string()),
        escape(&s.run_id),
        st = s.status.name()
    );
    if let Some(r) = &s.stop_reason {
        let _ = write!(b, "<p class=\"flag\">Stopped: {}</p>", escape(r));
    }
    decision_section(&mut b, s);
    let _ = write!(b, "<h2>Grade card</h2>{}", grade_card(s));
    let _ = write!(b, "<h2>Summary</h2><table>");
    for (k, v) in summary_rows(s) {
        let _ = write!(
            b,
            "<tr><th class=\"l\">{}</th><td class=\"l wrap\">{}</td></tr>",
            escape(&k),
            escape(&v)
        );
    }
    let _ = write!(b, "</table>");
    for a in &s.alarms {
        let _ = write!(b, "<p class=\"warn\"><b>Alarm:</b> {}</p>", escape(a));
    }
    for w in &s.warnings {
        let _ = write!(b, "<p class=\"warn\">Warning: {}</p>", escape(w));
    }
    let _ = write!(b, "<h2>Voltage, current and temperature</h2>");
    time_charts(&mut b, charts);
    capacity_chart(&mut b, charts);
    if let Some(g) = &s.groups {
        group_section(&mut b, g, charts);
    }
    differential_charts(&mut b, s, charts);
    ocv_table(&mut b, s);
    if let Some(c) = &s.characterization {
        characterization_section(&mut b, c);
    }
    budget_section(&mut b, s);
    step_table(&mut b, s);
    page(&format!("packbench — {} — {}", s.pack_id, s.run_id), &b)
}

/// How the figures are judged and what their uncertainty rests on:
/// stated before any figure (ISO/IEC 17025:2017 7.1.3: the decision rule
/// agreed before the test).
fn decision_section(b: &mut String, s: &Summary) {
    let _ = write!(b, "<h2>Decision rule and accuracy</h2><table>");
    let rule = s
        .verdict
        .grade
        .value()
        .and_then(|g| g.decision.as_ref())
        .map(|d| d.rule.clone())
        .unwrap_or_else(|| "not graded: no rule applied".into());
    for (k, v) in [
        ("Decision rule", rule),
        ("Accuracy", s.verdict.uncertainty.basis_line()),
        (
            "Calibration",
            match &s.calibration {
                Some(c) => format!(
                    "{} of {} (due {}{}), applied to every reading",
                    c.id,
                    c.date,
                    c.next_due,
                    if c.overdue { ", OVERDUE" } else { "" }
                ),
                None => "none recorded for this station: the instruments' stated accuracy is used"
                    .into(),
            },
        ),
    ] {
        let _ = write!(
            b,
            "<tr><th class=\"l\">{k}</th><td class=\"l wrap\">{}</td></tr>",
            escape(&v)
        );
    }
    let _ = write!(b, "</table>");
}

/// Each figure's uncertainty budget (JCGM 100:2008): its terms, the
/// combined standard uncertainty, the expanded one, the dominant term.
fn budget_section(b: &mut String, s: &Summary) {
    let u = &s.verdict.uncertainty;
    let budgets = [
        ("Measured capacity", &u.measured_ah),
        ("Measured energy", &u.measured_wh),
        ("Capacity (corrected)", &u.corrected_ah),
        ("State of health", &u.soh_pct),
        ("Coulombic efficiency", &u.coulombic_efficiency_pct),
        ("Energy efficiency", &u.energy_efficiency_pct),
        ("DC resistance", &u.resistance_mohm),
    ];
    if budgets.iter().all(|(_, x)| x.is_none()) {
        return;
    }
    let _ = write!(b, "<h2>Uncertainty budgets</h2>");
    for (name, x) in budgets {
        let Some(x) = x else { continue };
        let _ = write!(
            b,
            "<h3>{name}: {}</h3><table><tr><th class=\"l\">term</th><th>u ({})</th><th>share</th><th class=\"l\">distribution</th><th class=\"l\">basis</th></tr>",
            escape(&x.show()),
            escape(&x.unit)
        );
        let var = x.u * x.u;
        for t in &x.terms {
            let _ = write!(
                b,
                "<tr><td class=\"l\">{}</td><td>{:.3e}</td><td>{:.1} %</td><td class=\"l\">{}{}</td><td class=\"l wrap\">{}</td></tr>",
                escape(&t.name),
                t.u,
                if var > 0.0 { t.u * t.u / var * 100.0 } else { 0.0 },
                match t.shape {
                    analysis::uncertainty::Shape::Rectangular => "rectangular",
                    analysis::uncertainty::Shape::Normal => "normal",
                },
                if t.correlated { ", common to every sample" } else { "" },
                escape(&t.basis)
            );
        }
        let _ = write!(
            b,
            "<tr><th class=\"l\">combined u</th><th>{:.3e}</th><th></th><th class=\"l\" colspan=\"2\">U = {:.3e} (k = {}); {}</th></tr></table>",
            x.u,
            x.expanded,
            x.k,
            escape(&x.note())
        );
    }
}

/// The pulse-power levels: the curves (OCV, resistances, power
/// capability against state of charge) and the table a BMS engineer
/// reads them from.
fn characterization_section(b: &mut String, c: &analysis::characterize::Characterization) {
    let mut levels: Vec<_> = c.levels.iter().collect();
    levels.sort_by(|a, x| a.soc_pct.total_cmp(&x.soc_pct));
    let _ = write!(
        b,
        "<h2>Pulse-power characterization</h2><p class=\"sub\">hybrid pulse power method (US DOE/INL battery test manuals): state of charge on {:.3} Ah, {}; power capability at {:.2} V and {:.2} V; equivalent circuits fitted to each pulse and its relaxation. Tables: <code>packbench characterize</code>.</p>",
        c.basis.capacity_ah,
        escape(&c.basis.source),
        c.settings.voltage_min_v,
        c.settings.voltage_max_v
    );
    let pts = |f: &dyn Fn(&analysis::characterize::Level) -> Option<f64>| -> Vec<(f64, f64)> {
        levels
            .iter()
            .filter_map(|l| f(l).map(|y| (l.soc_pct, y)))
            .collect()
    };
    let mut ocv = Chart::new("Open-circuit voltage", "state of charge (%)", "voltage (V)");
    ocv.series.push(Series {
        name: "rest end before each pulse".into(),
        points: pts(&|l| Some(l.ocv_v)),
        color: svg::BLUE_,
        mark: Mark::LineAndDots,
    });
    b.push_str(&svg::render(&ocv));
    let mut r = Chart::new("Resistance", "state of charge (%)", "resistance (mΩ)");
    for (name, color, f) in [
        (
            "discharge pulse (end)",
            svg::BLUE_,
            &(|l: &analysis::characterize::Level| Some(l.discharge.resistance_mohm))
                as &dyn Fn(&analysis::characterize::Level) -> Option<f64>,
        ),
        (
            "charge pulse (end)",
            svg::ORANGE_,
            &|l: &analysis::characterize::Level| l.charge.as_ref().map(|p| p.resistance_mohm),
        ),
        (
            "R0 (circuit)",
            svg::GREEN_,
            &|l: &analysis::characterize::Level| l.circuit_r0_ohm(2).map(|r| r * 1000.0),
        ),
        (
            "R1 (circuit)",
            svg::PURPLE_,
            &|l: &analysis::characterize::Level| {
                l.ecm2
                    .as_ref()
                    .and_then(|f| f.pairs.first())
                    .map(|p| p.r_ohm * 1000.0)
            },
        ),
        (
            "R2 (circuit)",
            svg::GREY_,
            &|l: &analysis::characterize::Level| {
                l.ecm2
                    .as_ref()
                    .and_then(|f| f.pairs.get(1))
                    .map(|p| p.r_ohm * 1000.0)
            },
        ),
    ] {
        let p = pts(f);
        if !p.is_empty() {
            r.series.push(Series {
                name: name.into(),
                points: p,
                color,
                mark: Mark::LineAndDots,
            });
        }
    }
    b.push_str(&svg::render(&r));
    let mut pw = Chart::new("Pulse power capability", "state of charge (%)", "power (W)");
    pw.series.push(Series {
        name: "discharge".into(),
        points: pts(&|l| l.power_discharge_w),
        color: svg::BLUE_,
        mark: Mark::LineAndDots,
    });
    pw.series.push(Series {
        name: "charge".into(),
        points: pts(&|l| l.power_charge_w),
        color: svg::ORANGE_,
        mark: Mark::LineAndDots,
    });
    b.push_str(&svg::render(&pw));
    let _ = write!(b, "<table><tr>");
    for col in &crate::tables::LEVEL_COLUMNS {
        let _ = write!(b, "<th>{}</th>", escape(col.heading));
    }
    let _ = write!(b, "<th class=\"l\">notes</th></tr>");
    for (l, cells) in crate::tables::level_rows(c, "–") {
        let _ = write!(b, "<tr>");
        for cell in cells {
            let _ = write!(b, "<td>{}</td>", escape(&cell));
        }
        let _ = write!(
            b,
            "<td class=\"l wrap\">{}</td></tr>",
            escape(&l.flags.join("; "))
        );
    }
    let _ = write!(b, "</table>");
    if let Some(a) = &c.available_energy {
        let _ = write!(
            b,
            "<p>Available energy at {:.0} W discharge and {:.0} W charge: <b>{:.1} Wh</b>, between {:.1} % and {:.1} % depth of discharge.</p>",
            a.target_discharge_w, a.target_charge_w, a.energy_wh, a.dod_from_pct, a.dod_to_pct
        );
    }
}

/// The open-circuit-voltage table (state of charge, the charge and
/// discharge voltages, their mean; per cell with a rating).
fn ocv_table(b: &mut String, s: &Summary) {
    let Some(t) = s.curves.as_ref().and_then(|c| c.ocv.as_ref()) else {
        return;
    };
    let rated = s.needs_rating.is_empty();
    let _ = write!(
        b,
        "<h2>Open-circuit voltage</h2><p class=\"sub\">the mean of the charge (step {}, {:.2}C) and the discharge (step {}, {:.2}C) at each state of charge</p><table><tr><th>SoC (%)</th><th>charge (V)</th><th>discharge (V)</th><th>OCV (V)</th>{}</tr>",
        t.charge_step,
        t.charge_rate_c,
        t.discharge_step,
        t.discharge_rate_c,
        if rated { "<th>OCV (V/cell)</th>" } else { "" }
    );
    for p in &t.points {
        let _ = write!(
            b,
            "<tr><td>{:.0}</td><td>{:.3}</td><td>{:.3}</td><td>{:.3}</td>{}</tr>",
            p.soc_pct,
            p.charge_v,
            p.discharge_v,
            p.ocv_v,
            if rated {
                format!("<td>{:.4}</td>", p.ocv_per_cell_v)
            } else {
                String::new()
            }
        );
    }
    let _ = write!(b, "</table>");
}

/// The capacity rows of the summary table: every figure the verdict's.
fn capacity_rows(s: &Summary, out: &mut Vec<(String, String)>) {
    let mut row = |k: &str, v: String| out.push((k.to_string(), v));
    let v = &s.verdict;
    if let Some(c) = &s.capacity {
        let u = &v.uncertainty;
        row(
            "Measured capacity",
            format!(
                "{:.4} Ah{}, {:.2} Wh{}",
                c.measured_ah,
                crate::pm(&u.measured_ah),
                c.measured_wh,
                crate::pm(&u.measured_wh)
            ),
        );
        let why: Vec<String> = c
            .corrections
            .iter()
            .map(|x| format!("{} ×{:.4}: {}", x.kind, x.factor, x.why))
            .collect();
        row(
            "Capacity (corrected)",
            match v.corrected_ah.get() {
                Some(a) if why.is_empty() => {
                    format!("{a:.4} Ah{} ({})", crate::pm(&u.corrected_ah), v.conditions)
                }
                Some(a) => format!(
                    "{a:.4} Ah{} ({})",
                    crate::pm(&u.corrected_ah),
                    why.join("; ")
                ),
                None => v.corrected_ah.show(4, " Ah"),
            },
        );
        row(
            "State of health",
            match (v.soh_pct.get(), c.rated_ah) {
                (Some(p), Some(r)) => {
                    format!("{p:.2} %{} of rated {r} Ah", crate::pm(&u.soh_pct))
                }
                _ => v.soh_pct.show(2, " %"),
            },
        );
        row("IEEE 450 percent capacity", v.ieee450_percent.show(1, " %"));
        row(
            "Discharge",
            format!(
                "{:.3} A ({}) for {}",
                c.mean_current_a,
                v.test_rate_c.show(3, "C"),
                HumanDuration(c.duration_s)
            ),
        );
        row(
            "Ended on cutoff",
            match v.ended_on_cutoff {
                Some(true) => "yes".into(),
                Some(false) => "no (lower bound)".into(),
                None => "not known (the log does not say; see --cutoff)".into(),
            },
        );
    } else {
        row(
            "Measured capacity",
            "none (no completed capacity step)".into(),
        );
    }
}

/// The summary table of a run, as (label, text) rows: plain text, escaped
/// where it is written.
pub fn summary_rows(s: &Summary) -> Vec<(String, String)> {
    let mut out: Vec<(String, String)> = Vec::new();
    capacity_rows(s, &mut out);
    let mut row = |k: &str, v: String| out.push((k.to_string(), v));
    let v = &s.verdict;
    row(
        "Grade",
        match v.grade.value() {
            Some(g) => format!("{} — {}", g.label, g.meaning),
            None => format!(
                "not graded ({})",
                v.grade.why().map(|w| w.words()).unwrap_or_default()
            ),
        },
    );
    for flag in &v.flags {
        row("Flag", flag.clone());
    }
    if s.resistance.is_none() {
        for p in s.pulse_resistance.iter().take(8) {
            let vals: Vec<String> = p
                .values
                .iter()
                .map(|x| format!("{:.2} mΩ at {} s", x.resistance_mohm, x.delay_s))
                .collect();
            row(
                "Pulse resistance",
                format!(
                    "edge at {:.0} s (step {}): {}",
                    p.t_edge_s,
                    p.step,
                    vals.join(", ")
                ),
            );
        }
    }
    if let Some(r) = &s.resistance {
        row(
            "DC resistance",
            format!("{:.2} mΩ — {}", r.dcir_mohm, r.method),
        );
        if !r.why.is_empty() {
            row("  why this method", r.why.clone());
        }
        if r.readings.len() > 1 {
            for x in &r.readings {
                row(
                    &format!("  step {}", x.step),
                    format!(
                        "{:.2} mΩ{}",
                        x.dcir_mohm,
                        x.soc_pct
                            .map(|s| format!(" at {s:.0} % state of charge"))
                            .unwrap_or_default()
                    ),
                );
            }
        }
    }
    row(
        "Resistance growth",
        match (&v.resistance_growth_pct, &v.resistance_reference) {
            (f, Some(r)) if f.get().is_some() => {
                format!(
                    "{} against {:.2} mΩ ({})",
                    f.show(1, " %"),
                    r.mohm,
                    r.source
                )
            }
            (f, _) => f.show(1, " %"),
        },
    );
    row(
        "New nominal for the BMS",
        match (v.new_nominal_ah.get(), &s.recalibration) {
            (Some(n), Some(rc)) => format!("{n:.3} Ah — {}", rc.conditions),
            _ => v.new_nominal_ah.show(3, " Ah"),
        },
    );
    if let Some(cv) = &s.curves {
        for i in cv.ica.iter().filter(|i| !i.peaks.is_empty()) {
            let peaks: Vec<String> = i
                .peaks
                .iter()
                .map(|p| crate::text::peak_text(s, p))
                .collect();
            row(
                &format!("dQ/dV peaks, {} step {}", i.direction, i.step),
                peaks.join(", "),
            );
        }
    }
    if !s.gaps.is_empty() {
        row(
            "Gaps in the log",
            format!(
                "{} (longest {:.1} s); integrated across by straight lines",
                s.gaps.len(),
                s.gaps.iter().map(|g| g.duration_s).fold(0.0, f64::max)
            ),
        );
    }
    if let Some(d) = &s.standby_drain {
        row(
            "Standby drain",
            format!(
                "{:.2} mA = {:.2} % of {:.3} Ah a month (step {})",
                d.current_ma, d.pct_per_month, d.capacity_ref_ah, d.step
            ),
        );
    }
    if let Some(p) = &s.preflight {
        let zero = |z: Option<f64>| {
            z.map(|z| format!("{z:+.1} mA"))
                .unwrap_or_else(|| "-".into())
        };
        row(
            "Before the run",
            format!(
                "pack at rest {:.3} V; zero offsets: source {}, load {}{}",
                p.voltage_v,
                zero(p.source_zero_ma),
                zero(p.load_zero_ma),
                if p.corrected { " (subtracted)" } else { "" }
            ),
        );
    }
    for r in &s.resumed {
        row(
            "Resumed",
            format!("at step {} after {:.0} s down: {}", r.step, r.gap_s, r.rule),
        );
    }
    for c in &s.cycles {
        if let (Some(ce), Some(ee)) = (c.coulombic_efficiency_pct, c.energy_efficiency_pct) {
            row(
                &format!("Cycle {}", c.cycle),
                format!("coulombic efficiency {ce:.3} %, energy efficiency {ee:.2} %"),
            );
        }
    }
    row(
        "Samples",
        format!("{} over {}", s.samples, HumanDuration(s.duration_s)),
    );
    if let Some(b) = &s.bms {
        out.extend(crate::bms::rows(b));
    }
    out
}

/// One chart per quantity against time in hours, thinned for plotting.
fn time_charts(b: &mut String, charts: &ChartData) {
    let traces = [
        (
            "Pack voltage",
            "voltage (V)",
            "voltage",
            svg::BLUE_,
            &charts.voltage,
        ),
        (
            "Pack current (positive into the pack)",
            "current (A)",
            "current",
            svg::ORANGE_,
            &charts.current,
        ),
        (
            "Pack temperature",
            "temperature (°C)",
            "temperature",
            svg::RED_,
            &charts.temperature,
        ),
    ];
    for (title, y_label, name, color, series) in traces {
        if series.seen() == 0 {
            continue;
        }
        let mut c = Chart::new(title, "time since start (h)", y_label);
        c.series.push(Series {
            name: name.into(),
            points: svg::thin(&series.points(), MAX_POINTS),
            color,
            mark: Mark::Line,
        });
        b.push_str(&svg::render(&c));
    }
}

/// Voltage against discharged charge over the capacity step.
/// A pack read group by group: the table of groups with the weakest
/// marked and why, their voltages against time and against discharged
/// charge (the weakest drawn in red, the others grey), and a bar chart of
/// each group's charge to its cutoff.
fn group_section(b: &mut String, g: &analysis::groups::GroupsResult, charts: &ChartData) {
    let _ = write!(b, "<h2>Cell groups</h2>");
    if let Some(w) = &g.weakest_reason {
        let _ = write!(
            b,
            "<p class=\"flag\"><b>Weakest group:</b> {}</p>",
            escape(w)
        );
    }
    let _ = write!(
        b,
        "<p>End-of-charge spread {} mV · end-of-discharge spread {} mV · capacity spread {} %</p>",
        f(g.end_of_charge_spread_mv, 0),
        f(g.end_of_discharge_spread_mv, 0),
        f(g.capacity_spread_pct, 1)
    );
    let _ = write!(
        b,
        "<table><tr><th>group</th><th>to cutoff (Ah)</th><th>share of mean (%)</th><th>capacity vs mean (%)</th><th>end of charge (V)</th><th>end of discharge (V)</th><th>resistance (mΩ)</th><th>max temperature (°C)</th><th class=\"l\">how</th></tr>"
    );
    for r in &g.groups {
        let weak = g.weakest == Some(r.group);
        let _ = write!(
            b,
            "<tr{}><td>{}</td>",
            if weak { " class=\"weak\"" } else { "" },
            r.group
        );
        for c in crate::text::group_cells(r, "–") {
            let _ = write!(b, "<td>{c}</td>");
        }
        let _ = write!(
            b,
            "<td class=\"l\">{}{}</td></tr>",
            escape(&r.how),
            if weak { " · weakest" } else { "" }
        );
    }
    let _ = write!(b, "</table>");
    for t in &g.temperatures {
        let _ = write!(
            b,
            "<p class=\"sub\">Temperature input '{}' ({}, channel {}): highest {} °C</p>",
            escape(&t.name),
            escape(&t.place),
            t.channel,
            f(t.max_c, 1)
        );
    }
    let color = |k: usize| {
        if g.weakest == Some(k as u32 + 1) {
            svg::RED_
        } else {
            svg::RGBColor(170, 170, 170)
        }
    };
    let name = |k: usize| {
        if g.weakest == Some(k as u32 + 1) {
            format!("group {} (weakest)", k + 1)
        } else if k == 0 || (k == 1 && g.weakest == Some(1)) {
            "the other groups".to_string()
        } else {
            String::new()
        }
    };
    for (title, x, pick) in [
        ("Group voltages against time", "time (h)", 0usize),
        (
            "Group voltages against discharged charge (capacity step)",
            "discharged (Ah)",
            1,
        ),
    ] {
        let mut c = Chart::new(title, x, "group voltage (V)");
        c.legend_lower_left = true;
        // The weakest last, so it is drawn over the others.
        let mut order: Vec<usize> = (0..charts.groups.len()).collect();
        order.sort_by_key(|&k| g.weakest == Some(k as u32 + 1));
        for k in order {
            let (t, q) = &charts.groups[k];
            let pts = if pick == 0 { t.points() } else { q.points() };
            c.series.push(Series {
                name: name(k),
                points: svg::thin(&pts, MAX_POINTS / 2),
                color: color(k),
                mark: Mark::Line,
            });
        }
        b.push_str(&svg::render(&c));
    }
    let bars: Vec<(f64, f64)> = g
        .groups
        .iter()
        .filter_map(|r| r.charge_to_cutoff_ah.map(|c| (f64::from(r.group), c)))
        .collect();
    if !bars.is_empty() {
        let mean = bars.iter().map(|p| p.1).sum::<f64>() / bars.len() as f64;
        let mut c = Chart::new(
            &format!("Each group's charge to its cutoff (dashed: the mean, {mean:.3} Ah)"),
            "group",
            "charge to cutoff (Ah)",
        );
        c.series.push(Series {
            name: String::new(),
            points: bars,
            color: svg::BLUE_,
            mark: Mark::Bars,
        });
        c.hlines.push(svg::HLine {
            y: mean,
            name: String::new(),
            color: svg::GREY_,
        });
        b.push_str(&svg::render(&c));
    }
}

/// A pack read group by group: its groups' spread and its weakest
/// group's share, test by test.
fn group_spread_chart(b: &mut String, h: &PackHistory) {
    let pts: Vec<(f64, &analysis::fade::history::GroupSpread)> = h
        .points
        .iter()
        .filter_map(|p| {
            let days = f64::from(chrono::Datelike::num_days_from_ce(&p.date));
            p.groups.as_ref().map(|g| (days, g))
        })
        .collect();
    if pts.is_empty() {
        return;
    }
    let _ = write!(b, "<h2>Cell groups over the pack's history</h2>");
    let mut c = Chart::new(
        "The groups' capacity spread and the weakest group's shortfall",
        "test date",
        "% of the mean",
    );
    c.x_is_date = true;
    c.series.push(Series {
        name: "capacity spread (highest − lowest)".into(),
        points: pts
            .iter()
            .filter_map(|(d, g)| g.capacity_spread_pct.map(|v| (*d, v)))
            .collect(),
        color: svg::ORANGE_,
        mark: Mark::LineAndDots,
    });
    c.series.push(Series {
        name: "weakest group's shortfall (100 − share)".into(),
        points: pts
            .iter()
            .filter_map(|(d, g)| g.weakest_share_pct.map(|v| (*d, 100.0 - v)))
            .collect(),
        color: svg::RED_,
        mark: Mark::LineAndDots,
    });
    b.push_str(&svg::render(&c));
}

fn capacity_chart(b: &mut String, charts: &ChartData) {
    if let Some(curve) = &charts.capacity {
        let _ = write!(b, "<h2>Capacity discharge</h2>");
        let mut c = Chart::new(
            "Voltage against discharged charge",
            "discharged (Ah)",
            "voltage (V)",
        );
        c.series.push(Series {
            name: "capacity step".into(),
            points: svg::thin(&curve.points(), MAX_POINTS),
            color: svg::BLUE_,
            mark: Mark::Line,
        });
        b.push_str(&svg::render(&c));
    }
}

/// The differential curves the summary's peaks come from: the same grid,
/// bins and smoothing as the analysis.
fn differential_charts(b: &mut String, s: &Summary, charts: &ChartData) {
    let grid = |step: u32| {
        charts
            .grids
            .iter()
            .find(|(k, _)| *k == step)
            .map(|(_, g)| g)
    };
    if let Some(cv) = &s.curves {
        let series = f64::from(s.pack.series.max(1));
        for i in &cv.ica {
            let Some(grid) = grid(i.step) else { continue };
            let d = curves::ica(grid, i.bin_mv_per_cell / 1000.0 * series, i.smoothing_bins);
            differential_chart(
                b,
                &format!(
                    "Incremental capacity, {} step {}: {} mV/cell bins, smoothed over {} bins",
                    i.direction, i.step, i.bin_mv_per_cell, i.smoothing_bins
                ),
                "voltage (V)",
                "dQ/dV (Ah/V)",
                &d,
            );
        }
        for v in &cv.dva {
            let Some(grid) = grid(v.step) else { continue };
            let d = curves::dva(grid, v.bin_ah, v.smoothing_bins);
            differential_chart(
                b,
                &format!(
                    "Differential voltage, {} step {}: {:.3} Ah bins, smoothed over {} bins",
                    v.direction, v.step, v.bin_ah, v.smoothing_bins
                ),
                "charge passed (Ah)",
                "|dV/dQ| (V/Ah)",
                &d,
            );
        }
    }
}

/// One row per step.
fn step_table(b: &mut String, s: &Summary) {
    let _ = write!(
        b,
        "<h2>Steps</h2><table><tr><th>step</th><th class=\"l\">phase</th><th class=\"l\">kind</th><th>cycle</th><th>duration</th><th>charge (Ah)</th><th>energy (Wh)</th><th>start V</th><th>end V</th><th>max °C</th><th class=\"l\">end</th></tr>"
    );
    for st in &s.steps {
        let _ = write!(
            b,
            "<tr><td>{}</td><td class=\"l\">{}</td><td class=\"l\">{}</td><td>{}</td><td>{}</td><td>{:.4}</td><td>{:.3}</td><td>{}</td><td>{}</td><td>{}</td><td class=\"l\">{}</td></tr>",
            st.step,
            escape(&st.phase),
            st.kind.name(),
            st.cycle,
            HumanDuration(st.duration_s),
            st.charge_ah,
            st.energy_wh,
            f(st.start_voltage_v, 3),
            f(st.end_voltage_v, 3),
            f(st.max_temperature_c, 1),
            escape(st.end_reason.as_deref().unwrap_or(""))
        );
    }
    let _ = write!(b, "</table>");
}

/// Draw a fitted line over `range` and its 95 % prediction band; the fit's
/// x is the chart's x minus `offset`.
fn add_fit_with_band(
    c: &mut Chart,
    fit: &analysis::fit::LinearFit,
    range: (f64, f64),
    offset: f64,
    name: &str,
) {
    let xs: Vec<f64> = (0..=60)
        .map(|k| range.0 + (range.1 - range.0) * k as f64 / 60.0)
        .collect();
    // The line by its two ends: straight, not a polyline of rounded
    // pixels.
    c.series.push(Series {
        name: name.into(),
        points: [range.0, range.1]
            .iter()
            .map(|x| (*x, fit.predict(x - offset)))
            .collect(),
        color: svg::GREY_,
        mark: Mark::Line,
    });
    let (mut up, mut lo) = (Vec::new(), Vec::new());
    for x in &xs {
        if let Some((l, u)) = fit.prediction_interval(x - offset, analysis::fade::trend::LEVEL) {
            up.push((*x, u));
            lo.push((*x, l));
        }
    }
    c.bands.push(Band {
        name: "95 % prediction band".into(),
        upper: up,
        lower: lo,
        color: svg::GREY_,
    });
}

fn day_number(d: chrono::NaiveDate) -> f64 {
    use chrono::Datelike;
    f64::from(d.num_days_from_ce())
}

/// The fade report of one pack. `curves_by_run` holds each run's
/// capacity-step curve (discharged Ah, V) with its label.
pub fn pack_report(
    h: &PackHistory,
    fa: &FadeAnalysis,
    curves_by_run: &[(String, Vec<(f64, f64)>)],
    links: &Links,
) -> String {
    let mut b = String::new();
    let spec = &h.spec;
    let _ = write!(
        b,
        "<h1>Capacity fade of pack {}</h1><p class=\"sub\">{} {}S, rated {} Ah · {} measurements · end of life at {} % of rated</p>",
        escape(&h.pack_id),
        spec.chemistry,
        spec.series,
        spec.rated_capacity_ah,
        h.points.len(),
        fa.threshold_pct
    );
    let _ = write!(b, "<h2>Projection</h2>");
    match &fa.eol_cycles {
        Some(p) => {
            let _ = write!(
                b,
                "<p>State of health reaches {} % at about <b>{:.0} equivalent full cycles</b> (95 % prediction band: {} to {}; basis: {}).</p>",
                fa.threshold_pct,
                p.cycles,
                f(p.cycles_early, 0),
                p.cycles_late.map(|c| format!("{c:.0}")).unwrap_or_else(|| "not bounded".into()),
                escape(&p.basis)
            );
        }
        None => {
            let _ = write!(b, "<p>No end-of-life cycle count projected.</p>");
        }
    }
    if let Some(p) = &fa.eol_date {
        let _ = write!(
            b,
            "<p>By date: about <b>{}</b> (band {} to {}).</p>",
            p.date,
            p.date_early
                .map(|d| d.to_string())
                .unwrap_or_else(|| "–".into()),
            p.date_late
                .map(|d| d.to_string())
                .unwrap_or_else(|| "not bounded".into())
        );
    }
    if let Some(a) = &fa.accelerating {
        let _ = write!(
            b,
            "<p class=\"flag\">Accelerating fade: {:.3} % per 100 cycles recently against {:.3} % earlier ({:.1}×).</p>",
            a.recent_pct_per_100_cycles, a.earlier_pct_per_100_cycles, a.ratio
        );
    }
    for n in &fa.notes {
        let _ = write!(b, "<p class=\"warn\">{}</p>", escape(n));
    }
    soh_by_cycles_chart(&mut b, h, fa);
    soh_by_date_chart(&mut b, h, fa);
    resistance_charts(&mut b, h, fa);
    pulse_r50_chart(&mut b, h);
    group_spread_chart(&mut b, h);
    overlay_chart(&mut b, curves_by_run);
    pack_tables(&mut b, h, fa, links);
    page(&format!("packbench — fade of {}", h.pack_id), &b)
}

/// State of health against cycles with the fit, its band and the
/// threshold (and the recent-half line when fade accelerates).
fn soh_by_cycles_chart(b: &mut String, h: &PackHistory, fa: &FadeAnalysis) {
    let pts: Vec<(f64, f64)> = h
        .points
        .iter()
        .filter(|p| p.cycles.is_finite())
        .map(|p| (p.cycles, p.soh_pct))
        .collect();
    let mut c = Chart::new(
        "State of health against equivalent full cycles",
        "equivalent full cycles",
        "state of health (% of rated)",
    );
    c.series.push(Series {
        name: "measured".into(),
        points: pts.clone(),
        color: svg::BLUE_,
        mark: Mark::Dots,
    });
    if let Some(m) = fa
        .models
        .iter()
        .find(|m| m.kind == analysis::fade::trend::ModelKind::LinearCycles)
    {
        let x0 = pts.first().map(|p| p.0).unwrap_or(0.0);
        let x1 = fa
            .eol_cycles
            .as_ref()
            .map(|p| p.cycles.max(pts.last().map(|p| p.0).unwrap_or(0.0)))
            .unwrap_or_else(|| pts.last().map(|p| p.0).unwrap_or(1.0))
            .min(x0 + 10.0 * (pts.last().map(|p| p.0).unwrap_or(1.0) - x0).max(1.0));
        add_fit_with_band(
            &mut c,
            &m.fit,
            (x0, x1),
            0.0,
            &format!("fit, all points (R² {:.3})", m.fit.r_squared),
        );
        if fa.accelerating.is_some() {
            if let Some(p) = &fa.eol_cycles {
                // The recent-half line the projection rests on.
                let n = pts.len();
                let recent = &pts[n / 2..];
                let (x, y): (Vec<f64>, Vec<f64>) = recent.iter().copied().unzip();
                if let Some(rf) = analysis::fit::LinearFit::fit(&x, &y) {
                    let a = recent.first().map(|p| p.0).unwrap_or(0.0);
                    c.series.push(Series {
                        name: "fit, recent half".into(),
                        points: vec![(a, rf.predict(a)), (p.cycles, rf.predict(p.cycles))],
                        color: svg::RED_,
                        mark: Mark::Line,
                    });
                }
            }
        }
    }
    c.hlines.push(HLine {
        y: fa.threshold_pct,
        name: "end of life".into(),
        color: svg::RED_,
    });
    b.push_str(&svg::render(&c));
}

/// State of health against date, with the time model and its band.
fn soh_by_date_chart(b: &mut String, h: &PackHistory, fa: &FadeAnalysis) {
    let mut c = Chart::new(
        "State of health against date",
        "test date",
        "state of health (% of rated)",
    );
    c.x_is_date = true;
    let d0 = h.points.first().map(|p| day_number(p.date)).unwrap_or(0.0);
    c.series.push(Series {
        name: "measured".into(),
        points: h
            .points
            .iter()
            .map(|p| (day_number(p.date), p.soh_pct))
            .collect(),
        color: svg::BLUE_,
        mark: Mark::Dots,
    });
    if let Some(m) = fa
        .models
        .iter()
        .find(|m| m.kind == analysis::fade::trend::ModelKind::LinearTime)
    {
        let last = h.points.last().map(|p| day_number(p.date)).unwrap_or(d0);
        let end = fa
            .eol_date
            .as_ref()
            .map(|p| day_number(p.date).max(last))
            .unwrap_or(last)
            .min(last + 4.0 * (last - d0).max(30.0));
        add_fit_with_band(
            &mut c,
            &m.fit,
            (d0, end),
            d0,
            &format!("fit, linear in time (R² {:.3})", m.fit.r_squared),
        );
    }
    c.hlines.push(HLine {
        y: fa.threshold_pct,
        name: "end of life".into(),
        color: svg::RED_,
    });
    b.push_str(&svg::render(&c));
}

/// Resistance against cycles and against date.
/// The pulse-power characterizations' discharge resistance at 50 %
/// state of charge against the test date.
fn pulse_r50_chart(b: &mut String, h: &PackHistory) {
    let pts: Vec<(f64, f64)> = h
        .points
        .iter()
        .filter_map(|p| p.pulse_r50_mohm.map(|r| (day_number(p.date), r)))
        .collect();
    if pts.is_empty() {
        return;
    }
    let mut c = Chart::new(
        "Pulse resistance at 50 % state of charge against date",
        "test date",
        "resistance (mΩ)",
    );
    c.x_is_date = true;
    c.series.push(Series {
        name: "discharge pulse (end), pulse-power characterization".into(),
        points: pts,
        color: svg::PURPLE_,
        mark: Mark::LineAndDots,
    });
    b.push_str(&svg::render(&c));
}

fn resistance_charts(b: &mut String, h: &PackHistory, fa: &FadeAnalysis) {
    let reference = h.reference_resistance();
    for by_date in [false, true] {
        let rp: Vec<(f64, f64)> = h
            .points
            .iter()
            .filter_map(|p| {
                p.resistance_mohm.map(|r| {
                    (
                        if by_date {
                            day_number(p.date)
                        } else {
                            p.cycles
                        },
                        r,
                    )
                })
            })
            .filter(|(x, _)| x.is_finite())
            .collect();
        if rp.is_empty() {
            break;
        }
        let mut c = if by_date {
            Chart::new("DC resistance against date", "test date", "resistance (mΩ)")
        } else {
            Chart::new(
                "DC resistance against equivalent full cycles",
                "equivalent full cycles",
                "resistance (mΩ)",
            )
        };
        c.x_is_date = by_date;
        if let (false, Some(f)) = (by_date, &fa.resistance_fit) {
            let (a, z) = (rp[0].0, rp[rp.len() - 1].0);
            c.series.push(Series {
                name: format!("fit ({:+.2} mΩ per 100 cycles)", f.slope * 100.0),
                points: vec![(a, f.predict(a)), (z, f.predict(z))],
                color: svg::GREY_,
                mark: Mark::Line,
            });
        }
        c.series.push(Series {
            name: "measured".into(),
            points: rp,
            color: svg::ORANGE_,
            mark: Mark::LineAndDots,
        });
        if let Some((r0, what)) = reference {
            c.hlines.push(HLine {
                y: 2.0 * r0,
                name: format!("twice the {what} resistance"),
                color: svg::RED_,
            });
        }
        b.push_str(&svg::render(&c));
    }
}

/// Every test's capacity discharge, overlaid.
fn overlay_chart(b: &mut String, curves_by_run: &[(String, Vec<(f64, f64)>)]) {
    if !curves_by_run.is_empty() {
        let mut c = Chart::new(
            "Capacity discharges, every test",
            "discharged (Ah)",
            "voltage (V)",
        );
        for (i, (name, pts)) in curves_by_run.iter().enumerate() {
            c.series.push(Series {
                name: name.clone(),
                points: svg::thin(pts, 400),
                color: svg::palette(i),
                mark: Mark::Line,
            });
        }
        c.height = 420;
        b.push_str(&svg::render(&c));
    }
}

/// The models, the measurements and the runs left out.
fn pack_tables(b: &mut String, h: &PackHistory, fa: &FadeAnalysis, links: &Links) {
    let _ = write!(b, "<h2>Models</h2><table><tr><th class=\"l\">model</th><th>slope</th><th class=\"l\">unit</th><th>R²</th><th>points</th></tr>");
    for m in &fa.models {
        let _ = write!(
            b,
            "<tr><td class=\"l\">{}</td><td>{:.4}</td><td class=\"l\">{}</td><td>{:.4}</td><td>{}</td></tr>",
            escape(m.description),
            m.fade_per_unit,
            escape(m.unit),
            m.fit.r_squared,
            m.fit.n
        );
    }
    let _ = write!(b, "</table><h2>Runs and their verdicts</h2><table id=\"runs\"><tr><th class=\"l\">date</th><th>cycles</th><th>capacity (Ah)</th><th>SOH (%)</th><th>resistance (mΩ)</th><th>CE (%)</th><th class=\"l\">grade</th><th class=\"l\">source</th></tr>");
    // A run's own pages, where the point is a run of ours.
    let run_cell = |run: &str, text: &str| {
        let mut cell = format!(
            "<a data-role=\"run-report\" href=\"{}\">{}</a>",
            escape(&links.run(&h.pack_id, run)),
            escape(text)
        );
        if let Some(l) = links.label(&h.pack_id, run) {
            let _ = write!(
                cell,
                " · <a data-role=\"run-label\" href=\"{}\">label</a>",
                escape(&l)
            );
        }
        cell
    };
    let run_of = |p: &analysis::fade::history::HistoryPoint| {
        p.run_dir
            .as_ref()
            .and_then(|d| d.file_name())
            .map(|n| n.to_string_lossy().into_owned())
    };
    for p in &h.points {
        let source = match run_of(p) {
            Some(run) => run_cell(&run, &p.source),
            None => escape(&p.source),
        };
        let _ = write!(
            b,
            "<tr><td class=\"l\">{}</td><td>{}{}</td><td>{:.3}</td><td>{:.2}</td><td>{}</td><td>{}</td><td class=\"l\">{}</td><td class=\"l\">{}</td></tr>",
            p.date,
            f(p.cycles.is_finite().then_some(p.cycles), 0),
            if p.cycles_given {
                ""
            } else if p.cycles.is_finite() {
                " (counted)"
            } else {
                " (unknown)"
            },
            p.capacity_ah,
            p.soh_pct,
            f(p.resistance_mohm, 1),
            f(p.coulombic_efficiency_pct, 2),
            escape(p.grade.as_deref().unwrap_or("")),
            source
        );
    }
    let _ = write!(b, "</table>");
    for p in &h.points {
        for fl in &p.flags {
            let _ = write!(
                b,
                "<p class=\"warn\">Flag: {} ({}): {}</p>",
                escape(&p.source),
                p.date,
                escape(fl)
            );
        }
    }
    if !h.left_out.is_empty() {
        let _ = write!(b, "<h2>Runs left out of the fits</h2><ul>");
        for l in &h.left_out {
            let _ = write!(
                b,
                "<li>{} — {}: {}</li>",
                run_cell(&l.run_id, &l.run_id),
                l.status.name(),
                escape(&l.reason)
            );
        }
        let _ = write!(b, "</ul>");
    }
}

/// The fleet report. `histories` gives each pack's points for the
/// fleet-wide plot.
pub fn fleet_report(
    fleet: &Fleet,
    histories: &[PackHistory],
    title: &str,
    links: &Links,
) -> String {
    // (The fleet's table is wide: the page takes up to 1360 px, its flags
    // wrap, so that it fits a 1400 px window without a scroll bar.)
    let mut b = String::from("<style>body { max-width: 1360px; }</style>");
    let _ = write!(
        b,
        "<h1>{}</h1><p class=\"sub\">{} packs · as of {} · tests due by {} · end of life at {} % of rated</p>",
        escape(title),
        fleet.rows.len(),
        fleet.today,
        escape(&fleet.schedule),
        fleet.threshold_pct
    );
    let _ = write!(b, "<table><tr><th>rank</th><th class=\"l\">pack</th><th class=\"l\">chemistry</th><th>tests</th><th class=\"l\">last test</th><th>cycles</th><th>SOH (%)</th><th>resistance (mΩ)</th><th>growth (%)</th><th>fade (%/100 cyc)</th><th>EOL cycles</th><th class=\"l\">EOL date</th><th class=\"l\">grade</th><th class=\"l\">flags</th></tr>");
    for r in &fleet.rows {
        // What needs attention, judged once in the fleet row.
        let flags = &r.attention;
        let _ = write!(
            b,
            "<tr><td>{}</td><td class=\"l\">{}</td><td class=\"l\">{} {}S</td><td>{}</td><td class=\"l\">{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td class=\"l\">{}</td><td class=\"l\"><b>{}</b></td><td class=\"l flag\">{}</td></tr>",
            r.rank,
            format_args!(
                "<a href=\"{}\">{}</a>",
                escape(&links.pack(&r.pack_id)),
                escape(&r.pack_id)
            ),
            r.chemistry.name(),
            r.series,
            r.tests,
            r.last_test.map(|d| d.to_string()).unwrap_or_default(),
            f(r.cycles, 0),
            f(r.soh_pct, 1),
            f(r.resistance_mohm, 1),
            f(r.resistance_growth_pct, 0),
            f(r.fade_pct_per_100_cycles, 3),
            f(r.eol_cycles, 0),
            r.eol_date.map(|d| d.to_string()).unwrap_or_default(),
            escape(r.grade.as_deref().unwrap_or("")),
            escape(&flags.join(", "))
        );
    }
    let _ = write!(b, "</table>");
    let mut c = Chart::new(
        "State of health of every pack",
        "equivalent full cycles",
        "state of health (% of rated)",
    );
    for (i, h) in histories.iter().enumerate() {
        c.series.push(Series {
            name: h.pack_id.clone(),
            points: h
                .points
                .iter()
                .filter(|p| p.cycles.is_finite())
                .map(|p| (p.cycles, p.soh_pct))
                .collect(),
            color: svg::palette(i),
            mark: Mark::LineAndDots,
        });
    }
    c.hlines.push(HLine {
        y: fleet.threshold_pct,
        name: "end of life".into(),
        color: svg::RED_,
    });
    c.height = 440;
    b.push_str(&svg::render(&c));
    page(title, &b)
}
