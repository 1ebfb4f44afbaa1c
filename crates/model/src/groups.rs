//! Cell groups: the parallel groups of a series pack, each read on its own
//! channel of a scanning voltmeter, and the extra temperature inputs.
//!
//! A series pack is only as good as its weakest parallel group: cells in
//! parallel balance each other, groups in series do not (common
//! practice). One group is one cell in the series count, so a group's
//! voltage is a per-cell voltage and the envelope's per-cell limits apply
//! to it directly.

use serde::{Deserialize, Serialize};

/// How the voltage channels are wired.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum Wiring {
    /// Each channel reads one group across its own two sense leads.
    #[default]
    Direct,
    /// Channel n reads tap n against the pack's negative terminal; group n
    /// is tap n minus tap n−1 (tap 0 is the negative terminal, 0 V).
    Taps,
}

impl Wiring {
    pub fn name(self) -> &'static str {
        match self {
            Wiring::Direct => "direct",
            Wiring::Taps => "taps",
        }
    }
}

/// A temperature input: its channel, a name, where it sits, the group it
/// sits on (if any) and its own upper limit (else the envelope's).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TemperatureChannel {
    pub channel: u32,
    pub name: String,
    pub place: String,
    #[serde(default)]
    pub group: Option<u32>,
    #[serde(default)]
    pub max_c: Option<f64>,
}

/// The scanner's channels of one station: one voltage channel per group
/// (group 1 first), then the temperature inputs.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GroupChannels {
    pub wiring: Wiring,
    pub voltage: Vec<u32>,
    #[serde(default)]
    pub temperatures: Vec<TemperatureChannel>,
}

impl GroupChannels {
    pub fn groups(&self) -> usize {
        self.voltage.len()
    }

    /// The sim's own wiring for `n` groups: voltage channels 101…, the
    /// surface sensors the sim config places on groups at 201…, the busbar
    /// at 250 and ambient at 251.
    pub fn sim_default(n: u32, wiring: Wiring, sensor_groups: &[u32]) -> GroupChannels {
        let mut temperatures: Vec<TemperatureChannel> = sensor_groups
            .iter()
            .map(|&g| TemperatureChannel {
                channel: SIM_SURFACE_BASE + g,
                name: format!("group {g} surface"),
                place: format!("on group {g}"),
                group: Some(g),
                max_c: None,
            })
            .collect();
        temperatures.push(TemperatureChannel {
            channel: SIM_BUSBAR_CHANNEL,
            name: "busbar".into(),
            place: "negative busbar".into(),
            group: None,
            max_c: None,
        });
        temperatures.push(TemperatureChannel {
            channel: SIM_AMBIENT_CHANNEL,
            name: "ambient".into(),
            place: "air beside the pack".into(),
            group: None,
            max_c: None,
        });
        GroupChannels {
            wiring,
            voltage: (1..=n).map(|g| SIM_VOLTAGE_BASE + g).collect(),
            temperatures,
        }
    }

    /// The temperature input on a group, if one is.
    pub fn sensor_on(&self, group: u32) -> Option<usize> {
        self.temperatures
            .iter()
            .position(|t| t.group == Some(group))
    }
}

/// How a charge step's end on a group is worded: the group that reached
/// the step's per-cell voltage first is full, and so is the pack as far
/// as its highest group allows (a series string cannot be charged further
/// without taking that group past its limit).
pub fn group_full_reason(group: u32, volts: f64, per_cell_v: f64, inferred: bool) -> String {
    format!(
        "group {group} full at {volts:.3} V{}, past the charge's {per_cell_v:.3} V/cell",
        if inferred {
            " (read from the pack voltage less the others)"
        } else {
            ""
        }
    )
}

/// The simulated scanner's channel numbers: group g's voltage (or tap g)
/// on 100 + g, a surface sensor on group g on 200 + g.
pub const SIM_VOLTAGE_BASE: u32 = 100;
pub const SIM_SURFACE_BASE: u32 = 200;
pub const SIM_BUSBAR_CHANNEL: u32 = 250;
pub const SIM_AMBIENT_CHANNEL: u32 = 251;

/// Group voltages from tap voltages: group n = tap n − tap n−1, with tap 0
/// the pack's negative terminal at 0 V.
pub fn group_voltages_from_taps(taps: &[f64]) -> Vec<f64> {
    let mut prev = 0.0;
    taps.iter()
        .map(|&t| {
            let g = t - prev;
            prev = t;
            g
        })
        .collect()
}

