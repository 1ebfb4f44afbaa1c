//! The results index: `results/index.sqlite`, an embedded SQLite database
//! (compiled in, nothing to install) beside the run folders, which stay the
//! record. It holds each pack's spec and earlier measurements, and each
//! run's figures (status, capacity, state of health, resistance, grade,
//! cycles, its steps), so the fleet is ranked without reading every
//! folder, and a shop can ask its history in SQL.
//!
//! The index can always be thrown away: `refresh` brings it up to the
//! folders by their stamps (a file's size and modification time), reading
//! only what changed (a folder changed behind its back is read again) and
//! dropping what is gone. Each pack is brought up to date in one
//! transaction, so a refresh killed anywhere leaves every pack either as
//! it was or as it is now, and the next refresh completes it.

use crate::history::{self, HistoryError, PackHistory, RunFacts, HISTORY_CSV};
use crate::{PACK_TOML, SUMMARY_JSON};
use model::pack::PackSpec;
use rusqlite::{params, Connection, OptionalExtension};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// The index file in a results folder.
pub const INDEX_SQLITE: &str = "index.sqlite";
/// The index layout this build writes and reads.
pub const INDEX_SCHEMA: i64 = 4;

#[derive(Debug, thiserror::Error)]
pub enum IndexError {
    #[error("{path}: {error}")]
    Sql {
        path: PathBuf,
        error: rusqlite::Error,
    },
    #[error("{path}: {error}")]
    Io {
        path: PathBuf,
        error: std::io::Error,
    },
    #[error(transparent)]
    History(#[from] HistoryError),
    #[error("{path}: index layout {found} is newer than this build's ({INDEX_SCHEMA}); remove the file to rebuild it")]
    Newer { path: PathBuf, found: i64 },
}

const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS packs (
    pack_id TEXT PRIMARY KEY,
    stamp TEXT NOT NULL,
    chemistry TEXT NOT NULL,
    series INTEGER NOT NULL,
    rated_capacity_ah REAL NOT NULL,
    rated_energy_wh REAL,
    rated_rate_c REAL,
    rated_resistance_mohm REAL,
    spec_toml TEXT NOT NULL,
    history_csv TEXT
);
CREATE TABLE IF NOT EXISTS runs (
    pack_id TEXT NOT NULL,
    folder TEXT NOT NULL,
    run_id TEXT NOT NULL,
    stamp TEXT NOT NULL,
    test_date TEXT NOT NULL,
    status TEXT NOT NULL,
    stop_reason TEXT,
    cycle_count REAL,
    capacity_ah REAL,
    corrected_ah REAL,
    soh_pct REAL,
    from_full_charge INTEGER,
    preceded_by TEXT,
    dcir_mohm REAL,
    coulombic_efficiency_pct REAL,
    grade TEXT,
    discharged_ah REAL NOT NULL,
    counts_for_history INTEGER NOT NULL,
    not_counted TEXT,
    resistance_growth_pct REAL,
    ieee450_percent REAL,
    soh_u95_pct REAL,
    grade_conditional INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (pack_id, folder)
);
CREATE TABLE IF NOT EXISTS steps (
    pack_id TEXT NOT NULL,
    folder TEXT NOT NULL,
    step INTEGER NOT NULL,
    kind TEXT NOT NULL,
    duration_s REAL NOT NULL,
    charge_in_ah REAL NOT NULL,
    charge_out_ah REAL NOT NULL,
    PRIMARY KEY (pack_id, folder, step)
);
CREATE TABLE IF NOT EXISTS cycles (
    pack_id TEXT NOT NULL,
    folder TEXT NOT NULL,
    cycle INTEGER NOT NULL,
    charge_ah REAL NOT NULL,
    discharge_ah REAL NOT NULL,
    charge_wh REAL NOT NULL,
    discharge_wh REAL NOT NULL,
    coulombic_efficiency_pct REAL,
    energy_efficiency_pct REAL,
    PRIMARY KEY (pack_id, folder, cycle)
);
CREATE TABLE IF NOT EXISTS resistance (
    pack_id TEXT NOT NULL,
    folder TEXT NOT NULL,
    seq INTEGER NOT NULL,
    step INTEGER NOT NULL,
    dcir_mohm REAL NOT NULL,
    method TEXT NOT NULL,
    soc_pct REAL,
    PRIMARY KEY (pack_id, folder, seq)
);
CREATE INDEX IF NOT EXISTS runs_by_date ON runs (test_date);
CREATE INDEX IF NOT EXISTS runs_in_order ON runs (pack_id, test_date, run_id);
";

/// What a refresh did.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Refreshed {
    pub packs: usize,
    pub packs_read: usize,
    pub runs_read: usize,
    pub runs_dropped: usize,
    pub packs_dropped: usize,
    /// Packs whose records could not be read (pack id, why): left out,
    /// and the rest read on.
    pub skipped: Vec<(String, String)>,
}

