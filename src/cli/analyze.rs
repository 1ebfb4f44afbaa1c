//! `packbench analyze`: the summary of a log after the fact — one of our
//! run folders (identical to its `summary.json`) or any bench's CSV.

use crate::cli::args::pack_from_args;
use crate::cli::args::PackArgs;
use crate::cli::args::{bms_from_args, BmsArgs};
use crate::cli::exit::ExitCode;
use analysis::correct::CorrectionPolicy;
use analysis::fade::grade::Policy;
use analysis::{AnalysisOptions, CurveData};
use anyhow::{anyhow, bail, Context};
use clap::Args;
use model::pack::PackSpec;
use model::units;
use record::import::{ColumnNames, CurrentSign, LogFormat, TimeUnit};
use record::summarize::ForeignLog;
use record::summarize::SummaryContext;
use record::{PackSummary, Summary, RUN_JSON, SAMPLES_CSV};
use std::io::Write;
use std::path::{Path, PathBuf};

#[derive(Debug, Args)]
pub struct AnalyzeArgs {
    /// A run folder, its samples.csv, or any bench's CSV log.
    pub log: PathBuf,
    /// Which column is which: time=NAME,voltage=NAME,current=NAME[,temperature=NAME][,step=NAME].
    /// Without it, common header names are recognised.
    #[arg(long)]
    pub columns: Option<String>,
    /// Sign of current in the log.
    #[arg(long, default_value = "charge-positive")]
    pub current_sign: String,
    /// Unit of a numeric time column: s, ms, min or h.
    #[arg(long, default_value = "s")]
    pub time_unit: String,
    /// Skip (and count) rows that do not parse instead of stopping.
    #[arg(long)]
    pub skip_bad_rows: bool,
    #[command(flatten)]
    pub pack_args: PackArgs,
    #[command(flatten)]
    pub bms_args: BmsArgs,
    /// Pack id for an imported log (default: the file's name).
    #[arg(long)]
    pub pack: Option<String>,
    /// The day the test counts for, YYYY-MM-DD (imported logs; default today).
    #[arg(long, visible_alias = "date")]
    pub test_date: Option<String>,
    /// Grading policy (TOML); default: the built-in policy.
    #[arg(long)]
    pub policy: Option<PathBuf>,
    /// Print the summary as JSON (the shape of summary.json).
    #[arg(long)]
    pub json: bool,
    /// Write ica.csv, dva.csv and ocv.csv here.
    #[arg(long)]
    pub curves_dir: Option<PathBuf>,
    /// Incremental-capacity voltage bin per cell, e.g. 5mV.
    #[arg(long)]
    pub ica_bin: Option<String>,
    /// Gaussian smoothing of dQ/dV, standard deviation in bins (0: none).
    #[arg(long)]
    pub ica_smooth: Option<f64>,
    /// Differential-voltage charge bin, % of rated capacity.
    #[arg(long)]
    pub dva_bin: Option<String>,
    /// Gaussian smoothing of dV/dQ, standard deviation in bins.
    #[arg(long)]
    pub dva_smooth: Option<f64>,
    /// Delays after a current edge for the pulse method, e.g. 0.1s,1s,10s,18s.
    #[arg(long, value_delimiter = ',')]
    pub pulse_delays: Option<Vec<String>>,
    /// A gap is an interval longer than this many typical intervals.
    #[arg(long)]
    pub gap_factor: Option<f64>,
    /// Peukert exponent for the rate correction (default: the pack's own,
    /// saved by `packbench peukert --save`, else lead-acid's published
    /// value; other chemistries are stated at their test rate).
    #[arg(long)]
    pub peukert_k: Option<f64>,
    /// A foreign log's discharge cutoff, e.g. 3.0V/cell or 36V: the largest
    /// discharge counts as ended on it when its last voltage is within 1 %.
    /// Without it no new nominal is suggested from a foreign log.
    #[arg(long)]
    pub cutoff: Option<String>,
    /// The field delimiter of a foreign log: comma, semicolon or tab
    /// (default: found from the header line).
    #[arg(long)]
    pub delimiter: Option<String>,
    /// The pack's minimum and maximum voltage for the pulse power
    /// capability, e.g. 3.0V/cell,4.2V/cell (default: the chemistry's
    /// usual operating limits; give the maker's).
    #[arg(long, value_delimiter = ',')]
    pub voltage_limits: Option<Vec<String>>,
    /// Power targets for the pulse-power available energy, W: discharge,
    /// charge, e.g. 4000,2000.
    #[arg(long, value_delimiter = ',')]
    pub power_targets: Option<Vec<f64>>,
    /// Validate each figure's uncertainty budget by a Monte Carlo of N
    /// trials (JCGM 101:2008): its standard deviation and 95 % interval
    /// against the GUM's.
    #[arg(long, value_name = "N")]
    pub monte_carlo: Option<usize>,
    /// Do not correct the capacity for temperature.
    #[arg(long)]
    pub no_temperature_correction: bool,
    /// Do not correct the capacity for rate.
    #[arg(long)]
    pub no_rate_correction: bool,
}

