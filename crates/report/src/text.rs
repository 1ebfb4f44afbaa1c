//! The short human summary printed at the end of a run.

use model::units::HumanDuration;
use record::Summary;
use std::fmt::Write;

/// The short summary of a run for a terminal.
/// A figure with `d` decimals, or "-" when there is none.
fn opt(x: Option<f64>, d: usize) -> String {
    opt_or(x, d, "-")
}

/// A figure with `d` decimals, or `none` when there is none.
pub(crate) fn opt_or(x: Option<f64>, d: usize, none: &str) -> String {
    x.map_or(none.to_string(), |v| format!("{v:.d$}"))
}

/// One group's figures as printed, in the order of the groups' table:
/// charge to cutoff, share of the mean, capacity against the mean,
/// end-of-charge and end-of-discharge volts, resistance, highest
/// temperature; `none` where a figure is missing.
pub(crate) fn group_cells(r: &analysis::groups::GroupResult, none: &str) -> [String; 7] {
    let f = |x: Option<f64>, d: usize| opt_or(x, d, none);
    [
        f(r.charge_to_cutoff_ah, 3),
        f(r.share_of_mean_pct, 1),
        f(r.relative_capacity_pct, 1),
        f(r.end_of_charge_v, 3),
        f(r.end_of_discharge_v, 3),
        f(r.resistance_mohm, 2),
        f(r.max_temperature_c, 1),
    ]
}

/// A pack read group by group: a line per group and the weakest.
fn groups_text(o: &mut String, g: &analysis::groups::GroupsResult) {
    let _ = writeln!(
        o,
        "  Groups:            end-of-charge spread {} mV, end-of-discharge spread {} mV, capacity spread {} %",
        opt(g.end_of_charge_spread_mv, 0),
        opt(g.end_of_discharge_spread_mv, 0),
        opt(g.capacity_spread_pct, 1)
    );
    let _ = writeln!(
        o,
        "    group  to cutoff Ah  share %  capacity %  EOC V   EOD V   R mOhm  max degC  how"
    );
    for r in &g.groups {
        let c = group_cells(r, "-");
        let _ = writeln!(
            o,
            "    {:>5}  {:>12}  {:>7}  {:>10}  {:>6}  {:>6}  {:>6}  {:>8}  {}{}",
            r.group,
            c[0],
            c[1],
            c[2],
            c[3],
            c[4],
            c[5],
            c[6],
            r.how,
            if g.weakest == Some(r.group) {
                "  <- weakest"
            } else {
                ""
            }
        );
    }
    if let Some(w) = &g.weakest_reason {
        let _ = writeln!(o, "  Weakest group:     {w}");
    }
    for n in &g.notes {
        let _ = writeln!(o, "  groups: {n}");
    }
}

