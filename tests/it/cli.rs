//! The `packbench` binary as a user runs it.

use crate::util::*;
use std::path::Path;
use std::process::{Command, Output};

#[test]
fn the_readme_command_runs_a_capacity_check() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    let out = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--sim",
        "--pack",
        "DEMO-01",
        "--results",
        results.to_str().unwrap(),
    ]);
    let stdout = text(&out.stdout);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{stdout}\n{}",
        text(&out.stderr)
    );
    for needle in [
        "Measured capacity:",
        // Every figure with its uncertainty, and the rule before them.
        "Ah ± ",
        "(k = 2, 95 %)",
        "Decision rule:",
        "Wh",
        "State of health:",
        "coulombic efficiency",
    ] {
        assert!(stdout.contains(needle), "missing '{needle}' in:\n{stdout}");
    }
    let pack_dir = results.join("DEMO-01");
    assert!(pack_dir.join("pack.toml").is_file());
    let runs: Vec<_> = std::fs::read_dir(&pack_dir)
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.path().is_dir())
        .collect();
    assert_eq!(runs.len(), 1);
    let run = runs[0].path();
    for f in ["run.json", "samples.csv", "events.jsonl", "summary.json"] {
        assert!(run.join(f).is_file(), "{f} missing");
    }
    let s: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(run.join("summary.json")).unwrap()).unwrap();
    assert_eq!(s["status"], "completed");
    for k in ["measured_ah", "measured_wh"] {
        assert!(s["capacity"][k].is_f64(), "capacity.{k}");
    }
    assert!(s["verdict"]["soh_pct"]["value"].is_f64(), "verdict.soh_pct");
    for st in s["steps"].as_array().unwrap() {
        for k in ["kind", "duration_s", "charge_ah", "energy_wh", "end_reason"] {
            assert!(!st[k].is_null(), "steps[].{k}");
        }
    }
    let cycle = &s["cycles"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["cycle"] == 1)
        .unwrap()
        .clone();
    for k in [
        "charge_ah",
        "discharge_ah",
        "coulombic_efficiency_pct",
        "energy_efficiency_pct",
    ] {
        assert!(cycle[k].is_f64(), "cycles[].{k}");
    }
    let header = std::fs::read_to_string(run.join("samples.csv")).unwrap();
    assert!(header.starts_with("t_s,step,cycle,voltage_v,current_a,temperature_c\n"));
    // The grade card shows the capacity the state of health is taken on
    // (at rated conditions) with its corrections.
    let html = std::fs::read_to_string(run.join("report.html")).unwrap();
    let corrected = s["verdict"]["corrected_ah"]["value"].as_f64().unwrap();
    assert!(
        html.contains(&format!(
            "<dt>Capacity (corrected)</dt><dd>{corrected:.3} Ah"
        )),
        "the card lacks the corrected capacity {corrected:.3} Ah"
    );

    // A second test of the same pack reuses its saved spec ...
    let again = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--pack",
        "DEMO-01",
        "--results",
        results.to_str().unwrap(),
        "--quiet",
    ]);
    assert_eq!(again.status.code(), Some(0), "{}", text(&again.stderr));
    assert!(text(&again.stdout).starts_with("completed "));
    // ... and refuses a different one.
    let clash = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--pack",
        "DEMO-01",
        "--results",
        results.to_str().unwrap(),
        "--chemistry",
        "lfp",
        "--series",
        "4",
        "--rated",
        "100Ah",
    ]);
    assert_eq!(clash.status.code(), Some(2));
    assert!(
        text(&clash.stderr).contains("was first tested as"),
        "{}",
        text(&clash.stderr)
    );
}

/// Write a broken copy of the capacity check and run it.
fn run_broken(from: &str, to: &str) -> (Output, tempfile::TempDir) {
    let dir = tempfile::tempdir().unwrap();
    let proc_text = std::fs::read_to_string("procedures/capacity-check.toml").unwrap();
    assert!(proc_text.contains(from), "fixture text '{from}' not found");
    let path = dir.path().join("broken.toml");
    std::fs::write(&path, proc_text.replacen(from, to, 1)).unwrap();
    let results = dir.path().join("results");
    let out = packbench(&[
        "run",
        path.to_str().unwrap(),
        "--sim",
        "--pack",
        "P1",
        "--results",
        results.to_str().unwrap(),
    ]);
    (out, dir)
}