fn options(a: &AnalyzeArgs) -> anyhow::Result<AnalysisOptions> {
    let mut o = AnalysisOptions::default();
    if let Some(b) = &a.ica_bin {
        let v = match units::voltage(b).map_err(|e| anyhow!("--ica-bin: {e}"))? {
            units::VoltageSpec::Pack(v) | units::VoltageSpec::PerCell(v) => v,
        };
        if !(v > 0.0 && v <= 0.1) {
            bail!("--ica-bin {b}: expected 0.1 mV to 100 mV per cell");
        }
        o.ica_bin_v_per_cell = v;
    }
    for (name, given, slot) in [
        ("--ica-smooth", a.ica_smooth, &mut o.ica_smooth_bins),
        ("--dva-smooth", a.dva_smooth, &mut o.dva_smooth_bins),
    ] {
        if let Some(x) = given {
            if !(x.is_finite() && (0.0..=50.0).contains(&x)) {
                bail!("{name} {x}: expected 0 to 50 bins");
            }
            *slot = x;
        }
    }
    if let Some(b) = &a.dva_bin {
        let t = b.trim().trim_end_matches('%');
        let x: f64 = t.parse().map_err(|_| {
            anyhow!("--dva-bin {b}: expected a percentage of rated capacity, e.g. 1%")
        })?;
        if !(x > 0.0 && x <= 20.0) {
            bail!("--dva-bin {b}: expected 0.01 % to 20 %");
        }
        o.dva_bin_fraction = x / 100.0;
    }
    if let Some(ds) = &a.pulse_delays {
        let mut v = Vec::new();
        for d in ds {
            let s = units::duration(d).map_err(|e| anyhow!("--pulse-delays: {e}"))?;
            if !(s > 0.0 && s <= 3600.0) {
                bail!("--pulse-delays {d}: expected a delay from 1 ms to 1 h");
            }
            v.push(s);
        }
        v.sort_by(f64::total_cmp);
        v.dedup();
        o.pulse_delays_s = v;
    }
    if let Some(g) = a.gap_factor {
        if !(g.is_finite() && g >= 1.5) {
            bail!("--gap-factor {g}: expected 1.5 or more");
        }
        o.gap_factor = g;
    }
    if let Some(k) = a.peukert_k {
        if !(k.is_finite() && (1.0..=2.0).contains(&k)) {
            bail!("--peukert-k {k}: expected 1.0 to 2.0");
        }
    }
    o.correction = CorrectionPolicy {
        temperature: !a.no_temperature_correction,
        rate: !a.no_rate_correction,
        peukert_k: a.peukert_k,
        peukert_source: analysis::correct::PeukertSource::Given,
    };
    Ok(o)
}

/// The pulse-power settings that need the pack: its voltage limits and
/// the power targets.
fn pulse_settings(a: &AnalyzeArgs, pack: &PackSpec, o: &mut AnalysisOptions) -> anyhow::Result<()> {
    if let Some(l) = &a.voltage_limits {
        let n = f64::from(pack.series.max(1));
        let mut v = Vec::new();
        for t in l {
            v.push(
                match units::voltage(t).map_err(|e| anyhow!("--voltage-limits: {e}"))? {
                    units::VoltageSpec::PerCell(x) => x * n,
                    units::VoltageSpec::Pack(x) => x,
                },
            );
        }
        if !(v.len() == 2 && v[0] > 0.0 && v[1] > v[0]) {
            bail!(
                "--voltage-limits: expected MIN,MAX with 0 < MIN < MAX, e.g. 3.0V/cell,4.2V/cell"
            );
        }
        o.voltage_limits_v = Some((v[0], v[1]));
    }
    if let Some(t) = &a.power_targets {
        if !(t.len() == 2 && t.iter().all(|x| x.is_finite() && *x > 0.0)) {
            bail!("--power-targets: expected two positive powers in W, discharge,charge, e.g. 4000,2000");
        }
        o.power_targets_w = Some((t[0], t[1]));
    }
    Ok(())
}

