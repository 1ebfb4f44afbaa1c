//! `packbench calibrate`: the station's current readings (charge through
//! the source, discharge through the load) and its voltage reading checked
//! against a reference meter at several points, a line fitted to each, as
//! found and as left judged against the instruments' stated accuracy, and
//! the record kept for the runs that follow (`record::calibration`).
//!
//! The current flows through the pack on the bench: points at zero (both
//! outputs off), 10, 50 and 90 % of the calibration current, discharging
//! then charging; each point settles, then the bench's reading and the
//! reference's are read together several times and averaged. The pack's
//! voltage moves little over the points, so the voltage gets its offset at
//! the pack's voltage only (said in the record). Every point checks the
//! pack's voltage against the limits, and the outputs end off whatever
//! happens.

use crate::session::error::{Failure, RunError};
use analysis::calibration::{conformity, fit, Line, Point};
use chrono::NaiveDate;
use engine::clock::Clock;
use instrument::{Instrument, Load, LoadSetting, Source};
use model::accuracy::{Declared, Spec};
use record::calibration::{CalibrationRecord, Channel, Reference, CHARGE, DISCHARGE, VOLTAGE};
use std::sync::Arc;

/// Shares of the calibration current the points are taken at.
pub const POINTS: [f64; 4] = [0.0, 0.1, 0.5, 0.9];

/// What a calibration is asked to do and record.
#[derive(Debug, Clone)]
pub struct CalibrateRequest {
    pub station: String,
    /// The largest current, A (a point is taken at 90 % of it).
    pub current_a: f64,
    /// The pack's limits while the points run, V.
    pub voltage_min_v: f64,
    pub voltage_max_v: f64,
    /// Readings averaged at each point, and the settling time before them.
    pub readings: usize,
    pub settle_s: f64,
    pub date: NaiveDate,
    pub interval_days: i64,
    pub ambient_c: Option<f64>,
    pub operator: Option<String>,
    pub certificate: Option<String>,
    pub certificate_due: Option<NaiveDate>,
}

/// The instruments a calibration drives and reads, with what each states.
pub struct CalBench {
    pub source: Source,
    pub load: Load,
    pub reference: Instrument,
    pub clock: Arc<dyn Clock>,
    pub source_accuracy: (Declared, Option<f64>, Option<f64>),
    pub load_accuracy: (Declared, Option<f64>, Option<f64>),
    pub reference_accuracy: Declared,
}

fn failed(what: String) -> RunError {
    RunError::from(Failure::Calibration(what))
}

/// One point: the bench's reading (pack sign) and the reference's, read
/// together `n` times.
async fn point(
    b: &mut CalBench,
    charge: bool,
    req: &CalibrateRequest,
) -> Result<(Point, Point), RunError> {
    let t0 = b.clock.now();
    b.clock.sleep_until(t0 + req.settle_s).await;
    let (mut di, mut dv) = (Vec::new(), Vec::new());
    for _ in 0..req.readings.max(2) {
        let r = if charge {
            b.source.measure().await
        } else {
            b.load.measure().await
        }
        .map_err(|e| failed(e.to_string()))?;
        let ri = b
            .reference
            .measure_current()
            .await
            .map_err(|e| failed(format!("reference: {e}")))?;
        let rv = b
            .reference
            .measure_voltage()
            .await
            .map_err(|e| failed(format!("reference: {e}")))?;
        if rv < req.voltage_min_v || rv > req.voltage_max_v {
            return Err(failed(format!(
                "the pack reads {rv:.3} V, outside {:.3}–{:.3} V: calibration stopped",
                req.voltage_min_v, req.voltage_max_v
            )));
        }
        di.push((ri, r.current_a));
        dv.push((rv, r.voltage_v));
        let t = b.clock.now();
        b.clock.sleep_until(t + 0.1).await;
    }
    Ok((mean_point(&di), mean_point(&dv)))
}

fn mean_point(xs: &[(f64, f64)]) -> Point {
    let n = xs.len() as f64;
    let r = xs.iter().map(|x| x.0).sum::<f64>() / n;
    let y = xs.iter().map(|x| x.1).sum::<f64>() / n;
    let d: Vec<f64> = xs.iter().map(|x| x.1 - x.0).collect();
    let md = d.iter().sum::<f64>() / n;
    let s = if xs.len() > 1 {
        (d.iter().map(|x| (x - md).powi(2)).sum::<f64>() / (n - 1.0)).sqrt()
    } else {
        0.0
    };
    Point {
        reference: r,
        reading: y,
        s,
        n: xs.len(),
    }
}

