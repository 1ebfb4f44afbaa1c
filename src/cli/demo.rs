//! The demo: a fictional e-bike rental fleet of our own, "Fernhollow
//! Rides", with eight packs of two chemistries bought at different times,
//! each tested every quarter for two years on the simulated bench. The
//! packs age in the simulator by a law the demo knows (capacity down,
//! resistance up, some faster than others, one with a knee); the fade
//! analysis does not know it and has to find it from the tests.
//!
//! Everything here is invented for the demo.

use crate::cli::exit::ExitCode;
use crate::session::error::RunError;
use crate::session::request::PackSource;
use crate::session::request::RunOptions;
use crate::session::request::RunRequest;
use crate::session::request::Speed;
use crate::session::{self, Session};
use analysis::fade::{fleet, trend};
use chrono::{Days, NaiveDate};
use model::pack::{Chemistry, PackSpec};
use model::simconfig::SimConfig;
use record::history;
use report::html;
use std::path::{Path, PathBuf};

/// File that marks a folder as written by the demo (so a rerun may replace it).
pub const MARKER: &str = ".packbench-demo";
/// Days between tests (13 weeks).
pub const QUARTER_DAYS: u64 = 91;
/// Tests per pack over the two years.
pub const QUARTERS: u32 = 9;

/// How one demo pack ages, per equivalent full cycle N:
/// capacity factor = 1 − a·N − k·max(0, N − knee)², resistance factor =
/// 1 + r·N + kr·max(0, N − knee)².
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AgeingLaw {
    pub fade_per_cycle: f64,
    pub knee_cycles: f64,
    pub knee_coeff: f64,
    pub resistance_per_cycle: f64,
    pub knee_resistance_coeff: f64,
}

impl AgeingLaw {
    pub fn capacity_factor(&self, n: f64) -> f64 {
        let over = (n - self.knee_cycles).max(0.0);
        1.0 - self.fade_per_cycle * n - self.knee_coeff * over * over
    }

    pub fn resistance_factor(&self, n: f64) -> f64 {
        let over = (n - self.knee_cycles).max(0.0);
        1.0 + self.resistance_per_cycle * n + self.knee_resistance_coeff * over * over
    }

    /// Cycles at which the capacity factor reaches `fraction` (bisection).
    pub fn cycles_to(&self, fraction: f64) -> f64 {
        let (mut lo, mut hi) = (0.0, 100_000.0);
        for _ in 0..200 {
            let m = 0.5 * (lo + hi);
            if self.capacity_factor(m) > fraction {
                lo = m;
            } else {
                hi = m;
            }
        }
        0.5 * (lo + hi)
    }
}

/// One pack of the demo fleet.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoPack {
    pub id: &'static str,
    pub spec: PackSpec,
    /// Equivalent full cycles at the first test.
    pub cycles_at_start: f64,
    pub cycles_per_quarter: f64,
    pub law: AgeingLaw,
    /// Quarters whose test was skipped (the pack was out on hire).
    pub missed: &'static [u32],
    pub procedure: &'static str,
}

/// The simulated bench's default pack (a 36 V, 14 Ah e-bike pack) with the
/// maker's resistance figure.
fn li_ion(rated_resistance: f64) -> PackSpec {
    PackSpec {
        rated_resistance_mohm: Some(rated_resistance),
        ..crate::session::request::default_sim_pack()
    }
}

fn lfp(rated_resistance: f64) -> PackSpec {
    PackSpec {
        chemistry: Chemistry::Lfp,
        series: 12,
        rated_capacity_ah: 15.0,
        rated_energy_wh: Some(576.0),
        rated_rate_c: Some(0.2),
        rated_resistance_mohm: Some(rated_resistance),
    }
}

const LINEAR: AgeingLaw = AgeingLaw {
    fade_per_cycle: 0.0,
    knee_cycles: f64::INFINITY,
    knee_coeff: 0.0,
    resistance_per_cycle: 0.0,
    knee_resistance_coeff: 0.0,
};

