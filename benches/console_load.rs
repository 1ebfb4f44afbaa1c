//! The console under load: 8 simulated bays in real time, each running a
//! capacity check, with 20 clients following the live stream, for
//! `CONSOLE_SECONDS` (default 60). Prints the samples taken late (more
//! than 100 ms after their time, from each run's `run.json`), the latest
//! one, the events each client received, and the console process's CPU
//! per wall second (from /proc).
//!
//! `cargo bench --bench console_load`

use std::io::{Read, Write};
use std::net::TcpStream;
use std::process::{Command, Stdio};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

fn request(addr: &str, method: &str, path: &str, body: &str) -> (u16, String) {
    let mut s = TcpStream::connect(addr).expect("connect");
    let req = format!(
        "{method} {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\nContent-Type: application/json\r\nX-Packbench-Request: 1\r\nContent-Length: {}\r\n\r\n{body}",
        body.len()
    );
    s.write_all(req.as_bytes()).expect("send");
    let mut out = String::new();
    let _ = s.read_to_string(&mut out);
    let status = out
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    let body = out
        .split_once("\r\n\r\n")
        .map(|x| x.1)
        .unwrap_or("")
        .to_string();
    (status, body)
}

/// utime + stime of a process, in clock ticks.
fn cpu_ticks(pid: u32) -> u64 {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).unwrap_or_default();
    let after = stat.rsplit_once(')').map(|x| x.1).unwrap_or("");
    let f: Vec<&str> = after.split_whitespace().collect();
    let n = |i: usize| f.get(i).and_then(|x| x.parse::<u64>().ok()).unwrap_or(0);
    // Fields 14 and 15 of stat (utime, stime) are 12 and 13 after ')'.
    n(11) + n(12)
}

fn main() {
    let seconds: u64 = std::env::var("CONSOLE_SECONDS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(60);
    let dir = tempfile::tempdir().expect("a temporary folder");
    let mut child = Command::new(env!("CARGO_BIN_EXE_packbench"))
        .args([
            "serve",
            "--sim",
            "8",
            "--listen",
            "127.0.0.1:0",
            "--speed",
            "1",
        ])
        .arg("--results")
        .arg(dir.path().join("results"))
        .arg("--procedures")
        .arg(std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("procedures"))
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("packbench serve");
    let mut first = String::new();
    {
        let out = child.stdout.as_mut().expect("stdout");
        let mut b = [0u8; 1];
        while out.read(&mut b).map(|n| n == 1).unwrap_or(false) && b[0] != b'\n' {
            first.push(b[0] as char);
        }
    }
    let addr = first
        .split("http://")
        .nth(1)
        .and_then(|r| r.split('/').next())
        .expect("the console's address")
        .to_string();
    for k in 1..=8 {
        let (st, body) = request(
            &addr,
            "POST",
            &format!("/api/bays/{k}/start"),
            &format!(
                r#"{{"pack_id":"FR-LOAD{k}","procedure":"capacity-check.toml","chemistry":"li-ion","series":"10","rated":"14Ah"}}"#
            ),
        );
        assert_eq!(st, 202, "bay {k}: {body}");
    }
    let stop = Arc::new(AtomicBool::new(false));
    let events = Arc::new(AtomicU64::new(0));
    let clients: Vec<_> = (0..20)
        .map(|_| {
            let (addr, stop, events) = (addr.clone(), stop.clone(), events.clone());
            std::thread::spawn(move || {
                let mut s = TcpStream::connect(&addr).expect("connect");
                s.set_read_timeout(Some(Duration::from_millis(500))).ok();
                let req = format!(
                    "GET /api/stream HTTP/1.1\r\nHost: {addr}\r\nAccept: text/event-stream\r\n\r\n"
                );
                s.write_all(req.as_bytes()).expect("send");
                let mut buf = vec![0u8; 1 << 16];
                while !stop.load(Ordering::Relaxed) {
                    if let Ok(n) = s.read(&mut buf) {
                        if n == 0 {
                            break;
                        }
                        let got = buf[..n].windows(11).filter(|w| w == b"event: bays").count();
                        events.fetch_add(got as u64, Ordering::Relaxed);
                    }
                }
            })
        })
        .collect();
    let pid = child.id();
    let tick_hz = 100.0; // USER_HZ on Linux
    let c0 = cpu_ticks(pid);
    let t0 = Instant::now();
    std::thread::sleep(Duration::from_secs(seconds));
    let wall = t0.elapsed().as_secs_f64();
    let cpu = (cpu_ticks(pid) - c0) as f64 / tick_hz;
    stop.store(true, Ordering::Relaxed);
    for c in clients {
        let _ = c.join();
    }
    for k in 1..=8 {
        request(&addr, "POST", &format!("/api/bays/{k}/stop"), "{}");
    }
    // Each run's record says how many samples were late.
    let deadline = Instant::now() + Duration::from_secs(30);
    let (mut late, mut scheduled, mut max_late) = (0u64, 0u64, 0f64);
    let mut recorded = 0;
    while Instant::now() < deadline && recorded < 8 {
        recorded = 0;
        late = 0;
        scheduled = 0;
        max_late = 0.0;
        for k in 1..=8 {
            let pack = dir.path().join("results").join(format!("FR-LOAD{k}"));
            let Some(run) = std::fs::read_dir(&pack).ok().and_then(|d| {
                d.flatten()
                    .map(|e| e.path())
                    .find(|p| p.join("summary.json").is_file())
            }) else {
                continue;
            };
            let Ok(text) = std::fs::read_to_string(run.join("run.json")) else {
                continue;
            };
            let m: serde_json::Value = serde_json::from_str(&text).unwrap_or_default();
            if m["timing"].is_object() {
                recorded += 1;
                late += m["timing"]["late_samples"].as_u64().unwrap_or(0);
                scheduled += m["timing"]["scheduled_samples"].as_u64().unwrap_or(0);
                max_late = max_late.max(m["timing"]["max_late_s"].as_f64().unwrap_or(0.0));
            }
        }
        std::thread::sleep(Duration::from_millis(200));
    }
    let _ = child.kill();
    let _ = child.wait();
    println!(
        "console load: 8 simulated bays in real time, 20 clients on the live stream, {wall:.0} s"
    );
    println!("  runs recorded: {recorded} of 8");
    println!(
        "  samples scheduled {scheduled}, late (> 100 ms) {late}, latest {:.1} ms",
        max_late * 1000.0
    );
    println!(
        "  live-stream events received: {} ({:.2} per client per second)",
        events.load(Ordering::Relaxed),
        events.load(Ordering::Relaxed) as f64 / 20.0 / wall
    );
    println!(
        "  console process CPU: {cpu:.2} s over {wall:.0} s = {:.1} % of one core",
        cpu / wall * 100.0
    );
}