/// An open index.
pub struct Index {
    conn: Connection,
    path: PathBuf,
}

/// What the index holds of a pack: its stamp and its runs' stamps.
#[derive(Debug, Default)]
struct Known {
    stamp: Option<String>,
    runs: BTreeMap<String, String>,
}

/// The stamp of a pack's own files.
fn pack_stamp(dir: &Path) -> String {
    format!(
        "{}|{}",
        stamp(&dir.join(PACK_TOML)),
        stamp(&dir.join(HISTORY_CSV))
    )
}

/// The run folders of a pack that hold a summary, with its stamp.
fn run_stamps(dir: &Path) -> std::io::Result<Vec<(String, PathBuf, String)>> {
    let mut now = Vec::new();
    for e in std::fs::read_dir(dir)?.flatten() {
        let summary = e.path().join(SUMMARY_JSON);
        let st = stamp(&summary);
        if st == "-" {
            continue;
        }
        now.push((e.file_name().to_string_lossy().into_owned(), summary, st));
    }
    Ok(now)
}

/// Does a pack's folder differ from what the index holds of it?
fn pack_changed(results: &Path, id: &str, known: Option<&Known>) -> bool {
    let Some(k) = known else { return true };
    let dir = results.join(id);
    if k.stamp.as_deref() != Some(pack_stamp(&dir).as_str()) {
        return true;
    }
    match run_stamps(&dir) {
        Ok(now) => {
            now.len() != k.runs.len()
                || now.iter().any(|(name, _, st)| k.runs.get(name) != Some(st))
        }
        Err(_) => true,
    }
}

/// A pack's spec (checked), its text, and its earlier measurements' text
/// (checked too, so a bad file is said when the pack is indexed).
fn read_pack_files(dir: &Path) -> Result<(PackSpec, String, Option<String>), IndexError> {
    let spec_path = dir.join(PACK_TOML);
    let spec_text = model::procedure::read_text(&spec_path).map_err(|error| IndexError::Io {
        path: spec_path.clone(),
        error,
    })?;
    let spec = PackSpec::from_toml(&spec_path, &spec_text)
        .map_err(|e| IndexError::History(HistoryError::Pack(e.to_string())))?;
    let csv_path = dir.join(HISTORY_CSV);
    let csv = if csv_path.is_file() {
        let text = model::procedure::read_text(&csv_path).map_err(|error| IndexError::Io {
            path: csv_path.clone(),
            error,
        })?;
        history::parse_history_csv(&csv_path, &text, spec.rated_capacity_ah)?;
        Some(text)
    } else {
        None
    };
    Ok((spec, spec_text, csv))
}

/// A file's stamp: size and modification time (ns), or "-" if absent.
fn stamp(path: &Path) -> String {
    match std::fs::metadata(path) {
        Ok(m) => {
            let t = m
                .modified()
                .ok()
                .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
                .map_or(0, |d| d.as_nanos());
            format!("{}:{t}", m.len())
        }
        Err(_) => "-".into(),
    }
}