/// The fleet. Rated resistances are the new packs' two-level readings.
pub fn scenario() -> Vec<DemoPack> {
    let li = "procedures/quarterly-check-li-ion.toml";
    let lf = "procedures/quarterly-check-lfp.toml";
    let law = |a: f64, r: f64| AgeingLaw {
        fade_per_cycle: a,
        resistance_per_cycle: r,
        ..LINEAR
    };
    vec![
        DemoPack {
            id: "FR-L01",
            spec: li_ion(37.0),
            cycles_at_start: 0.0,
            cycles_per_quarter: 60.0,
            law: law(2.0e-4, 6e-4),
            missed: &[],
            procedure: li,
        },
        DemoPack {
            id: "FR-L02",
            spec: li_ion(37.0),
            cycles_at_start: 150.0,
            cycles_per_quarter: 90.0,
            law: law(2.2e-4, 7e-4),
            missed: &[],
            procedure: li,
        },
        DemoPack {
            id: "FR-L03",
            spec: li_ion(37.0),
            cycles_at_start: 300.0,
            cycles_per_quarter: 45.0,
            law: law(1.8e-4, 5e-4),
            missed: &[],
            procedure: li,
        },
        DemoPack {
            id: "FR-L04",
            spec: li_ion(37.0),
            cycles_at_start: 100.0,
            cycles_per_quarter: 80.0,
            law: AgeingLaw {
                fade_per_cycle: 1.5e-4,
                knee_cycles: 450.0,
                knee_coeff: 1.2e-6,
                resistance_per_cycle: 6e-4,
                knee_resistance_coeff: 4e-6,
            },
            missed: &[],
            procedure: li,
        },
        DemoPack {
            id: "FR-L05",
            spec: li_ion(37.0),
            cycles_at_start: 50.0,
            cycles_per_quarter: 70.0,
            law: law(2.0e-4, 6e-4),
            missed: &[7, 8],
            procedure: li,
        },
        DemoPack {
            id: "FR-P01",
            spec: lfp(35.0),
            cycles_at_start: 0.0,
            cycles_per_quarter: 90.0,
            law: law(0.8e-4, 3e-4),
            missed: &[],
            procedure: lf,
        },
        DemoPack {
            id: "FR-P02",
            spec: lfp(35.0),
            cycles_at_start: 400.0,
            cycles_per_quarter: 100.0,
            law: law(0.9e-4, 3e-4),
            missed: &[],
            procedure: lf,
        },
        DemoPack {
            id: "FR-P03",
            spec: lfp(35.0),
            cycles_at_start: 200.0,
            cycles_per_quarter: 75.0,
            law: law(0.7e-4, 2.5e-4),
            missed: &[],
            procedure: lf,
        },
    ]
}

/// The first test day of the scenario.
pub fn first_test_day() -> NaiveDate {
    NaiveDate::from_ymd_opt(2024, 11, 4).unwrap_or_default()
}

/// The scenario's "today", three weeks after the last round of tests.
pub fn scenario_today() -> NaiveDate {
    first_test_day()
        .checked_add_days(Days::new(QUARTER_DAYS * u64::from(QUARTERS - 1) + 21))
        .unwrap_or_default()
}

/// What the demo wrote.
#[derive(Debug, Clone)]
pub struct DemoOutcome {
    pub out: PathBuf,
    pub results: PathBuf,
    pub runs: usize,
    pub fleet_report: PathBuf,
    pub pack_reports: Vec<PathBuf>,
    pub fleet: fleet::Fleet,
}

