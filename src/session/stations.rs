//! One way to start a station's run, for `run` (simulated and bench-file
//! stations), `resume` and the console's bays: the request checked
//! (`prepare_for`), the job made (`job`), and the runtime it is driven on
//! (`block_on_local`). The fields of a request and their refusals are in
//! [`crate::session::fields`].

/// Everything a station's run is checked against before anything is
/// touched, for `run` and the console alike: the request (`prepare`: pack
/// id, procedure, spec), then a bench file's station's instruments'
/// ranges against the procedure's setpoints.
pub fn prepare_for(
    req: &crate::session::request::RunRequest,
    station: Option<&crate::session::benchfile::StationSpec>,
) -> Result<crate::session::request::Prepared, crate::session::error::RunError> {
    let prepared = crate::session::prepare::prepare(req)?;
    if let Some(st) = station {
        let (sp, lp) = st.profiles();
        crate::session::prepare::check_ranges(&prepared.procedure, sp, lp)?;
    }
    Ok(prepared)
}

/// A checked job for one station: the request prepared and checked
/// against the bench's station (if any), with its board. The one way
/// `run` and the console make a station's job.
pub fn job(
    name: &str,
    req: &crate::session::request::RunRequest,
    bench: crate::session::request::JobBench,
) -> Result<crate::session::request::StationJob, crate::session::error::RunError> {
    let prepared = prepare_for(req, bench.station().map(|(s, _)| s))?;
    Ok(crate::session::request::StationJob {
        name: name.to_string(),
        board: crate::session::live::Board::new(name, &prepared.pack_id),
        prepared,
        bench,
    })
}

/// The runtime a station's run is driven on, for `run` and the console
/// alike: a current-thread runtime and a local task set (the engine's
/// futures stay on their thread); `body` runs on it, and spawns the runs
/// as local tasks (a panic in one ends that task, whose session has
/// switched the outputs off on its way down). Err when the runtime cannot
/// start.
pub fn block_on_local<Fut: std::future::Future>(body: Fut) -> Result<Fut::Output, String> {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| format!("cannot start the runtime: {e}"))?;
    let local = tokio::task::LocalSet::new();
    Ok(local.block_on(&rt, body))
}
