//! The console in a real browser: Debian's headless Chromium driven over
//! WebDriver (chromedriver, by the fantoccini crate). A test started on a
//! simulated bay from the form, its values updating, stopped (interrupted,
//! outputs off), resumed, its report and label opened; a bad pack id and a
//! bad procedure shown next to their fields with nothing started.
//!
//! Needs `/usr/bin/chromium` and `/usr/bin/chromedriver` (Debian's
//! chromium and chromium-driver): the test is `#[ignore]`d with that as its
//! reason, and `.ci/run` installs them and runs it with `-- --ignored`,
//! where a missing browser fails it.
//! With `PACKBENCH_SCREENSHOTS=DIR` it saves the bays page, a report and a
//! label there (the ones in docs/ came from it).

use crate::console::{bay, quick_procedures, serve};
use crate::util::*;
use fantoccini::{Client, ClientBuilder, Locator};
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Duration;

const CHROMIUM: &str = "/usr/bin/chromium";
const CHROMEDRIVER: &str = "/usr/bin/chromedriver";

/// Fails (does not skip) without the browser and its driver.
fn require_browser() {
    assert!(
        Path::new(CHROMIUM).is_file() && Path::new(CHROMEDRIVER).is_file(),
        "no {CHROMIUM} and {CHROMEDRIVER} (apt-get install chromium chromium-driver)"
    );
}

struct Driver(std::process::Child);