#[derive(Debug, thiserror::Error)]
pub enum DemoError {
    #[error("{0} exists and was not written by the demo; give another --out or empty it")]
    NotOurs(PathBuf),
    #[error("{path}: {error}")]
    Io {
        path: PathBuf,
        error: std::io::Error,
    },
    #[error(transparent)]
    Run(#[from] RunError),
    #[error(transparent)]
    History(#[from] history::HistoryError),
    #[error("a demo station stopped unexpectedly")]
    Station,
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> DemoError + '_ {
    move |source| DemoError::Io {
        path: path.to_path_buf(),
        error: source,
    }
}

/// Run every test of one pack, in order (`done` is told after each).
fn run_pack(
    p: &DemoPack,
    results: &Path,
    seed: u64,
    done: &(dyn Fn() + Sync),
) -> Result<usize, DemoError> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(io(results))?;
    let mut runs = 0;
    for q in 0..QUARTERS {
        if p.missed.contains(&q) {
            continue;
        }
        let n = p.cycles_at_start + p.cycles_per_quarter * f64::from(q);
        let date = first_test_day()
            .checked_add_days(Days::new(QUARTER_DAYS * u64::from(q)))
            .unwrap_or_default();
        let req = RunRequest {
            procedure: PathBuf::from(p.procedure),
            pack_id: p.id.to_string(),
            pack: PackSource::Given(p.spec.clone()),
            results: results.to_path_buf(),
            options: RunOptions {
                test_date: date,
                cycle_count: Some(n),
                // The record's start on the scenario's day (packs a few
                // minutes apart), so that the exports' times agree with
                // the test dates.
                started_at: date
                    .and_hms_opt(8, 0, 0)
                    .map(|t| t.and_utc() + chrono::Duration::minutes((seed / 1000) as i64 * 7)),
                ..RunOptions::default()
            },
        };
        let prepared = crate::session::prepare::prepare(&req)?;
        let mut cfg = SimConfig {
            seed: seed + u64::from(q),
            ..SimConfig::default()
        };
        cfg.pack.capacity_factor = p.law.capacity_factor(n);
        cfg.pack.resistance_factor = p.law.resistance_factor(n);
        // Packs come back from hire part-charged.
        cfg.pack.initial_soc = 0.3 + 0.05 * f64::from((seed as u32 + q * 7) % 10);
        cfg.pack.ambient_c = 23.0 + f64::from(q % 3);
        rt.block_on(session::run(Session::sim(&prepared, &cfg, Speed::Max)))?;
        runs += 1;
        done();
    }
    Ok(runs)
}

/// Set up the scenario under `out`, run every test (packs concurrently,
/// one station each), grade, and write the run, pack and fleet reports.
pub fn run_demo(out: &Path) -> Result<DemoOutcome, DemoError> {
    run_demo_with(out, &|| {})
}

/// How many tests the scenario runs.
pub fn scenario_runs() -> usize {
    scenario()
        .iter()
        .map(|p| (0..QUARTERS).filter(|q| !p.missed.contains(q)).count())
        .sum()
}

/// [`run_demo`], telling `done` after each test.
pub fn run_demo_with(out: &Path, done: &(dyn Fn() + Sync)) -> Result<DemoOutcome, DemoError> {
    if out.exists() {
        let empty = std::fs::read_dir(out).map_err(io(out))?.next().is_none();
        if !empty && !out.join(MARKER).exists() {
            return Err(DemoError::NotOurs(out.to_path_buf()));
        }
        let results = out.join("results");
        if results.exists() {
            std::fs::remove_dir_all(&results).map_err(io(&results))?;
        }
    }
    std::fs::create_dir_all(out).map_err(io(out))?;
    std::fs::write(out.join(MARKER), "written by packbench demo\n").map_err(io(out))?;
    let results = out.join("results");
    std::fs::create_dir_all(&results).map_err(io(&results))?;
    let packs = scenario();
    let threads = std::thread::available_parallelism()
        .map(|n| n.get())
        .unwrap_or(2)
        .clamp(1, packs.len());
    let mut total = 0;
    std::thread::scope(|scope| -> Result<(), DemoError> {
        let handles: Vec<_> = (0..threads)
            .map(|t| {
                let packs = &packs;
                let results = &results;
                scope.spawn(move || -> Result<usize, DemoError> {
                    let mut n = 0;
                    for (i, p) in packs.iter().enumerate().filter(|(i, _)| i % threads == t) {
                        n += run_pack(p, results, 1000 * (i as u64 + 1), done)?;
                    }
                    Ok(n)
                })
            })
            .collect();
        for h in handles {
            total += h.join().map_err(|_| DemoError::Station)??;
        }
        Ok(())
    })?;
    let today = scenario_today();
    let threshold = analysis::fade::END_OF_LIFE_PCT;
    let mut pack_reports = Vec::new();
    let mut histories = Vec::new();
    for p in &packs {
        let h = history::load(&results, p.id, None)?;
        let fa = trend::analyze(&h, threshold);
        let path = write_pack_report(&results, &h, &fa)?;
        pack_reports.push(path);
        histories.push(h);
    }
    let (fleet, _) = history::fleet(
        &results,
        today,
        &analysis::fade::default_schedule(),
        threshold,
    )?;
    let fleet_report = results.join("fleet.html");
    let html = html::fleet_report(
        &fleet,
        &histories,
        "Fernhollow Rides — e-bike battery fleet (fictional demo)",
        &html::Links::Files(String::new()),
    );
    std::fs::write(&fleet_report, html).map_err(io(&fleet_report))?;
    Ok(DemoOutcome {
        out: out.to_path_buf(),
        results,
        runs: total,
        fleet_report,
        pack_reports,
        fleet,
    })
}

/// Write `results/<pack>/fade.html`.
pub fn write_pack_report(
    results: &Path,
    h: &history::PackHistory,
    fa: &trend::FadeAnalysis,
) -> Result<PathBuf, DemoError> {
    let path = results.join(&h.pack_id).join("fade.html");
    // (In the pack's folder: its runs' reports beside it.)
    let html = html::pack_report(
        h,
        fa,
        &history::capacity_curves(h),
        &html::Links::Files(String::new()),
    );
    std::fs::write(&path, html).map_err(io(&path))?;
    Ok(path)
}

#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// Folder for the demo's results and reports.
    #[arg(long, default_value = "demo")]
    pub out: PathBuf,
}

