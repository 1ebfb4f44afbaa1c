//! Results leaving the bench: exports read back by other tools, and the
//! central PostgreSQL store.
//!
//! The read-back test needs Python with pandas, pyarrow, polars and DuckDB
//! (`pip install -r scripts/requirements-readback.txt`); the store tests
//! need a PostgreSQL server, named by `PACKBENCH_TEST_PG` (a URL whose user
//! may create databases; `scripts/pg-test-server.sh` starts one). They are
//! `#[ignore]`d, with what they need as the reason, so a plain `cargo test`
//! lists them as ignored rather than passing them unchecked; `.ci/run`
//! installs what they need and runs them with `-- --ignored`, where a
//! missing dependency fails them.

use crate::util::*;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// Fails (does not skip) when python3 cannot import the readers.
fn require_python() {
    let ok = Command::new("python3")
        .args(["-c", "import pandas, pyarrow, polars, duckdb"])
        .stderr(Stdio::null())
        .status()
        .is_ok_and(|s| s.success());
    assert!(
        ok,
        "python3 cannot import pandas, pyarrow, polars and duckdb (pip install -r scripts/requirements-readback.txt)"
    );
}

/// A run left alone and a run interrupted and resumed, exported as Parquet
/// and BDF, read back by pandas, polars and DuckDB (scripts/readback.py):
/// each step's Ah and Wh as summary.json has them, to 1e-9.
#[cfg(unix)]
#[test]
#[ignore = "needs python3 with pandas, pyarrow, polars and duckdb (scripts/requirements-readback.txt); run with -- --ignored"]
fn exports_read_back_with_pandas_polars_and_duckdb_to_the_summary() {
    require_python();
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    write(d, "discharge.toml", &crate::figures::fast_discharge());
    write(d, "full.toml", "[pack]\ninitial_soc = 1.0\n");
    let whole = d.join("whole");
    let out = packbench_in(
        d,
        &[
            "run",
            "discharge.toml",
            "--pack",
            "R0",
            "--sim-config",
            "full.toml",
            "--quiet",
            "--results",
            whole.to_str().unwrap(),
        ],
    );
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let whole_run = run_dirs(&whole.join("R0")).remove(0);
    let ref_ah = json(&whole_run.join("summary.json"))["capacity"]["measured_ah"]
        .as_f64()
        .unwrap();
    crate::figures::interrupt_and_resume(d, 7, 400, 80, ref_ah, 28.0);
    let resumed_run = run_dirs(&d.join("r7").join("R7")).remove(0);
    assert_eq!(
        json(&resumed_run.join("summary.json"))["resumed"]
            .as_array()
            .unwrap()
            .len(),
        1
    );
    // A capacity check too (charge, rest, discharge: several steps).
    let checks = d.join("checks");
    let out = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--sim",
        "--pack",
        "FR-X01",
        "--quiet",
        "--results",
        checks.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let check_run = run_dirs(&checks.join("FR-X01")).remove(0);
    let ex = d.join("export");
    let runs = [&whole_run, &resumed_run, &check_run];
    for run in runs {
        for format in ["parquet", "bdf"] {
            let out = packbench(&[
                "export",
                run.to_str().unwrap(),
                "--format",
                format,
                "--out",
                ex.to_str().unwrap(),
            ]);
            assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
        }
    }
    let out = Command::new("python3")
        .arg("scripts/readback.py")
        .arg(&ex)
        .args(runs)
        .output()
        .unwrap();
    eprintln!("{}", text(&out.stdout));
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}{}",
        text(&out.stdout),
        text(&out.stderr)
    );
    assert_eq!(text(&out.stdout).matches("largest difference").count(), 3);
    // The BDF header: the preferred labels, required ones first.
    let base = format!(
        "FR-X01__{}",
        check_run.file_name().unwrap().to_string_lossy()
    );
    let csv = std::fs::read_to_string(ex.join(format!("{base}.bdf.csv"))).unwrap();
    let header = csv.lines().next().unwrap();
    assert!(
        header.starts_with(
            "Test Time / s,Voltage / V,Current / A,Unix Time / s,Cycle Count / 1,Step Count / 1"
        ),
        "{header}"
    );
    let meta = json(&ex.join(format!("{base}.bdf.metadata.json")));
    assert!(meta["current_sign"]
        .as_str()
        .unwrap()
        .starts_with("positive = into the pack"));
}

