//! The BMS comparison as label–value rows, for the text summary, the
//! report and the grade card.

use analysis::bms::BmsCheck;

/// One row per figure the BMS reported, with how far it was off.
pub fn rows(b: &BmsCheck) -> Vec<(String, String)> {
    let mut out = Vec::new();
    let mut row = |k: &str, v: String| out.push((k.to_string(), v));
    let r = &b.reported;
    if let Some(f) = r.full_charge_capacity_ah {
        row(
            "BMS full-charge capacity",
            match (b.capacity_error_pct, b.measured_capacity_ah) {
                (Some(e), Some(m)) => {
                    format!("{f:.3} Ah: {e:+.2} % against the measured {m:.3} Ah")
                }
                _ => format!("{f:.3} Ah (not compared)"),
            },
        );
    }
    if let (Some(soh), Some(d)) = (b.bms_soh_pct, r.design_capacity_ah) {
        row(
            "BMS state of health",
            format!("{soh:.1} % (its full-charge capacity over its design {d:.3} Ah)"),
        );
    } else if let Some(d) = r.design_capacity_ah {
        row("BMS design capacity", format!("{d:.3} Ah"));
    }
    if let Some(c) = r.cycle_count {
        row("BMS cycle count", format!("{c:.0}"));
    }
    for (label, bms, measured, err) in [
        (
            "BMS state of charge at the start",
            r.soc_start_pct,
            b.soc_start_measured_pct,
            b.soc_start_error_pp,
        ),
        (
            "BMS state of charge at the end",
            r.soc_end_pct,
            b.soc_end_measured_pct,
            b.soc_end_error_pp,
        ),
    ] {
        if let Some(x) = bms {
            row(
                label,
                match (measured, err) {
                    (Some(m), Some(e)) => {
                        format!("{x:.1} % against {m:.1} % measured: {e:+.1} points")
                    }
                    _ => format!("{x:.1} % (not compared)"),
                },
            );
        }
    }
    if let Some(n) = b.suggested_nominal_ah {
        row(
            "New nominal for the BMS",
            format!("{n:.3} Ah ({})", b.conditions.clone().unwrap_or_default()),
        );
    }
    for n in &b.notes {
        row("BMS note", n.clone());
    }
    out
}