/// `packbench demo`.
pub fn cmd_demo(a: DemoArgs) -> anyhow::Result<ExitCode> {
    let t = std::time::Instant::now();
    // Progress on the error stream (drawn on a terminal only).
    let bar = indicatif::ProgressBar::with_draw_target(
        Some(scenario_runs() as u64),
        indicatif::ProgressDrawTarget::stderr_with_hz(8),
    );
    bar.set_style(
        indicatif::ProgressStyle::with_template("{msg} {bar:30} {pos}/{len} tests ({elapsed})")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    bar.set_message("Running the demo fleet's tests on the simulated bench");
    let d = crate::cli::demo::run_demo_with(&a.out, &|| bar.inc(1));
    bar.finish_and_clear();
    let d = d?;
    print!("{}", report::text::fleet(&d.fleet));
    println!(
        "\nDemo: {} tests of {} packs on the simulated bench in {:.1} s.",
        d.runs,
        d.pack_reports.len(),
        t.elapsed().as_secs_f64()
    );
    println!("Open the fleet report:   {}", d.fleet_report.display());
    println!(
        "Pack fade reports:       {}",
        d.results.join("<pack>/fade.html").display()
    );
    println!(
        "Run reports and grades:  {}",
        d.results.join("<pack>/<run>/report.html").display()
    );
    Ok(ExitCode::Ok)
}

/// A large fleet of made-up test records for the index benchmark and its
/// tests: `packs` packs of the fictional fleet (`FR-B00001` …), each with
/// `runs` run folders holding only a `summary.json`, copied from
/// `template` (a real summary) with the run id, date and capacity changed:
/// each pack fades at its own rate, tested every 30 days from 2024-01-01.
/// Nothing else reads these folders as runs (no log).
pub fn synthetic_fleet(
    results: &Path,
    packs: usize,
    runs: usize,
    template: &record::Summary,
) -> std::io::Result<()> {
    let mut t = template.clone();
    // Only what a history reads: the rest would only make the files big.
    t.curves = None;
    t.pulse_resistance.clear();
    t.warnings.clear();
    t.gaps.clear();
    let rated = t
        .pack
        .rated_capacity_ah
        .ok_or_else(|| std::io::Error::other("the template summary has no rated capacity"))?;
    let policy = analysis::fade::grade::Policy::default_policy();
    let spec = format!(
        "chemistry = \"{}\"\nseries = {}\nrated_capacity = \"{}Ah\"\n",
        t.pack.chemistry, t.pack.series, rated
    );
    let start = NaiveDate::from_ymd_opt(2024, 1, 1).unwrap_or_default();
    for i in 0..packs {
        let id = format!("FR-B{i:05}");
        let dir = results.join(&id);
        std::fs::create_dir_all(&dir)?;
        std::fs::write(dir.join(record::PACK_TOML), &spec)?;
        // 0.2 to 1.2 % of rated per test, by pack.
        let fade = 0.002 + 0.01 * ((i * 7919) % 1000) as f64 / 1000.0;
        for j in 0..runs {
            let date = start
                .checked_add_days(Days::new(30 * j as u64))
                .unwrap_or(start);
            let run_id = format!("{}-000000Z-synthetic", date.format("%Y%m%d"));
            let mut s = t.clone();
            s.pack_id = id.clone();
            s.run_id = run_id.clone();
            s.test_date = date;
            if let Some(c) = s.capacity.as_mut() {
                let soh = 1.0 - fade * j as f64;
                c.measured_ah = rated * soh;
                c.corrected_ah = Some(rated * soh);
            }
            record::verdict::rejudge(&mut s, Some(&policy));
            let run = dir.join(&run_id);
            std::fs::create_dir_all(&run)?;
            let bytes = serde_json::to_vec(&s).map_err(std::io::Error::other)?;
            std::fs::write(run.join(record::SUMMARY_JSON), bytes)?;
        }
    }
    Ok(())
}
