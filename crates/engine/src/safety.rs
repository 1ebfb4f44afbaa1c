//! Pure envelope checks, run on every sample of every step.

use model::procedure::Envelope;
use model::sample::Sample;

/// The instruments' own protection levels, from the envelope: a little
/// outside its limits, so the software envelope acts first and the
/// instrument only when the controller is gone.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BackstopLevels {
    /// The supply's over-voltage protection, V.
    pub over_voltage_v: f64,
    /// The load's under-voltage switch-off, V.
    pub under_voltage_v: f64,
    /// Both instruments' over-current protection, A.
    pub over_current_a: f64,
    /// The load's voltage-on threshold: it sinks nothing from a pack
    /// already below the switch-off, V.
    pub voltage_on_v: f64,
}

/// Margin of the voltage protections outside the envelope: 1 % of the
/// limit, at least 50 mV (common practice: close enough to catch a
/// runaway charge or a deep discharge, far enough that a reading's noise
/// and the leads' drop do not trip it in a normal run).
pub const BACKSTOP_VOLTAGE_MARGIN: f64 = 0.01;
pub const BACKSTOP_VOLTAGE_MARGIN_MIN_V: f64 = 0.05;
/// Margin of the over-current protection: 5 %, at least 10 mA (common
/// practice).
pub const BACKSTOP_CURRENT_MARGIN: f64 = 0.05;
pub const BACKSTOP_CURRENT_MARGIN_MIN_A: f64 = 0.01;

/// The backstop levels of an envelope.
pub fn backstop(env: &Envelope) -> BackstopLevels {
    let dv = |v: f64| (v * BACKSTOP_VOLTAGE_MARGIN).max(BACKSTOP_VOLTAGE_MARGIN_MIN_V);
    let under = (env.voltage_min_v - dv(env.voltage_min_v)).max(0.0);
    BackstopLevels {
        over_voltage_v: env.voltage_max_v + dv(env.voltage_max_v),
        under_voltage_v: under,
        over_current_a: env.current_max_a
            + (env.current_max_a * BACKSTOP_CURRENT_MARGIN).max(BACKSTOP_CURRENT_MARGIN_MIN_A),
        voltage_on_v: under,
    }
}

/// A crossed limit.
#[derive(Debug, Clone, PartialEq)]
pub struct Breach {
    pub limit: &'static str,
    pub value: f64,
    pub threshold: f64,
    pub message: String,
}

/// What the step has done so far, as far as the envelope cares.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct StepSoFar {
    pub elapsed_s: f64,
    pub charge_in_ah: f64,
}