pub fn summary(s: &Summary) -> String {
    let mut o = String::new();
    if s.needs_rating.is_empty() {
        let _ = writeln!(
            o,
            "Run {} of pack {} ({} {}S, {}): {}",
            s.run_id,
            s.pack_id,
            s.pack.chemistry,
            s.pack.series,
            rated_text(s),
            s.status
        );
    } else {
        let _ = writeln!(
            o,
            "Run {} of pack {} (no pack spec given): {}",
            s.run_id, s.pack_id, s.status
        );
    }
    if let Some(r) = &s.stop_reason {
        let _ = writeln!(o, "  stopped: {r}");
    }
    let _ = writeln!(
        o,
        "  {} samples over {}",
        s.samples,
        HumanDuration(s.duration_s)
    );
    // (The header in the rows' own widths: the columns line up.)
    let _ = writeln!(
        o,
        "  {:>4}  {:<9} {:>10} {:>12} {:>11}   end",
        "step", "kind", "duration", "charge Ah", "energy Wh"
    );
    for st in &s.steps {
        let _ = writeln!(
            o,
            "  {:>4}  {:<9} {:>10} {:>12.4} {:>11.3}   {}",
            st.step,
            st.kind,
            HumanDuration(st.duration_s).to_string(),
            st.charge_ah,
            st.energy_wh,
            st.end_reason.clone().unwrap_or_default()
        );
    }
    decision_lines(&mut o, s);
    capacity_lines(&mut o, s);
    resistance_lines(&mut o, s);
    if let Some(b) = &s.bms {
        for (k, v) in crate::bms::rows(b) {
            let _ = writeln!(o, "  {k}: {v}");
        }
    }
    if let Some(d) = &s.standby_drain {
        let _ = writeln!(
            o,
            "  Standby drain:     {:.2} mA = {:.2} % of {:.3} Ah a month (mean of the last {:.0} s of step {})",
            d.current_ma, d.pct_per_month, d.capacity_ref_ah, d.window_s, d.step
        );
    }
    if let Some(p) = &s.preflight {
        let zero = |z: Option<f64>| {
            z.map(|z| format!("{z:+.1} mA"))
                .unwrap_or_else(|| "-".into())
        };
        let _ = writeln!(
            o,
            "  Before the run:    pack at rest {:.3} V; zero offsets: source {}, load {}{}",
            p.voltage_v,
            zero(p.source_zero_ma),
            zero(p.load_zero_ma),
            if p.corrected { " (subtracted)" } else { "" }
        );
    }
    for r in &s.resumed {
        let _ = writeln!(
            o,
            "  Resumed:           at step {} after {:.0} s down ({})",
            r.step, r.gap_s, r.rule
        );
    }
    for a in &s.alarms {
        let _ = writeln!(o, "  ALARM:             {a}");
    }
    if !s.gaps.is_empty() {
        let _ = writeln!(
            o,
            "  Gaps:              {} flagged (longest {:.1} s)",
            s.gaps.len(),
            s.gaps.iter().map(|g| g.duration_s).fold(0.0, f64::max)
        );
    }
    if let Some(g) = &s.groups {
        groups_text(&mut o, g);
    }
    if let Some(c) = &s.characterization {
        o.push_str(&characterization_text(c));
    }
    grade_lines(&mut o, s);
    for flag in &s.verdict.flags {
        let _ = writeln!(o, "  FLAG:              {flag}");
    }
    for c in &s.cycles {
        if let (Some(ce), Some(ee)) = (c.coulombic_efficiency_pct, c.energy_efficiency_pct) {
            let (uce, uee) = if s.verdict.efficiency_cycle == Some(c.cycle) {
                (
                    crate::pm(&s.verdict.uncertainty.coulombic_efficiency_pct),
                    crate::pm(&s.verdict.uncertainty.energy_efficiency_pct),
                )
            } else {
                (String::new(), String::new())
            };
            let _ = writeln!(
                o,
                "  Cycle {}: charged {:.3} Ah / {:.2} Wh, discharged {:.3} Ah / {:.2} Wh; coulombic efficiency {:.3} %{uce}, energy efficiency {:.2} %{uee}",
                c.cycle, c.charge_ah, c.charge_wh, c.discharge_ah, c.discharge_wh, ce, ee
            );
        }
    }
    if !s.needs_rating.is_empty() {
        let _ = writeln!(
            o,
            "  Needs the rated capacity (--rated, with --chemistry and --series, or --pack-spec): {}",
            s.needs_rating.join(", ")
        );
    }
    for w in &s.warnings {
        let _ = writeln!(o, "  warning: {w}");
    }
    o
}

/// The grade with its reasons, and how the decision rule judged it.
fn grade_lines(o: &mut String, s: &Summary) {
    match s.verdict.grade.value() {
        Some(g) => {
            let _ = writeln!(
                o,
                "  Grade:             {}{} ({}) — {}",
                g.label,
                match &g.decision {
                    Some(d) if d.retest => " RETEST",
                    Some(d) if d.conditional => " (conditional)",
                    _ => "",
                },
                g.meaning,
                g.reasons.join("; ")
            );
            if let Some(d) = g.decision.as_ref().map(|d| d.line()) {
                if !d.is_empty() {
                    let _ = writeln!(o, "                     {d}");
                }
            }
        }
        None => {
            let _ = writeln!(
                o,
                "  Grade:             not graded ({})",
                s.verdict.grade.why().map(|w| w.words()).unwrap_or_default()
            );
        }
    }
}

