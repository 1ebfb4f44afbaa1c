//! Arguments shared by several commands and their parsing.

use crate::session::error::RunError;
use crate::session::request::Speed;
use chrono::NaiveDate;
use clap::Args;
use model::pack::{parse_rate, PackSpec};
use model::simconfig::SimConfig;
use model::units;
use std::path::PathBuf;

/// The pack under test, given on the command line or as a file.
#[derive(Debug, Clone, Args)]
pub struct PackArgs {
    /// Chemistry: li-ion, lfp, lead-acid or nimh.
    #[arg(long)]
    pub chemistry: Option<String>,
    /// Cells in series.
    #[arg(long)]
    pub series: Option<String>,
    /// Rated capacity, e.g. 14Ah or 2800mAh.
    #[arg(long)]
    pub rated: Option<String>,
    /// Rated energy, e.g. 504Wh.
    #[arg(long)]
    pub rated_energy: Option<String>,
    /// Rated discharge rate, e.g. 0.2C or 20h.
    #[arg(long)]
    pub rated_rate: Option<String>,
    /// The maker's DC resistance of the new pack, e.g. 60mohm.
    #[arg(long)]
    pub rated_resistance: Option<String>,
    /// A pack spec TOML file instead of the options above.
    #[arg(long, conflicts_with_all = ["chemistry", "series", "rated", "rated_energy", "rated_rate", "rated_resistance"])]
    pub pack_spec: Option<PathBuf>,
}

/// Build a pack spec from the options, if any were given.
pub fn pack_from_args(a: &PackArgs) -> Result<Option<PackSpec>, RunError> {
    if let Some(path) = &a.pack_spec {
        return crate::session::prepare::read_pack_file(path).map(Some);
    }
    if a.chemistry.is_none() && a.series.is_none() && a.rated.is_none() {
        if a.rated_energy.is_some() || a.rated_rate.is_some() || a.rated_resistance.is_some() {
            return Err(RunError::arguments("--rated-energy, --rated-rate and --rated-resistance need --chemistry, --series and --rated"));
        }
        return Ok(None);
    }
    // The three words as the console's form reads them: the same
    // refusals, named by the option.
    let base = crate::session::fields::pack_spec(
        a.chemistry.as_deref(),
        a.series.as_deref(),
        a.rated.as_deref(),
    )
    .map_err(|e| RunError::arguments(format!("{}: {}", e.field.option(), e.message)))?;
    let Some(base) = base else {
        return Ok(None);
    };
    let energy = a
        .rated_energy
        .as_deref()
        .map(units::energy_wh)
        .transpose()
        .map_err(|e| RunError::arguments(format!("--rated-energy: {e}")))?;
    let rate = a
        .rated_rate
        .as_deref()
        .map(parse_rate)
        .transpose()
        .map_err(|e| RunError::arguments(format!("--rated-rate: {e}")))?;
    let resistance = a
        .rated_resistance
        .as_deref()
        .map(units::resistance_ohm)
        .transpose()
        .map_err(|e| RunError::arguments(format!("--rated-resistance: {e}")))?
        .map(|r| r * 1000.0);
    let spec = PackSpec {
        rated_resistance_mohm: resistance,
        rated_energy_wh: energy,
        rated_rate_c: rate,
        ..base
    };
    spec.check().map_err(RunError::arguments)?;
    Ok(Some(spec))
}

/// The simulated bench's settings from `--sim-config`, `--sim-ideal` and
/// `--fault` options.
pub fn sim_config(
    path: Option<&std::path::Path>,
    ideal: bool,
    faults: &[String],
) -> Result<SimConfig, RunError> {
    let mut cfg = match path {
        Some(path) => {
            let text = model::procedure::read_text(path)
                .map_err(crate::session::error::input_file_err(path))?;
            SimConfig::from_toml(path, &text)?
        }
        None => SimConfig::default(),
    };
    if ideal {
        cfg.ideal = true;
    }
    for f in faults {
        cfg.faults
            .link
            .push(f.parse().map_err(RunError::arguments)?);
    }
    Ok(cfg)
}

pub fn parse_speed(s: &str) -> Result<Speed, RunError> {
    if s.eq_ignore_ascii_case("max") {
        return Ok(Speed::Max);
    }
    match s.parse::<f64>() {
        Ok(f) if f.is_finite() && f > 0.0 && f <= 1e6 => Ok(Speed::Factor(f)),
        _ => Err(RunError::arguments(format!(
            "--speed '{s}': expected max or a number of bench seconds per second (1 = real time)"
        ))),
    }
}