fn assert_refused(out: &Output, dir: &Path, needle: &str) {
    let err = text(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(err.contains(needle), "expected '{needle}' in:\n{err}");
    assert!(
        !dir.join("results").exists(),
        "a results folder was created for bad input"
    );
}

#[test]
fn bad_procedures_are_refused_with_a_location_and_nothing_is_created() {
    let (o, d) = run_broken("current_max = \"1C\"", "curent_max = \"1C\"");
    assert_refused(&o, d.path(), "broken.toml:15:1: unknown field `curent_max`");
    let (o, d) = run_broken("current = \"0.5C\"", "current = \"0.5K\"");
    assert_refused(&o, d.path(), "broken.toml:39:13: unknown unit 'K'");
    let (o, d) = run_broken(
        "ends = [\"current < 0.05C\", \"time > 5h\"]",
        "ends = [\"voltage > 4.3V/cell\"]",
    );
    assert_refused(&o, d.path(), "outside the envelope");
    let (o, d) = run_broken(
        "ends = [\"current < 0.05C\", \"time > 5h\"]",
        "ends = [\"current < 0.6C\"]",
    );
    assert_refused(&o, d.path(), "cannot end");
    let (o, d) = run_broken("current = \"0.5C\"", "current = \"2C\"");
    assert_refused(
        &o,
        d.path(),
        "broken.toml:39:13: current 28.000 A is outside the envelope",
    );
}

#[test]
fn unsafe_pack_ids_are_refused() {
    for id in ["../escape", "a/b", "..", ".", ""] {
        let dir = tempfile::tempdir().unwrap();
        let results = dir.path().join("results");
        let out = packbench(&[
            "run",
            "procedures/capacity-check.toml",
            "--sim",
            "--pack",
            id,
            "--results",
            results.to_str().unwrap(),
        ]);
        assert_eq!(
            out.status.code(),
            Some(2),
            "id '{id}': {}",
            text(&out.stderr)
        );
        assert!(
            text(&out.stderr).contains("pack id"),
            "{}",
            text(&out.stderr)
        );
        assert!(!results.exists());
        assert!(!dir.path().join("escape").exists());
    }
}

#[test]
fn bad_pack_options_are_refused() {
    let out = packbench(&[
        "check",
        "procedures/capacity-check.toml",
        "--chemistry",
        "li-ion",
        "--series",
        "10",
        "--rated",
        "14V",
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("a capacity (Ah or mAh)"),
        "{}",
        text(&out.stderr)
    );
    let out = packbench(&[
        "check",
        "procedures/capacity-check.toml",
        "--chemistry",
        "zinc",
        "--series",
        "10",
        "--rated",
        "14Ah",
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("unknown chemistry"));
}

#[test]
fn check_prints_the_resolved_plan() {
    let out = packbench(&[
        "check",
        "procedures/lead-acid-c20.toml",
        "--chemistry",
        "lead-acid",
        "--series",
        "6",
        "--rated",
        "100Ah",
    ]);
    let s = text(&out.stdout);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(s.contains("discharge 5.000 A (constant current)"), "{s}");
    assert!(s.contains("charge 10.000 A to 14.400 V (CC-CV)"), "{s}");
    assert!(s.contains("voltage < 10.500 V"), "{s}");
    assert!(s.contains("<- capacity result"), "{s}");
    // The dry run: each step's expected duration, charge and end, and the total.
    assert!(s.contains("Dry run on the simulated pack"), "{s}");
    assert!(s.contains("Total expected time: "), "{s}");
    let dry = s.split("Dry run").nth(1).unwrap();
    assert!(
        dry.contains("voltage < 10.500 V"),
        "the capacity step ends on its cutoff: {dry}"
    );
    // JSON for tools; --no-dry-run only validates.
    let out = packbench(&[
        "check",
        "procedures/lead-acid-c20.toml",
        "--chemistry",
        "lead-acid",
        "--series",
        "6",
        "--rated",
        "100Ah",
        "--json",
    ]);
    let s = text(&out.stdout);
    let json = &s[s.find("{\n").unwrap()..];
    let f: serde_json::Value = serde_json::from_str(json).unwrap();
    assert_eq!(f["status"], "completed");
    assert!(f["total_s"].as_f64().unwrap() > 20.0 * 3600.0);
    let out = packbench(&[
        "check",
        "procedures/lead-acid-c20.toml",
        "--chemistry",
        "lead-acid",
        "--series",
        "6",
        "--rated",
        "100Ah",
        "--no-dry-run",
    ]);
    assert!(!text(&out.stdout).contains("Dry run"));
}

#[test]
fn a_safety_stop_exits_non_zero() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = dir.path().join("sim.toml");
    std::fs::write(&cfg, "[faults]\nsource_voltage_error_pct = 3.0\n").unwrap();
    let results = dir.path().join("results");
    let out = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--sim",
        "--pack",
        "HOT-1",
        "--results",
        results.to_str().unwrap(),
        "--sim-config",
        cfg.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(3), "{}", text(&out.stdout));
    assert!(text(&out.stdout).contains("aborted"));
    assert!(text(&out.stdout).contains("voltage_max"));
    // A misspelt simulator setting is bad input too.
    std::fs::write(&cfg, "[faults]\nsource_voltage_eror_pct = 3.0\n").unwrap();
    let out = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--pack",
        "HOT-2",
        "--results",
        results.to_str().unwrap(),
        "--sim-config",
        cfg.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("sim.toml:2:1"),
        "{}",
        text(&out.stderr)
    );
}

