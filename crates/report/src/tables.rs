//! The tables a BMS engineer loads, from a pulse-power characterization:
//! open-circuit voltage against state of charge, the equivalent circuit's
//! parameters against state of charge (first and second order), the
//! method's resistances and power capability, a JSON file of the test's
//! conditions, and a C header for firmware.
//!
//! Every table's first column is its breakpoint vector (state of charge,
//! % of the capacity basis, ascending); every header names its unit. A
//! figure the test did not give is an empty cell (CSV) or absent (JSON),
//! never a zero. Resistances in Ω, capacitances in F, time constants in s,
//! voltages in V, powers in W; the current sign is positive into the pack.

use analysis::characterize::{Characterization, Level};
use analysis::ecm::EcmFit;
use std::fmt::Write as _;

/// File names, in the folder `characterize` writes.
pub const OCV_CSV: &str = "ocv_soc.csv";
pub const ECM1_CSV: &str = "ecm1_soc.csv";
pub const ECM2_CSV: &str = "ecm2_soc.csv";
pub const PULSE_CSV: &str = "pulse_soc.csv";
pub const CONDITIONS_JSON: &str = "characterization.json";
pub const C_HEADER: &str = "characterization.h";

/// One column of the levels' summary, as the terminal and the run report
/// show it: its heading, the decimals and the figure (absent: not
/// measured).
pub struct LevelColumn {
    pub heading: &'static str,
    pub decimals: usize,
    pub value: fn(&Level) -> Option<f64>,
}

fn pair_of(l: &Level, i: usize) -> Option<&analysis::ecm::RcPair> {
    l.ecm2.as_ref().and_then(|f| f.pairs.get(i))
}

/// The levels' summary: the method's figures and the second-order
/// circuit.
pub const LEVEL_COLUMNS: [LevelColumn; 12] = [
    LevelColumn {
        heading: "SoC %",
        decimals: 1,
        value: |l| Some(l.soc_pct),
    },
    LevelColumn {
        heading: "OCV V",
        decimals: 3,
        value: |l| Some(l.ocv_v),
    },
    LevelColumn {
        heading: "Rdis mΩ",
        decimals: 2,
        value: |l| Some(l.discharge.resistance_mohm),
    },
    LevelColumn {
        heading: "Rchg mΩ",
        decimals: 2,
        value: |l| l.charge.as_ref().map(|p| p.resistance_mohm),
    },
    LevelColumn {
        heading: "Pdis W",
        decimals: 0,
        value: |l| l.power_discharge_w,
    },
    LevelColumn {
        heading: "Pchg W",
        decimals: 0,
        value: |l| l.power_charge_w,
    },
    LevelColumn {
        heading: "R0 mΩ",
        decimals: 2,
        value: |l| l.circuit_r0_ohm(2).map(|r| r * 1000.0),
    },
    LevelColumn {
        heading: "R1 mΩ",
        decimals: 2,
        value: |l| pair_of(l, 0).map(|p| p.r_ohm * 1000.0),
    },
    LevelColumn {
        heading: "τ1 s",
        decimals: 1,
        value: |l| pair_of(l, 0).map(|p| p.tau_s),
    },
    LevelColumn {
        heading: "R2 mΩ",
        decimals: 2,
        value: |l| pair_of(l, 1).map(|p| p.r_ohm * 1000.0),
    },
    LevelColumn {
        heading: "τ2 s",
        decimals: 0,
        value: |l| pair_of(l, 1).map(|p| p.tau_s),
    },
    LevelColumn {
        heading: "rms mV",
        decimals: 2,
        value: |l| l.ecm2.as_ref().map(|f| f.rms_v * 1000.0),
    },
];