fn spec_from_summary(p: &PackSummary) -> anyhow::Result<PackSpec> {
    let chemistry = p.chemistry;
    Ok(PackSpec {
        chemistry,
        series: p.series,
        rated_capacity_ah: p
            .rated_capacity_ah
            .ok_or_else(|| anyhow!("the run's pack has no rated capacity"))?,
        rated_energy_wh: p.rated_energy_wh,
        rated_rate_c: p.rated_rate_c,
        rated_resistance_mohm: p.rated_resistance_mohm,
    })
}

/// Our run folder for a path (the folder, or its samples.csv), if it is one.
fn our_run(path: &Path) -> Option<PathBuf> {
    let dir = if path.is_dir() {
        path.to_path_buf()
    } else if path.file_name().and_then(|n| n.to_str()) == Some(SAMPLES_CSV) {
        path.parent()?.to_path_buf()
    } else {
        return None;
    };
    dir.join(RUN_JSON).exists().then_some(dir)
}

fn write_curves(dir: &Path, d: &CurveData) -> anyhow::Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let mut w = csv::Writer::from_path(dir.join("ica.csv"))?;
    w.write_record([
        "step",
        "direction",
        "voltage_v",
        "dq_dv_ah_per_v",
        "dq_dv_smoothed_ah_per_v",
    ])?;
    for (s, dir_, x, y, ys) in &d.ica {
        w.write_record([
            s.to_string(),
            dir_.clone(),
            x.to_string(),
            y.to_string(),
            ys.to_string(),
        ])?;
    }
    w.flush()?;
    let mut w = csv::Writer::from_path(dir.join("dva.csv"))?;
    w.write_record([
        "step",
        "direction",
        "charge_ah",
        "dv_dq_v_per_ah",
        "dv_dq_smoothed_v_per_ah",
    ])?;
    for (s, dir_, x, y, ys) in &d.dva {
        w.write_record([
            s.to_string(),
            dir_.clone(),
            x.to_string(),
            y.to_string(),
            ys.to_string(),
        ])?;
    }
    w.flush()?;
    let mut w = csv::Writer::from_path(dir.join("ocv.csv"))?;
    w.write_record([
        "soc_pct",
        "charge_v",
        "discharge_v",
        "ocv_v",
        "ocv_per_cell_v",
    ])?;
    for p in &d.ocv {
        w.write_record([
            p.soc_pct.to_string(),
            p.charge_v.to_string(),
            p.discharge_v.to_string(),
            p.ocv_v.to_string(),
            p.ocv_per_cell_v.to_string(),
        ])?;
    }
    w.flush()?;
    Ok(())
}

/// The grading policy given, or the built-in one.
pub fn policy_of(a: &AnalyzeArgs) -> anyhow::Result<Policy> {
    Ok(match &a.policy {
        Some(p) => {
            let text = model::procedure::read_text(p)
                .with_context(|| format!("cannot read {}", p.display()))?;
            Policy::from_toml(p, &text)?
        }
        None => Policy::default_policy(),
    })
}

