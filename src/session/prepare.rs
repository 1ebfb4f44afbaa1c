//! Every check before an instrument is touched: the pack, the procedure
//! against the pack and the instruments' ranges.

use crate::session::error::input_file_err;
use crate::session::error::RunError;
use crate::session::fields::{Field, FieldError};
use crate::session::request::default_sim_pack;
use crate::session::request::PackSource;
use crate::session::request::Prepared;
use crate::session::request::RunRequest;
use instrument::profile::{Profile, ProfileRole};
use model::location::{InputErrors, LocatedError, Location};
use model::pack::{check_pack_id, PackSpec};
use model::procedure::{self, DischargeMode, LoadedProcedure, StepKind};
use record::PACK_TOML;
use std::path::Path;

/// Read a pack spec file.
pub fn read_pack_file(path: &Path) -> Result<PackSpec, RunError> {
    let text = model::procedure::read_text(path).map_err(input_file_err(path))?;
    Ok(PackSpec::from_toml(path, &text)?)
}

/// Decide the pack spec: the one given, or the one saved on the pack's
/// first test. A given spec that differs from the saved one is refused.
pub fn resolve_pack(
    pack_id: &str,
    source: &PackSource,
    results: &Path,
) -> Result<(PackSpec, bool, Option<String>), RunError> {
    check_pack_id(pack_id)?;
    let saved_path = results.join(pack_id).join(PACK_TOML);
    let saved = if saved_path.exists() {
        Some(read_pack_file(&saved_path)?)
    } else {
        None
    };
    match (source, saved) {
        (PackSource::Given(g), Some(s)) if *g != s => Err(RunError::from(FieldError::new(
            Field::Rated,
            format!(
                "pack '{pack_id}' was first tested as {} {}S {} Ah ({}); give the same spec, leave it out to reuse it, or use a new pack id",
                s.chemistry,
                s.series,
                s.rated_capacity_ah,
                saved_path.display()
            ),
        ))),
        (PackSource::Given(g), saved) => Ok((g.clone(), saved.is_none(), None)),
        (PackSource::Saved { .. }, Some(s)) => Ok((s, false, Some(format!("pack spec from {}", saved_path.display())))),
        (PackSource::Saved { allow_sim_default: true }, None) => {
            let p = default_sim_pack();
            Ok((
                p.clone(),
                true,
                Some(format!(
                    "no pack spec given: using the simulated bench's pack ({} {}S, rated {} Ah)",
                    p.chemistry, p.series, p.rated_capacity_ah
                )),
            ))
        }
        (PackSource::Saved { allow_sim_default: false }, None) => Err(RunError::from(FieldError::new(
            Field::Rated,
            format!("no pack spec for '{pack_id}': give its chemistry, series and rated capacity (--chemistry, --series and --rated, or --pack-spec FILE)"),
        ))),
    }
}

