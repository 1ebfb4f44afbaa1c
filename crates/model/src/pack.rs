//! The pack under test: its id (a safe folder name), its chemistry, series
//! count and ratings. A spec comes from the command line or a TOML file and
//! is saved as `results/<pack>/pack.toml` on the pack's first test.

use crate::location::{toml_error, InputErrors, LocatedError, Location};
use crate::units;
use serde::{Deserialize, Serialize};
use std::fmt;
use std::path::Path;
use std::str::FromStr;
use toml::Spanned;

/// Cell chemistry families the bench knows defaults for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Chemistry {
    /// Lithium-ion with a layered oxide cathode (NMC-class), 4.2 V/cell full.
    LiIon,
    /// Lithium iron phosphate, 3.65 V/cell full.
    Lfp,
    /// Lead-acid (flooded or valve-regulated).
    LeadAcid,
    /// Nickel-metal hydride.
    Nimh,
}

impl Chemistry {
    pub const ALL: [Chemistry; 4] = [
        Chemistry::LiIon,
        Chemistry::Lfp,
        Chemistry::LeadAcid,
        Chemistry::Nimh,
    ];

    pub fn name(&self) -> &'static str {
        match self {
            Chemistry::LiIon => "li-ion",
            Chemistry::Lfp => "lfp",
            Chemistry::LeadAcid => "lead-acid",
            Chemistry::Nimh => "nimh",
        }
    }

    /// The rate a capacity is rated at when the spec gives none, C-rate:
    /// 0.2 It for Li-ion, LFP and NiMH (IEC 61960-3 / IEC 61951-2 scheme),
    /// the 20-h rate for lead-acid (US practice; standards fact sheet §2, §4e).
    pub fn default_rated_rate_c(&self) -> f64 {
        match self {
            Chemistry::LeadAcid => 0.05,
            _ => 0.2,
        }
    }

    /// Nominal cell voltage (common practice): used for rated energy when
    /// none is given.
    pub fn nominal_cell_voltage(&self) -> f64 {
        match self {
            Chemistry::LiIon => 3.6,
            Chemistry::Lfp => 3.2,
            Chemistry::LeadAcid => 2.0,
            Chemistry::Nimh => 1.2,
        }
    }

    /// Default charge cap as a multiple of rated capacity, applied when a
    /// procedure's envelope sets none. Common practice: lithium takes back
    /// little more than it gave; NiMH's standard charge puts in 160 %
    /// (0.1 It × 16 h, IEC 61951-2); lead-acid needs about 110–120 %.
    pub fn default_charge_cap(&self) -> f64 {
        match self {
            Chemistry::LiIon | Chemistry::Lfp => 1.3,
            Chemistry::LeadAcid => 1.5,
            Chemistry::Nimh => 1.7,
        }
    }

    /// The usual minimum and maximum operating voltage per cell, V, for
    /// the pulse power capability when the maker's are not given (common
    /// practice: li-ion 3.0–4.2 V, LFP 2.5–3.65 V, lead-acid 1.75–2.45 V,
    /// NiMH 1.0–1.5 V).
    pub fn operating_limits_v_per_cell(&self) -> (f64, f64) {
        match self {
            Chemistry::LiIon => (3.0, 4.2),
            Chemistry::Lfp => (2.5, 3.65),
            Chemistry::LeadAcid => (1.75, 2.45),
            Chemistry::Nimh => (1.0, 1.5),
        }
    }

    /// The highest per-cell voltage an envelope may allow: above any charge
    /// voltage the chemistry is charged to, short of a plain mistake
    /// (common practice: li-ion is charged to 4.2–4.4 V, LFP to 3.6–3.65 V,
    /// lead-acid equalised to about 2.5 V, NiMH peaks near 1.5–1.6 V).
    pub fn envelope_ceiling_v_per_cell(&self) -> f64 {
        match self {
            Chemistry::LiIon => 4.5,
            Chemistry::Lfp => 4.0,
            Chemistry::LeadAcid => 2.75,
            Chemistry::Nimh => 2.0,
        }
    }
}

impl fmt::Display for Chemistry {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.pad(self.name())
    }
}

impl FromStr for Chemistry {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s.trim().to_ascii_lowercase().as_str() {
            "li-ion" | "liion" | "nmc" | "lithium-ion" => Ok(Chemistry::LiIon),
            "lfp" | "lifepo4" => Ok(Chemistry::Lfp),
            "lead-acid" | "leadacid" | "pb" | "agm" | "vrla" | "flooded" => Ok(Chemistry::LeadAcid),
            "nimh" => Ok(Chemistry::Nimh),
            other => Err(format!(
                "unknown chemistry '{other}'; expected one of li-ion, lfp, lead-acid, nimh"
            )),
        }
    }
}

