//! Pure envelope checks, run on every sample of every step.

use model::procedure::Envelope;
use model::sample::Sample;

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

    fn env() -> Envelope {
        Envelope {
            voltage_max_v: 42.5,
            voltage_min_v: 25.0,
            current_max_a: 14.0,
            temperature_max_c: 55.0,
            temperature_min_c: Some(0.0),
            charge_max_ah: 18.2,
            step_time_max_s: 36_000.0,
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