/// Check one sample against the envelope. The first breach found is
/// returned. `temperature_min` applies while charging (charging cold
/// lithium cells plates metal; common practice).
pub fn check(s: &Sample, so_far: &StepSoFar, env: &Envelope) -> Option<Breach> {
    let b = |limit, value: f64, threshold: f64, what: &str| {
        Some(Breach {
            limit,
            value,
            threshold,
            message: format!("{what} ({value:.4} against limit {threshold:.4})"),
        })
    };
    if !s.voltage_v.is_finite() || !s.current_a.is_finite() {
        return b("reading", f64::NAN, 0.0, "a reading is not a finite number");
    }
    if s.voltage_v > env.voltage_max_v {
        return b(
            "voltage_max",
            s.voltage_v,
            env.voltage_max_v,
            "pack voltage above voltage_max",
        );
    }
    if s.voltage_v < env.voltage_min_v {
        return b(
            "voltage_min",
            s.voltage_v,
            env.voltage_min_v,
            "pack voltage below voltage_min",
        );
    }
    if s.current_a.abs() > env.current_max_a {
        return b(
            "current_max",
            s.current_a.abs(),
            env.current_max_a,
            "pack current above current_max",
        );
    }
    if let Some(t) = s.temperature_c {
        if !t.is_finite() {
            return b(
                "temperature",
                f64::NAN,
                env.temperature_max_c,
                "temperature reading is not finite",
            );
        }
        if t > env.temperature_max_c {
            return b(
                "temperature_max",
                t,
                env.temperature_max_c,
                "pack temperature above temperature_max",
            );
        }
        if let Some(tmin) = env.temperature_min_c {
            if s.current_a > 0.0 && t < tmin {
                return b("temperature_min", t, tmin, "charging below temperature_min");
            }
        }
    }
    if so_far.charge_in_ah > env.charge_max_ah {
        return b(
            "charge_max",
            so_far.charge_in_ah,
            env.charge_max_ah,
            "charge into the pack in this step above charge_max",
        );
    }
    if so_far.elapsed_s > env.step_time_max_s {
        return b(
            "step_time_max",
            so_far.elapsed_s,
            env.step_time_max_s,
            "step lasted longer than step_time_max",
        );
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The backstop sits just outside the envelope on every side: the
    /// software limit is always met first.
    #[test]
    fn the_backstop_sits_just_outside_the_envelope() {
        let b = backstop(&env());
        assert!((b.over_voltage_v - 42.925).abs() < 1e-9, "{b:?}");
        assert!((b.under_voltage_v - 24.75).abs() < 1e-9, "{b:?}");
        assert!((b.over_current_a - 14.7).abs() < 1e-9, "{b:?}");
        assert_eq!(b.voltage_on_v, b.under_voltage_v);
        // The 50 mV and 10 mA floors on a one-cell envelope.
        let small = Envelope {
            voltage_max_v: 3.65,
            voltage_min_v: 2.5,
            current_max_a: 0.1,
            ..env()
        };
        let b = backstop(&small);
        assert!((b.over_voltage_v - 3.7).abs() < 1e-9, "{b:?}");
        assert!((b.under_voltage_v - 2.45).abs() < 1e-9, "{b:?}");
        assert!((b.over_current_a - 0.11).abs() < 1e-9, "{b:?}");
    }

    fn env() -> Envelope {
        Envelope {
            voltage_max_v: 42.5,
            voltage_min_v: 25.0,
            current_max_a: 14.0,
            temperature_max_c: 55.0,
            temperature_min_c: Some(0.0),
            charge_max_ah: 18.2,
            step_time_max_s: 36_000.0,
            group_voltage_max_v: None,
            group_voltage_min_v: None,
            temperature_rise_max_k_per_s: None,
        }
    }

    fn s(v: f64, i: f64, t: Option<f64>) -> Sample {
        Sample {
            t_s: 0.0,
            step: 1,
            cycle: 1,
            voltage_v: v,
            current_a: i,
            temperature_c: t,
        }
    }

    #[test]
    fn each_limit_trips_alone() {
        let ok = StepSoFar::default();
        assert_eq!(check(&s(40.0, 2.0, Some(25.0)), &ok, &env()), None);
        let lim = |x: Option<Breach>| x.map(|b| b.limit);
        assert_eq!(
            lim(check(&s(42.6, 2.0, None), &ok, &env())),
            Some("voltage_max")
        );
        assert_eq!(
            lim(check(&s(24.9, -2.0, None), &ok, &env())),
            Some("voltage_min")
        );
        assert_eq!(
            lim(check(&s(40.0, -14.1, None), &ok, &env())),
            Some("current_max")
        );
        assert_eq!(
            lim(check(&s(40.0, 2.0, Some(55.1)), &ok, &env())),
            Some("temperature_max")
        );
        assert_eq!(
            lim(check(&s(40.0, 2.0, Some(-1.0)), &ok, &env())),
            Some("temperature_min")
        );
        // Cold discharge is allowed.
        assert_eq!(lim(check(&s(40.0, -2.0, Some(-1.0)), &ok, &env())), None);
        let much = StepSoFar {
            elapsed_s: 10.0,
            charge_in_ah: 18.3,
        };
        assert_eq!(
            lim(check(&s(40.0, 2.0, None), &much, &env())),
            Some("charge_max")
        );
        let long = StepSoFar {
            elapsed_s: 36_001.0,
            charge_in_ah: 0.0,
        };
        assert_eq!(
            lim(check(&s(40.0, 0.0, None), &long, &env())),
            Some("step_time_max")
        );
        assert_eq!(
            lim(check(&s(f64::NAN, 0.0, None), &ok, &env())),
            Some("reading")
        );
    }
}