/// A validated pack spec, all values in SI units.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PackSpec {
    pub chemistry: Chemistry,
    pub series: u32,
    pub rated_capacity_ah: f64,
    pub rated_energy_wh: Option<f64>,
    /// The rated discharge rate as a C-rate (e.g. 0.2 for the 5-hour rate).
    pub rated_rate_c: Option<f64>,
    /// The maker's DC resistance of the new pack, mΩ (for grading
    /// resistance growth when the pack's first test is not a new pack).
    pub rated_resistance_mohm: Option<f64>,
}

impl PackSpec {
    /// Rated energy: the given one, or rated Ah × nominal voltage.
    pub fn rated_energy_or_nominal(&self) -> f64 {
        self.rated_energy_wh.unwrap_or(
            self.rated_capacity_ah * self.chemistry.nominal_cell_voltage() * f64::from(self.series),
        )
    }

    /// Check ranges (used for CLI-given specs and files alike).
    pub fn check(&self) -> Result<(), String> {
        if self.series == 0 || self.series > 1000 {
            return Err(format!(
                "series must be between 1 and 1000 cells, got {}",
                self.series
            ));
        }
        if !(self.rated_capacity_ah.is_finite()
            && self.rated_capacity_ah > 0.0
            && self.rated_capacity_ah <= 100_000.0)
        {
            return Err(format!(
                "rated capacity must be above 0 Ah and at most 100000 Ah, got {} Ah",
                self.rated_capacity_ah
            ));
        }
        if let Some(e) = self.rated_energy_wh {
            if !(e.is_finite() && e > 0.0) {
                return Err(format!("rated energy must be above 0 Wh, got {e} Wh"));
            }
        }
        if let Some(r) = self.rated_resistance_mohm {
            if !(r.is_finite() && r > 0.0) {
                return Err(format!(
                    "rated resistance must be above 0 mohm, got {r} mohm"
                ));
            }
        }
        if let Some(c) = self.rated_rate_c {
            if !(c.is_finite() && c > 0.0 && c <= 100.0) {
                return Err(format!(
                    "rated rate must be above 0C and at most 100C, got {c}C"
                ));
            }
        }
        Ok(())
    }

    /// The TOML text saved as `pack.toml`.
    pub fn to_toml(&self) -> String {
        let mut s = String::from("# Pack spec, written by packbench on the pack's first test.\n");
        s.push_str(&format!("chemistry = \"{}\"\n", self.chemistry));
        s.push_str(&format!("series = {}\n", self.series));
        s.push_str(&format!(
            "rated_capacity = \"{}Ah\"\n",
            self.rated_capacity_ah
        ));
        if let Some(e) = self.rated_energy_wh {
            s.push_str(&format!("rated_energy = \"{e}Wh\"\n"));
        }
        if let Some(c) = self.rated_rate_c {
            s.push_str(&format!("rated_rate = \"{c}C\"\n"));
        }
        if let Some(r) = self.rated_resistance_mohm {
            s.push_str(&format!("rated_resistance = \"{r}mohm\"\n"));
        }
        s
    }

    /// Parse a pack spec file; errors carry file:line:column.
    pub fn from_toml(file: &Path, text: &str) -> Result<PackSpec, InputErrors> {
        #[derive(Deserialize)]
        #[serde(deny_unknown_fields)]
        struct Raw {
            chemistry: Spanned<String>,
            series: Spanned<i64>,
            rated_capacity: Spanned<String>,
            rated_energy: Option<Spanned<String>>,
            rated_rate: Option<Spanned<String>>,
            rated_resistance: Option<Spanned<String>>,
        }
        let raw: Raw =
            toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
        let mut errors = Vec::new();
        let at = |s: &std::ops::Range<usize>, message: String| LocatedError {
            location: Location::of_span(file, text, s),
            message,
        };
        let chemistry = raw
            .chemistry
            .get_ref()
            .parse::<Chemistry>()
            .map_err(|m| errors.push(at(&raw.chemistry.span(), m)))
            .ok();
        let series = match u32::try_from(*raw.series.get_ref()) {
            Ok(n) if n >= 1 => Some(n),
            _ => {
                errors.push(at(
                    &raw.series.span(),
                    format!(
                        "series must be a whole number of cells >= 1, got {}",
                        raw.series.get_ref()
                    ),
                ));
                None
            }
        };
        let rated = units::capacity_ah(raw.rated_capacity.get_ref())
            .map_err(|e| errors.push(at(&raw.rated_capacity.span(), e.to_string())))
            .ok();
        let energy = match &raw.rated_energy {
            Some(s) => units::energy_wh(s.get_ref())
                .map_err(|e| errors.push(at(&s.span(), e.to_string())))
                .ok(),
            None => None,
        };
        let rate = match &raw.rated_rate {
            Some(s) => parse_rate(s.get_ref())
                .map_err(|e| errors.push(at(&s.span(), e)))
                .ok(),
            None => None,
        };
        let resistance = match &raw.rated_resistance {
            Some(s) => units::resistance_ohm(s.get_ref())
                .map(|r| r * 1000.0)
                .map_err(|e| errors.push(at(&s.span(), e.to_string())))
                .ok(),
            None => None,
        };
        if !errors.is_empty() {
            return Err(InputErrors(errors));
        }
        let (Some(chemistry), Some(series), Some(rated)) = (chemistry, series, rated) else {
            return Err(InputErrors(errors));
        };
        let spec = PackSpec {
            chemistry,
            series,
            rated_capacity_ah: rated,
            rated_energy_wh: energy,
            rated_rate_c: rate,
            rated_resistance_mohm: resistance,
        };
        spec.check().map_err(|m| {
            InputErrors(vec![LocatedError {
                location: Location::at(file, text, 0),
                message: m,
            }])
        })?;
        Ok(spec)
    }
}