/// The pulse-power levels: one line each, state of charge ascending.
pub fn characterization_text(c: &analysis::characterize::Characterization) -> String {
    let mut o = String::new();
    let _ = writeln!(
        o,
        "  Pulse-power levels (state of charge on {:.3} Ah, {}; power at {:.2}–{:.2} V):",
        c.basis.capacity_ah, c.basis.source, c.settings.voltage_min_v, c.settings.voltage_max_v
    );
    let widths = [6, 8, 8, 8, 8, 8, 7, 7, 6, 7, 7, 6];
    let line = |cells: &mut dyn Iterator<Item = &str>| -> String {
        cells
            .zip(widths)
            .map(|(c, w)| format!("{c:>w$}"))
            .collect::<Vec<_>>()
            .join("  ")
    };
    let headings = crate::tables::LEVEL_COLUMNS.iter().map(|c| c.heading);
    let _ = writeln!(o, "    {}", line(&mut headings.into_iter()));
    for (l, cells) in crate::tables::level_rows(c, "-") {
        let _ = writeln!(
            o,
            "    {}{}",
            line(&mut cells.iter().map(String::as_str)),
            if l.flags.is_empty() {
                String::new()
            } else {
                format!("  ({})", l.flags.join("; "))
            }
        );
    }
    if let Some(a) = &c.available_energy {
        let _ = writeln!(
            o,
            "    Available energy at {:.0} W discharge / {:.0} W charge: {:.1} Wh between {:.1} % and {:.1} % depth of discharge",
            a.target_discharge_w, a.target_charge_w, a.energy_wh, a.dod_from_pct, a.dod_to_pct
        );
    }
    o
}

/// The rule the grade is judged under and where the figures' uncertainty
/// comes from: stated before the figures.
fn decision_lines(o: &mut String, s: &Summary) {
    if let Some(d) = s.verdict.grade.value().and_then(|g| g.decision.as_ref()) {
        let _ = writeln!(o, "  Decision rule:     {}", d.rule);
    }
    let _ = writeln!(
        o,
        "  Uncertainty:       {}",
        s.verdict.uncertainty.basis_line()
    );
    if let Some(c) = &s.calibration {
        let _ = writeln!(
            o,
            "  Calibration:       {} of {} applied to every reading (due {}{})",
            c.id,
            c.date,
            c.next_due,
            if c.overdue { ", OVERDUE" } else { "" }
        );
    }
}

/// The capacity figures: measured, where it started, at rated conditions,
/// state of health.
fn capacity_lines(o: &mut String, s: &Summary) {
    let v = &s.verdict;
    match &s.capacity {
        Some(c) => {
            let rate = match v.test_rate_c.get() {
                Some(r) => format!(" ({r:.2}C)"),
                None => String::new(),
            };
            let u = &v.uncertainty;
            let _ = writeln!(
                o,
                "  Measured capacity: {:.3} Ah{}, {:.2} Wh{} at {:.3} A{rate}, {}",
                c.measured_ah,
                crate::pm(&u.measured_ah),
                c.measured_wh,
                crate::pm(&u.measured_wh),
                c.mean_current_a,
                match v.ended_on_cutoff {
                    Some(true) => "to the cutoff",
                    Some(false) => "NOT to the cutoff (lower bound)",
                    None => "cutoff not known (state it with --cutoff)",
                }
            );
            if !c.preceded_by.is_empty() {
                let _ = writeln!(
                    o,
                    "  Started from:      {}{}",
                    c.preceded_by,
                    if c.from_full_charge {
                        ""
                    } else {
                        " (NOT from a full charge: not the pack's capacity; not graded)"
                    }
                );
            }
            if let Some(a) = v.corrected_ah.get() {
                let _ = writeln!(
                    o,
                    "  Capacity (corrected): {a:.3} Ah{}, {}",
                    crate::pm(&u.corrected_ah),
                    v.conditions
                );
                if let Some(b) = &u.corrected_ah {
                    let _ = writeln!(o, "    uncertainty: {}", b.note());
                }
            }
            let _ = writeln!(
                o,
                "  State of health:   {}",
                match (v.soh_pct.get(), c.rated_ah) {
                    (Some(p), Some(r)) =>
                        format!("{p:.1} %{} of rated {r:.3} Ah", crate::pm(&u.soh_pct)),
                    _ => v.soh_pct.show(1, " %"),
                }
            );
            if let Some(p) = v.ieee450_percent.get() {
                let _ = writeln!(o, "  IEEE 450 percent capacity: {p:.1} %");
            }
            let _ = writeln!(
                o,
                "  New nominal (BMS): {}",
                match (v.new_nominal_ah.get(), &s.recalibration) {
                    (Some(n), Some(r)) => format!("{n:.3} Ah ({})", r.conditions),
                    _ => v.new_nominal_ah.show(3, " Ah"),
                }
            );
        }
        None => {
            let _ = writeln!(o, "  Measured capacity: none (no completed capacity step)");
        }
    }
}