/// Check the plan's setpoints against the instruments' declared ranges.
pub fn check_ranges(p: &LoadedProcedure, source: &Profile, load: &Profile) -> Result<(), RunError> {
    let mut errors = Vec::new();
    for st in &p.plan.steps {
        let at = Location {
            file: p.path.clone(),
            line: st.line,
            column: 1,
        };
        let mut out = |what: String| {
            errors.push(LocatedError {
                location: at.clone(),
                message: what,
            })
        };
        let (sr, lr) = (source.ranges, load.ranges);
        let over = |v: f64, max: Option<f64>| max.is_some_and(|m| v > m);
        match &st.kind {
            StepKind::Charge {
                current_a,
                voltage_v,
            } => {
                if over(*voltage_v, sr.voltage_max_v) {
                    out(format!(
                        "charge voltage {voltage_v:.3} V is beyond the source's range ({} V)",
                        sr.voltage_max_v.unwrap_or(0.0)
                    ));
                }
                if over(*current_a, sr.current_max_a) {
                    out(format!(
                        "charge current {current_a:.3} A is beyond the source's range ({} A)",
                        sr.current_max_a.unwrap_or(0.0)
                    ));
                }
            }
            StepKind::Discharge { load: m } => match *m {
                DischargeMode::Current { current_a } if over(current_a, lr.current_max_a) => {
                    out(format!(
                        "discharge current {current_a:.3} A is beyond the load's range ({} A)",
                        lr.current_max_a.unwrap_or(0.0)
                    ))
                }
                DischargeMode::Power { power_w } if over(power_w, lr.power_max_w) => out(format!(
                    "discharge power {power_w:.2} W is beyond the load's range ({} W)",
                    lr.power_max_w.unwrap_or(0.0)
                )),
                DischargeMode::Resistance { resistance_ohm }
                    if over(resistance_ohm, lr.resistance_max_ohm) =>
                {
                    out(format!(
                    "discharge resistance {resistance_ohm} ohm is beyond the load's range ({} ohm)",
                    lr.resistance_max_ohm.unwrap_or(0.0)
                ))
                }
                _ => {}
            },
            StepKind::Pulse { levels } => {
                for l in levels {
                    // A charge level is the source's, a discharge level
                    // the load's.
                    let (name, r) = if l.current_a > 0.0 {
                        ("source", sr.current_max_a)
                    } else {
                        ("load", lr.current_max_a)
                    };
                    if over(l.current_a.abs(), r) {
                        out(format!(
                            "pulse current {:.3} A is beyond the {name}'s range ({} A)",
                            l.current_a,
                            r.unwrap_or(0.0)
                        ));
                    }
                }
            }
            StepKind::Drain { current_limit_a } => {
                if over(*current_limit_a, sr.current_max_a) {
                    out(format!(
                        "drain current limit {current_limit_a:.3} A is beyond the source's range ({} A)",
                        sr.current_max_a.unwrap_or(0.0)
                    ));
                }
            }
            StepKind::Rest => {}
        }
    }
    let vmax = p.plan.envelope.voltage_max_v;
    for (name, r) in [
        ("source", source.ranges.voltage_max_v),
        ("load", load.ranges.voltage_max_v),
    ] {
        if let Some(m) = r {
            if vmax > m {
                errors.push(LocatedError {
                    location: Location { file: p.path.clone(), line: 1, column: 1 },
                    message: format!("the envelope's voltage_max {vmax:.2} V is beyond the {name}'s range ({m} V)"),
                });
            }
        }
    }
    if errors.is_empty() {
        Ok(())
    } else {
        Err(InputErrors(errors).into())
    }
}

/// Validate a request completely. Creates nothing and talks to nothing.
pub fn prepare(req: &RunRequest) -> Result<Prepared, RunError> {
    let (pack, save_pack, pack_note) = resolve_pack(&req.pack_id, &req.pack, &req.results)?;
    // The run is written inside the results folder, never through a link.
    let pack_dir = req.results.join(&req.pack_id);
    record::write::refuse_links_below(&req.results, &pack_dir.join(record::PACK_TOML))
        .map_err(|e| RunError::arguments(e.to_string()))?;
    let procedure = procedure::load(&req.procedure, &pack)?;
    check_ranges(
        &procedure,
        &Profile::builtin(ProfileRole::Source),
        &Profile::builtin(ProfileRole::Load),
    )?;
    Ok(Prepared {
        procedure,
        pack_id: req.pack_id.clone(),
        pack_dir,
        pack,
        save_pack,
        pack_note,
        options: req.options.clone(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use model::pack::Chemistry;

    /// A setpoint beyond an instrument's range is refused at its step's
    /// line, naming the instrument and its range.
    #[test]
    fn range_errors_name_the_instrument_and_its_range() {
        let pack = PackSpec {
            chemistry: Chemistry::LiIon,
            series: 10,
            rated_capacity_ah: 100.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
        let text = r#"title = "t"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.8V/cell"
current_max = "1.2C"
temperature_max = "55degC"
[[phase]]
name = "p"
  [[phase.step]]
  kind = "pulse"
  levels = [{ current = "-1C", duration = "10s" }, { current = "0.8C", duration = "10s" }]
  [[phase.step]]
  kind = "drain"
  current = "0.9C"
  ends = ["time > 1h"]
"#;
        let plan = procedure::validate::plan_from_text(Path::new("p.toml"), text, &pack).unwrap();
        let p = LoadedProcedure {
            path: "p.toml".into(),
            text: text.into(),
            sha256: String::new(),
            plan,
        };
        let (mut source, mut load) = crate::session::links::sim_profiles();
        source.ranges.current_max_a = Some(60.0);
        load.ranges.current_max_a = Some(60.0);
        let e = check_ranges(&p, &source, &load).unwrap_err().to_string();
        assert!(
            e.contains("p.toml:9:1: pulse current -100.000 A is beyond the load's range (60 A)"),
            "{e}"
        );
        assert!(
            e.contains("pulse current 80.000 A is beyond the source's range (60 A)"),
            "{e}"
        );
        assert!(
            e.contains(
                "p.toml:12:1: drain current limit 90.000 A is beyond the source's range (60 A)"
            ),
            "{e}"
        );
        load.ranges.current_max_a = Some(100.0);
        source.ranges.current_max_a = Some(100.0);
        assert!(check_ranges(&p, &source, &load).is_ok());
    }
}