/// How the live status is shown: nothing when quiet, redrawn on a
/// terminal, else a line every `status_every`.
pub fn display_mode(
    quiet: bool,
    status_every: &str,
) -> Result<crate::session::live::DisplayMode, RunError> {
    use std::io::IsTerminal;
    if quiet {
        return Ok(crate::session::live::DisplayMode::Quiet);
    }
    if std::io::stderr().is_terminal() {
        return Ok(crate::session::live::DisplayMode::Terminal);
    }
    match units::duration(status_every) {
        Ok(s) if s >= 0.1 => Ok(crate::session::live::DisplayMode::Lines(s)),
        _ => Err(RunError::arguments(format!(
            "--status-every '{status_every}': expected a duration of 0.1 s or more, e.g. 60s"
        ))),
    }
}

/// What the pack's battery management system reported, to compare with
/// the measurement (a BMS recalibration).
#[derive(Debug, Clone, Default, Args)]
pub struct BmsArgs {
    /// The BMS's learnt full-charge capacity, e.g. 10.4Ah.
    #[arg(long)]
    pub bms_capacity: Option<String>,
    /// The BMS's design capacity, e.g. 11Ah.
    #[arg(long)]
    pub bms_design_capacity: Option<String>,
    /// The BMS's cycle count.
    #[arg(long)]
    pub bms_cycles: Option<f64>,
    /// The BMS's state of charge when the test started, e.g. 62%.
    #[arg(long)]
    pub bms_soc_start: Option<String>,
    /// The BMS's state of charge when the test ended, e.g. 55%.
    #[arg(long)]
    pub bms_soc_end: Option<String>,
}

/// The BMS's figures from the options, checked; `None` when none given.
pub fn bms_from_args(a: &BmsArgs) -> Result<Option<model::bms::BmsReadings>, RunError> {
    let cap = |name: &str, v: &Option<String>| {
        v.as_deref()
            .map(|t| units::capacity_ah(t).map_err(|e| RunError::arguments(format!("{name}: {e}"))))
            .transpose()
    };
    let soc = |name: &str, v: &Option<String>| {
        v.as_deref()
            .map(|t| match units::parse(t) {
                Ok(units::Quantity::Percent(p)) => Ok(p),
                _ => Err(RunError::arguments(format!(
                    "{name} '{t}': expected a state of charge such as 62%"
                ))),
            })
            .transpose()
    };
    let b = model::bms::BmsReadings {
        full_charge_capacity_ah: cap("--bms-capacity", &a.bms_capacity)?,
        design_capacity_ah: cap("--bms-design-capacity", &a.bms_design_capacity)?,
        cycle_count: a.bms_cycles,
        soc_start_pct: soc("--bms-soc-start", &a.bms_soc_start)?,
        soc_end_pct: soc("--bms-soc-end", &a.bms_soc_end)?,
    };
    b.check().map_err(RunError::arguments)?;
    Ok((!b.is_empty()).then_some(b))
}

pub fn parse_date(s: &str) -> Result<NaiveDate, RunError> {
    NaiveDate::parse_from_str(s.trim(), "%Y-%m-%d")
        .map_err(|_| RunError::arguments(format!("'{s}' is not a date; expected YYYY-MM-DD")))
}

pub fn parse_threshold(s: &str) -> Result<f64, RunError> {
    match units::parse(s) {
        Ok(units::Quantity::Percent(p)) if p > 0.0 && p < 100.0 => Ok(p),
        _ => Err(RunError::arguments(format!(
            "threshold '{s}': expected a percentage such as 80%"
        ))),
    }
}

/// A test interval in whole days: `92d`, `13w` (weeks), or any duration of
/// at least a day (`2160h`).
pub fn interval_days(text: &str) -> Option<i64> {
    let t = text.trim();
    let weeks = ["weeks", "week", "wk", "w"]
        .iter()
        .find_map(|u| t.strip_suffix(u))
        .and_then(|n| n.trim().parse::<f64>().ok());
    let seconds = match weeks {
        Some(w) => w * 7.0 * 86_400.0,
        None => match units::parse(t) {
            Ok(units::Quantity::Seconds(s)) => s,
            _ => return None,
        },
    };
    (seconds.is_finite() && seconds >= 86_400.0).then(|| (seconds / 86_400.0).round() as i64)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn test_intervals_in_days_or_weeks() {
        assert_eq!(interval_days("92d"), Some(92));
        assert_eq!(interval_days("13w"), Some(91));
        assert_eq!(interval_days("13 weeks"), Some(91));
        assert_eq!(interval_days("2160h"), Some(90));
        assert_eq!(interval_days("12h"), None);
        assert_eq!(interval_days("13W"), None, "watts are no interval");
        assert_eq!(interval_days("soon"), None);
    }
}
