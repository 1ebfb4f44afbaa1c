//! The JSON API under `/api/`: everything the pages show and do.

use super::bays::{self, Bay, BayKind, FieldErrors, Job, StartForm};
use super::security::refused_names;
use super::Console;
use crate::session::error::RunError;
use crate::session::live::Board;
use crate::session::request::{RunReport, Speed};
use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::response::{IntoResponse, Json, Response};
use engine::control::StopHandle;
use std::convert::Infallible;
use std::sync::{Arc, Mutex};
use std::time::Duration;

/// How often the live stream sends the bays.
pub const STREAM_EVERY: Duration = Duration::from_millis(500);

fn json_error(status: StatusCode, why: impl Into<String>) -> Response {
    (status, Json(serde_json::json!({ "error": why.into() }))).into_response()
}

fn field_errors(e: FieldErrors) -> Response {
    (
        StatusCode::UNPROCESSABLE_ENTITY,
        Json(serde_json::json!({ "errors": e })),
    )
        .into_response()
}

fn unknown_bay(name: &str) -> Response {
    json_error(StatusCode::NOT_FOUND, format!("no bay '{name}'"))
}

pub async fn bays(State(c): State<Arc<Console>>) -> Json<Vec<bays::BayView>> {
    Json(c.bays.iter().map(|b| b.view()).collect())
}

/// Server-sent events: every bay, every half second.
pub async fn stream(
    State(c): State<Arc<Console>>,
) -> Sse<impl futures::Stream<Item = Result<Event, Infallible>>> {
    let closing = c.closing.subscribe();
    let s = futures::stream::unfold((c, true, closing), |(c, first, mut closing)| async move {
        if *closing.borrow() {
            return None;
        }
        if !first {
            tokio::select! {
                _ = tokio::time::sleep(STREAM_EVERY) => {}
                // The console is closing: the stream ends.
                _ = closing.wait_for(|c| *c) => return None,
            }
        }
        let views: Vec<bays::BayView> = c.bays.iter().map(|b| b.view()).collect();
        let data = serde_json::to_string(&views).unwrap_or_else(|_| "[]".into());
        Some((
            Ok(Event::default().event("bays").data(data)),
            (c, false, closing),
        ))
    });
    Sse::new(s).keep_alive(KeepAlive::default())
}

pub async fn procedures(State(c): State<Arc<Console>>) -> Json<Vec<String>> {
    Json(c.procedures.iter().map(|(n, _)| n.clone()).collect())
}

/// The pack of a start form must not be on another bay now.
fn pack_elsewhere(c: &Console, bay: &Bay, pack_id: &str) -> Option<String> {
    c.bays
        .iter()
        .filter(|b| b.name != bay.name && b.busy())
        .find(|b| b.view().live.is_some_and(|l| l.pack_id == pack_id))
        .map(|b| b.name.clone())
}

/// Check a start form as `run` would (nothing is touched) and forecast it
/// on the simulated pack: the dry run shown before the operator confirms.
pub async fn check(
    State(c): State<Arc<Console>>,
    Path(bay): Path<String>,
    Json(form): Json<StartForm>,
) -> Response {
    let Some(b) = c.bay(&bay) else {
        return unknown_bay(&bay);
    };
    let prepared = match prepare(&c, &b, &form) {
        Ok(j) => j.prepared,
        Err(e) => return field_errors(e),
    };
    let cfg = match &b.kind {
        BayKind::Sim { cfg, .. } => (**cfg).clone(),
        BayKind::Station { .. } => sim::SimConfig::default(),
    };
    let plan = prepared.procedure.plan.clone();
    // The dry run plays the plan on a simulated pack: off the server's
    // thread.
    let f =
        match tokio::task::spawn_blocking(move || crate::session::forecast::forecast(&plan, &cfg))
            .await
        {
            Ok(f) => f,
            Err(e) => return json_error(StatusCode::INTERNAL_SERVER_ERROR, e.to_string()),
        };
    Json(serde_json::json!({
        "pack_id": prepared.pack_id,
        "pack_note": prepared.pack_note,
        "plan": prepared.procedure.plan.to_string(),
        "forecast": f,
        "forecast_text": f.to_string(),
    }))
    .into_response()
}

