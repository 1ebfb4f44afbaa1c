//! The results index (`results/index.sqlite`): the fleet ranked from it is
//! the fleet ranked by reading every folder; a folder changed, added or
//! removed behind its back is noticed; `packbench index` killed anywhere
//! leaves every pack either as it was or as it is, and the next run
//! completes it with nothing twice.

use crate::util::*;
use analysis::fade::schedule::Schedule;
use record::index::Index;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

/// A real summary to copy: a simulated capacity check, run once into
/// `dir/seed` (pack FR-SEED).
pub(crate) fn template(dir: &Path) -> record::Summary {
    let seed = dir.join("seed");
    if let Some(run) = std::fs::read_dir(seed.join("FR-SEED")).ok().and_then(|d| {
        d.map(|e| e.unwrap().path())
            .find(|p| p.join("summary.json").is_file())
    }) {
        return record::read::read_summary(&run.join("summary.json")).unwrap();
    }
    let out = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--sim",
        "--pack",
        "FR-SEED",
        "--quiet",
        "--chemistry",
        "li-ion",
        "--series",
        "10",
        "--rated",
        "14Ah",
        "--results",
        seed.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let run = std::fs::read_dir(seed.join("FR-SEED"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.join("summary.json").is_file())
        .unwrap();
    record::read::read_summary(&run.join("summary.json")).unwrap()
}

fn today() -> chrono::NaiveDate {
    chrono::NaiveDate::from_ymd_opt(2026, 1, 1).unwrap()
}

fn walk(results: &Path) -> analysis::fade::fleet::Fleet {
    record::history::fleet(results, today(), &Schedule::interval(92), 80.0)
        .unwrap()
        .0
}

fn indexed(results: &Path) -> (analysis::fade::fleet::Fleet, record::index::Refreshed) {
    record::index::fleet(results, today(), &Schedule::interval(92), 80.0).unwrap()
}

fn count(ix: &Index, sql: &str) -> usize {
    ix.query_strings(sql).unwrap()[0][0].parse().unwrap()
}

#[test]
fn the_index_ranks_as_the_folders_do_and_follows_them() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    packbench::cli::demo::synthetic_fleet(&results, 30, 6, &template(dir.path())).unwrap();
    let (f, r) = indexed(&results);
    assert_eq!(r.runs_read, 180);
    assert_eq!(f, walk(&results), "the same ranking and figures either way");
    // Nothing changed: nothing read again.
    let (_, r) = indexed(&results);
    assert_eq!((r.runs_read, r.packs_read), (0, 0));
    // A summary rewritten behind the index's back is read again.
    let pack = results.join("FR-B00007");
    let run: PathBuf = std::fs::read_dir(&pack)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_dir())
        .max()
        .unwrap();
    let mut s = record::read::read_summary(&run.join("summary.json")).unwrap();
    if let Some(c) = s.capacity.as_mut() {
        c.measured_ah = 7.0;
        c.corrected_ah = Some(7.0);
    }
    record::verdict::rejudge(
        &mut s,
        Some(&analysis::fade::grade::Policy::default_policy()),
    );
    // A new size, so the stamp changes even within the clock's resolution.
    record::write::write_json(&run.join("summary.json"), &s).unwrap();
    let (f, r) = indexed(&results);
    assert_eq!(r.runs_read, 1);
    assert_eq!(f, walk(&results));
    assert_eq!(f.rows.last().unwrap().pack_id, "FR-B00007", "now the worst");
    // A run folder removed, a pack removed, a history file added.
    std::fs::remove_dir_all(&run).unwrap();
    std::fs::remove_dir_all(results.join("FR-B00011")).unwrap();
    std::fs::write(
        results.join("FR-B00003/history.csv"),
        "date,cycles,capacity_ah\n2023-06-01,,14.2\n",
    )
    .unwrap();
    let (f, r) = indexed(&results);
    assert_eq!((r.runs_dropped, r.packs_dropped, r.packs_read), (1, 1, 1));
    assert_eq!(f, walk(&results));
    assert_eq!(f.rows.len(), 29);
    // The shop's questions in SQL.
    let ix = Index::open(&results).unwrap();
    assert_eq!(count(&ix, "SELECT COUNT(*) FROM runs"), 29 * 6 - 1);
    assert_eq!(
        count(
            &ix,
            "SELECT COUNT(DISTINCT pack_id) FROM runs WHERE soh_pct < 85"
        ),
        f.rows
            .iter()
            .filter(|r| record::history::load(&results, &r.pack_id, None)
                .unwrap()
                .points
                .iter()
                .any(|p| p.soh_pct < 85.0 && p.source.starts_with("run")))
            .count()
    );
    assert!(count(&ix, "SELECT COUNT(*) FROM steps") >= (29 * 6 - 1) * 5);
    // Cycles and resistance readings, as the summaries hold them.
    let summaries: Vec<record::Summary> = f
        .rows
        .iter()
        .flat_map(|r| record::history::run_summaries(&results.join(&r.pack_id)).unwrap())
        .map(|(_, s)| s)
        .collect();
    assert_eq!(summaries.len(), 29 * 6 - 1);
    let cycles: usize = summaries.iter().map(|s| s.cycles.len()).sum();
    assert!(cycles > 0);
    assert_eq!(count(&ix, "SELECT COUNT(*) FROM cycles"), cycles);
    let readings: usize = summaries
        .iter()
        .map(|s| s.resistance.as_ref().map_or(0, |r| r.readings.len()))
        .sum();
    assert_eq!(count(&ix, "SELECT COUNT(*) FROM resistance"), readings);
    drop(ix);
    // An index of an older layout is thrown away and built again.
    {
        let c = rusqlite_free_set_schema(&results, "1");
        assert!(c);
    }
    let (f2, r) = indexed(&results);
    assert_eq!(r.runs_read, 29 * 6 - 1, "every run read again");
    assert_eq!(f2, f);
    let ix = Index::open(&results).unwrap();
    assert_eq!(
        ix.query_strings("SELECT value FROM meta WHERE key = 'schema'")
            .unwrap()[0][0],
        record::index::INDEX_SCHEMA.to_string()
    );
}