/// A rated rate as a C-rate (`0.2C`) or an hour rate (`5h`, `20h`).
pub fn parse_rate(text: &str) -> Result<f64, String> {
    match units::parse(text).map_err(|e| e.to_string())? {
        units::Quantity::CRate(c) => Ok(c),
        units::Quantity::Seconds(s) if s > 0.0 => Ok(3600.0 / s),
        q => Err(format!(
            "'{text}' is {}, but a rate (0.2C, or an hour rate such as 5h) was expected",
            q.kind_name()
        )),
    }
}

/// Why a pack id was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("pack id '{id}' is not allowed: {why} (use letters, digits, '-', '_' and '.', at most 64 characters, not '.' or '..')")]
pub struct PackIdError {
    pub id: String,
    pub why: &'static str,
}

/// Check that a pack id is a safe folder name: letters, digits, `-`, `_`,
/// `.`; no path separators, not `.` or `..`, at most 64 characters.
pub fn check_pack_id(id: &str) -> Result<(), PackIdError> {
    let err = |why| {
        Err(PackIdError {
            id: id.to_string(),
            why,
        })
    };
    if id.is_empty() {
        return err("it is empty");
    }
    if id.len() > 64 {
        return err("it is longer than 64 characters");
    }
    if id == "." || id == ".." {
        return err("it names the current or parent folder");
    }
    if id.starts_with('.') {
        return err("it starts with '.'");
    }
    if !id
        .chars()
        .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'))
    {
        return err("it contains a character other than letters, digits, '-', '_' or '.'");
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pack_ids() {
        assert!(check_pack_id("DEMO-01").is_ok());
        assert!(check_pack_id("fleet_7.b").is_ok());
        for bad in ["", ".", "..", "../x", "a/b", "a\\b", ".hidden", "a b", "é"] {
            assert!(check_pack_id(bad).is_err(), "{bad} accepted");
        }
    }

    #[test]
    fn spec_round_trips_through_toml() {
        let spec = PackSpec {
            chemistry: Chemistry::Lfp,
            series: 4,
            rated_capacity_ah: 100.0,
            rated_energy_wh: Some(1280.0),
            rated_rate_c: Some(0.2),
            rated_resistance_mohm: Some(12.5),
        };
        let back = PackSpec::from_toml(Path::new("p.toml"), &spec.to_toml()).unwrap();
        assert_eq!(back, spec);
    }

    #[test]
    fn spec_errors_are_located() {
        let text = "chemistry = \"li-ion\"\nseries = 10\nrated_capacity = \"14V\"\n";
        let e = PackSpec::from_toml(Path::new("p.toml"), text).unwrap_err();
        let msg = e.to_string();
        assert!(msg.starts_with("p.toml:3:18"), "{msg}");
        let e = PackSpec::from_toml(Path::new("p.toml"), "chemistry = \"li-ion\"\nseriess = 1\n")
            .unwrap_err();
        assert!(e.to_string().contains("p.toml:2:1"), "{e}");
    }

    #[test]
    fn hour_rates() {
        assert!((parse_rate("20h").unwrap() - 0.05).abs() < 1e-12);
        assert!((parse_rate("0.2C").unwrap() - 0.2).abs() < 1e-12);
        assert!(parse_rate("2A").is_err());
    }
}
