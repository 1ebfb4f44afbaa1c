//! The short human summary printed at the end of a run.

use crate::runlog::Summary;
use crate::units::HumanDuration;
use std::fmt::Write;

pub fn summary(s: &Summary) -> String {
    let mut o = String::new();
    let _ = writeln!(
        o,
        "Run {} of pack {} ({} {}S, rated {:.3} Ah): {}",
        s.run_id, s.pack_id, s.pack.chemistry, s.pack.series, s.pack.rated_capacity_ah, s.status
    );
    if let Some(r) = &s.stop_reason {
        let _ = writeln!(o, "  stopped: {r}");
    }
    let _ = writeln!(
        o,
        "  {} samples over {}",
        s.samples,
        HumanDuration(s.duration_s)
    );
    let _ = writeln!(
        o,
        "  step  kind       duration      charge Ah   energy Wh   end"
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
    match &s.capacity {
        Some(c) => {
            let _ = writeln!(
                o,
                "  Measured capacity: {:.3} Ah, {:.2} Wh at {:.3} A ({:.2}C), {}",
                c.measured_ah,
                c.measured_wh,
                c.mean_current_a,
                c.c_rate,
                if c.ended_on_cutoff {
                    "to the cutoff"
                } else {
                    "NOT to the cutoff (lower bound)"
                }
            );
            let _ = writeln!(
                o,
                "  State of health:   {:.1} % of rated {:.3} Ah",
                c.soh_pct, c.rated_ah
            );
        }
        None => {
            let _ = writeln!(o, "  Measured capacity: none (no completed capacity step)");
        }
    }
    for c in &s.cycles {
        if let (Some(ce), Some(ee)) = (c.coulombic_efficiency_pct, c.energy_efficiency_pct) {
            let _ = writeln!(
                o,
                "  Cycle {}: charged {:.3} Ah / {:.2} Wh, discharged {:.3} Ah / {:.2} Wh; coulombic efficiency {:.3} %, energy efficiency {:.2} %",
                c.cycle, c.charge_ah, c.charge_wh, c.discharge_ah, c.discharge_wh, ce, ee
            );
        }
    }
    for w in &s.warnings {
        let _ = writeln!(o, "  warning: {w}");
    }
    o
}