/// Run the points of one direction; the outputs are off at its end.
async fn sweep(
    b: &mut CalBench,
    charge: bool,
    req: &CalibrateRequest,
) -> Result<(Vec<Point>, Vec<Point>), RunError> {
    let mut pi = Vec::new();
    let mut pv = Vec::new();
    for f in POINTS {
        let i = f * req.current_a;
        let set = if f == 0.0 {
            Ok(())
        } else if charge {
            match b.source.program(req.voltage_max_v, i).await {
                Ok(()) => b.source.0.enable().await,
                Err(e) => Err(e),
            }
        } else {
            match b.load.program(LoadSetting::Current(i)).await {
                Ok(()) => b.load.0.enable().await,
                Err(e) => Err(e),
            }
        };
        set.map_err(|e| failed(e.to_string()))?;
        let (ci, cv) = point(b, charge, req).await?;
        pi.push(ci);
        if f > 0.0 && !charge {
            pv.push(cv);
        }
    }
    let off = if charge {
        b.source.0.disable().await
    } else {
        b.load.0.disable().await
    };
    off.map_err(|e| failed(e.to_string()))?;
    Ok((pi, pv))
}

/// The reference's standard uncertainty at a value (its stated limit as a
/// rectangle).
fn u_of(spec: Option<Spec>) -> impl Fn(f64) -> f64 {
    move |x| spec.map_or(0.0, |s| s.limit_at(x) / 3f64.sqrt())
}

fn channel(
    quantity: &str,
    instrument: &str,
    unit: &str,
    points: Vec<Point>,
    acceptance: Spec,
    u_ref: &dyn Fn(f64) -> f64,
) -> Result<Channel, RunError> {
    let line = fit(&points, u_ref).map_err(|e| failed(format!("{quantity}: {e}")))?;
    Ok(Channel {
        quantity: quantity.into(),
        instrument: instrument.into(),
        unit: unit.into(),
        as_found: conformity(&points, &acceptance, None),
        as_left: conformity(&points, &acceptance, Some(&line)),
        points,
        line,
        offset_only: false,
        acceptance,
    })
}

/// The voltage's offset at the pack's voltage: a = 1, b the mean
/// difference, u(b) from the points' scatter and the reference.
fn voltage_channel(
    instrument: &str,
    points: Vec<Point>,
    acceptance: Spec,
    u_ref: &dyn Fn(f64) -> f64,
) -> Option<Channel> {
    if points.is_empty() {
        return None;
    }
    let n = points.len() as f64;
    let diffs: Vec<f64> = points.iter().map(|p| p.reading - p.reference).collect();
    let b = diffs.iter().sum::<f64>() / n;
    let s = if points.len() > 1 {
        (diffs.iter().map(|d| (d - b).powi(2)).sum::<f64>() / (n - 1.0)).sqrt()
    } else {
        points[0].s
    };
    let vmean = points.iter().map(|p| p.reference).sum::<f64>() / n;
    let line = Line {
        a: 1.0,
        b,
        u_a: 0.0,
        u_b: (s * s / n + u_ref(vmean).powi(2)).sqrt(),
        cov_ab: 0.0,
        residual_max: diffs.iter().fold(0.0, |m, d| m.max((d - b).abs())),
    };
    Some(Channel {
        quantity: VOLTAGE.into(),
        instrument: instrument.into(),
        unit: "V".into(),
        as_found: conformity(&points, &acceptance, None),
        as_left: conformity(&points, &acceptance, Some(&line)),
        points,
        line,
        offset_only: true,
        acceptance,
    })
}