/// The pack's rating as every report writes it ("rated 14.000 Ah", or
/// that none was given).
pub fn rated_text(s: &Summary) -> String {
    match s.pack.rated_capacity_ah {
        Some(r) => format!("rated {r:.3} Ah"),
        None => "no rated capacity given".into(),
    }
}

/// A dQ/dV peak as every report writes it: per cell with a rating;
/// without one the cells in series are not known, so in pack volts.
pub fn peak_text(s: &Summary, p: &analysis::PeakSummary) -> String {
    if s.needs_rating.is_empty() {
        format!("{:.3} V/cell ({:.2} Ah/V)", p.position_per_cell, p.height)
    } else {
        format!("{:.3} V pack ({:.2} Ah/V)", p.position, p.height)
    }
}

/// The resistance figures and the dQ/dV peaks.
fn resistance_lines(o: &mut String, s: &Summary) {
    if s.resistance.is_none() {
        for p in s.pulse_resistance.iter().take(8) {
            let vals: Vec<String> = p
                .values
                .iter()
                .map(|x| format!("{:.2} mOhm at {} s", x.resistance_mohm, x.delay_s))
                .collect();
            let _ = writeln!(
                o,
                "  Pulse resistance:  edge at {:.0} s (step {}): {}",
                p.t_edge_s,
                p.step,
                vals.join(", ")
            );
        }
        if s.pulse_resistance.len() > 8 {
            let _ = writeln!(
                o,
                "    … {} more edge(s) in summary.json",
                s.pulse_resistance.len() - 8
            );
        }
    }
    if let Some(g) = s.verdict.resistance_growth_pct.get() {
        if let Some(r) = &s.verdict.resistance_reference {
            let _ = writeln!(
                o,
                "  Resistance growth: {g:+.1} % against {:.2} mOhm ({})",
                r.mohm, r.source
            );
        }
    }
    if let Some(r) = &s.resistance {
        let _ = writeln!(
            o,
            "  DC resistance:     {:.2} mOhm{} ({})",
            r.dcir_mohm,
            crate::pm(&s.verdict.uncertainty.resistance_mohm).replace("mΩ", "mOhm"),
            r.method
        );
        if !r.why.is_empty() {
            let _ = writeln!(o, "    why this method:  {}", r.why);
        }
        if r.readings.len() > 1 {
            for x in &r.readings {
                let _ = writeln!(
                    o,
                    "    step {:>3}: {:.2} mOhm{}",
                    x.step,
                    x.dcir_mohm,
                    x.soc_pct
                        .map(|s| format!(" at {s:.0} % state of charge"))
                        .unwrap_or_default()
                );
            }
        }
    }
    if let Some(c) = &s.curves {
        for i in &c.ica {
            if !i.peaks.is_empty() {
                let peaks: Vec<String> = i.peaks.iter().map(|p| peak_text(s, p)).collect();
                let _ = writeln!(
                    o,
                    "  dQ/dV peaks ({} step {}): {}",
                    i.direction,
                    i.step,
                    peaks.join(", ")
                );
            }
        }
    }
    if let Some(t) = s.curves.as_ref().and_then(|c| c.ocv.as_ref()) {
        let rated = s.needs_rating.is_empty();
        let _ = writeln!(
            o,
            "  Open-circuit voltage (steps {} at {:.2}C and {} at {:.2}C):",
            t.charge_step, t.charge_rate_c, t.discharge_step, t.discharge_rate_c
        );
        let _ = writeln!(
            o,
            "    SoC %   charge V  discharge V   OCV V{}",
            if rated { "  OCV V/cell" } else { "" }
        );
        for p in &t.points {
            let _ = writeln!(
                o,
                "    {:>5.0}  {:>9.3}  {:>11.3}  {:>6.3}{}",
                p.soc_pct,
                p.charge_v,
                p.discharge_v,
                p.ocv_v,
                if rated {
                    format!("  {:>10.4}", p.ocv_per_cell_v)
                } else {
                    String::new()
                }
            );
        }
    }
}

/// The pulse-power characterizations' discharge resistance at 50 %
/// state of charge, test by test, and its change over the first.
fn pulse_r50_text(o: &mut String, h: &analysis::fade::history::PackHistory) {
    let pts: Vec<_> = h
        .points
        .iter()
        .filter_map(|p| p.pulse_r50_mohm.map(|r| (p, r)))
        .collect();
    let Some(&(_, first)) = pts.first() else {
        return;
    };
    let _ = writeln!(
        o,
        "  Pulse resistance at 50 % state of charge (discharge pulse, end):"
    );
    for (p, r) in &pts {
        let _ = writeln!(
            o,
            "    {}  {:>8.2} mΩ  {:>+6.1} %  ({})",
            p.date,
            r,
            (r / first - 1.0) * 100.0,
            p.source
        );
    }
}

