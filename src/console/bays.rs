//! The bays a console drives: each a simulated bay or a bench file's
//! station, each with at most one run at a time on a thread of its own
//! (its own runtime, as `packbench run` has), so nothing the web side does
//! can make a sample late.

use crate::session::benchfile::StationSpec;
use crate::session::error::RunError;
use crate::session::live::{Board, BoardState, Live};
use crate::session::request::{JobBench, PackSource, RunOptions, RunReport, RunRequest, Speed};
use engine::control::StopHandle;
use serde::Serialize;
use sim::SimConfig;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

/// Where a bay's instruments are.
#[derive(Clone)]
pub enum BayKind {
    /// The embedded simulated bench, paced.
    Sim { cfg: Box<SimConfig>, speed: f64 },
    /// A bench file's station (real instruments, or its `sim` links).
    Station {
        spec: Box<StationSpec>,
        file: PathBuf,
    },
}

/// Where a bay's run leaves its report (or why it never ran).
pub type Done = Arc<Mutex<Option<Result<RunReport, String>>>>;

/// A run on a bay: its board, its stop handle, and its report when done.
pub struct Job {
    pub board: Board,
    pub stop: StopHandle,
    pub done: Done,
    pub resumed: bool,
}

/// One bay.
pub struct Bay {
    pub name: String,
    pub kind: BayKind,
    pub job: Mutex<Option<Job>>,
    /// An interrupted run of this bay's station from before the console
    /// started (a restart, a power cut): shown, and offered for resume.
    pub previous: Mutex<Option<PathBuf>>,
}

/// What a start request carries (the form's fields).
#[derive(Debug, Clone, Default, serde::Deserialize)]
pub struct StartForm {
    #[serde(default)]
    pub pack_id: String,
    #[serde(default)]
    pub procedure: String,
    /// The pack's spec; empty to use the saved `pack.toml`.
    #[serde(default)]
    pub chemistry: String,
    #[serde(default)]
    pub series: String,
    #[serde(default)]
    pub rated: String,
}

/// Errors of a request, by form field (`""` for the request as a whole).
#[derive(Debug, Clone, Default, Serialize, PartialEq)]
pub struct FieldErrors(pub BTreeMap<String, String>);

impl FieldErrors {
    pub fn one(field: &str, message: impl Into<String>) -> FieldErrors {
        let mut m = BTreeMap::new();
        m.insert(field.to_string(), message.into());
        FieldErrors(m)
    }
}

/// A bay as the page and the API show it.
#[derive(Debug, Clone, Serialize)]
pub struct BayView {
    pub name: String,
    pub kind: &'static str,
    /// idle, starting, running, completed, aborted, interrupted, failed.
    pub state: &'static str,
    pub live: Option<LiveView>,
    pub result: Option<ResultView>,
}

/// The live figures of a running bay.
#[derive(Debug, Clone, Serialize)]
pub struct LiveView {
    pub pack_id: String,
    pub step: u32,
    pub steps: u32,
    pub kind: Option<String>,
    pub run_t_s: f64,
    pub voltage_v: f64,
    pub current_a: f64,
    pub power_w: f64,
    pub step_ah: f64,
    pub step_wh: f64,
    pub soc_pct: Option<f64>,
    pub eta_s: Option<f64>,
    pub eta_lower_bound: bool,
    pub temperature_c: Option<f64>,
    pub alarms: Vec<String>,
    pub samples: u64,
    /// The lowest and highest cell group now: [group, volts].
    pub group_low: Option<(u32, f64)>,
    pub group_high: Option<(u32, f64)>,
}

/// How a bay's last run ended.
#[derive(Debug, Clone, Serialize)]
pub struct ResultView {
    pub pack_id: String,
    pub run_id: String,
    pub status: String,
    pub stop_reason: Option<String>,
    pub capacity_ah: Option<f64>,
    pub soh_pct: Option<f64>,
    /// The expanded uncertainties of the capacity and the state of health
    /// (the reported 95 % intervals' half-widths), from the verdict.
    pub capacity_u95_ah: Option<f64>,
    pub soh_u95_pct: Option<f64>,
    pub grade: Option<String>,
    /// The grade was given inside a guard band.
    pub grade_conditional: bool,
    pub resumable: bool,
    /// The failure when the run never ran.
    pub error: Option<String>,
}

