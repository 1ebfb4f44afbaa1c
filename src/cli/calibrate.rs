//! `packbench calibrate`: check a station's readings against a reference
//! meter and keep the record that later runs apply (see
//! `session::calibrate`).

use crate::cli::exit::ExitCode;
use crate::session::calibrate::{calibrate, save, text, CalBench, CalibrateRequest};
use crate::session::links::SIM_TIMEOUT_MS;
use anyhow::{anyhow, bail, Context};
use clap::Args;
use engine::clock::{Clock, SimClock};
use instrument::profile::{Profile, ProfileRole};
use instrument::Attach;
use instrument::{Instrument, Load, Meter, Source};
use std::path::PathBuf;
use std::sync::Arc;

#[derive(Debug, Args)]
pub struct CalibrateArgs {
    /// Calibrate the built-in simulated bench (its meters carry the gain
    /// and offset errors of --sim-config; the reference reads the truth).
    #[arg(long)]
    pub sim: bool,
    /// The simulated bench's settings (TOML).
    #[arg(long)]
    pub sim_config: Option<PathBuf>,
    /// A bench file: its station's meter is the reference (a multimeter
    /// with `measure_current` in its profile, on a shunt or its current
    /// input in series with the pack).
    #[arg(long)]
    pub bench: Option<PathBuf>,
    /// The station of the bench file (default: its only one).
    #[arg(long)]
    pub station: Option<String>,
    /// The largest calibration current, e.g. 5A (points at 0, 10, 50 and
    /// 90 % of it, discharging then charging the pack on the bench).
    #[arg(long, default_value = "5A")]
    pub current: String,
    /// The pack's voltage limits while the points run, e.g. 30V,42V (a
    /// point outside them stops the calibration with the outputs off).
    #[arg(long, value_delimiter = ',')]
    pub voltage_limits: Vec<String>,
    /// Results folder: the record goes to `<results>/_calibration/<station>/`.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
    /// The reference's calibration certificate (number, issuing lab).
    #[arg(long)]
    pub certificate: Option<String>,
    /// The reference certificate's due date, e.g. 2027-06-30.
    #[arg(long)]
    pub certificate_due: Option<chrono::NaiveDate>,
    /// Ambient temperature during the calibration, °C.
    #[arg(long)]
    pub ambient: Option<f64>,
    #[arg(long)]
    pub operator: Option<String>,
    /// Interval to the next calibration, days.
    #[arg(long, default_value_t = 365)]
    pub interval_days: i64,
    /// Readings averaged at each point.
    #[arg(long, default_value_t = 10)]
    pub readings: usize,
}

fn amps(s: &str) -> anyhow::Result<f64> {
    match model::units::parse(s) {
        Ok(model::units::Quantity::Amps(a)) if a > 0.0 && a.is_finite() => Ok(a),
        _ => bail!("--current '{s}': expected a current above zero such as 5A"),
    }
}

fn volts(s: &str) -> anyhow::Result<f64> {
    match model::units::voltage(s).map_err(|e| anyhow!("--voltage-limits '{s}': {e}"))? {
        model::units::VoltageSpec::Pack(v) => Ok(v),
        _ => bail!("--voltage-limits '{s}': give the pack's voltage, e.g. 30V (the calibration has no pack spec)"),
    }
}