impl Drop for Driver {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

async fn connect(port: u16, profile: &Path) -> Client {
    let mut caps = serde_json::Map::new();
    caps.insert(
        "goog:chromeOptions".into(),
        serde_json::json!({
            "binary": CHROMIUM,
            "args": [
                "--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic",
                "--no-first-run", "--disable-background-networking",
                "--disable-component-update", "--disable-sync",
                "--disable-dev-shm-usage", "--window-size=1280,900",
                format!("--user-data-dir={}", profile.display()),
            ]
        }),
    );
    let connector = hyper_util::client::legacy::connect::HttpConnector::new();
    let mut last = None;
    for _ in 0..50 {
        match ClientBuilder::new(connector.clone())
            .capabilities(caps.clone())
            .connect(&format!("http://127.0.0.1:{port}"))
            .await
        {
            Ok(c) => return c,
            Err(e) => last = Some(e),
        }
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    panic!("no WebDriver session: {last:?}");
}

/// Wait for an element's text to satisfy `ok`.
async fn wait_text(c: &Client, css: &str, limit: Duration, ok: impl Fn(&str) -> bool) -> String {
    let t0 = std::time::Instant::now();
    let mut last = String::new();
    while t0.elapsed() < limit {
        if let Ok(e) = c.find(Locator::Css(css)).await {
            if let Ok(t) = e.text().await {
                if ok(&t) {
                    return t;
                }
                last = t;
            }
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    panic!("{css}: still '{last}' after {limit:?}");
}

async fn click(c: &Client, css: &str) {
    let t0 = std::time::Instant::now();
    loop {
        // The tiles are redrawn from the live stream: find afresh.
        match c.find(Locator::Css(css)).await {
            Ok(e) => match e.click().await {
                Ok(_) => return,
                Err(e) if t0.elapsed() > Duration::from_secs(10) => panic!("{css}: {e}"),
                Err(_) => {}
            },
            Err(e) if t0.elapsed() > Duration::from_secs(10) => panic!("{css}: {e}"),
            Err(_) => {}
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

async fn fill(c: &Client, css: &str, text: &str) {
    let e = c.find(Locator::Css(css)).await.unwrap();
    e.clear().await.unwrap();
    e.send_keys(text).await.unwrap();
}

async fn shot(c: &Client, name: &str) {
    if let Some(dir) = std::env::var_os("PACKBENCH_SCREENSHOTS") {
        let png = c.screenshot().await.unwrap();
        std::fs::write(Path::new(&dir).join(name), png).unwrap();
    }
}

#[test]
#[ignore = "needs Debian's chromium and chromium-driver; run with -- --ignored"]
fn the_console_in_a_real_browser() {
    require_browser();
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    quick_procedures(d);
    write(d, "nearly-full.toml", "[pack]\ninitial_soc = 0.9\n");
    let s = serve(
        d,
        &[
            "--sim",
            "3",
            "--listen",
            "127.0.0.1:0",
            "--speed",
            "400",
            "--sim-config",
            "nearly-full.toml",
            "--public-url",
            "https://bench.fernhollow.example",
        ],
    );
    let port = free_port();
    let _driver = Driver(
        Command::new(CHROMEDRIVER)
            .arg(format!("--port={port}"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap(),
    );
    let profile = d.join("browser-profile");
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let addr = s.addr.clone();
    rt.block_on(async move {
        let c = connect(port, &profile).await;
        let base = format!("http://{addr}");
        c.goto(&format!("{base}/")).await.unwrap();
        wait_text(&c, "#bay-1 [data-role=state]", Duration::from_secs(10), |t| t == "idle").await;
        // A bad pack id and procedure: shown next to their fields, nothing started.
        click(&c, "#bay-1 [data-action=start]").await;
        fill(&c, "#f-pack_id", "../etc").await;
        c.execute(
            "const s = document.getElementById('f-procedure'); s.append(new Option('missing.toml', 'missing.toml')); s.value = 'missing.toml';",
            vec![],
        )
        .await
        .unwrap();
        click(&c, "#check-button").await;
        let e = wait_text(&c, "#e-pack_id", Duration::from_secs(10), |t| !t.is_empty()).await;
        assert!(e.contains("../etc"), "{e}");
        let e = wait_text(&c, "#e-procedure", Duration::from_secs(5), |t| !t.is_empty()).await;
        assert!(e.contains("missing.toml"), "{e}");
        let start = c.find(Locator::Css("#confirm-button")).await.unwrap();
        assert_eq!(start.attr("disabled").await.unwrap().as_deref(), Some("true"));
        assert_eq!(bay(&addr, "1")["state"], "idle");
        // The good form: the dry run shown, then started.
        fill(&c, "#f-pack_id", "FR-C21").await;
        c.find(Locator::Css("#f-chemistry")).await.unwrap().select_by_value("li-ion").await.unwrap();
        fill(&c, "#f-series", "10").await;
        fill(&c, "#f-rated", "14Ah").await;
        c.find(Locator::Css("#f-procedure")).await.unwrap().select_by_value("quick-check.toml").await.unwrap();
        click(&c, "#check-button").await;
        wait_text(&c, "#forecast", Duration::from_secs(20), |t| t.contains("discharge")).await;
        click(&c, "#confirm-button").await;
        wait_text(&c, "#bay-1 [data-role=state]", Duration::from_secs(20), |t| t == "running").await;
        // Two more bays busy, so the page shows a shop at work.
        for (b, pack) in [("2", "FR-C22"), ("3", "FR-C23")] {
            let (st, r) = crate::console::post(
                &addr,
                &format!("/api/bays/{b}/start"),
                &serde_json::json!({"pack_id": pack, "procedure": "quick-check.toml",
                    "chemistry": "li-ion", "series": "10", "rated": "14Ah"}),
            );
            assert_eq!(st, 202, "{r}");
        }
        // Its values update on the page.
        let v1 = wait_text(&c, "#bay-1 [data-role=voltage]", Duration::from_secs(20), |t| !t.starts_with('–')).await;
        let v2 = wait_text(&c, "#bay-1 [data-role=voltage]", Duration::from_secs(30), |t| t != v1).await;
        assert_ne!(v1, v2);
        shot(&c, "console-bays.png").await;
        // Stop, confirmed: interrupted, outputs off.
        click(&c, "#bay-1 [data-action=stop]").await;
        c.accept_alert().await.unwrap();
        wait_text(&c, "#bay-1 [data-role=state]", Duration::from_secs(30), |t| t == "interrupted").await;
        let b = bay(&addr, "1");
        let run_id = b["result"]["run_id"].as_str().unwrap().to_string();
        let events = std::fs::read_to_string(
            d.join("results/FR-C21").join(&run_id).join("events.jsonl"),
        )
        .unwrap();
        let off = events.lines().rev().find(|l| l.contains("\"outputs_off\"")).unwrap().to_string();
        assert!(off.contains("\"source_off_confirmed\":true") && off.contains("\"load_off_confirmed\":true"), "{off}");
        // Resume from the page.
        click(&c, "#bay-1 [data-action=resume]").await;
        wait_text(&c, "#bay-1 [data-role=state]", Duration::from_secs(20), |t| t == "running").await;
        // To its end; then its report and its label.
        wait_text(&c, "#bay-1 [data-role=state]", Duration::from_secs(120), |t| t == "completed").await;
        let result = wait_text(&c, "#bay-1 [data-role=result]", Duration::from_secs(5), |t| t.contains("grade")).await;
        assert!(result.contains("Ah"), "{result}");
        click(&c, "#bay-1 [data-action=report]").await;
        let url = c.current_url().await.unwrap();
        assert!(url.path().ends_with(&format!("/packs/FR-C21/runs/{run_id}")), "{url}");
        let body = c.find(Locator::Css("body")).await.unwrap().text().await.unwrap();
        assert!(body.contains("FR-C21"), "{body}");
        shot(&c, "console-report.png").await;
        c.goto(&format!("{base}/packs/FR-C21/runs/{run_id}/label")).await.unwrap();
        let label = c.find(Locator::Css("#label")).await.unwrap().text().await.unwrap();
        assert!(label.contains("FR-C21") && label.contains("Grade"), "{label}");
        assert!(c.find(Locator::Css("#label svg")).await.is_ok(), "a QR code");
        shot(&c, "console-label.png").await;
        // From the packs page, every run's report and label by clicks
        // only: pack → its runs → report, back to the pack by the header,
        // → label, back; then the next pack by the header's "Packs".
        for b in ["2", "3"] {
            assert!(wait_until(Duration::from_secs(120), || bay(&addr, b)["state"] == "completed"));
        }
        c.goto(&format!("{base}/packs")).await.unwrap();
        wait_text(&c, "#packs tbody", Duration::from_secs(10), |t| t.contains("FR-C21")).await;
        shot(&c, "console-packs.png").await;
        let packs: Vec<String> = {
            let mut v = Vec::new();
            for a in c.find_all(Locator::Css("#packs tbody td a")).await.unwrap() {
                v.push(a.text().await.unwrap());
            }
            v
        };
        assert_eq!(packs.len(), 3, "{packs:?}");
        let mut seen = 0;
        for pack in &packs {
            click(&c, &format!("#packs tbody a[href='/packs/{pack}']")).await;
            let runs = c.find_all(Locator::Css("#runs a[data-role=run-report]")).await.unwrap().len();
            assert!(runs >= 1, "{pack}: no run listed");
            for k in 0..runs {
                let nth = |role: &str| format!("#runs tr:nth-child({}) a[data-role={role}]", k + 2);
                let run = c.find(Locator::Css(&nth("run-report"))).await.unwrap().text().await.unwrap();
                click(&c, &nth("run-report")).await;
                let h1 = wait_text(&c, "h1", Duration::from_secs(10), |t| !t.is_empty()).await;
                assert!(h1.contains(pack.as_str()), "{h1}");
                let id = run.trim_start_matches("run ");
                let body = c.find(Locator::Css("body")).await.unwrap().text().await.unwrap();
                assert!(body.contains(&format!("run {id}")), "{run}");
                click(&c, &format!("header.pb-nav a[href='/packs/{pack}']")).await;
                click(&c, &nth("run-label")).await;
                let label = wait_text(&c, "#label", Duration::from_secs(10), |t| !t.is_empty()).await;
                assert!(label.contains(pack.as_str()) && label.contains("Grade"), "{label}");
                assert!(c.find(Locator::Css("#label svg")).await.is_ok(), "a QR code");
                click(&c, &format!("header.pb-nav a[href='/packs/{pack}']")).await;
                seen += 1;
            }
            click(&c, "header a[href='/packs']").await;
            wait_text(&c, "#packs tbody", Duration::from_secs(10), |t| t.contains(pack.as_str())).await;
        }
        assert!(seen >= 3, "{seen} runs reached");
        c.close().await.unwrap();
    });
}