#[test]
fn demo_then_fade_fleet_and_report_on_its_results() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("demo");
    let o = packbench(&["demo", "--out", out.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let s = text(&o.stdout);
    assert!(
        s.contains("Open the fleet report:") && s.contains("fleet.html"),
        "{s}"
    );
    assert!(s.contains("OVERDUE") && s.contains("ACCELERATING"), "{s}");
    let results = out.join("results");
    let r = results.to_str().unwrap();
    // Rerunning the demo into its own folder is allowed; into a foreign one is not.
    let foreign = dir.path().join("mine");
    std::fs::create_dir_all(&foreign).unwrap();
    std::fs::write(foreign.join("notes.txt"), "keep me").unwrap();
    let o = packbench(&["demo", "--out", foreign.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(1));
    assert!(foreign.join("notes.txt").exists());

    // fade: text, JSON and the HTML report.
    let o = packbench(&["fade", "FR-L04", "--results", r]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let s = text(&o.stdout);
    assert!(
        s.contains("ACCELERATING FADE") && s.contains("End of life at about"),
        "{s}"
    );
    assert!(results.join("FR-L04/fade.html").is_file());
    let o = packbench(&[
        "fade",
        "FR-P01",
        "--results",
        r,
        "--json",
        "--threshold",
        "85%",
    ]);
    let j: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(j["fade"]["threshold_pct"], 85.0);
    assert_eq!(j["history"]["points"].as_array().unwrap().len(), 9);
    assert!(j["fade"]["eol_cycles"]["cycles"].as_f64().unwrap() > 1000.0);
    let o = packbench(&["fade", "../FR-P01", "--results", r]);
    assert_eq!(o.status.code(), Some(2));

    // fleet: table, CSV, JSON, HTML.
    let o = packbench(&["fleet", r, "--today", "2026-11-23"]);
    let s = text(&o.stdout);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    // The table (title, header, 8 packs), then why each overdue pack is due.
    let (why, table): (Vec<&str>, Vec<&str>) = s.lines().partition(|l| l.contains(": due "));
    assert_eq!(table.len(), 10, "{s}");
    let overdue = table.iter().filter(|l| l.contains("OVERDUE")).count();
    assert_eq!(why.len(), overdue, "{s}");
    // Ranked from the index (results/index.sqlite) as from the folders.
    let from_index = packbench(&["fleet", r, "--today", "2026-11-23", "--json"]);
    let walked = packbench(&["fleet", r, "--today", "2026-11-23", "--json", "--walk"]);
    assert_eq!(from_index.status.code(), Some(0));
    assert_eq!(text(&from_index.stdout), text(&walked.stdout));
    assert!(results.join("index.sqlite").is_file());
    let o = packbench(&["fleet", r, "--today", "2026-11-23", "--csv"]);
    let s = text(&o.stdout);
    assert!(s.starts_with("rank,pack_id,chemistry"));
    assert_eq!(s.lines().count(), 9);
    let html = dir.path().join("fleet.html");
    let o = packbench(&[
        "fleet",
        r,
        "--today",
        "2026-11-23",
        "--json",
        "--html",
        html.to_str().unwrap(),
    ]);
    let j: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let rows = j["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 8);
    assert_eq!(rows.iter().filter(|r| r["overdue"] == true).count(), 1);
    assert!(std::fs::read_to_string(&html).unwrap().contains("<svg"));
    let o = packbench(&["fleet", r, "--today", "yesterday"]);
    assert_eq!(o.status.code(), Some(2));

    // report: rewrite a run's report from its folder.
    let run = std::fs::read_dir(results.join("FR-L01"))
        .unwrap()
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .find(|p| p.is_dir())
        .unwrap();
    std::fs::remove_file(run.join("report.html")).unwrap();
    let o = packbench(&["report", run.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let page = std::fs::read_to_string(run.join("report.html")).unwrap();
    assert!(page.contains("Grade card") && page.matches("<svg").count() >= 4);
}

/// Each error once, with its location; bad input exits 2 whatever the
/// command (issue: "X: X", and exit 1 from analyze, fade and resume).
#[test]
fn errors_are_said_once_and_bad_input_exits_2() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let bad = d.join("bad.toml");
    std::fs::write(
        &bad,
        "title = \"x\"\n[envelope]\nvoltage_max = \"4.25V/cell\"\n",
    )
    .unwrap();
    let hist = d.join("h.csv");
    std::fs::write(&hist, "date,cycles,capacity_ah\n2024-01-01,x,3\n").unwrap();
    let pack = d.join("results/P-1");
    std::fs::create_dir_all(&pack).unwrap();
    std::fs::write(
        pack.join("pack.toml"),
        "chemistry = \"li-ion\"\nseries = 10\nrated_capacity = \"14Ah\"\n",
    )
    .unwrap();
    let results = d.join("results");
    let r = results.to_str().unwrap();
    let cases: Vec<(Vec<&str>, String)> = vec![
        (
            vec!["check", bad.to_str().unwrap()],
            "[envelope] is missing voltage_min".into(),
        ),
        (
            vec![
                "analyze",
                "no-such-log.csv",
                "--chemistry",
                "li-ion",
                "--series",
                "10",
                "--rated",
                "5Ah",
            ],
            "no-such-log.csv".into(),
        ),
        (
            vec![
                "fade",
                "P-1",
                "--results",
                r,
                "--history",
                hist.to_str().unwrap(),
            ],
            "h.csv:2:12: 'x' is not a cycle count".into(),
        ),
        (vec!["fade", "NO-PACK", "--results", r], "NO-PACK".into()),
        (vec!["resume", "/no/such/run"], "/no/such/run".into()),
        (vec!["fleet", r, "--interval", "5"], "--interval '5'".into()),
    ];
    for (args, needle) in cases {
        let out = packbench(&args);
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
        let first = err
            .lines()
            .find(|l| l.starts_with("error: "))
            .unwrap_or_default();
        assert!(first.contains(&needle), "{args:?}: {err}");
        // Said once: no message repeated after a colon.
        let msg = first.rsplit(": ").next().unwrap();
        assert_eq!(err.matches(msg).count(), 1, "{args:?}: said twice: {err}");
    }
}

/// A pack under its end-of-life threshold says so in `fade` and `fleet`;
/// a projected end of life before today is flagged; a test interval may
/// be given in weeks.
#[test]
fn end_of_life_reached_or_past_is_said() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    let r = results.to_str().unwrap();
    let spec = "chemistry = \"li-ion\"\nseries = 10\nrated_capacity = \"10Ah\"\n";
    for (id, hist) in [
        // 86, 82, then 79 and 77: under 80 % since 2024-07-01.
        (
            "WORN-1",
            "date,cycles,capacity_ah\n2023-07-01,300,8.6\n2024-01-01,450,8.2\n2024-07-01,600,7.9\n2025-01-01,750,7.7\n",
        ),
        // 100, 95, 90 % over a year: 80 % projected for about 2022-01.
        (
            "AGING-2",
            "date,cycles,capacity_ah\n2020-01-01,0,10.0\n2020-07-01,150,9.5\n2021-01-01,300,9.0\n",
        ),
    ] {
        let p = results.join(id);
        std::fs::create_dir_all(&p).unwrap();
        std::fs::write(p.join("pack.toml"), spec).unwrap();
        std::fs::write(p.join("history.csv"), hist).unwrap();
    }
    let out = packbench(&["fade", "WORN-1", "--results", r, "--today", "2025-02-01"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let said = text(&out.stdout);
    assert!(
        said.contains("below end of life (80 % of rated) since 2024-07-01"),
        "{said}"
    );
    let out = packbench(&["fade", "AGING-2", "--results", r, "--today", "2024-01-01"]);
    let said = text(&out.stdout);
    assert!(said.contains("is before today (2024-01-01)"), "{said}");
    let out = packbench(&["fleet", r, "--today", "2024-01-01", "--interval", "13w"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let said = text(&out.stdout);
    assert!(said.contains("tests due by every 91 days"), "{said}");
    let line = |id: &str| said.lines().find(|l| l.contains(id)).unwrap().to_string();
    assert!(
        line("WORN-1").contains("BELOW-EOL-SINCE-2024-07-01"),
        "{said}"
    );
    assert!(line("AGING-2").contains("EOL-DATE-PAST"), "{said}");
}

/// Every JSON record carries its layout's version; a record newer than
/// this build is refused by name (exit 2), an older one without the field
/// still reads.
#[test]
fn records_carry_their_version_and_newer_ones_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    let out = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--sim",
        "--pack",
        "VER-1",
        "--quiet",
        "--results",
        results.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let run = wait_run_dir(&results.join("VER-1"), std::time::Duration::ZERO).unwrap();
    let version = record::schema::SCHEMA_VERSION;
    for name in ["run.json", "summary.json", "sim-pack.json"] {
        assert_eq!(json(&run.join(name))["schema_version"], version, "{name}");
    }
    let first = std::fs::read_to_string(run.join("events.jsonl")).unwrap();
    let first: serde_json::Value = serde_json::from_str(first.lines().next().unwrap()).unwrap();
    assert_eq!(first["event"], "run_start");
    assert_eq!(first["schema_version"], version);
    // Without the field (written before it existed): still read.
    let summary_path = run.join("summary.json");
    let mut s = json(&summary_path);
    s.as_object_mut().unwrap().remove("schema_version");
    std::fs::write(&summary_path, s.to_string()).unwrap();
    let ok = packbench(&["report", run.to_str().unwrap()]);
    assert_eq!(ok.status.code(), Some(0), "{}", text(&ok.stderr));
    // Newer: refused, named as newer.
    s["schema_version"] = serde_json::json!(version + 1);
    std::fs::write(&summary_path, s.to_string()).unwrap();
    let newer = packbench(&["report", run.to_str().unwrap()]);
    let err = text(&newer.stderr);
    assert_eq!(newer.status.code(), Some(2), "{err}");
    assert!(
        err.contains("summary.json") && err.contains("newer packbench"),
        "{err}"
    );
    let mut m = json(&run.join("run.json"));
    m["schema_version"] = serde_json::json!(version + 1);
    m["status"] = serde_json::json!("interrupted");
    std::fs::write(run.join("run.json"), m.to_string()).unwrap();
    let resume = packbench(&["resume", run.to_str().unwrap()]);
    let err = text(&resume.stderr);
    assert_eq!(resume.status.code(), Some(2), "{err}");
    assert!(
        err.contains("run.json") && err.contains("newer packbench"),
        "{err}"
    );
}

/// The run report's pieces: the summary rows carry the figures, and text
/// from the procedure is escaped wherever it is written.
#[test]
fn the_run_report_escapes_what_the_procedure_says() {
    let dir = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string("procedures/capacity-check.toml").unwrap();
    let title_line = text.lines().find(|l| l.starts_with("title")).unwrap();
    let text = text.replace(title_line, "title = \"<b>check</b> & 'more'\"");
    let proc_path = write(dir.path(), "odd.toml", &text);
    let p = prepare_as(
        &proc_path,
        li_ion_14ah(),
        &dir.path().join("results"),
        "ESC-1",
    );
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let r = rt
        .block_on(packbench::session::run(packbench::session::Session::sim(
            &p,
            &model::simconfig::SimConfig::default(),
            packbench::session::Speed::Max,
        )))
        .unwrap();
    let rows = report::html::summary_rows(&r.summary);
    let labels: Vec<&str> = rows.iter().map(|(k, _)| k.as_str()).collect();
    for want in [
        "Measured capacity",
        "State of health",
        "Discharge",
        "Samples",
    ] {
        assert!(labels.contains(&want), "{want} in {labels:?}");
    }
    let html = std::fs::read_to_string(r.run_dir.join("report.html")).unwrap();
    assert!(
        html.contains("&lt;b&gt;check&lt;/b&gt; &amp; &#39;more&#39;"),
        "the title escaped"
    );
    assert!(!html.contains("<b>check</b>"));
}

/// The BMS's figures typed in with a run are compared with the
/// measurement: its capacity error against the measured capacity, and its
/// state of charge against the measured one at the run's start and end.
/// The simulated pack starts at 50 % (the simulator's truth), so the
/// measured start is checked against that, not against our own figures.
/// The same comparison comes back from `analyze` of the run folder, and a
/// figure out of range is refused before any instrument is touched.
#[test]
fn the_bms_is_compared_with_the_measurement() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    let r = results.to_str().unwrap();
    let bms = [
        "--bms-capacity",
        "14.6Ah",
        "--bms-design-capacity",
        "15Ah",
        "--bms-cycles",
        "312",
        "--bms-soc-start",
        "55%",
        "--bms-soc-end",
        "3%",
    ];
    let mut args = vec![
        "run",
        "procedures/capacity-check.toml",
        "--sim",
        "--pack",
        "BMS-1",
        "--results",
        r,
        "--quiet",
    ];
    args.extend(bms);
    let out = packbench(&args);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let run = std::fs::read_dir(results.join("BMS-1"))
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .find(|p| p.is_dir())
        .unwrap();
    let s = json(&run.join("summary.json"));
    let b = &s["bms"];
    let f = |k: &str| b[k].as_f64().unwrap_or_else(|| panic!("{k} in {b}"));
    let measured = s["capacity"]["measured_ah"].as_f64().unwrap();
    assert!((f("capacity_error_pct") - (14.6 - measured) / measured * 100.0).abs() < 1e-9);
    assert!((f("bms_soh_pct") - 14.6 / 15.0 * 100.0).abs() < 1e-9);
    // The simulator's pack started at 50 %, and ends at the cutoff.
    assert!((f("soc_start_measured_pct") - 50.0).abs() < 1.0, "{b}");
    assert!((f("soc_start_error_pp") - (55.0 - f("soc_start_measured_pct"))).abs() < 1e-9);
    assert!(f("soc_end_measured_pct").abs() < 0.5, "{b}");
    assert!((f("soc_end_error_pp") - 3.0).abs() < 0.5);
    assert_eq!(b["reported"]["cycle_count"].as_f64(), Some(312.0));
    assert!(b["suggested_nominal_ah"].as_f64().unwrap() > 0.0);
    // Recorded with the run: analyze gives the same comparison.
    let again = packbench(&["analyze", run.to_str().unwrap(), "--json"]);
    let again: serde_json::Value = serde_json::from_slice(&again.stdout).unwrap();
    assert_eq!(again["bms"], s["bms"]);
    // The report and the grade card show it.
    let html = std::fs::read_to_string(run.join("report.html")).unwrap();
    assert!(html.contains("BMS capacity error"));
    assert!(html.contains("BMS state of charge at the start"));
    // Out of range: refused, exit 2, nothing run.
    let out = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--sim",
        "--pack",
        "BMS-2",
        "--results",
        r,
        "--bms-soc-start",
        "120%",
    ]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert!(
        text(&out.stderr).contains("state of charge at the start"),
        "{}",
        text(&out.stderr)
    );
    assert!(!results.join("BMS-2").exists());
}

/// A station task that panics is a run failure (exit 1), not bad input,
/// and the live display does not wait for it forever: its board is marked
/// failed once the task is gone (the display ends when every board is
/// final). Lines mode, so the display loop really runs.
#[test]
fn a_panicked_station_is_a_failure_and_the_display_ends() {
    use packbench::session::live::{Board, BoardState, DisplayMode};
    let boards = vec![Board::new("bay-1", "FR-P1")];
    let (tx, rx) = std::sync::mpsc::channel();
    let b = boards.clone();
    std::thread::spawn(move || {
        let task: packbench::cli::run::StationTask = Box::new(|_, _| {
            Box::pin(async {
                if std::hint::black_box(true) {
                    panic!("a station task panicked");
                }
                unreachable!()
            })
        });
        let r = packbench::cli::run::run_stations(b, DisplayMode::Lines(0.05), vec![task]);
        // What the test needs: was it bad input, and what it says.
        let r = r.map(|v| {
            v.into_iter()
                .map(|x| x.map(|_| ()).map_err(|e| (e.is_input(), e.to_string())))
                .collect::<Vec<_>>()
        });
        let _ = tx.send(r);
    });
    let results = rx
        .recv_timeout(std::time::Duration::from_secs(20))
        .expect("the display waited for a station that is gone")
        .expect("the runtime starts");
    let (input, text) = results.into_iter().next().unwrap().unwrap_err();
    assert!(!input, "{text}");
    assert_eq!(boards[0].get().state, BoardState::Failed);
}

/// `fleet --policy` with the shipped IEEE 450 schedule: a lead-acid string
/// under 90 % of rating is due a year after its last test and says which
/// rule made it so; a lithium pack beside it keeps the shop's interval; a
/// string under 80 % is flagged for replacement.
#[test]
fn fleet_due_dates_follow_the_policys_ieee_450_schedule() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    let r = results.to_str().unwrap();
    let lead = "chemistry = \"lead-acid\"\nseries = 24\nrated_capacity = \"100Ah\"\n";
    let li = "chemistry = \"li-ion\"\nseries = 10\nrated_capacity = \"10Ah\"\n";
    for (id, spec, hist) in [
        (
            "FR-S01",
            lead,
            "date,cycles,capacity_ah\n2021-06-01,10,92\n2023-01-10,40,88\n",
        ),
        (
            "FR-S02",
            lead,
            "date,cycles,capacity_ah\n2021-06-01,10,92\n2023-06-01,40,79\n",
        ),
        (
            "FR-L01",
            li,
            "date,cycles,capacity_ah\n2024-01-01,100,9.5\n",
        ),
    ] {
        let p = results.join(id);
        std::fs::create_dir_all(&p).unwrap();
        std::fs::write(p.join("pack.toml"), spec).unwrap();
        std::fs::write(p.join("history.csv"), hist).unwrap();
    }
    let out = packbench(&[
        "fleet",
        r,
        "--today",
        "2024-06-01",
        "--policy",
        "policies/stationary-lead-acid.toml",
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let said = text(&out.stdout);
    assert!(
        said.contains("tests due by IEEE 450 for lead-acid"),
        "{said}"
    );
    assert!(
        said.contains("FR-S01: due since 2024-01-10: IEEE 450: every year: capacity 88.0 % of rating (under 90 %)"),
        "{said}"
    );
    assert!(
        said.contains("FR-S02: due since 2024-05-31: IEEE 450: replace: capacity 79.0 % of rating (under 80 %)"),
        "{said}"
    );
    assert!(
        said.contains(
            "FR-L01: due since 2024-04-02: the shop's interval: 92 days after the last test"
        ),
        "{said}"
    );
    let line = |id: &str| said.lines().find(|l| l.contains(id)).unwrap().to_string();
    assert!(line("FR-S02").contains("REPLACE"), "{said}");
    // A schedule the policy cannot hold is refused with its place.
    let bad = dir.path().join("bad.toml");
    std::fs::write(
        &bad,
        std::fs::read_to_string("policies/stationary-lead-acid.toml")
            .unwrap()
            .replace("service_life = \"20y\"", "service_life = \"long\""),
    )
    .unwrap();
    let out = packbench(&["fleet", r, "--policy", bad.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("schedule.service_life = \"long\": expected a duration"),
        "{}",
        text(&out.stderr)
    );
}

/// `packbench import`: a test from another bench (here a copy of a
/// simulated run's log, outside its run folder) joins the pack's history
/// as a run marked imported, with the source file's hash; its capacity is
/// one of the points the fade fit uses; the same file a second time is
/// refused (exit 2) and adds nothing.
#[test]
fn an_imported_log_joins_the_fade_fit_once() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    let r = results.to_str().unwrap();
    let pack = ["--chemistry", "li-ion", "--series", "10", "--rated", "14Ah"];
    let out = Command::new(BIN)
        .args([
            "run",
            "procedures/capacity-check.toml",
            "--sim",
            "--pack",
            "FR-X1",
            "--quiet",
        ])
        .args(pack)
        .args(["--results", r, "--test-date", "2026-01-10"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    // Two earlier tests from the pack's paper records.
    std::fs::write(
        results.join("FR-X1/history.csv"),
        "date,cycles,capacity_ah\n2025-01-01,,13.9\n2025-07-01,,13.4\n",
    )
    .unwrap();
    let run = std::fs::read_dir(results.join("FR-X1"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.is_dir())
        .unwrap();
    let log = dir.path().join("bay-7 export.csv");
    std::fs::copy(run.join("samples.csv"), &log).unwrap();
    let import = |extra: &[&str]| {
        Command::new(BIN)
            .arg("import")
            .arg(&log)
            .args(["--pack", "FR-X1", "--date", "2026-06-01", "--results", r])
            .args(extra)
            .output()
            .unwrap()
    };
    let out = import(&["--cycles", "150"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let id = "20260601-imported-bay-7-export";
    let folder = results.join("FR-X1").join(id);
    let rec = json(&folder.join("import.json"));
    let (sha, _) = packbench::cli::import::file_sha256(&log).unwrap();
    assert_eq!(rec["sha256"], sha.as_str());
    let summary = json(&folder.join("summary.json"));
    assert_eq!(summary["status"], "imported");
    assert_eq!(summary["cycle_count"], 150.0);
    assert_eq!(
        std::fs::read(folder.join("source.csv")).unwrap(),
        std::fs::read(&log).unwrap()
    );
    let imported_ah = summary["capacity"]["measured_ah"].as_f64().unwrap();
    let ours_ah = json(&run.join("summary.json"))["capacity"]["measured_ah"]
        .as_f64()
        .unwrap();
    assert!(
        (imported_ah - ours_ah).abs() < 1e-6,
        "{imported_ah} vs {ours_ah}"
    );
    // In the fade fit: four points, the imported one among them.
    let out = packbench(&["fade", "FR-X1", "--results", r, "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let j: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let points = j["history"]["points"].as_array().unwrap();
    assert_eq!(points.len(), 4, "{points:?}");
    let p = points
        .iter()
        .find(|p| p["source"] == format!("run {id}").as_str())
        .unwrap_or_else(|| panic!("not in the history: {points:?}"));
    assert_eq!(p["date"], "2026-06-01");
    assert_eq!(p["cycles"], 150.0);
    let models = j["fade"]["models"].as_array().unwrap();
    assert!(
        models.iter().any(|m| m["fit"]["n"].as_u64() == Some(4)),
        "a model fitted on all four points: {models:?}"
    );
    // Once only: refused by its hash, whatever date it is given.
    let before = std::fs::read_dir(results.join("FR-X1")).unwrap().count();
    let out = Command::new(BIN)
        .arg("import")
        .arg(&log)
        .args(["--pack", "FR-X1", "--date", "2026-07-01", "--results", r])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    assert!(
        text(&out.stderr).contains(&format!("was imported already, as FR-X1/{id}")),
        "{}",
        text(&out.stderr)
    );
    assert_eq!(
        std::fs::read_dir(results.join("FR-X1")).unwrap().count(),
        before
    );
    // The pack and the date are needed.
    let out = Command::new(BIN)
        .arg("import")
        .arg(&log)
        .args(["--pack", "FR-X2", "--results", r])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(
        text(&out.stderr).contains("--date"),
        "{}",
        text(&out.stderr)
    );
}