/// Analyse a log and return its summary and curves.
pub fn analyze(a: &AnalyzeArgs) -> anyhow::Result<(Summary, CurveData)> {
    let opts = options(a)?;
    let policy = policy_of(a)?;
    let given_bms = bms_from_args(&a.bms_args)?;
    if let Some(dir) = our_run(&a.log) {
        // The typed record: a malformed field is an error with its place,
        // not a silently dropped block.
        let m = record::read::read_manifest(&dir.join(RUN_JSON))?;
        // Given now, or recorded with the run.
        let bms = given_bms.or(m.bms.clone());
        let pack = spec_from_summary(&m.pack)?;
        let mut opts = opts;
        pulse_settings(a, &pack, &mut opts)?;
        let (pack_id, run_id) = (m.pack_id.clone(), m.run_id.clone());
        let title = m.procedure.title.clone();
        let test_date = record::history::parse_date(&m.test_date).ok_or_else(|| {
            anyhow!(
                "{}: test_date '{}' is not a date",
                dir.join(RUN_JSON).display(),
                m.test_date
            )
        })?;
        let ctx = SummaryContext {
            pack: &pack,
            pack_id: &pack_id,
            run_id: &run_id,
            title: &title,
            test_date,
            cycle_count: m.cycle_count,
            policy: &policy,
            bms: bms.as_ref(),
        };
        // The same path as the summary written at the end of the run.
        return Ok(record::summarize::summarize_run_with_curves(
            &dir, &ctx, None, opts,
        )?);
    }
    let given = pack_from_args(&a.pack_args)?;
    let format = LogFormat {
        columns: match &a.columns {
            Some(c) => c.parse::<ColumnNames>().map_err(|e| anyhow!(e))?,
            None => ColumnNames::default(),
        },
        sign: a
            .current_sign
            .parse::<CurrentSign>()
            .map_err(|e| anyhow!(e))?,
        time_unit: a.time_unit.parse::<TimeUnit>().map_err(|e| anyhow!(e))?,
        skip_bad_rows: a.skip_bad_rows,
        delimiter: match &a.delimiter {
            Some(d) => {
                Some(record::import::parse_delimiter(d).map_err(|e| anyhow!("--delimiter: {e}"))?)
            }
            None => None,
        },
    };
    let stem = a
        .log
        .file_stem()
        .and_then(|s| s.to_str())
        .unwrap_or("imported")
        .to_string();
    let pack_id = a.pack.clone().unwrap_or(stem);
    let test_date = match &a.test_date {
        Some(d) => record::history::parse_date(d)
            .ok_or_else(|| anyhow!("--test-date {d}: expected YYYY-MM-DD"))?,
        None => chrono::Utc::now().date_naive(),
    };
    // Without a spec, what needs no rating is worked out and the rest is
    // said to need one.
    let mut opts = opts;
    let unrated = given.is_none();
    let pack = match given {
        Some(p) => p,
        None => {
            opts.correction.temperature = false;
            opts.correction.rate = false;
            record::summarize::provisional_spec(&a.log, &format)?
        }
    };
    pulse_settings(a, &pack, &mut opts)?;
    if let Some(c) = &a.cutoff {
        let per_cell = match units::voltage(c).map_err(|e| anyhow!("--cutoff: {e}"))? {
            units::VoltageSpec::PerCell(v) => v,
            units::VoltageSpec::Pack(v) => v / f64::from(pack.series.max(1)),
        };
        if !(per_cell > 0.5 && per_cell < 5.0) {
            bail!("--cutoff {c}: expected a cell voltage from 0.5 V to 5 V (or the pack's)");
        }
        opts.cutoff_v_per_cell = Some(per_cell);
    }
    let bms = given_bms;
    let log = ForeignLog {
        path: &a.log,
        format,
        pack: &pack,
        pack_id: &pack_id,
        test_date,
        policy: &policy,
        bms: bms.as_ref(),
    };
    let (mut s, _, data) = record::summarize::summarize_foreign(&log, opts)?;
    if unrated {
        record::summarize::mark_unrated(&mut s);
    }
    Ok((s, data))
}

/// `packbench analyze`.
pub fn cmd_analyze(a: AnalyzeArgs) -> anyhow::Result<ExitCode> {
    let (s, data) = analyze(&a)?;
    if let Some(dir) = &a.curves_dir {
        write_curves(dir, &data)?;
    }
    let mut out = std::io::stdout().lock();
    if a.json {
        serde_json::to_writer_pretty(&mut out, &s)?;
        writeln!(out)?;
    } else {
        write!(out, "{}", report::text::summary(&s))?;
        if let Some(dir) = &a.curves_dir {
            writeln!(out, "  Curves: {}", dir.display())?;
        }
    }
    if let Some(n) = a.monte_carlo {
        write!(out, "{}", monte_carlo_text(&s.verdict.uncertainty, n))?;
    }
    Ok(ExitCode::Ok)
}