impl Index {
    /// Open (or create) the index of a results folder.
    pub fn open(results: &Path) -> Result<Index, IndexError> {
        let path = results.join(INDEX_SQLITE);
        std::fs::create_dir_all(results).map_err(|error| IndexError::Io {
            path: results.to_path_buf(),
            error,
        })?;
        let sql = |error| IndexError::Sql {
            path: path.clone(),
            error,
        };
        let conn = Connection::open(&path).map_err(sql)?;
        conn.busy_timeout(std::time::Duration::from_secs(10))
            .map_err(sql)?;
        conn.execute_batch("PRAGMA journal_mode = WAL; PRAGMA synchronous = NORMAL;")
            .map_err(sql)?;
        conn.execute_batch(SCHEMA).map_err(sql)?;
        let found: Option<String> = conn
            .query_row("SELECT value FROM meta WHERE key = 'schema'", [], |r| {
                r.get(0)
            })
            .optional()
            .map_err(sql)?;
        match found.and_then(|v| v.parse::<i64>().ok()) {
            Some(v) if v > INDEX_SCHEMA => {
                return Err(IndexError::Newer { path, found: v });
            }
            Some(v) if v < INDEX_SCHEMA => {
                // An older layout: thrown away and built again from the
                // folders (the index can always be).
                conn.execute_batch(
                    "DROP TABLE IF EXISTS packs; DROP TABLE IF EXISTS runs; DROP TABLE IF EXISTS steps; DROP TABLE IF EXISTS cycles; DROP TABLE IF EXISTS resistance; DROP TABLE IF EXISTS meta;",
                )
                .map_err(sql)?;
                conn.execute_batch(SCHEMA).map_err(sql)?;
                conn.execute(
                    "INSERT OR REPLACE INTO meta (key, value) VALUES ('schema', ?1)",
                    params![INDEX_SCHEMA.to_string()],
                )
                .map_err(sql)?;
            }
            Some(_) => {}
            None => {
                conn.execute(
                    "INSERT OR REPLACE INTO meta (key, value) VALUES ('schema', ?1)",
                    params![INDEX_SCHEMA.to_string()],
                )
                .map_err(sql)?;
            }
        }
        Ok(Index { conn, path })
    }