fn prepare(
    c: &Console,
    b: &Bay,
    form: &StartForm,
) -> Result<crate::session::request::StationJob, FieldErrors> {
    let req = bays::request(b, form, &c.procedures, &c.results)?;
    // The same job `run` makes (the request and the station's ranges).
    let job = crate::session::stations::job(&b.name, &req, bays::bench_of(b))
        .map_err(|e| bays::field_of(&e))?;
    if let Some(other) = pack_elsewhere(c, b, &job.prepared.pack_id) {
        return Err(FieldErrors::one(
            "pack_id",
            format!("pack '{}' is on bay {other} now", job.prepared.pack_id),
        ));
    }
    Ok(job)
}

/// A run on its own thread and runtime; its report is kept in `done`.
fn spawn_run<F, Fut>(name: &str, done: bays::Done, make: F)
where
    F: FnOnce() -> Fut + Send + 'static,
    Fut: std::future::Future<Output = Result<RunReport, RunError>> + 'static,
{
    let keep = done.clone();
    let spawned = std::thread::Builder::new()
        .name(format!("bay {name}"))
        .spawn(move || {
            // The runtime `run` drives its stations on.
            let r = crate::session::stations::block_on_local(async move {
                // A panic in the run ends its task here (the session has
                // switched the outputs off on its way down).
                match tokio::task::spawn_local(make()).await {
                    Ok(Ok(r)) => Ok(r),
                    Ok(Err(e)) => Err(e.to_string()),
                    Err(e) => Err(format!("the run's task failed: {e}")),
                }
            })
            .and_then(|r| r);
            let mut g = match keep.lock() {
                Ok(g) => g,
                Err(p) => p.into_inner(),
            };
            *g = Some(r);
        });
    if let Err(e) = spawned {
        let mut g = match done.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        *g = Some(Err(format!("cannot start the bay's thread: {e}")));
    }
}

/// Put a new job on a bay unless it is busy.
fn claim(b: &Bay, board: &Board, resumed: bool) -> Option<(StopHandle, bays::Done)> {
    let mut g = match b.job.lock() {
        Ok(g) => g,
        Err(p) => p.into_inner(),
    };
    let busy = g.as_ref().is_some_and(|j| match j.done.lock() {
        Ok(d) => d.is_none(),
        Err(p) => p.into_inner().is_none(),
    });
    if busy {
        return None;
    }
    let stop = StopHandle::new();
    let done = Arc::new(Mutex::new(None));
    match b.previous.lock() {
        Ok(mut p) => *p = None,
        Err(p) => *p.into_inner() = None,
    }
    *g = Some(Job {
        board: board.clone(),
        stop: stop.clone(),
        done: done.clone(),
        resumed,
    });
    Some((stop, done))
}

pub async fn start(
    State(c): State<Arc<Console>>,
    Path(bay): Path<String>,
    Json(form): Json<StartForm>,
) -> Response {
    let Some(b) = c.bay(&bay) else {
        return unknown_bay(&bay);
    };
    if b.busy() {
        return json_error(StatusCode::CONFLICT, format!("bay {bay} is running a test"));
    }
    let job = match prepare(&c, &b, &form) {
        Ok(j) => j,
        Err(e) => return field_errors(e),
    };
    let Some((stop, done)) = claim(&b, &job.board, false) else {
        return json_error(StatusCode::CONFLICT, format!("bay {bay} is running a test"));
    };
    let em = c.emergency.clone();
    spawn_run(&b.name, done, move || async move {
        crate::session::run(job.session(stop, em, false, None)).await
    });
    (StatusCode::ACCEPTED, Json(b.view())).into_response()
}

/// The safe stop: outputs off, confirmed, the run marked interrupted.
pub async fn stop(State(c): State<Arc<Console>>, Path(bay): Path<String>) -> Response {
    let Some(b) = c.bay(&bay) else {
        return unknown_bay(&bay);
    };
    if !b.busy() {
        return json_error(
            StatusCode::CONFLICT,
            format!("bay {bay} is not running a test"),
        );
    }
    let g = match b.job.lock() {
        Ok(g) => g,
        Err(p) => p.into_inner(),
    };
    if let Some(j) = g.as_ref() {
        j.stop.request_stop();
    }
    drop(g);
    (StatusCode::ACCEPTED, Json(b.view())).into_response()
}