/// Calibrate a station. The outputs are switched off at the end, and on
/// any error before it is returned.
pub async fn calibrate(
    req: &CalibrateRequest,
    b: &mut CalBench,
) -> Result<CalibrationRecord, RunError> {
    let r = run_points(req, b).await;
    let _ = b.load.0.make_safe().await;
    let _ = b.source.0.make_safe().await;
    let (dis, dis_v, chg) = r?;
    let (sd, s_vr, s_ir) = b.source_accuracy.clone();
    let (ld, l_vr, l_ir) = b.load_accuracy.clone();
    let rd = &b.reference_accuracy;
    let u_i = u_of(rd.current);
    let u_v = u_of(rd.voltage);
    let accept = |d: &Declared, current: bool, vr: Option<f64>, ir: Option<f64>| {
        let s = if current { d.current } else { d.voltage };
        s.map(|s| s.resolved(if current { ir } else { vr }))
            .unwrap_or_default()
    };
    let mut channels = vec![
        channel(
            DISCHARGE,
            &format!("load ({})", b.load.0.idn()),
            "A",
            dis,
            accept(&ld, true, l_vr, l_ir),
            &u_i,
        )?,
        channel(
            CHARGE,
            &format!("source ({})", b.source.0.idn()),
            "A",
            chg,
            accept(&sd, true, s_vr, s_ir),
            &u_i,
        )?,
    ];
    channels.extend(voltage_channel(
        &format!("load ({})", b.load.0.idn()),
        dis_v,
        accept(&ld, false, l_vr, l_ir),
        &u_v,
    ));
    let passed = channels.iter().all(|c| c.as_left.within);
    let stamp = chrono::Utc::now().format("%H%M%S");
    Ok(CalibrationRecord {
        schema_version: record::schema::SCHEMA_VERSION,
        id: format!("{}-{stamp}", req.date.format("%Y%m%d")),
        station: req.station.clone(),
        date: req.date,
        next_due: req.date + chrono::Duration::days(req.interval_days),
        ambient_c: req.ambient_c,
        operator: req.operator.clone(),
        tool: format!("packbench {}", env!("CARGO_PKG_VERSION")),
        reference: Reference {
            identity: b.reference.idn().to_string(),
            certificate: req.certificate.clone(),
            certificate_due: req.certificate_due,
            voltage: rd.voltage,
            current: rd.current,
        },
        channels,
        passed,
    })
}

type Sweeps = (Vec<Point>, Vec<Point>, Vec<Point>);

async fn run_points(req: &CalibrateRequest, b: &mut CalBench) -> Result<Sweeps, RunError> {
    let (dis, dis_v) = sweep(b, false, req).await?;
    let (chg, _) = sweep(b, true, req).await?;
    Ok((dis, dis_v, chg))
}

/// Write the record where runs find it: `<results>/_calibration/<station>/<id>.json`.
pub fn save(
    results: &std::path::Path,
    rec: &CalibrationRecord,
) -> Result<std::path::PathBuf, RunError> {
    let dir = record::calibration::station_dir(results, &rec.station);
    std::fs::create_dir_all(&dir).map_err(crate::session::error::io_err(&dir))?;
    let path = dir.join(format!("{}.json", rec.id));
    let text = serde_json::to_string_pretty(rec)
        .map_err(|e| failed(format!("the record does not serialise: {e}")))?;
    record::write::atomic_write(&path, text.as_bytes())
        .map_err(crate::session::error::io_err(&path))?;
    Ok(path)
}

/// The record as a technician reads it.
pub fn text(rec: &CalibrationRecord, path: &std::path::Path) -> String {
    use std::fmt::Write as _;
    let mut o = String::new();
    let _ = writeln!(
        o,
        "Calibration {} of station {} on {} (next due {}); reference {}{}",
        rec.id,
        rec.station,
        rec.date,
        rec.next_due,
        rec.reference.identity,
        rec.reference
            .certificate
            .as_ref()
            .map(|c| format!(", certificate {c}"))
            .unwrap_or_default()
    );
    for c in &rec.channels {
        let l = &c.line;
        let _ = writeln!(
            o,
            "  {} ({}): reading = {:.6}·reference {:+.6} {} (u(a) = {:.2e}, u(b) = {:.2e} {}, linearity {:.2e} {}){}",
            c.quantity,
            c.instrument,
            l.a,
            l.b,
            c.unit,
            l.u_a,
            l.u_b,
            c.unit,
            l.residual_max,
            c.unit,
            if c.offset_only { "; offset only (the pack spans too little voltage for a gain)" } else { "" }
        );
        let _ = writeln!(
            o,
            "    as found: largest error {:.4} {} = {:.0} % of the stated accuracy ({}); as left: {:.4} {} ({})",
            c.as_found.max_error,
            c.unit,
            c.as_found.worst_share * 100.0,
            if c.as_found.within { "within" } else { "OUT OF TOLERANCE" },
            c.as_left.max_error,
            c.unit,
            if c.as_left.within { "within" } else { "OUT OF TOLERANCE" },
        );
        for p in &c.points {
            let _ = writeln!(
                o,
                "      reference {:+.4} {}  reading {:+.4} {}  (s {:.2e}, n {})",
                p.reference, c.unit, p.reading, c.unit, p.s, p.n
            );
        }
    }
    let _ = writeln!(
        o,
        "  {} — kept in {}; runs on this station apply it until the next calibration",
        if rec.passed {
            "PASSED as left"
        } else {
            "FAILED as left"
        },
        path.display()
    );
    o
}