/// A finished run's tile: every figure from the run's verdict.
pub fn result_of(s: &record::Summary) -> ResultView {
    ResultView {
        pack_id: s.pack_id.clone(),
        run_id: s.run_id.clone(),
        status: s.status.name().to_string(),
        stop_reason: s.stop_reason.clone(),
        capacity_ah: s.verdict.corrected_ah.get().or(s.verdict.measured_ah.get()),
        soh_pct: s.verdict.soh_pct.get(),
        capacity_u95_ah: match (s.verdict.corrected_ah.get(), &s.verdict.uncertainty) {
            (Some(_), u) => u.corrected_ah.as_ref().map(|b| b.half_width()),
            (None, u) => u.measured_ah.as_ref().map(|b| b.half_width()),
        },
        soh_u95_pct: s
            .verdict
            .soh_pct
            .get()
            .and(s.verdict.uncertainty.soh_pct.as_ref())
            .map(|b| b.half_width()),
        grade: s.verdict.grade_label().map(str::to_string),
        grade_conditional: s
            .verdict
            .grade
            .value()
            .and_then(|g| g.decision.as_ref())
            .is_some_and(|d| d.conditional),
        resumable: s.status == model::status::RunStatus::Interrupted,
        error: None,
    }
}

fn live_view(l: &Live) -> LiveView {
    LiveView {
        pack_id: l.pack_id.clone(),
        step: l.step,
        steps: l.steps,
        kind: l.kind.map(|k| k.name().to_string()),
        run_t_s: l.run_t_s,
        voltage_v: l.voltage_v,
        current_a: l.current_a,
        power_w: l.power_w,
        step_ah: l.step_ah,
        step_wh: l.step_wh,
        soc_pct: l.soc.map(|s| s * 100.0),
        eta_s: l.eta_s.map(|e| e.0),
        eta_lower_bound: l.eta_s.is_some_and(|e| e.1),
        temperature_c: l.temperature_c,
        alarms: l.alarms.clone(),
        samples: l.samples,
        group_low: l.group_low,
        group_high: l.group_high,
    }
}

impl Bay {
    /// The bay now.
    pub fn view(&self) -> BayView {
        let kind = match self.kind {
            BayKind::Sim { .. } => "simulated",
            BayKind::Station { .. } => "station",
        };
        let guard = match self.job.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        let Some(job) = guard.as_ref() else {
            let previous = match self.previous.lock() {
                Ok(g) => g.clone(),
                Err(p) => p.into_inner().clone(),
            };
            let result = previous
                .and_then(|dir| record::read::read_summary(&dir.join(record::SUMMARY_JSON)).ok())
                .map(|s| result_of(&s));
            return BayView {
                name: self.name.clone(),
                kind,
                state: if result.is_some() {
                    "interrupted"
                } else {
                    "idle"
                },
                live: None,
                result,
            };
        };
        let live = job.board.get();
        let done = match job.done.lock() {
            Ok(g) => g.clone(),
            Err(p) => p.into_inner().clone(),
        };
        let result = done.map(|r| match r {
            Ok(r) => result_of(&r.summary),
            Err(e) => ResultView {
                pack_id: live.pack_id.clone(),
                run_id: String::new(),
                status: "failed".into(),
                stop_reason: None,
                capacity_ah: None,
                soh_pct: None,
                capacity_u95_ah: None,
                soh_u95_pct: None,
                grade: None,
                grade_conditional: false,
                resumable: false,
                error: Some(e),
            },
        });
        let state = match (&result, live.state) {
            (Some(r), _) if r.status == "failed" => "failed",
            (Some(r), _) => match r.status.as_str() {
                "completed" => "completed",
                "aborted" => "aborted",
                "interrupted" => "interrupted",
                _ => "failed",
            },
            (None, BoardState::Starting) => "starting",
            (None, _) => "running",
        };
        BayView {
            name: self.name.clone(),
            kind,
            state,
            live: Some(live_view(&live)),
            result,
        }
    }

    /// Whether a run is going on (started and not ended).
    pub fn busy(&self) -> bool {
        let guard = match self.job.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        guard.as_ref().is_some_and(|j| {
            let done = match j.done.lock() {
                Ok(g) => g.is_some(),
                Err(p) => p.into_inner().is_some(),
            };
            !done
        })
    }

    /// The run folder of the bay's last run, if it ran.
    pub fn last_run_dir(&self) -> Option<PathBuf> {
        let guard = match self.job.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        let Some(job) = guard.as_ref() else {
            return match self.previous.lock() {
                Ok(g) => g.clone(),
                Err(p) => p.into_inner().clone(),
            };
        };
        let done = match job.done.lock() {
            Ok(g) => g.clone(),
            Err(p) => p.into_inner().clone(),
        };
        match done {
            Some(Ok(r)) => Some(r.run_dir),
            _ => None,
        }
    }
}