/// Bad input to `export` is refused with the reason, nothing written.
#[test]
fn export_refuses_what_it_cannot_export() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let results = d.join("results");
    std::fs::create_dir_all(results.join("FR-1")).unwrap();
    let out = packbench(&[
        "export",
        "../etc",
        "--results",
        results.to_str().unwrap(),
        "--out",
        d.join("o").to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    let out = packbench(&[
        "export",
        "FR-1/../../x",
        "--results",
        results.to_str().unwrap(),
        "--out",
        d.join("o").to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    let out = packbench(&[
        "export",
        "FR-1",
        "--format",
        "xlsx",
        "--results",
        results.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("csv, parquet or bdf"));
    let out = packbench(&[
        "export",
        "FR-1",
        "--results",
        results.to_str().unwrap(),
        "--out",
        d.join("o").to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert!(
        text(&out.stderr).contains("neither a run folder"),
        "{}",
        text(&out.stderr)
    );
    assert!(!d.join("o").exists(), "nothing written");
}

// ---- the central store -------------------------------------------------

/// A fresh database on the test server; fails (does not skip) without one.
fn database(name: &str) -> String {
    let admin = std::env::var("PACKBENCH_TEST_PG")
        .ok()
        .filter(|s| !s.is_empty())
        .expect("no PostgreSQL server: export PACKBENCH_TEST_PG=$(scripts/pg-test-server.sh)");
    let db = format!("pb_{name}_{}", std::process::id());
    let mut c = postgres::Client::connect(&admin, postgres::NoTls).unwrap();
    c.batch_execute(&format!("DROP DATABASE IF EXISTS {db} WITH (FORCE)"))
        .unwrap();
    c.batch_execute(&format!("CREATE DATABASE {db}")).unwrap();
    let mut url = admin.clone();
    let cut = url.rfind('/').unwrap();
    url.truncate(cut + 1);
    url.push_str(&db);
    url
}

fn pg(url: &str) -> postgres::Client {
    postgres::Client::connect(url, postgres::NoTls).unwrap()
}

fn count(c: &mut postgres::Client, sql: &str) -> i64 {
    c.query_one(sql, &[]).unwrap().get(0)
}

/// A made-up fleet under `results`, from a real summary (the seed run
/// is in `results/../seed`).
fn synthetic(results: &Path, packs: usize, runs: usize) {
    let template = crate::index::template(results.parent().unwrap());
    packbench::cli::demo::synthetic_fleet(results, packs, runs, &template).unwrap();
}

fn sync(url: &str, results: &Path, extra: &[&str]) -> String {
    let mut args = vec!["sync", "--to", url, results.to_str().unwrap()];
    args.extend_from_slice(extra);
    let out = packbench(&args);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    text(&out.stdout)
}

/// Every run in the store is whole: its steps and cycles as its summary
/// lists them, its samples as many as the summary counted when pushed
/// with them.
fn assert_whole(c: &mut postgres::Client, when: &str) {
    let broken = count(
        c,
        "SELECT COUNT(*) FROM runs r WHERE
           (SELECT COUNT(*) FROM steps s WHERE s.pack_id = r.pack_id AND s.run_id = r.run_id)
             <> jsonb_array_length(r.summary -> 'steps')
        OR (SELECT COUNT(*) FROM cycles s WHERE s.pack_id = r.pack_id AND s.run_id = r.run_id)
             <> jsonb_array_length(r.summary -> 'cycles')
        OR (r.with_samples AND (SELECT COUNT(*) FROM samples s WHERE s.pack_id = r.pack_id AND s.run_id = r.run_id)
             <> (r.summary ->> 'samples')::bigint)",
    );
    assert_eq!(broken, 0, "runs half there ({when})");
    let orphans = count(
        c,
        "SELECT COUNT(*) FROM runs WHERE pack_id NOT IN (SELECT pack_id FROM packs)",
    );
    assert_eq!(orphans, 0, "runs without their pack ({when})");
}

/// A sync pushes each run once; a second finds everything there; a summary
/// changed since is replaced; `fleet --db` ranks as `fleet` does from the
/// folders; a store of a newer layout is refused by name.
#[test]
#[ignore = "needs a PostgreSQL server named by PACKBENCH_TEST_PG (scripts/pg-test-server.sh); run with -- --ignored"]
fn sync_pushes_each_run_once_and_the_fleet_from_the_store_is_the_fleet() {
    let url = database("once");
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    synthetic(&results, 20, 6);
    let first = sync(&url, &results, &["--bench", "depot-north"]);
    assert!(first.contains("120 runs pushed"), "{first}");
    let again = sync(&url, &results, &["--bench", "depot-north"]);
    assert!(again.contains("0 runs pushed"), "{again}");
    assert!(again.contains("120 already there"), "{again}");
    let mut c = pg(&url);
    assert_eq!(count(&mut c, "SELECT COUNT(*) FROM runs"), 120);
    assert_eq!(count(&mut c, "SELECT COUNT(*) FROM packs"), 20);
    assert_whole(&mut c, "after two syncs");
    // A summary rewritten since (an analysis redone): replaced, not doubled.
    let pack = results.join("FR-B00004");
    let run = run_dirs(&pack).pop().unwrap();
    let mut s = record::read::read_summary(&run.join("summary.json")).unwrap();
    if let Some(cap) = s.capacity.as_mut() {
        cap.measured_ah = 6.0;
        cap.corrected_ah = Some(6.0);
    }
    let want = 6.0 / s.pack.rated_capacity_ah.unwrap() * 100.0;
    record::verdict::rejudge(
        &mut s,
        Some(&analysis::fade::grade::Policy::default_policy()),
    );
    record::write::write_json(&run.join("summary.json"), &s).unwrap();
    let third = sync(&url, &results, &["--bench", "depot-north"]);
    assert!(third.contains("1 replaced"), "{third}");
    assert_eq!(count(&mut c, "SELECT COUNT(*) FROM runs"), 120);
    let soh: f64 = c
        .query_one(
            "SELECT soh_pct FROM runs WHERE pack_id = 'FR-B00004' ORDER BY test_date DESC LIMIT 1",
            &[],
        )
        .unwrap()
        .get(0);
    assert!((soh - want).abs() < 1e-9, "{soh} {want}");
    // The same fleet from the store as from the folders, byte for byte.
    let args = |src: &[&str]| {
        let mut a = vec!["fleet", "--today", "2026-06-01", "--json"];
        a.extend_from_slice(src);
        let out = packbench(&a);
        assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
        text(&out.stdout)
    };
    let from_db = args(&["--db", &url]);
    let from_folders = args(&["--walk", results.to_str().unwrap()]);
    assert_eq!(from_db, from_folders);
    assert!(from_db.contains("FR-B00004"));
    // A store written by a newer layout is refused by name.
    c.execute(
        "UPDATE packbench_meta SET value = '99' WHERE key = 'schema'",
        &[],
    )
    .unwrap();
    let out = packbench(&["sync", "--to", &url, results.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        text(&out.stderr).contains("layout version 99 is newer"),
        "{}",
        text(&out.stderr)
    );
}

/// `packbench sync --samples` killed with SIGKILL at twelve points of a
/// sync into an empty store, each aimed by state (once 1/13, 2/13, … of
/// the runs are in the store): every run in the store is whole (a run is
/// one transaction); the next sync pushes exactly what is missing; nothing
/// is there twice.
#[cfg(unix)]
#[test]
#[ignore = "needs a PostgreSQL server named by PACKBENCH_TEST_PG (scripts/pg-test-server.sh); run with -- --ignored"]
fn a_sync_killed_anywhere_is_completed_by_the_next_with_nothing_twice() {
    let url = database("kill");
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    let (packs, runs) = (40, 6);
    synthetic(&results, packs, runs);
    // Real samples in a few runs, so some transactions are long.
    let seed = dir.path().join("seed");
    let seed_run = run_dirs(&seed.join("FR-SEED")).remove(0);
    for p in (0..packs).step_by(8) {
        let run = run_dirs(&results.join(format!("FR-B{p:05}"))).remove(0);
        std::fs::copy(seed_run.join("samples.csv"), run.join("samples.csv")).unwrap();
        std::fs::copy(seed_run.join("events.jsonl"), run.join("events.jsonl")).unwrap();
    }
    // How long a whole sync takes here, into a scratch database.
    let scratch = database("killscratch");
    let t0 = Instant::now();
    sync(&scratch, &results, &["--samples"]);
    let whole = t0.elapsed();
    eprintln!("a whole sync: {:.2} s", whole.as_secs_f64());
    // The schema, from a sync of nothing.
    let empty = dir.path().join("empty");
    std::fs::create_dir_all(&empty).unwrap();
    sync(&url, &empty, &[]);
    let mut c = pg(&url);
    let samples = record::read::read_samples(&seed_run.join("samples.csv"))
        .unwrap()
        .samples
        .len() as i64;
    let mut partial_seen = 0;
    for k in 1..=12u32 {
        // Each round from an empty store, killed further into the sync.
        c.batch_execute("TRUNCATE packs, runs, steps, cycles, events, samples")
            .unwrap();
        let mut child = Command::new(BIN)
            .args(["sync", "--to", &url, results.to_str().unwrap(), "--samples"])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        // Aimed by state: killed once k thirteenths of the runs are there
        // (polled on the test's own connection), not after a time.
        let target = (u64::from(k) * (packs * runs) as u64).div_ceil(13) as i64;
        let t0 = Instant::now();
        while count(&mut c, "SELECT COUNT(*) FROM runs") < target
            && child.try_wait().ok().flatten().is_none()
            && t0.elapsed() < whole * 20
        {
            std::thread::sleep(std::time::Duration::from_millis(2));
        }
        let _ = child.kill();
        let _ = child.wait();
        assert_whole(&mut c, &format!("kill {k}"));
        let there = count(&mut c, "SELECT COUNT(*) FROM runs");
        eprintln!("kill {k}: {there} of {} runs there", packs * runs);
        if there > 0 && there < (packs * runs) as i64 {
            partial_seen += 1;
        }
        // The next sync completes it, nothing twice.
        let out = sync(&url, &results, &["--samples"]);
        assert!(
            out.contains(&format!("{} runs pushed", packs * runs - there as usize)),
            "kill {k}: {there} there before: {out}"
        );
        assert_whole(&mut c, &format!("after kill {k}"));
        assert_eq!(
            count(&mut c, "SELECT COUNT(*) FROM runs"),
            (packs * runs) as i64
        );
        assert_eq!(
            count(&mut c, "SELECT COUNT(*) FROM runs WHERE with_samples"),
            5
        );
        assert_eq!(count(&mut c, "SELECT COUNT(*) FROM samples"), 5 * samples);
    }
    // Aimed by state, every kill lands mid-sync.
    assert_eq!(
        partial_seen, 12,
        "the kills landed mid-sync only {partial_seen} times of 12"
    );
    let _ = Duration::ZERO;
}

/// Two benches syncing into one store at once, with one pack's folder
/// copied to both: every run there once.
#[cfg(unix)]
#[test]
#[ignore = "needs a PostgreSQL server named by PACKBENCH_TEST_PG (scripts/pg-test-server.sh); run with -- --ignored"]
fn two_benches_syncing_at_once_put_every_run_there_once() {
    let url = database("two");
    let dir = tempfile::tempdir().unwrap();
    let a = dir.path().join("a");
    let b = dir.path().join("b");
    synthetic(&a, 40, 5);
    // Bench b: its own packs (renamed), and three of a's packs copied over.
    synthetic(&b, 40, 5);
    for e in std::fs::read_dir(&b).unwrap() {
        let p = e.unwrap().path();
        let name = p.file_name().unwrap().to_string_lossy().to_string();
        if name.starts_with("FR-B") {
            let new = b.join(name.replace("FR-B", "FR-C"));
            std::fs::rename(&p, &new).unwrap();
            for run in run_dirs(&new) {
                let mut s = record::read::read_summary(&run.join("summary.json")).unwrap();
                s.pack_id = new.file_name().unwrap().to_string_lossy().to_string();
                record::write::write_json(&run.join("summary.json"), &s).unwrap();
            }
        }
    }
    for p in ["FR-B00001", "FR-B00002", "FR-B00003"] {
        let st = Command::new("cp")
            .arg("-r")
            .arg(a.join(p))
            .arg(b.join(p))
            .status()
            .unwrap();
        assert!(st.success());
    }
    let spawn = |results: &Path, bench: &str| {
        Command::new(BIN)
            .args([
                "sync",
                "--to",
                &url,
                results.to_str().unwrap(),
                "--bench",
                bench,
            ])
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap()
    };
    let ca = spawn(&a, "depot-north");
    let cb = spawn(&b, "depot-south");
    let oa = ca.wait_with_output().unwrap();
    let ob = cb.wait_with_output().unwrap();
    assert_eq!(oa.status.code(), Some(0), "{}", text(&oa.stderr));
    assert_eq!(ob.status.code(), Some(0), "{}", text(&ob.stderr));
    let mut c = pg(&url);
    // 200 runs of 40 packs each, the 15 runs of the copied packs once.
    assert_eq!(count(&mut c, "SELECT COUNT(*) FROM runs"), 400);
    assert_eq!(count(&mut c, "SELECT COUNT(*) FROM packs"), 80);
    assert_eq!(
        count(&mut c, "SELECT COUNT(*) FROM runs WHERE bench = 'depot-south'"),
        200 + count(
            &mut c,
            "SELECT COUNT(*) FROM runs WHERE bench = 'depot-south' AND pack_id IN ('FR-B00001', 'FR-B00002', 'FR-B00003')"
        )
    );
    assert_whole(&mut c, "after two benches at once");
    // Both say what they pushed and what was there: together, each once.
    let pushed = |o: &std::process::Output| -> i64 {
        let s = text(&o.stdout);
        let n = s.split(" runs pushed").next().unwrap();
        n.rsplit(' ').next().unwrap().parse().unwrap()
    };
    assert_eq!(pushed(&oa) + pushed(&ob), 400);
}

/// TLS the usual way: a role the server lets in over TLS only syncs with
/// `sslmode=verify-full` and the server's certificate as `PGSSLROOTCERT`,
/// is refused when the certificate cannot be checked (never sent in the
/// clear), and syncs encrypted but unchecked with `require` and no root,
/// as libpq does. The connection comes from the PG* variables alone.
#[test]
#[ignore = "needs a PostgreSQL server named by PACKBENCH_TEST_PG (scripts/pg-test-server.sh); run with -- --ignored"]
fn sync_over_tls_checks_the_servers_certificate() {
    let url = database("tls");
    // The schema, so the refused tries below can be counted.
    let empty = tempfile::tempdir().unwrap();
    sync(&url, empty.path(), &[]);
    let mut c = pg(&url);
    let data: String = c
        .query_one(
            "SELECT setting FROM pg_settings WHERE name = 'data_directory'",
            &[],
        )
        .unwrap()
        .get(0);
    // The test server's own root (scripts/pg-test-server.sh).
    let cert = Path::new(&data).join("root.crt");
    assert!(
        cert.is_file(),
        "{} (scripts/pg-test-server.sh makes it)",
        cert.display()
    );
    let tls_role = c
        .query_one(
            "SELECT COUNT(*) FROM pg_roles WHERE rolname = 'tls_only'",
            &[],
        )
        .unwrap()
        .get::<_, i64>(0);
    assert_eq!(
        tls_role, 1,
        "the test server (scripts/pg-test-server.sh) has a TLS-only role"
    );
    let db = url.rsplit('/').next().unwrap().to_string();
    let hostport = url
        .split('@')
        .nth(1)
        .unwrap()
        .split('/')
        .next()
        .unwrap()
        .to_string();
    let (host, port) = hostport.split_once(':').unwrap();
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    synthetic(&results, 2, 2);
    let run = |root: Option<&Path>, mode: &str| {
        let mut cmd = Command::new(BIN);
        cmd.args(["sync", results.to_str().unwrap()])
            .env("PGHOST", host)
            .env("PGPORT", port)
            .env("PGUSER", "tls_only")
            .env("PGDATABASE", &db)
            .env("PGSSLMODE", mode)
            .env_remove("PGSSLROOTCERT");
        if let Some(r) = root {
            cmd.env("PGSSLROOTCERT", r);
        }
        cmd.output().unwrap()
    };
    // Not over TLS: the server refuses the role.
    let out = run(Some(&cert), "disable");
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    // verify-full without the server's root (not among the system's):
    // refused, never sent in the clear.
    let out = run(None, "verify-full");
    assert_eq!(out.status.code(), Some(1));
    let err = text(&out.stderr).to_lowercase();
    assert!(err.contains("tls") || err.contains("certificate"), "{err}");
    let mut c2 = pg(&url);
    assert_eq!(count(&mut c2, "SELECT COUNT(*) FROM runs"), 0);
    // Checked against its own root: synced.
    let out = run(Some(&cert), "verify-full");
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(
        text(&out.stdout).contains("4 runs pushed"),
        "{}",
        text(&out.stdout)
    );
    // require without a root: encrypted, unchecked, as libpq does.
    let out = run(None, "require");
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(
        text(&out.stdout).contains("4 already there"),
        "{}",
        text(&out.stdout)
    );
    assert_eq!(count(&mut c, "SELECT COUNT(*) FROM runs"), 4);
}