/// The levels from full down, each as its columns' text (`absent` where
/// a figure was not measured).
pub fn level_rows<'a>(c: &'a Characterization, absent: &str) -> Vec<(&'a Level, Vec<String>)> {
    let mut levels = ascending(c);
    levels.reverse();
    levels
        .into_iter()
        .map(|l| {
            let cells = LEVEL_COLUMNS
                .iter()
                .map(|col| {
                    (col.value)(l)
                        .map_or_else(|| absent.to_string(), |v| format!("{v:.*}", col.decimals))
                })
                .collect();
            (l, cells)
        })
        .collect()
}

/// The levels in ascending state of charge.
fn ascending(c: &Characterization) -> Vec<&Level> {
    let mut v: Vec<&Level> = c.levels.iter().collect();
    v.sort_by(|a, b| a.soc_pct.total_cmp(&b.soc_pct));
    v
}

fn num(x: Option<f64>) -> String {
    match x {
        Some(v) if v.is_finite() => format!("{v:.9}")
            .trim_end_matches('0')
            .trim_end_matches('.')
            .to_string(),
        _ => String::new(),
    }
}

/// `ocv_soc.csv`: the rest's last voltage before each level.
pub fn ocv_csv(c: &Characterization) -> String {
    let n = f64::from(c.settings.series.max(1));
    let mut s = String::from("soc_pct,ocv_v,ocv_per_cell_v,rest_before_s,temperature_c\n");
    for l in ascending(c) {
        let _ = writeln!(
            s,
            "{},{},{},{},{}",
            num(Some(l.soc_pct)),
            num(Some(l.ocv_v)),
            num(Some(l.ocv_v / n)),
            num(Some(l.rest_s)),
            num(l.temperature_c)
        );
    }
    s
}

/// `ecm1_soc.csv` / `ecm2_soc.csv`: the circuit of `order` at each level,
/// each parameter with its standard uncertainty (u_…).
pub fn ecm_csv(c: &Characterization, order: usize) -> String {
    let mut s = String::from("soc_pct,r0_ohm,u_r0_ohm");
    for i in 1..=order {
        let _ = write!(
            s,
            ",r{i}_ohm,u_r{i}_ohm,c{i}_f,u_c{i}_f,tau{i}_s,u_tau{i}_s"
        );
    }
    s.push_str(",rms_error_v,points,r0_separable\n");
    for l in ascending(c) {
        let f: Option<&EcmFit> = if order == 1 {
            l.ecm1.as_ref()
        } else {
            l.ecm2.as_ref()
        };
        let _ = write!(s, "{}", num(Some(l.soc_pct)));
        match f {
            Some(f) => {
                // R0 only where the sampling separates it from R1.
                let r0 = l.circuit_r0_ohm(order);
                let u0 = l.r0_separable.then_some(f.u_r0_ohm);
                let _ = write!(s, ",{},{}", num(r0), num(u0));
                for p in &f.pairs {
                    let _ = write!(
                        s,
                        ",{},{},{},{},{},{}",
                        num(Some(p.r_ohm)),
                        num(Some(p.u_r_ohm)),
                        num(Some(p.c_f)),
                        num(Some(p.u_c_f)),
                        num(Some(p.tau_s)),
                        num(Some(p.u_tau_s))
                    );
                }
                let _ = writeln!(s, ",{},{},{}", num(Some(f.rms_v)), f.points, l.r0_separable);
            }
            None => {
                s.push_str(&",".repeat(2 + 6 * order + 2));
                let _ = writeln!(s, ",{}", l.r0_separable);
            }
        }
    }
    s
}