    fn sql(&self) -> impl Fn(rusqlite::Error) -> IndexError + '_ {
        move |error| IndexError::Sql {
            path: self.path.clone(),
            error,
        }
    }

    /// Bring the index up to the folders: every pack's files and every
    /// run's summary are checked by their stamps (on every core), and only
    /// the packs where something changed are read and written again.
    pub fn refresh(&mut self, results: &Path) -> Result<Refreshed, IndexError> {
        let ids = history::pack_ids(results)?;
        let mut out = Refreshed {
            packs: ids.len(),
            ..Refreshed::default()
        };
        let known = self.stamps()?;
        let threads = std::thread::available_parallelism()
            .map_or(1, |n| n.get())
            .max(1);
        let chunk = ids.len().div_ceil(threads).max(1);
        let changed: Vec<String> = std::thread::scope(|sc| {
            let handles: Vec<_> = ids
                .chunks(chunk)
                .map(|part| {
                    let known = &known;
                    sc.spawn(move || {
                        part.iter()
                            .filter(|id| pack_changed(results, id, known.get(id.as_str())))
                            .cloned()
                            .collect::<Vec<String>>()
                    })
                })
                .collect();
            handles
                .into_iter()
                .flat_map(|h| h.join().unwrap_or_default())
                .collect()
        });
        for id in &changed {
            match self.refresh_pack(results, id) {
                Ok((read, runs_read, dropped)) => {
                    out.packs_read += usize::from(read);
                    out.runs_read += runs_read;
                    out.runs_dropped += dropped;
                }
                // One pack's unreadable record does not hide the fleet.
                Err(e @ (IndexError::History(_) | IndexError::Io { .. })) => {
                    out.skipped.push((id.clone(), e.to_string()))
                }
                Err(e) => return Err(e),
            }
        }
        // Packs whose folder is gone.
        for k in known.keys().filter(|k| !ids.contains(k)) {
            let path = self.path.clone();
            let sql = |error| IndexError::Sql {
                path: path.clone(),
                error,
            };
            let tx = self.conn.transaction().map_err(sql)?;
            for t in ["steps", "cycles", "resistance", "runs", "packs"] {
                tx.execute(&format!("DELETE FROM {t} WHERE pack_id = ?1"), params![k])
                    .map_err(sql)?;
            }
            tx.commit().map_err(sql)?;
            out.packs_dropped += 1;
        }
        Ok(out)
    }

    /// Every indexed pack's stamp and its runs' stamps, in one read.
    fn stamps(&self) -> Result<BTreeMap<String, Known>, IndexError> {
        let sql = self.sql();
        let mut out: BTreeMap<String, Known> = BTreeMap::new();
        let mut st = self
            .conn
            .prepare("SELECT pack_id, stamp FROM packs")
            .map_err(&sql)?;
        let rows = st
            .query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?)))
            .map_err(&sql)?;
        for r in rows {
            let (id, stamp) = r.map_err(&sql)?;
            out.entry(id).or_default().stamp = Some(stamp);
        }
        let mut st = self
            .conn
            .prepare("SELECT pack_id, folder, stamp FROM runs")
            .map_err(&sql)?;
        let rows = st
            .query_map([], |r| {
                Ok((
                    r.get::<_, String>(0)?,
                    r.get::<_, String>(1)?,
                    r.get::<_, String>(2)?,
                ))
            })
            .map_err(&sql)?;
        for r in rows {
            let (id, folder, stamp) = r.map_err(&sql)?;
            out.entry(id).or_default().runs.insert(folder, stamp);
        }
        Ok(out)
    }

    /// Bring one pack up to its folder, in one transaction: (whether the
    /// pack's own files were read, runs read, runs dropped).
    pub fn refresh_pack(
        &mut self,
        results: &Path,
        pack_id: &str,
    ) -> Result<(bool, usize, usize), IndexError> {
        model::pack::check_pack_id(pack_id)
            .map_err(|e| IndexError::History(HistoryError::Pack(e.to_string())))?;
        let dir = results.join(pack_id);
        let pack_stamp = pack_stamp(&dir);
        let path = self.path.clone();
        let sql = move |error| IndexError::Sql {
            path: path.clone(),
            error,
        };
        let known_pack: Option<String> = self
            .conn
            .query_row(
                "SELECT stamp FROM packs WHERE pack_id = ?1",
                params![pack_id],
                |r| r.get(0),
            )
            .optional()
            .map_err(&sql)?;
        let mut known_runs: BTreeMap<String, String> = BTreeMap::new();
        {
            let mut st = self
                .conn
                .prepare_cached("SELECT folder, stamp FROM runs WHERE pack_id = ?1")
                .map_err(&sql)?;
            let rows = st
                .query_map(params![pack_id], |r| {
                    Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?))
                })
                .map_err(&sql)?;
            for r in rows {
                let (k, v) = r.map_err(&sql)?;
                known_runs.insert(k, v);
            }
        }
        // What the folder holds now.
        let now = run_stamps(&dir).map_err(|error| IndexError::Io {
            path: dir.clone(),
            error,
        })?;
        let pack_changed = known_pack.as_deref() != Some(pack_stamp.as_str());
        let changed: Vec<&(String, PathBuf, String)> = now
            .iter()
            .filter(|(name, _, st)| known_runs.get(name) != Some(st))
            .collect();
        let gone: Vec<&String> = known_runs
            .keys()
            .filter(|k| !now.iter().any(|(n, _, _)| n == *k))
            .collect();
        if !pack_changed && changed.is_empty() && gone.is_empty() {
            return Ok((false, 0, 0));
        }
        // Read everything first, outside the transaction.
        let pack_row = if pack_changed {
            Some(read_pack_files(&dir)?)
        } else {
            None
        };
        let mut facts = Vec::new();
        for (name, summary, st) in &changed {
            let s = crate::read::read_summary(summary).map_err(HistoryError::from)?;
            let readings = s
                .resistance
                .as_ref()
                .map(|r| r.readings.clone())
                .unwrap_or_default();
            facts.push((
                name.clone(),
                st.clone(),
                RunFacts::of(&s),
                (s.steps, s.cycles, readings),
            ));
        }
        let tx = self.conn.transaction().map_err(&sql)?;
        if let Some((spec, text, csv)) = &pack_row {
            tx.execute(
                "INSERT OR REPLACE INTO packs (pack_id, stamp, chemistry, series, rated_capacity_ah, rated_energy_wh, rated_rate_c, rated_resistance_mohm, spec_toml, history_csv) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
                params![
                    pack_id,
                    pack_stamp,
                    spec.chemistry.to_string(),
                    spec.series,
                    spec.rated_capacity_ah,
                    spec.rated_energy_wh,
                    spec.rated_rate_c,
                    spec.rated_resistance_mohm,
                    text,
                    csv
                ],
            )
            .map_err(&sql)?;
        }
        for k in &gone {
            tx.execute(
                "DELETE FROM runs WHERE pack_id = ?1 AND folder = ?2",
                params![pack_id, k],
            )
            .map_err(&sql)?;
            for table in ["steps", "cycles", "resistance"] {
                tx.execute(
                    &format!("DELETE FROM {table} WHERE pack_id = ?1 AND folder = ?2"),
                    params![pack_id, k],
                )
                .map_err(&sql)?;
            }
        }
        for (name, st, f, (steps, cycles, readings)) in &facts {
            let c = f.capacity.as_ref();
            tx.execute(
                "INSERT OR REPLACE INTO runs (pack_id, folder, run_id, stamp, test_date, status, stop_reason, cycle_count, capacity_ah, corrected_ah, soh_pct, from_full_charge, preceded_by, dcir_mohm, coulombic_efficiency_pct, grade, discharged_ah, counts_for_history, not_counted, resistance_growth_pct, ieee450_percent, soh_u95_pct, grade_conditional) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20, ?21, ?22, ?23)",
                params![
                    pack_id,
                    name,
                    f.run_id,
                    st,
                    f.test_date,
                    f.status.name(),
                    f.stop_reason,
                    f.cycle_count,
                    c.map(|c| c.measured_ah),
                    c.and_then(|c| c.corrected_ah),
                    c.and_then(|c| c.soh_pct),
                    c.map(|c| c.from_full_charge),
                    c.map(|c| c.preceded_by.clone()),
                    f.dcir_mohm,
                    f.coulombic_efficiency_pct,
                    f.grade,
                    f.discharged_ah,
                    f.counts_for_history,
                    f.not_counted,
                    f.resistance_growth_pct,
                    f.ieee450_percent,
                    f.soh_u95_pct,
                    f.grade_conditional
                ],
            )
            .map_err(&sql)?;
            write_children(&tx, pack_id, name, steps, cycles, readings).map_err(&sql)?;
        }
        tx.commit().map_err(&sql)?;
        Ok((pack_changed, facts.len(), gone.len()))
    }

    /// Every indexed pack's history, as the folder walk assembles it.
    pub fn histories(&self, results: &Path) -> Result<Vec<PackHistory>, IndexError> {
        let sql = self.sql();
        let mut runs: BTreeMap<String, Vec<(PathBuf, RunFacts)>> = BTreeMap::new();
        {
            let mut st = self
                .conn
                .prepare(
                    "SELECT pack_id, run_id, test_date, status, stop_reason, cycle_count, capacity_ah, corrected_ah, soh_pct, from_full_charge, preceded_by, dcir_mohm, coulombic_efficiency_pct, grade, discharged_ah, folder, counts_for_history, not_counted, resistance_growth_pct, ieee450_percent, soh_u95_pct, grade_conditional FROM runs ORDER BY pack_id, test_date, run_id",
                )
                .map_err(&sql)?;
            let rows = st
                .query_map([], |r| {
                    let pack: String = r.get(0)?;
                    let run_id: String = r.get(1)?;
                    let status: String = r.get(3)?;
                    let capacity = history::CapacityFacts::from_columns(
                        r.get(6)?,
                        r.get(7)?,
                        r.get(8)?,
                        r.get(9)?,
                        r.get(10)?,
                    );
                    let folder: String = r.get(15)?;
                    Ok((
                        pack,
                        folder,
                        RunFacts {
                            run_id,
                            test_date: r.get(2)?,
                            status: status.parse().unwrap_or(model::status::RunStatus::Aborted),
                            stop_reason: r.get(4)?,
                            cycle_count: r.get(5)?,
                            capacity,
                            dcir_mohm: r.get(11)?,
                            coulombic_efficiency_pct: r.get(12)?,
                            grade: r.get(13)?,
                            discharged_ah: r.get(14)?,
                            counts_for_history: r.get(16)?,
                            not_counted: r.get(17)?,
                            resistance_growth_pct: r.get(18)?,
                            ieee450_percent: r.get(19)?,
                            groups: None,
                            pulse_r50_mohm: None,
                            soh_u95_pct: r.get(20)?,
                            grade_conditional: r.get(21)?,
                        },
                    ))
                })
                .map_err(&sql)?;
            for r in rows {
                let (pack, folder, f) = r.map_err(&sql)?;
                let dir = results.join(&pack).join(folder);
                runs.entry(pack).or_default().push((dir, f));
            }
        }
        let mut st = self
            .conn
            .prepare("SELECT pack_id, chemistry, series, rated_capacity_ah, rated_energy_wh, rated_rate_c, rated_resistance_mohm, history_csv FROM packs ORDER BY pack_id")
            .map_err(&sql)?;
        let rows = st
            .query_map([], |r| {
                Ok((
                    r.get::<_, String>(0)?,
                    r.get::<_, String>(1)?,
                    r.get::<_, u32>(2)?,
                    r.get::<_, f64>(3)?,
                    r.get::<_, Option<f64>>(4)?,
                    r.get::<_, Option<f64>>(5)?,
                    r.get::<_, Option<f64>>(6)?,
                    r.get::<_, Option<String>>(7)?,
                ))
            })
            .map_err(&sql)?;
        let mut out = Vec::new();
        for r in rows {
            let (id, chemistry, series, rated, energy, rate, resistance, csv) = r.map_err(&sql)?;
            let dir = results.join(&id);
            // The spec as it was checked when the pack was indexed.
            let spec = PackSpec {
                chemistry: chemistry
                    .parse()
                    .map_err(|e: String| IndexError::History(HistoryError::Pack(e)))?,
                series,
                rated_capacity_ah: rated,
                rated_energy_wh: energy,
                rated_rate_c: rate,
                rated_resistance_mohm: resistance,
            };
            let pack_runs = runs.remove(&id).unwrap_or_default();
            out.push(history::from_index(
                &id,
                spec,
                csv.as_deref(),
                &dir.join(HISTORY_CSV),
                &pack_runs,
            )?);
        }
        Ok(out)
    }

    /// Run a read-only SQL statement and hand back its rows as text (for
    /// tests and the odd question asked by hand).
    pub fn query_strings(&self, sql_text: &str) -> Result<Vec<Vec<String>>, IndexError> {
        let sql = self.sql();
        let mut st = self.conn.prepare(sql_text).map_err(&sql)?;
        let n = st.column_count();
        let rows = st
            .query_map([], |r| {
                (0..n)
                    .map(|i| {
                        let v: rusqlite::types::Value = r.get(i)?;
                        Ok(match v {
                            rusqlite::types::Value::Null => String::new(),
                            rusqlite::types::Value::Integer(i) => i.to_string(),
                            rusqlite::types::Value::Real(x) => x.to_string(),
                            rusqlite::types::Value::Text(t) => t,
                            rusqlite::types::Value::Blob(_) => "<blob>".into(),
                        })
                    })
                    .collect::<Result<Vec<String>, _>>()
            })
            .map_err(&sql)?;
        rows.collect::<Result<_, _>>().map_err(&sql)
    }
}