/// A SCPI channel list, runs of consecutive channels written as ranges:
/// `(@101:113,201,250:251)`.
pub fn channel_list(channels: &[u32]) -> String {
    let mut parts: Vec<String> = Vec::new();
    let mut i = 0;
    while i < channels.len() {
        let start = channels[i];
        let mut end = start;
        while i + 1 < channels.len() && channels[i + 1] == end + 1 {
            i += 1;
            end = channels[i];
        }
        parts.push(if end > start {
            format!("{start}:{end}")
        } else {
            start.to_string()
        });
        i += 1;
    }
    format!("(@{})", parts.join(","))
}

/// Parse a SCPI channel list such as `(@101:104,110)` or `101:104,110`
/// into its channels, in order.
pub fn parse_channel_list(text: &str) -> Result<Vec<u32>, String> {
    let t = text.trim();
    let t = t.strip_prefix("(@").unwrap_or(t);
    let t = t.strip_suffix(')').unwrap_or(t);
    let num = |s: &str| {
        s.trim()
            .parse::<u32>()
            .map_err(|_| format!("'{}' is not a channel number", s.trim()))
    };
    let mut out = Vec::new();
    for part in t.split(',').filter(|p| !p.trim().is_empty()) {
        match part.split_once(':') {
            Some((a, b)) => {
                let (a, b) = (num(a)?, num(b)?);
                if b < a || b - a > 999 {
                    return Err(format!("channel range {a}:{b} is not ascending"));
                }
                out.extend(a..=b);
            }
            None => out.push(num(part)?),
        }
    }
    if out.is_empty() {
        return Err("the channel list is empty".into());
    }
    Ok(out)
}

/// How a group's voltage in a sample was obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum GroupSource {
    /// Read on its channel.
    Read,
    /// Its channel is judged faulty: the pack voltage less the other
    /// groups.
    Inferred,
}

/// One row of the group log, on the same grid as the pack's samples.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GroupSample {
    pub t_s: f64,
    pub step: u32,
    pub cycle: u32,
    /// Each group's voltage as used for its limits (group 1 first).
    pub voltage_v: Vec<f64>,
    /// Each temperature input, in the order of the station's channels.
    pub temperature_c: Vec<Option<f64>>,
    /// The group whose voltage was inferred, if one was.
    pub inferred: Option<u32>,
}

impl GroupSample {
    /// The lowest and highest group: (group number, volts).
    pub fn extremes(&self) -> Option<((u32, f64), (u32, f64))> {
        let mut lo: Option<(u32, f64)> = None;
        let mut hi: Option<(u32, f64)> = None;
        for (i, &v) in self.voltage_v.iter().enumerate() {
            if !v.is_finite() {
                continue;
            }
            let g = i as u32 + 1;
            if lo.is_none_or(|(_, x)| v < x) {
                lo = Some((g, v));
            }
            if hi.is_none_or(|(_, x)| v > x) {
                hi = Some((g, v));
            }
        }
        Some((lo?, hi?))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Tap differences against a hand calculation (a worked example of
    /// our own): taps at 4.012, 8.031, 11.998 and 16.020 V above the
    /// negative terminal give groups of 4.012, 4.019, 3.967 and 4.022 V
    /// (8.031 − 4.012 = 4.019; 11.998 − 8.031 = 3.967; 16.020 − 11.998 =
    /// 4.022), and the groups add up to the top tap.
    #[test]
    fn tap_differences_match_the_hand_calculation() {
        let g = group_voltages_from_taps(&[4.012, 8.031, 11.998, 16.020]);
        let want = [4.012, 4.019, 3.967, 4.022];
        for (a, b) in g.iter().zip(want) {
            assert!((a - b).abs() < 1e-12, "{g:?}");
        }
        assert!((g.iter().sum::<f64>() - 16.020).abs() < 1e-12);
    }

    #[test]
    fn channel_lists_round_trip() {
        let chs = [101, 102, 103, 104, 110, 201, 250, 251];
        let s = channel_list(&chs);
        assert_eq!(s, "(@101:104,110,201,250:251)");
        assert_eq!(parse_channel_list(&s).unwrap(), chs);
        assert!(parse_channel_list("(@104:101)").is_err());
        assert!(parse_channel_list("(@a)").is_err());
        assert!(parse_channel_list("(@)").is_err());
    }

    #[test]
    fn extremes_name_the_groups() {
        let s = GroupSample {
            t_s: 0.0,
            step: 1,
            cycle: 1,
            voltage_v: vec![3.61, 3.40, 3.66, f64::NAN],
            temperature_c: vec![],
            inferred: None,
        };
        assert_eq!(s.extremes(), Some(((2, 3.40), (3, 3.66))));
    }
}