/// `pulse_soc.csv`: the method's resistances (at the pulse's end and at
/// the delays the sampling resolved) and power capability.
pub fn pulse_csv(c: &Characterization) -> String {
    let delays = analysis::characterize::DELAYS_S;
    let mut s = String::from("soc_pct,ocv_v,discharge_current_a,r_discharge_ohm");
    for d in delays {
        let _ = write!(s, ",r_discharge_{}s_ohm", delay_name(d));
    }
    s.push_str(",charge_current_a,r_charge_ohm");
    for d in delays {
        let _ = write!(s, ",r_charge_{}s_ohm", delay_name(d));
    }
    s.push_str(",power_discharge_w,power_charge_w,charge_reduced\n");
    let at = |v: &[(f64, f64)], d: f64| {
        v.iter()
            .find(|(x, _)| (x - d).abs() < 1e-9)
            .map(|(_, r)| r / 1000.0)
    };
    for l in ascending(c) {
        let _ = write!(
            s,
            "{},{},{},{}",
            num(Some(l.soc_pct)),
            num(Some(l.ocv_v)),
            num(Some(l.discharge.current_a)),
            num(Some(l.discharge.resistance_mohm / 1000.0))
        );
        for d in delays {
            let _ = write!(s, ",{}", num(at(&l.discharge.at_delays, d)));
        }
        let ch = l.charge.as_ref();
        let _ = write!(
            s,
            ",{},{}",
            num(ch.map(|p| p.current_a)),
            num(ch.map(|p| p.resistance_mohm / 1000.0))
        );
        for d in delays {
            let _ = write!(s, ",{}", num(ch.and_then(|p| at(&p.at_delays, d))));
        }
        let _ = writeln!(
            s,
            ",{},{},{}",
            num(l.power_discharge_w),
            num(l.power_charge_w),
            l.charge_reduced
        );
    }
    s
}

fn delay_name(d: f64) -> String {
    num(Some(d)).replace('.', "_")
}

/// What the JSON file says of the test besides the tables.
#[derive(Debug, Clone)]
pub struct Conditions<'a> {
    pub pack_id: &'a str,
    pub run_id: &'a str,
    pub test_date: chrono::NaiveDate,
    pub chemistry: &'a str,
    pub series: u32,
    pub rated_ah: Option<f64>,
}

/// `characterization.json`: the test's conditions, the capacity basis,
/// and every level with its fits (the tables' source).
pub fn conditions_json(c: &Characterization, k: &Conditions) -> serde_json::Value {
    let levels = ascending(c);
    let temps: Vec<f64> = levels.iter().filter_map(|l| l.temperature_c).collect();
    let mean = |v: &[f64]| (!v.is_empty()).then(|| v.iter().sum::<f64>() / v.len() as f64);
    let rests: Vec<f64> = levels.iter().map(|l| l.rest_s).collect();
    let worst_rms = levels
        .iter()
        .filter_map(|l| l.ecm2.as_ref().map(|f| f.rms_v))
        .reduce(f64::max);
    serde_json::json!({
        "method": "hybrid pulse power characterization (US DOE/INL battery test manuals), read by packbench",
        "pack_id": k.pack_id,
        "run_id": k.run_id,
        "test_date": k.test_date.to_string(),
        "chemistry": k.chemistry,
        "series": k.series,
        "rated_capacity_ah": k.rated_ah,
        "soc_basis": {
            "capacity_ah": c.basis.capacity_ah,
            "source": c.basis.source,
            "counted_from": "the end of the last full charge",
        },
        "sign": "current positive into the pack",
        "units": {"soc": "%", "voltage": "V", "resistance": "ohm", "capacitance": "F", "time_constant": "s", "power": "W"},
        "voltage_limits_v": [c.settings.voltage_min_v, c.settings.voltage_max_v],
        "temperature_c_mean": mean(&temps),
        "rest_before_levels_s": {"min": rests.iter().copied().reduce(f64::min), "max": rests.iter().copied().reduce(f64::max)},
        "discharge_pulse": levels.first().map(|l| serde_json::json!({"current_a": l.discharge.current_a, "duration_s": l.discharge.duration_s})),
        "charge_pulse": levels.iter().find_map(|l| l.charge.as_ref()).map(|p| serde_json::json!({"current_a": p.current_a, "duration_s": p.duration_s})),
        "fit": {
            "model": "Thevenin: V = OCV + I·R0 + Σ v_i, dv_i/dt = (I·R_i − v_i)/τ_i, C_i = τ_i/R_i",
            "method": "least squares: linear parameters by the normal equations, time constants by Nelder–Mead (argmin) from several starts",
            "worst_rms_error_v": worst_rms,
            "r0_rule": format!("R0 where the first sample after the discharge edge comes within {} of τ1", analysis::characterize::R0_SEPARABLE_FRACTION),
        },
        "available_energy": c.available_energy,
        "tables": [OCV_CSV, ECM1_CSV, ECM2_CSV, PULSE_CSV],
        "levels": levels,
    })
}