pub fn cmd_calibrate(a: CalibrateArgs) -> anyhow::Result<ExitCode> {
    let current_a = amps(&a.current)?;
    if a.sim == a.bench.is_some() {
        bail!("give --sim or --bench FILE (one of them)");
    }
    let limits = match a.voltage_limits.as_slice() {
        [] => None,
        [lo, hi] => Some((volts(lo)?, volts(hi)?)),
        _ => bail!("--voltage-limits takes two voltages, e.g. 30V,42V"),
    };
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    let today = chrono::Local::now().date_naive();
    let mut req = CalibrateRequest {
        station: String::new(),
        current_a,
        voltage_min_v: 0.0,
        voltage_max_v: 0.0,
        readings: a.readings.max(2),
        settle_s: 2.0,
        date: today,
        interval_days: a.interval_days.max(1),
        ambient_c: a.ambient,
        operator: a.operator.clone(),
        certificate: a.certificate.clone(),
        certificate_due: a.certificate_due,
    };
    let (rec, path) = rt.block_on(async {
        let mut bench = if a.sim {
            let cfg = crate::cli::args::sim_config(a.sim_config.as_deref(), false, &[])?;
            let pack = crate::session::request::default_sim_pack();
            let (lo, hi) = limits.unwrap_or_else(|| {
                let (l, h) = pack.chemistry.operating_limits_v_per_cell();
                (l * pack.series as f64, h * pack.series as f64)
            });
            req.voltage_min_v = lo;
            req.voltage_max_v = hi;
            req.station = "sim".into();
            if current_a > pack.rated_capacity_ah {
                bail!(
                    "--current {current_a} A is above the simulated pack's 1C ({} A)",
                    pack.rated_capacity_ah
                );
            }
            sim_bench(&pack, &cfg).await?
        } else {
            let file = a.bench.clone().unwrap_or_default();
            let bf =
                crate::session::benchfile::BenchFile::load(&file).map_err(|e| anyhow!("{e}"))?;
            let st = bf
                .station(a.station.as_deref())
                .map_err(|e| anyhow!("{}: {e}", file.display()))?;
            let Some((lo, hi)) = limits else {
                bail!("--voltage-limits is needed on a real bench (the pack's own, e.g. 30V,42V)");
            };
            req.voltage_min_v = lo;
            req.voltage_max_v = hi;
            req.station = st.name.clone();
            #[cfg(unix)]
            let _lock = crate::session::benchfile::lock_station(&file, st)?;
            real_bench(st).await?
        };
        let rec = calibrate(&req, &mut bench).await?;
        let path = save(&a.results, &rec)?;
        Ok::<_, anyhow::Error>((rec, path))
    })?;
    print!("{}", text(&rec, &path));
    Ok(if rec.passed {
        ExitCode::Ok
    } else {
        ExitCode::Failure
    })
}

/// What an instrument states of its accuracy, with the ranges its
/// range terms are of.
fn stated(p: &Profile) -> (model::accuracy::Declared, Option<f64>, Option<f64>) {
    (
        p.accuracy.clone(),
        p.ranges.voltage_max_v,
        p.ranges.current_max_a,
    )
}

/// The simulated bench with a reference meter that reads the truth.
async fn sim_bench(pack: &model::pack::PackSpec, cfg: &sim::SimConfig) -> anyhow::Result<CalBench> {
    cfg.check_meters().map_err(|e| anyhow!("{e}"))?;
    let clock: Arc<dyn Clock> = SimClock::new();
    let links = sim::build(pack, cfg, Arc::clone(&clock));
    let reference = sim::reference_link(&links.handle);
    let (mut sp, mut lp) = crate::session::links::sim_profiles();
    let [sd, ld, _] = cfg.declared();
    sp.accuracy = sd;
    lp.accuracy = ld;
    let mut mp = Profile::builtin(ProfileRole::Meter);
    mp.transport.timeout_ms = SIM_TIMEOUT_MS;
    let (source_accuracy, load_accuracy) = (stated(&sp), stated(&lp));
    let reference_accuracy = mp.accuracy.clone();
    let source = Source::connect_with(links.source, sp, Attach::default()).await?;
    let load = Load::connect_with(links.load, lp, Attach::default()).await?;
    let Meter(reference) = Meter::connect_with(reference, mp, Attach::default()).await?;
    Ok(CalBench {
        source,
        load,
        reference,
        clock,
        source_accuracy,
        load_accuracy,
        reference_accuracy,
    })
}

/// A bench file's station: its source and load, its meter as the reference.
async fn real_bench(st: &crate::session::benchfile::StationSpec) -> anyhow::Result<CalBench> {
    let links = crate::session::links::open_station(st).await?;
    let Some(m) = links.meter else {
        bail!(
            "station {} has no meter: calibrate reads a reference multimeter bound as the station's meter",
            st.name
        );
    };
    if m.profile.commands.measure_current.is_none() {
        bail!(
            "the meter's profile '{}' has no measure_current: the reference must read the current (e.g. MEAS:CURR:DC?)",
            m.profile.name
        );
    }
    let (source_accuracy, load_accuracy) =
        (stated(&links.source.profile), stated(&links.load.profile));
    let reference_accuracy = m.profile.accuracy.clone();
    let clock: Arc<dyn Clock> = engine::clock::PacedClock::new(1.0);
    let source =
        Source::connect_with(links.source.link, links.source.profile, links.source.attach).await?;
    let load = Load::connect_with(links.load.link, links.load.profile, links.load.attach).await?;
    let reference: Instrument = Meter::connect_with(m.link, m.profile, m.attach).await?.0;
    Ok(CalBench {
        source,
        load,
        reference,
        clock,
        source_accuracy,
        load_accuracy,
        reference_accuracy,
    })
}