/// A run's steps, cycles and resistance readings, replaced.
fn write_children(
    tx: &rusqlite::Transaction<'_>,
    pack_id: &str,
    name: &str,
    steps: &[analysis::StepSummary],
    cycles: &[analysis::CycleSummary],
    readings: &[analysis::resistance::ResistanceReading],
) -> Result<(), rusqlite::Error> {
    for table in ["steps", "cycles", "resistance"] {
        tx.execute(
            &format!("DELETE FROM {table} WHERE pack_id = ?1 AND folder = ?2"),
            params![pack_id, name],
        )?;
    }
    for c in cycles {
        tx.execute(
            "INSERT OR REPLACE INTO cycles (pack_id, folder, cycle, charge_ah, discharge_ah, charge_wh, discharge_wh, coulombic_efficiency_pct, energy_efficiency_pct) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
            params![pack_id, name, c.cycle, c.charge_ah, c.discharge_ah, c.charge_wh, c.discharge_wh, c.coulombic_efficiency_pct, c.energy_efficiency_pct],
        )?;
    }
    for (k, r) in readings.iter().enumerate() {
        tx.execute(
            "INSERT INTO resistance (pack_id, folder, seq, step, dcir_mohm, method, soc_pct) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
            params![pack_id, name, k as i64, r.step, r.dcir_mohm, r.method, r.soc_pct],
        )?;
    }
    for s in steps {
        tx.execute(
            "INSERT INTO steps (pack_id, folder, step, kind, duration_s, charge_in_ah, charge_out_ah) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
            params![pack_id, name, s.step, s.kind.to_string(), s.duration_s, s.charge_in_ah, s.charge_out_ah],
        )?;
    }
    Ok(())
}

/// The fleet from the index, brought up to the folders first.
pub fn fleet(
    results: &Path,
    today: chrono::NaiveDate,
    schedule: &analysis::fade::schedule::Schedule,
    threshold_pct: f64,
) -> Result<(analysis::fade::fleet::Fleet, Refreshed), IndexError> {
    let mut ix = Index::open(results)?;
    let r = ix.refresh(results)?;
    let hs = ix.histories(results)?;
    Ok((
        analysis::fade::fleet::rank(&hs, today, schedule, threshold_pct),
        r,
    ))
}