/// A C identifier from a pack id.
fn ident(s: &str) -> String {
    let mut out: String = s
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() {
                c.to_ascii_lowercase()
            } else {
                '_'
            }
        })
        .collect();
    if out.chars().next().is_none_or(|c| c.is_ascii_digit()) {
        out.insert_str(0, "pack_");
    }
    out
}

fn c_array(out: &mut String, ty: &str, name: &str, vals: &[Option<f64>]) {
    let _ = write!(out, "static const {ty} {name}[{}] = {{", vals.len());
    for (i, v) in vals.iter().enumerate() {
        if i > 0 {
            out.push_str(", ");
        }
        // An absent figure is NAN in firmware (math.h); the table's
        // comment says which.
        match v {
            Some(x) if x.is_finite() => {
                let _ = write!(out, "{x:.6e}f");
            }
            _ => out.push_str("NAN"),
        }
    }
    out.push_str("};\n");
}

/// `characterization.h`: the OCV and second-order circuit tables as
/// `static const float` arrays over one state-of-charge breakpoint
/// vector, for firmware. Absent figures are NAN.
pub fn c_header(c: &Characterization, k: &Conditions) -> String {
    let p = ident(k.pack_id);
    let levels = ascending(c);
    let mut s = String::new();
    let guard = format!("{}_CHARACTERIZATION_H", p.to_ascii_uppercase());
    let _ = writeln!(
        s,
        "/* Pulse-power characterization of pack {} (run {}, {}), written by packbench.\n * State of charge: % of {:.4} Ah ({}), counted from full.\n * Units: V, ohm, F, s; current positive into the pack. NAN: not measured. */",
        k.pack_id, k.run_id, k.test_date, c.basis.capacity_ah, c.basis.source
    );
    let _ = writeln!(s, "#ifndef {guard}\n#define {guard}\n\n#include <math.h>\n");
    let _ = writeln!(
        s,
        "#define {}_LEVELS {}\n",
        p.to_ascii_uppercase(),
        levels.len()
    );
    let col = |f: &dyn Fn(&Level) -> Option<f64>| -> Vec<Option<f64>> {
        levels.iter().map(|l| f(l)).collect()
    };
    c_array(
        &mut s,
        "float",
        &format!("{p}_soc_pct"),
        &col(&|l| Some(l.soc_pct)),
    );
    c_array(
        &mut s,
        "float",
        &format!("{p}_ocv_v"),
        &col(&|l| Some(l.ocv_v)),
    );
    let pair = |l: &Level, i: usize| l.ecm2.as_ref().and_then(|f| f.pairs.get(i).cloned());
    c_array(
        &mut s,
        "float",
        &format!("{p}_r0_ohm"),
        &col(&|l| l.circuit_r0_ohm(2)),
    );
    for i in 0..2 {
        let n = i + 1;
        c_array(
            &mut s,
            "float",
            &format!("{p}_r{n}_ohm"),
            &col(&|l| pair(l, i).map(|q| q.r_ohm)),
        );
        c_array(
            &mut s,
            "float",
            &format!("{p}_c{n}_f"),
            &col(&|l| pair(l, i).map(|q| q.c_f)),
        );
    }
    let _ = writeln!(s, "\n#endif /* {guard} */");
    s
}