/// The fade analysis of one pack for a terminal.
/// The groups' spread test by test, and how much it grew.
fn group_spread_text(o: &mut String, h: &analysis::fade::history::PackHistory) {
    let pts: Vec<_> = h
        .points
        .iter()
        .filter_map(|p| p.groups.as_ref().map(|g| (p, g)))
        .collect();
    if pts.is_empty() {
        return;
    }
    let _ = writeln!(
        o,
        "  groups:     weakest  share %  capacity spread %  EOC spread mV  EOD spread mV"
    );
    for (p, g) in &pts {
        let _ = writeln!(
            o,
            "  {}  {:>7}  {:>7}  {:>17}  {:>13}  {:>13}",
            p.date,
            g.weakest.map_or("-".into(), |w| w.to_string()),
            opt(g.weakest_share_pct, 1),
            opt(g.capacity_spread_pct, 1),
            opt(g.end_of_charge_spread_mv, 0),
            opt(g.end_of_discharge_spread_mv, 0)
        );
    }
    let spreads: Vec<f64> = pts
        .iter()
        .filter_map(|(_, g)| g.capacity_spread_pct)
        .collect();
    if let (Some(a), Some(b), true) = (spreads.first(), spreads.last(), spreads.len() > 1) {
        let _ = writeln!(
            o,
            "  The groups' capacity spread went from {a:.1} % to {b:.1} % over {} tests ({:+.1} points).",
            spreads.len(),
            b - a
        );
    }
}

pub fn fade(
    h: &analysis::fade::history::PackHistory,
    fa: &analysis::fade::trend::FadeAnalysis,
) -> String {
    let mut o = String::new();
    let _ = writeln!(
        o,
        "Pack {} ({} {}S, rated {} Ah): {} measurements, end of life at {} % of rated",
        h.pack_id,
        h.spec.chemistry,
        h.spec.series,
        h.spec.rated_capacity_ah,
        h.points.len(),
        fa.threshold_pct
    );
    let _ = writeln!(
        o,
        "  date        cycles   capacity Ah  SOH %  ± U (95 %)  resistance mOhm  grade  source"
    );
    for p in &h.points {
        let _ = writeln!(
            o,
            "  {}  {:>7}{} {:>10.3}  {:>6.2}  {:>10}  {:>15}  {:>5}  {}",
            p.date,
            if p.cycles.is_finite() {
                format!("{:.0}", p.cycles)
            } else {
                "-".into()
            },
            if p.cycles_given || !p.cycles.is_finite() {
                " "
            } else {
                "*"
            },
            p.capacity_ah,
            p.soh_pct,
            p.soh_u95_pct
                .map(|u| format!("± {u:.2}"))
                .unwrap_or_else(|| "-".into()),
            p.resistance_mohm
                .map(|r| format!("{r:.1}"))
                .unwrap_or_else(|| "-".into()),
            p.grade.as_deref().unwrap_or("-"),
            p.source
        );
    }
    group_spread_text(&mut o, h);
    pulse_r50_text(&mut o, h);
    if h.points
        .iter()
        .any(|p| !p.cycles_given && p.cycles.is_finite())
    {
        let _ = writeln!(
            o,
            "  (* cycles counted from the discharge Ah packbench measured)"
        );
    }
    if h.points.iter().any(|p| !p.cycles.is_finite()) {
        let _ = writeln!(
            o,
            "  (- cycle count unknown: left out of the fit against cycles, kept in the fits against time)"
        );
    }
    for m in &fa.models {
        let _ = writeln!(
            o,
            "  fade {}: {:.4} {} (R² {:.4}, n {})",
            m.description, m.fade_per_unit, m.unit, m.fit.r_squared, m.fit.n
        );
    }
    if let Some(p) = &fa.eol_cycles {
        let _ = writeln!(
            o,
            "  End of life at about {:.0} cycles (95 % band {} to {}; {})",
            p.cycles,
            p.cycles_early
                .map(|c| format!("{c:.0}"))
                .unwrap_or_else(|| "-".into()),
            p.cycles_late
                .map(|c| format!("{c:.0}"))
                .unwrap_or_else(|| "not bounded".into()),
            p.basis
        );
    }
    if let Some(p) = &fa.eol_date {
        let _ = writeln!(
            o,
            "  End of life about {} (95 % band {} to {})",
            p.date,
            p.date_early
                .map(|d| d.to_string())
                .unwrap_or_else(|| "-".into()),
            p.date_late
                .map(|d| d.to_string())
                .unwrap_or_else(|| "not bounded".into())
        );
    }
    if let Some(a) = &fa.accelerating {
        let _ = writeln!(
            o,
            "  ACCELERATING FADE: {:.3} %/100 cycles recently against {:.3} earlier ({:.1}x)",
            a.recent_pct_per_100_cycles, a.earlier_pct_per_100_cycles, a.ratio
        );
    }
    for n in &fa.notes {
        let _ = writeln!(o, "  note: {n}");
    }
    for l in &h.left_out {
        let _ = writeln!(
            o,
            "  left out: run {} ({}): {}",
            l.run_id, l.status, l.reason
        );
    }
    for p in &h.points {
        for f in &p.flags {
            let _ = writeln!(o, "  FLAG {} ({}): {f}", p.source, p.date);
        }
    }
    o
}

