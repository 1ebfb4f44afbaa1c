//! Hostile input: every case gets a clear error or a documented, safe
//! interpretation; none crashes, hangs, or sends a setpoint outside the
//! envelope.

use crate::util::*;
use instrument::link::{InMemoryLink, LineResponder, Link, Response};
use instrument::scpi::Session;
use model::pack::{Chemistry, PackSpec};
use model::procedure::validate::plan_from_text;
use record::import::{stream_log, LogFormat};
use std::path::Path;
use std::process::Command;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

const HEAD: &str = r#"title = "t"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.8V/cell"
current_max = "1C"
temperature_max = "55degC"
"#;

fn step(kind_and_values: &str) -> String {
    format!("{HEAD}[[phase]]\nname = \"p\"\n  [[phase.step]]\n{kind_and_values}\n")
}

fn refused(text: &str) -> String {
    let t = Instant::now();
    let r = plan_from_text(Path::new("h.toml"), text, &li_ion_14ah());
    assert!(
        t.elapsed() < Duration::from_secs(10),
        "took {:?}",
        t.elapsed()
    );
    match r {
        Ok(_) => panic!("accepted"),
        Err(e) => e.to_string(),
    }
}

#[test]
fn pack_ids_that_try_to_leave_the_results_folder_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let results = dir.path().join("results");
    for id in ["../escape", "..", "/etc/x", "a/b", "a\\b", "", ".", "CON:"] {
        let out = Command::new(BIN)
            .args([
                "run",
                "procedures/capacity-check.toml",
                "--quiet",
                "--pack",
                id,
            ])
            .arg("--results")
            .arg(&results)
            .output()
            .unwrap();
        assert_eq!(out.status.code(), Some(2), "pack id {id:?}");
        assert!(
            String::from_utf8_lossy(&out.stderr).contains("pack id"),
            "{id:?}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    // Nothing was created, inside or next to the results folder.
    assert!(!results.exists());
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
    // A procedure file name cannot steer the run folder's name: it is
    // reduced to letters, digits, '-' and '_'.
    let odd = dir.path().join("..odd name;rm -rf.toml");
    std::fs::copy("procedures/capacity-check.toml", &odd).unwrap();
    let out = Command::new(BIN)
        .args(["run", "--quiet", "--pack", "H1"])
        .arg(&odd)
        .arg("--results")
        .arg(&results)
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let runs: Vec<String> = std::fs::read_dir(results.join("H1"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n != "pack.toml")
        .collect();
    assert_eq!(runs.len(), 1);
    assert!(
        runs[0]
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_'),
        "{runs:?}"
    );
}

#[test]
fn oversized_and_deeply_nested_procedures_get_clear_errors() {
    // A 10 MB string.
    let big = HEAD.replacen(
        "title = \"t\"\n",
        &format!(
            "title = \"t\"\ndescription = \"{}\"\n",
            "x".repeat(10 << 20)
        ),
        1,
    );
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("big.toml");
    std::fs::write(&path, &big).unwrap();
    let e = model::procedure::load(&path, &li_ion_14ah())
        .unwrap_err()
        .to_string();
    assert!(e.contains("larger than"), "{e}");
    // A million steps by repetition.
    let many = format!(
        "{HEAD}[[phase]]\nname = \"p\"\nrepeat = 10000\n{}",
        "  [[phase.step]]\n  kind = \"rest\"\n  ends = [\"time > 1s\"]\n".repeat(100)
    );
    let e = refused(&many);
    assert!(e.contains("expands to more than 100000 steps"), "{e}");
    // Deep nesting: arrays and inline tables thousands deep.
    for nested in [
        format!("{HEAD}x = {}1{}\n", "[".repeat(50_000), "]".repeat(50_000)),
        format!(
            "{HEAD}x = {}1{}\n",
            "{a=".repeat(50_000),
            "}".repeat(50_000)
        ),
        format!("{HEAD}x = {}\n", "[".repeat(200_000)),
    ] {
        let e = refused(&nested);
        assert!(e.contains("h.toml:"), "located: {e}");
    }
}

#[test]
fn absurd_setpoints_are_refused_with_their_location() {
    for (values, needle) in [
        ("  kind = \"charge\"\n  current = \"-5A\"\n  voltage = \"4.2V/cell\"\n  ends = [\"time > 1h\"]", "positive magnitude"),
        ("  kind = \"charge\"\n  current = \"nan A\"\n  voltage = \"4.2V/cell\"\n  ends = [\"time > 1h\"]", "h.toml:"),
        ("  kind = \"charge\"\n  current = \"infA\"\n  voltage = \"4.2V/cell\"\n  ends = [\"time > 1h\"]", "h.toml:"),
        ("  kind = \"charge\"\n  current = \"1e400A\"\n  voltage = \"4.2V/cell\"\n  ends = [\"time > 1h\"]", "not a finite number"),
        ("  kind = \"charge\"\n  current = \"1A\"\n  voltage = \"1000000V\"\n  ends = [\"time > 1h\"]", "outside the envelope"),
        ("  kind = \"charge\"\n  current = \"1A\"\n  voltage = \"1MV\"\n  ends = [\"time > 1h\"]", "unknown unit"),
        ("  kind = \"discharge\"\n  current = \"50A\"\n  ends = [\"time > 1h\"]", "outside the envelope"),
        // Finding 15: a negative time was refused as "cannot end" alone,
        // or taken as a 0 s step beside another end.
        ("  kind = \"discharge\"\n  current = \"1A\"\n  ends = [\"time > -1h\"]", "negative"),
        ("  kind = \"discharge\"\n  current = \"1A\"\n  ends = [\"time > -1h\", \"voltage < 3.0V/cell\"]", "negative"),
        ("  kind = \"pulse\"\n  levels = [{ current = \"-1e9A\", duration = \"1s\" }]", "outside the envelope"),
        ("  kind = \"pulse\"\n  levels = [{ current = \"-1A\", duration = \"-1s\" }]", "negative"),
    ] {
        let e = refused(&step(values));
        assert!(e.contains(needle), "{values}: {e}");
        assert!(e.contains("h.toml:"), "{e}");
    }
    // An envelope beyond what the chemistry's cells can take.
    let e = refused(
        &step("  kind = \"rest\"\n  ends = [\"time > 1s\"]")
            .replace("voltage_max = \"4.25V/cell\"", "voltage_max = \"1000000V\""),
    );
    assert!(e.contains("beyond what a li-ion cell"), "{e}");
    // Finding 15: temperature limits that switch the limit off.
    for (from, to) in [
        (
            "temperature_max = \"55degC\"",
            "temperature_max = \"1e6degC\"",
        ),
        (
            "temperature_max = \"55degC\"",
            "temperature_max = \"55degC\"\ntemperature_min = \"-500degC\"",
        ),
    ] {
        let text = step("  kind = \"rest\"\n  ends = [\"time > 1s\"]");
        assert!(text.contains(from));
        let e = refused(&text.replace(from, to));
        assert!(e.contains("beyond any plausible temperature limit"), "{e}");
        assert!(e.contains("h.toml:"), "{e}");
    }
}

/// An instrument that answers every query with one fixed reply.
struct Fixed(String);

impl LineResponder for Fixed {
    fn respond(&mut self, line: &str) -> Result<Response, std::io::Error> {
        Ok(if line.contains('?') {
            Response::Reply(self.0.clone())
        } else {
            Response::Nothing
        })
    }
}

/// A link that sends endless bytes without a terminator.
struct Babbler;

impl tokio::io::AsyncRead for Babbler {
    fn poll_read(
        self: std::pin::Pin<&mut Self>,
        _cx: &mut std::task::Context<'_>,
        buf: &mut tokio::io::ReadBuf<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        let n = buf.remaining().min(4096);
        buf.put_slice(&vec![b'7'; n]);
        std::task::Poll::Ready(Ok(()))
    }
}

impl tokio::io::AsyncWrite for Babbler {
    fn poll_write(
        self: std::pin::Pin<&mut Self>,
        _cx: &mut std::task::Context<'_>,
        buf: &[u8],
    ) -> std::task::Poll<std::io::Result<usize>> {
        std::task::Poll::Ready(Ok(buf.len()))
    }
    fn poll_flush(
        self: std::pin::Pin<&mut Self>,
        _cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        std::task::Poll::Ready(Ok(()))
    }
    fn poll_shutdown(
        self: std::pin::Pin<&mut Self>,
        _cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<std::io::Result<()>> {
        std::task::Poll::Ready(Ok(()))
    }
}

#[test]
fn hostile_instrument_replies_are_errors_never_numbers() {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let session = |reply: &str| {
            let r: Arc<Mutex<dyn LineResponder>> = Arc::new(Mutex::new(Fixed(reply.into())));
            let link: Link = Box::new(InMemoryLink::new(r));
            Session::new("load", link, "\n", Duration::from_millis(200))
        };
        for (reply, needle) in [
            ("9.9E37", "overload"),
            ("+9.91E+37", "overload"),
            ("NaN", "not a number"),
            ("nan", "not a number"),
            ("inf", "not a number"),
            ("3700mV", "unit"),
            ("1.2kA", "unit"),
            ("12.5 V garbage", "trailing"),
            ("", "not a number"),
        ] {
            let e = session(reply).query_number("MEAS:VOLT?").await.unwrap_err();
            assert!(e.message.contains(needle), "{reply:?}: {}", e.message);
        }
        // A reply in the base unit is read as written.
        assert_eq!(
            session("12.5V").query_number("MEAS:VOLT?").await.unwrap(),
            12.5
        );
        assert_eq!(
            session("+1.25E+01")
                .query_number("MEAS:VOLT?")
                .await
                .unwrap(),
            12.5
        );
        // Endless data without a terminator: an error once the reply is
        // longer than any real reply, well before the timeout.
        let mut s = Session::new("load", Box::new(Babbler), "\n", Duration::from_secs(5));
        let t = Instant::now();
        let e = s.query_number("MEAS:VOLT?").await.unwrap_err();
        assert!(e.message.contains("without a terminator"), "{}", e.message);
        assert_ne!(e.kind, instrument::ErrorKind::Timeout);
        assert!(t.elapsed() < Duration::from_secs(5), "before the timeout");
    });
}

fn read(bytes: &[u8]) -> Result<(usize, record::import::ReadReport), String> {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("log.csv");
    std::fs::write(&p, bytes).unwrap();
    let mut n = 0;
    stream_log(&p, &LogFormat::default(), |r| {
        assert!(r.t_s.is_finite() && r.voltage_v.is_finite() && r.current_a.is_finite());
        n += 1;
    })
    .map(|rep| (n, rep))
    .map_err(|e| e.to_string())
}

#[test]
fn hostile_csv_logs_get_located_errors_or_documented_readings() {
    let head = b"time_s,voltage_v,current_a\n";
    // Non-UTF-8 bytes in a number: a located error.
    let mut bad = head.to_vec();
    bad.extend_from_slice(b"0,12.5,-1\n1,12\xff.4,-1\n");
    let e = read(&bad).unwrap_err();
    assert!(e.contains(":3:"), "line 3: {e}");
    // Non-UTF-8 bytes in a column nobody reads are left alone.
    let ok = b"time_s,voltage_v,current_a,note\n0,12.5,-1,\xfe\xff\n1,12.4,-1,ok\n";
    assert_eq!(read(ok).unwrap().0, 2);
    // Extra columns are ignored; a row with fewer cells than the header is
    // a located error.
    let extra = b"time_s,voltage_v,current_a,a,b,c\n0,12.5,-1,1,2,3\n1,12.4,-1,1,2,3\n";
    assert_eq!(read(extra).unwrap().0, 2);
    let short = b"time_s,voltage_v,current_a\n0,12.5,-1\n1,12.4\n";
    let e = read(short).unwrap_err();
    assert!(e.contains(":3:"), "{e}");
    // A missing column: the error names what is missing.
    let e = read(b"time_s,voltage_v\n0,12.5\n").unwrap_err();
    assert!(e.contains("current"), "{e}");
    // Time going backwards: the rows are read; the analysis drops and
    // counts them (tests/analyze.rs covers the count).
    let back = b"time_s,voltage_v,current_a\n0,12.5,-1\n2,12.4,-1\n1,12.45,-1\n3,12.3,-1\n";
    assert_eq!(read(back).unwrap().0, 4);
    // Empty, header only, binary junk: errors, not panics.
    assert!(read(b"").is_err());
    assert!(read(head).is_ok_and(|(n, _)| n == 0));
    assert!(read(&[0u8, 159, 146, 150, 255, 0, 10, 1, 2, 3]).is_err());
}

/// Every level setting sent to the simulated instruments by every shipped
/// procedure stays inside the procedure's envelope (voltage at most
/// voltage_max, current at most current_max).
#[test]
fn no_setting_sent_is_outside_the_envelope() {
    use engine::clock::{Clock, SimClock};
    use engine::control::StopHandle;
    use packbench::session::request::PackSource;
    use packbench::session::request::RunRequest;
    use sim::{self, SimConfig};
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let spec = |chemistry, series, rated_capacity_ah| PackSpec {
        chemistry,
        series,
        rated_capacity_ah,
        rated_energy_wh: None,
        rated_rate_c: None,
        rated_resistance_mohm: None,
    };
    for (file, pack) in [
        (
            "procedures/capacity-check.toml",
            spec(Chemistry::LiIon, 10, 14.0),
        ),
        (
            "procedures/lead-acid-c20.toml",
            spec(Chemistry::LeadAcid, 6, 100.0),
        ),
        (
            "procedures/nimh-capacity.toml",
            spec(Chemistry::Nimh, 6, 2.0),
        ),
        (
            "procedures/dcir-soc-sweep-li-ion.toml",
            spec(Chemistry::LiIon, 10, 14.0),
        ),
    ] {
        let dir = tempfile::tempdir().unwrap();
        let p = packbench::session::prepare::prepare(&RunRequest {
            procedure: file.into(),
            pack_id: "E1".into(),
            pack: PackSource::Given(pack),
            results: dir.path().to_path_buf(),
            options: Default::default(),
        })
        .unwrap();
        let cfg = SimConfig::default();
        let clock: Arc<dyn Clock> = SimClock::new();
        let links = sim::build(&p.pack, &cfg, Arc::clone(&clock));
        let h = links.handle.clone();
        h.keep_all_traffic();
        rt.block_on(packbench::session::run(
            packbench::session::Session::new(
                &p,
                packbench::session::Bench::SimLinks {
                    cfg: cfg.clone(),
                    clock,
                    links,
                    speed_text: "max".into(),
                },
            )
            .with_stop(StopHandle::new()),
        ))
        .unwrap();
        let env = &p.procedure.plan.envelope;
        let mut settings = 0;
        for traffic in [&h.source_traffic, &h.load_traffic] {
            for m in traffic.lock().unwrap().last.iter() {
                for part in m.split(';') {
                    let part = part.trim().trim_start_matches(':');
                    let Some((head, value)) = part.split_once(' ') else {
                        continue;
                    };
                    let Ok(x) = value.trim().parse::<f64>() else {
                        continue;
                    };
                    let limit = match head.to_ascii_uppercase().as_str() {
                        "VOLT" => env.voltage_max_v,
                        "CURR" => env.current_max_a,
                        _ => continue,
                    };
                    settings += 1;
                    assert!(
                        x.is_finite() && x >= 0.0 && x <= limit,
                        "{file}: '{part}' beyond {limit}"
                    );
                }
            }
        }
        assert!(settings > 2, "{file}: settings were seen ({settings})");
    }
}

/// A file one byte over the input cap, for the tests below.
fn oversized(dir: &std::path::Path, name: &str) -> std::path::PathBuf {
    let mut text = String::from("# ");
    text.push_str(&" ".repeat(model::procedure::MAX_INPUT_BYTES as usize));
    write(dir, name, &text)
}

fn refused_as_too_large(out: &std::process::Output, what: &str) {
    let err = text(&out.stderr);
    assert!(!out.status.success(), "{what}: accepted");
    assert!(err.contains("larger than 1024 kB"), "{what}: {err}");
}

/// Every file a user hands packbench is read under the same 1 MB cap as
/// procedures: a profile for `probe`, a policy for `analyze`, a history
/// for `fade`, and a pack's `pack.toml`. (Each read the whole file
/// before.)
#[test]
fn every_input_file_is_read_under_the_size_cap() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // probe --profile: refused before any link is opened.
    let big = oversized(d, "big-profile.toml");
    let out = packbench(&[
        "probe",
        "tcp:127.0.0.1:9",
        "--profile",
        big.to_str().unwrap(),
    ]);
    refused_as_too_large(&out, "probe --profile");
    // analyze --policy.
    let big = oversized(d, "big-policy.toml");
    let out = packbench(&[
        "analyze",
        "tests/fixtures/pybamm_two_level.csv",
        "--current-sign",
        "discharge-positive",
        "--policy",
        big.to_str().unwrap(),
    ]);
    refused_as_too_large(&out, "analyze --policy");
    // fade --history, and a pack.toml in the results.
    let results = d.join("results");
    let run = packbench(&[
        "run",
        "procedures/screen-li-ion.toml",
        "--sim",
        "--pack",
        "CAP-1",
        "--results",
        results.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(run.status.success(), "{}", text(&run.stderr));
    let big = oversized(d, "big-history.csv");
    let out = packbench(&[
        "fade",
        "CAP-1",
        "--results",
        results.to_str().unwrap(),
        "--history",
        big.to_str().unwrap(),
    ]);
    refused_as_too_large(&out, "fade --history");
    std::fs::copy(
        oversized(d, "pack.toml"),
        results.join("CAP-1").join("pack.toml"),
    )
    .unwrap();
    let out = packbench(&["fade", "CAP-1", "--results", results.to_str().unwrap()]);
    refused_as_too_large(&out, "pack.toml");
}

/// `packbench analyze` on a log, bounded in time by a wait that kills it:
/// (exit code, error stream); `None` when it had to be killed.
fn analyze_within(log: &Path, limit: Duration) -> Option<(i32, String)> {
    let mut child = std::process::Command::new(BIN)
        .arg("analyze")
        .arg(log)
        .args(["--chemistry", "li-ion", "--series", "4", "--rated", "2Ah"])
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let t = Instant::now();
    while t.elapsed() < limit {
        if let Some(st) = child.try_wait().unwrap() {
            let mut err = String::new();
            use std::io::Read;
            let _ = child.stderr.take().unwrap().read_to_string(&mut err);
            return Some((st.code().unwrap_or(-1), err));
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    let _ = child.kill();
    let _ = child.wait();
    None
}

/// Finding 8: hostile logs hung or exhausted memory: a 2-row log with
/// t = 1e9 (a grid bin per 0.1 % of capacity up to an enormous charge),
/// one voltage of 65535 among 100 rows (a million voltage bins), a
/// voltage of 1e7…1e308 (gigabytes of bins), a current of −1e308 (an
/// infinite charge written as null). Now every curve is bounded by a
/// fixed count, and values beyond a stated plausibility bound (±2000 V,
/// ±10 000 A, ±300 degC, ±1e10 s) are refused with file:line:column.
#[test]
fn hostile_logs_neither_hang_nor_exhaust_memory() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let head = "time_s,voltage_v,current_a\n";
    // A time leap of 1e9 s at 1 A: read (it is a plausible number) and
    // analysed in bounded time.
    let leap = write(d, "leap.csv", &format!("{head}0,16.0,-1\n1e9,15.9,-1\n"));
    let r = analyze_within(&leap, Duration::from_secs(30)).expect("analyze ends");
    assert!(r.0 == 0 || r.0 == 2, "{r:?}");
    // Values beyond the bounds: located errors, in bounded time.
    let mut rows = String::from(head);
    for k in 0..100 {
        let v = if k == 50 { "65535" } else { "15.5" };
        rows.push_str(&format!("{k},{v},-1\n"));
    }
    for (name, text, at) in [
        ("volts.csv", rows, ":52:2:"),
        ("huge.csv", format!("{head}0,16,-1\n1,1e7,-1\n"), ":3:2:"),
        ("max.csv", format!("{head}0,16,-1\n1,1e308,-1\n"), ":3:2:"),
        (
            "amps.csv",
            format!("{head}0,16,-1\n1,15.9,-1e308\n"),
            ":3:3:",
        ),
        (
            "hot.csv",
            "time_s,voltage_v,current_a,temperature_c\n0,16,-1,25\n1,15.9,-1,1e6\n".to_string(),
            ":3:4:",
        ),
        (
            "time.csv",
            format!("{head}0,16,-1\n1e300,15.9,-1\n"),
            ":3:1:",
        ),
    ] {
        let log = write(d, name, &text);
        let (code, err) = analyze_within(&log, Duration::from_secs(30))
            .unwrap_or_else(|| panic!("{name}: analyze did not end"));
        assert_eq!(code, 2, "{name}: {err}");
        assert!(err.contains(at), "{name}: {err}");
        assert!(err.contains("beyond any plausible"), "{name}: {err}");
    }
}

/// Finding 8: one pack whose summary cannot be read (a charge written as
/// null) made `fleet` and `index` fail on the whole results folder. Now
/// the pack is named and left out, and the others are listed.
#[test]
fn fleet_and_index_leave_out_an_unreadable_pack_and_go_on() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let results = d.join("results");
    for id in ["GOOD-1", "BAD-1"] {
        let out = std::process::Command::new(BIN)
            .args([
                "run",
                "procedures/capacity-check.toml",
                "--sim",
                "--pack",
                id,
                "--quiet",
            ])
            .arg("--results")
            .arg(&results)
            .output()
            .unwrap();
        assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    }
    let bad_run = std::fs::read_dir(results.join("BAD-1"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.is_dir())
        .unwrap();
    let s = std::fs::read_to_string(bad_run.join("summary.json")).unwrap();
    let broken = s.replacen("\"samples\":", "\"samples\": null, \"x\":", 1);
    assert_ne!(s, broken);
    std::fs::write(bad_run.join("summary.json"), broken).unwrap();
    for args in [
        &["fleet", "--walk"][..],
        &["fleet"][..],
        &["index", "--rebuild"][..],
    ] {
        let out = std::process::Command::new(BIN)
            .args(args)
            .arg(&results)
            .output()
            .unwrap();
        let (o, e) = (text(&out.stdout), text(&out.stderr));
        assert_eq!(out.status.code(), Some(0), "{args:?}: {e}");
        assert!(e.contains("pack BAD-1 left out"), "{args:?}: {e}");
        if args[0] == "fleet" {
            assert!(o.contains("GOOD-1"), "{args:?}: {o}");
        }
    }
}