/// Go on with the bay's interrupted run.
pub async fn resume(State(c): State<Arc<Console>>, Path(bay): Path<String>) -> Response {
    let Some(b) = c.bay(&bay) else {
        return unknown_bay(&bay);
    };
    if b.busy() {
        return json_error(StatusCode::CONFLICT, format!("bay {bay} is running a test"));
    }
    let Some(dir) = b.last_run_dir() else {
        return json_error(
            StatusCode::CONFLICT,
            format!("bay {bay} has no run to resume"),
        );
    };
    let (file, speed) = match &b.kind {
        BayKind::Sim { speed, .. } => (None, Some(Speed::Factor(*speed))),
        BayKind::Station { file, .. } => (Some(file.clone()), None),
    };
    let setup = match crate::session::resume::prepare(&dir, file.as_deref(), speed, None) {
        Ok(s) => s,
        Err(e) => return json_error(StatusCode::CONFLICT, e.to_string()),
    };
    let board = Board::new(&b.name, &setup.prepared.pack_id);
    let Some((stop, done)) = claim(&b, &board, true) else {
        return json_error(StatusCode::CONFLICT, format!("bay {bay} is running a test"));
    };
    let em = c.emergency.clone();
    spawn_run(&b.name, done, move || {
        crate::session::resume::execute(setup, board, stop, em)
    });
    (StatusCode::ACCEPTED, Json(b.view())).into_response()
}

/// The fleet, from the results index.
pub async fn packs(State(c): State<Arc<Console>>) -> Response {
    let results = c.results.clone();
    let r = tokio::task::spawn_blocking(move || {
        let today = chrono::Utc::now().date_naive();
        record::index::fleet(
            &results,
            today,
            &analysis::fade::default_schedule(),
            analysis::fade::END_OF_LIFE_PCT,
        )
    })
    .await;
    // A pack on a bay now is being tested, not overdue.
    let testing: Vec<(String, String)> = c
        .bays
        .iter()
        .filter(|b| b.busy())
        .filter_map(|b| Some((b.view().live?.pack_id, b.name.clone())))
        .collect();
    match r {
        Ok(Ok((mut f, _))) => {
            for row in &mut f.rows {
                if let Some((_, bay)) = testing.iter().find(|(p, _)| *p == row.pack_id) {
                    row.overdue = false;
                    row.attention.retain(|a| !a.starts_with("test overdue"));
                    row.attention
                        .insert(0, format!("being tested now on bay {bay}"));
                }
            }
            Json(f).into_response()
        }
        Ok(Err(e)) => json_error(StatusCode::INTERNAL_SERVER_ERROR, e.to_string()),
        Err(e) => json_error(StatusCode::INTERNAL_SERVER_ERROR, e.to_string()),
    }
}

/// One pack's history and fade.
pub async fn pack(State(c): State<Arc<Console>>, Path(pack): Path<String>) -> Response {
    if let Some(r) = refused_names(&[("pack", &pack)]) {
        return r;
    }
    match record::history::load(&c.results, &pack, None) {
        Ok(h) => {
            let fa = analysis::fade::trend::analyze(&h, analysis::fade::END_OF_LIFE_PCT);
            Json(serde_json::json!({ "history": h, "fade": fa })).into_response()
        }
        Err(e) => json_error(StatusCode::NOT_FOUND, e.to_string()),
    }
}

/// One run's summary.
pub async fn run(
    State(c): State<Arc<Console>>,
    Path((pack, run)): Path<(String, String)>,
) -> Response {
    if let Some(r) = refused_names(&[("pack", &pack), ("run", &run)]) {
        return r;
    }
    let path = c.results.join(&pack).join(&run).join(record::SUMMARY_JSON);
    if let Err(e) = record::write::refuse_links_below(&c.results, &path) {
        return json_error(StatusCode::FORBIDDEN, e.to_string());
    }
    match record::read::read_summary(&path) {
        Ok(s) => Json(s).into_response(),
        Err(e) => json_error(StatusCode::NOT_FOUND, e.to_string()),
    }
}