/// The fleet table for a terminal.
pub fn fleet(f: &analysis::fade::fleet::Fleet) -> String {
    let mut o = String::new();
    let _ = writeln!(
        o,
        "Fleet as of {} ({} packs; tests due by {}; end of life at {} %)",
        f.today,
        f.rows.len(),
        f.schedule,
        f.threshold_pct
    );
    let _ = writeln!(
        o,
        "{:>4}  {:<10} {:<13} {:>5} {:<10} {:>6} {:>6} {:>8} {:>7} {:>9} {:>7} {:<10} {:<5} flags",
        "rank",
        "pack",
        "chemistry",
        "tests",
        "last test",
        "cycles",
        "SOH%",
        "R mOhm",
        "R grow%",
        "fade%/100",
        "EOL cyc",
        "EOL date",
        "grade"
    );
    let n = |v: Option<f64>, d: usize| v.map(|x| format!("{x:.d$}")).unwrap_or_else(|| "-".into());
    for r in &f.rows {
        let mut flags = Vec::new();
        if r.overdue {
            flags.push("OVERDUE".to_string());
        }
        if r.replace {
            flags.push("REPLACE".to_string());
        }
        if r.accelerating {
            flags.push("ACCELERATING".to_string());
        }
        if let Some(d) = r.below_eol_since {
            flags.push(format!("BELOW-EOL-SINCE-{d}"));
        } else if r.eol_date_past {
            flags.push("EOL-DATE-PAST".to_string());
        }
        if !r.flags.is_empty() {
            flags.push("FLAGGED".to_string());
        }
        let _ =
            writeln!(
            o,
            "{:>4}  {:<10} {:<13} {:>5} {:<10} {:>6} {:>6} {:>8} {:>7} {:>9} {:>7} {:<10} {:<5} {}",
            r.rank,
            r.pack_id,
            format!("{} {}S", r.chemistry, r.series),
            r.tests,
            r.last_test.map(|d| d.to_string()).unwrap_or_else(|| "-".into()),
            n(r.cycles, 0),
            n(r.soh_pct, 1),
            n(r.resistance_mohm, 1),
            n(r.resistance_growth_pct, 0),
            n(r.fade_pct_per_100_cycles, 3),
            n(r.eol_cycles, 0),
            r.eol_date.map(|d| d.to_string()).unwrap_or_else(|| "-".into()),
            r.grade.as_deref().unwrap_or("-"),
            flags.join(" ")
        );
    }
    // Why each pack that needs attention does (the fleet row's words).
    for r in &f.rows {
        if r.overdue || r.replace {
            let when = match r.due {
                Some(d) if r.overdue => format!("due since {d}"),
                Some(d) => format!("due {d}"),
                None => "due now".into(),
            };
            let _ = writeln!(o, "  {}: {when}: {}", r.pack_id, r.due_rule);
        }
        for a in r
            .attention
            .iter()
            .filter(|a| a.starts_with("replace") && r.grade.is_some())
        {
            let _ = writeln!(o, "  {}: {a}", r.pack_id);
        }
        for fl in &r.flags {
            let _ = writeln!(o, "  {}: FLAG {fl}", r.pack_id);
        }
        if let Some(src) = r.from_test.as_ref().filter(|_| !r.flags.is_empty()) {
            let _ = writeln!(o, "  {}: its figures and grade are from {src}", r.pack_id);
        }
    }
    o
}