/// Mark the index as written by an older layout (through the index's own
/// connection: the test has no SQLite of its own).
fn rusqlite_free_set_schema(results: &Path, v: &str) -> bool {
    let ix = Index::open(results).unwrap();
    ix.query_strings(&format!(
        "UPDATE meta SET value = '{v}' WHERE key = 'schema' RETURNING value"
    ))
    .map(|rows| rows.len() == 1)
    .unwrap_or(false)
}

/// `packbench index` killed with SIGKILL at ten points of a build: every
/// pack in the index has all its runs or none (a pack is one transaction);
/// the next run completes it; nothing is there twice.
#[cfg(unix)]
#[test]
fn an_index_killed_anywhere_is_completed_by_the_next_run() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    let (packs, runs) = (300, 8);
    packbench::cli::demo::synthetic_fleet(&results, packs, runs, &template(dir.path())).unwrap();
    // How long a whole build takes here, to spread the kills over it.
    let t0 = std::time::Instant::now();
    let out = packbench(&["index", results.to_str().unwrap(), "--rebuild"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let whole = t0.elapsed();
    let mut partial_seen = 0;
    for k in 1..=10u32 {
        let mut child = Command::new(BIN)
            .args(["index", results.to_str().unwrap(), "--rebuild"])
            .stdout(std::process::Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(whole.mul_f64(f64::from(k) / 11.0));
        let _ = child.kill();
        let _ = child.wait();
        let ix = Index::open(&results).unwrap();
        let per_pack = ix
            .query_strings(
                "SELECT p.pack_id, (SELECT COUNT(*) FROM runs r WHERE r.pack_id = p.pack_id) FROM packs p",
            )
            .unwrap();
        for row in &per_pack {
            assert_eq!(
                row[1],
                runs.to_string(),
                "pack {} half indexed (kill {k})",
                row[0]
            );
        }
        let orphans = count(
            &ix,
            "SELECT COUNT(*) FROM runs WHERE pack_id NOT IN (SELECT pack_id FROM packs)",
        );
        assert_eq!(orphans, 0, "runs without their pack (kill {k})");
        if per_pack.len() < packs {
            partial_seen += 1;
        }
    }
    assert!(
        partial_seen >= 3,
        "the kills landed mid-build only {partial_seen} times"
    );
    // The next run completes it; nothing twice.
    let out = packbench(&["index", results.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let ix = Index::open(&results).unwrap();
    assert_eq!(count(&ix, "SELECT COUNT(*) FROM packs"), packs);
    assert_eq!(count(&ix, "SELECT COUNT(*) FROM runs"), packs * runs);
    assert_eq!(
        count(
            &ix,
            "SELECT COUNT(*) FROM (SELECT DISTINCT pack_id, run_id FROM runs)"
        ),
        packs * runs
    );
    let (f, r) = indexed(&results);
    assert_eq!(r.runs_read, 0);
    assert_eq!(f, walk(&results));
    let _ = Duration::ZERO;
}