/// Each budget validated by a Monte Carlo of its terms (JCGM 101:2008 8):
/// the GUM interval y ± U (or the budget's own Monte Carlo interval where
/// a rectangular term dominates) against N fresh trials; validated where
/// both ends agree within half a unit of U's last digit.
pub fn monte_carlo_text(u: &record::budget::Uncertainty, n: usize) -> String {
    use analysis::uncertainty::{decimals_for, monte_carlo};
    let mut o = String::new();
    if let Some(w) = &u.absent {
        o.push_str(&format!("  Monte Carlo: no budgets ({w})\n"));
        return o;
    }
    o.push_str(&format!(
        "  Monte Carlo validation of the budgets (JCGM 101:2008, {n} trials):\n"
    ));
    for (name, b) in [
        ("measured capacity", &u.measured_ah),
        ("measured energy", &u.measured_wh),
        ("corrected capacity", &u.corrected_ah),
        ("state of health", &u.soh_pct),
        ("coulombic efficiency", &u.coulombic_efficiency_pct),
        ("energy efficiency", &u.energy_efficiency_pct),
        ("DC resistance", &u.resistance_mohm),
    ] {
        let Some(b) = b else { continue };
        let mc = monte_carlo(b, n, 0x6a63_6d31);
        let hw = b.half_width();
        let dec = decimals_for(hw);
        let tol = 0.5 * 10f64.powi(-(dec as i32));
        let (lo, hi) = (b.value - hw, b.value + hw);
        let ok = (mc.lo - lo).abs() <= tol && (mc.hi - hi).abs() <= tol;
        let gum_k2 = (b.value - b.expanded, b.value + b.expanded);
        let d = dec + 1;
        o.push_str(&format!(
            "    {name}: reported [{lo:.d$}, {hi:.d$}] {unit}; Monte Carlo sd {:.d$}, 95 % [{:.d$}, {:.d$}]; k = 2 gives [{:.d$}, {:.d$}]: {}\n",
            mc.sd,
            mc.lo,
            mc.hi,
            gum_k2.0,
            gum_k2.1,
            if ok {
                format!("validated (ends within {tol})")
            } else {
                format!("NOT validated at {tol}: use the Monte Carlo interval")
            },
            unit = b.unit
        ));
    }
    o
}

#[derive(Debug, Args)]
pub struct PeukertArgs {
    /// Two run folders of the same pack whose capacity steps ran at different rates.
    pub runs: Vec<PathBuf>,
    /// Keep the exponent with the pack (`peukert.toml` in its folder):
    /// later summaries of the pack correct to the rated rate with it.
    #[arg(long)]
    pub save: bool,
}

/// `packbench peukert RUN_A RUN_B`: k = ln(t2/t1) / ln(I1/I2) from the two
/// capacity steps (standards fact sheet §5).
pub fn cmd_peukert(a: PeukertArgs) -> anyhow::Result<ExitCode> {
    if a.runs.len() != 2 {
        bail!("give exactly two run folders");
    }
    let mut pts = Vec::new();
    for r in &a.runs {
        let path = r.join(record::SUMMARY_JSON);
        let s: Summary = record::read::read_summary(&path)?;
        let c = s
            .capacity
            .ok_or_else(|| anyhow!("{}: no capacity step", r.display()))?;
        if c.ended_on_cutoff != Some(true) {
            bail!(
                "{}: the capacity step did not end on its cutoff",
                r.display()
            );
        }
        pts.push((c.mean_current_a, c.duration_s / 3600.0, s.pack_id));
    }
    if pts[0].2 != pts[1].2 {
        bail!(
            "the runs are of different packs ({} and {})",
            pts[0].2,
            pts[1].2
        );
    }
    let k = analysis::correct::peukert_exponent(pts[0].0, pts[0].1, pts[1].0, pts[1].1)
        .ok_or_else(|| anyhow!("the two runs ran at the same current: no exponent"))?;
    println!(
        "pack {}: {:.3} A for {:.3} h and {:.3} A for {:.3} h -> Peukert exponent k = {k:.4}",
        pts[0].2, pts[0].0, pts[0].1, pts[1].0, pts[1].1
    );
    if a.save {
        let pack_dir = a.runs[0]
            .canonicalize()
            .ok()
            .and_then(|d| d.parent().map(Path::to_path_buf))
            .ok_or_else(|| anyhow!("{}: no pack folder above it", a.runs[0].display()))?;
        let runs: Vec<String> = a
            .runs
            .iter()
            .map(|r| {
                r.file_name()
                    .and_then(|n| n.to_str())
                    .unwrap_or("?")
                    .to_string()
            })
            .collect();
        record::write::write_peukert(&pack_dir, k, &runs)?;
        println!(
            "saved with the pack: {} (summaries of the pack made from now on correct to the rated rate with it)",
            pack_dir.join(record::PEUKERT_TOML).display()
        );
    } else {
        println!("use it with: packbench analyze RUN --peukert-k {k:.3}, or keep it with the pack: --save");
    }
    Ok(ExitCode::Ok)
}