/// The request a start form makes, checked field by field before the
/// checks `packbench run` makes (the same `prepare`).
pub fn request(
    bay: &Bay,
    form: &StartForm,
    procedures: &[(String, PathBuf)],
    results: &Path,
) -> Result<RunRequest, FieldErrors> {
    let mut errors = FieldErrors::default();
    let pack_id = form.pack_id.trim().to_string();
    if let Err(e) = model::pack::check_pack_id(&pack_id) {
        errors.0.insert("pack_id".into(), e.to_string());
    }
    let procedure = procedures
        .iter()
        .find(|(name, _)| *name == form.procedure)
        .map(|(_, p)| p.clone());
    if procedure.is_none() {
        errors.0.insert(
            "procedure".into(),
            format!(
                "'{}' is not one of this console's procedures",
                form.procedure
            ),
        );
    }
    let pack = match crate::session::fields::pack_spec(
        Some(&form.chemistry),
        Some(&form.series),
        Some(&form.rated),
    ) {
        Ok(Some(spec)) => PackSource::Given(spec),
        Ok(None) => PackSource::Saved {
            allow_sim_default: matches!(bay.kind, BayKind::Sim { .. }),
        },
        Err(e) => {
            errors.0.insert(e.field.form_name().into(), e.message);
            PackSource::Saved {
                allow_sim_default: false,
            }
        }
    };
    if !errors.0.is_empty() {
        return Err(errors);
    }
    Ok(RunRequest {
        procedure: procedure.unwrap_or_default(),
        pack_id,
        pack,
        results: results.to_path_buf(),
        options: RunOptions::default(),
    })
}

/// Which field a refusal of `prepare` belongs to: by its kind, never by
/// its words.
pub fn field_of(e: &RunError) -> FieldErrors {
    use crate::session::error::InputError;
    let field = match e {
        RunError::Input(InputError::PackId(_)) => "pack_id",
        RunError::Input(InputError::Field(f)) => f.field.form_name(),
        // A saved pack spec that does not read is the spec's; any other
        // located error is the procedure's.
        RunError::Input(InputError::Located(l))
            if l.0
                .iter()
                .any(|x| x.location.file.ends_with(record::PACK_TOML)) =>
        {
            "rated"
        }
        RunError::Input(InputError::Located(_)) => "procedure",
        _ => "",
    };
    FieldErrors::one(field, e.to_string())
}

/// Where a bay's job runs.
pub fn bench_of(bay: &Bay) -> JobBench {
    match &bay.kind {
        BayKind::Sim { cfg, speed } => JobBench::Sim {
            cfg: (**cfg).clone(),
            speed: Speed::Factor(*speed),
            station: None,
        },
        BayKind::Station { spec, file } => JobBench::of_station(
            (**spec).clone(),
            file.clone(),
            SimConfig::default(),
            Speed::Factor(1.0),
        ),
    }
}

/// The interrupted runs of paced simulated benches in the results folder
/// (a simulated console stopped by Ctrl-C or a restart), newest first, at
/// most `bays` of them: each simulated bay offers one for resume.
pub fn interrupted_simulated(results: &Path, bays: usize) -> Vec<PathBuf> {
    let Ok(mut ix) = record::index::Index::open(results) else {
        return Vec::new();
    };
    if ix.refresh(results).is_err() {
        return Vec::new();
    }
    let rows = ix
        .query_strings("SELECT pack_id, folder FROM runs WHERE status = 'interrupted'")
        .unwrap_or_default();
    let mut found: Vec<(String, PathBuf)> = rows
        .iter()
        .filter_map(|row| {
            let [pack, folder] = &row[..] else {
                return None;
            };
            let dir = results.join(pack).join(folder);
            let m = record::read::read_manifest(&dir.join(record::RUN_JSON)).ok()?;
            let simulated_bay = m.simulation.is_some()
                && m.bench.bench_file.is_none()
                && m.bench.speed_factor.is_some();
            simulated_bay.then_some((m.started_utc, dir))
        })
        .collect();
    found.sort_by(|a, b| b.0.cmp(&a.0));
    found.into_iter().take(bays).map(|(_, d)| d).collect()
}

/// The latest interrupted run of each of a bench file's stations, from
/// the results index (runs whose `run.json` names this bench file and the
/// station).
pub fn interrupted_by_station(
    results: &Path,
    bench_file: &Path,
) -> std::collections::HashMap<String, PathBuf> {
    let mut out: std::collections::HashMap<String, (String, PathBuf)> = Default::default();
    let Ok(mut ix) = record::index::Index::open(results) else {
        return Default::default();
    };
    if ix.refresh(results).is_err() {
        return Default::default();
    }
    let rows = ix
        .query_strings("SELECT pack_id, folder FROM runs WHERE status = 'interrupted'")
        .unwrap_or_default();
    let ours = bench_file.canonicalize().ok();
    for row in rows {
        let [pack, folder] = &row[..] else { continue };
        let dir = results.join(pack).join(folder);
        let Ok(m) = record::read::read_manifest(&dir.join(record::RUN_JSON)) else {
            continue;
        };
        let (Some(file), Some(station)) = (&m.bench.bench_file, &m.bench.station) else {
            continue;
        };
        let same = Path::new(file).canonicalize().ok() == ours && ours.is_some()
            || Path::new(file) == bench_file;
        if !same {
            continue;
        }
        let newer = out
            .get(station)
            .is_none_or(|(started, _)| m.started_utc > *started);
        if newer {
            out.insert(station.clone(), (m.started_utc.clone(), dir));
        }
    }
    out.into_iter().map(|(k, (_, d))| (k, d)).collect()
}
