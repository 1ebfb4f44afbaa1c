//! `packbench serve`: the web console (see [`crate::console`]).

use crate::cli::args::{parse_speed, sim_config};
use crate::cli::exit::ExitCode;
use crate::console::bays::{Bay, BayKind};
use crate::console::Console;
use crate::session::error::RunError;
use crate::session::request::Speed;
use anyhow::Context;
use clap::Args;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

#[derive(Debug, Args)]
pub struct ServeArgs {
    /// The shop's bench file: one bay per station.
    #[arg(long, required_unless_present = "sim", conflicts_with = "sim")]
    pub bench: Option<PathBuf>,
    /// This many simulated bays instead (a demo, or training).
    #[arg(long)]
    pub sim: Option<usize>,
    /// Where to listen. Anything but a loopback address needs an access
    /// token on every request (printed at start, or --token-file).
    #[arg(long, default_value = "127.0.0.1:8080")]
    pub listen: SocketAddr,
    /// Read the access token from this file (at least 16 characters)
    /// instead of generating one.
    #[arg(long)]
    pub token_file: Option<PathBuf>,
    /// Results folder.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
    /// The procedures a start form offers: every .toml file here.
    #[arg(long, default_value = "procedures")]
    pub procedures: PathBuf,
    /// The simulated bays' pace: bench seconds per wall second (1 = real
    /// time).
    #[arg(long, default_value = "1")]
    pub speed: String,
    /// The simulated bays' pack and bench settings (TOML).
    #[arg(long)]
    pub sim_config: Option<PathBuf>,
    /// The address others open this console at (a phone scanning a
    /// label, a customer), e.g. https://bench.example.org: the labels'
    /// QR codes link there. Without it a label carries the pack and run
    /// ids in text instead.
    #[arg(long)]
    pub public_url: Option<String>,
}

/// `--public-url`: an http(s) address with a host, no spaces; kept
/// without its trailing slash.
pub fn public_url(text: &str) -> Result<String, RunError> {
    let t = text.trim().trim_end_matches('/');
    let rest = t
        .strip_prefix("https://")
        .or_else(|| t.strip_prefix("http://"));
    match rest {
        Some(r)
            if !r.is_empty()
                && !r.starts_with('/')
                && !r.starts_with(':')
                && r.chars().all(|c| c.is_ascii_graphic()) =>
        {
            Ok(t.to_string())
        }
        _ => Err(RunError::arguments(format!(
            "--public-url '{text}': expected the address others open the console at, such as https://bench.example.org or http://192.168.1.20:8080"
        ))),
    }
}

fn procedures(dir: &Path) -> Result<Vec<(String, PathBuf)>, RunError> {
    let entries = std::fs::read_dir(dir)
        .map_err(|e| RunError::arguments(format!("--procedures {}: {e}", dir.display())))?;
    let mut v: Vec<(String, PathBuf)> = entries
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.extension().is_some_and(|x| x == "toml"))
        .filter_map(|p| Some((p.file_name()?.to_string_lossy().into_owned(), p)))
        .collect();
    v.sort();
    if v.is_empty() {
        return Err(RunError::arguments(format!(
            "--procedures {}: no .toml procedure there",
            dir.display()
        )));
    }
    Ok(v)
}

fn token(a: &ServeArgs) -> Result<Option<String>, RunError> {
    if let Some(f) = &a.token_file {
        let t = std::fs::read_to_string(f)
            .map_err(|e| RunError::arguments(format!("--token-file {}: {e}", f.display())))?
            .trim()
            .to_string();
        if t.len() < 16 || !t.chars().all(|c| c.is_ascii_graphic()) {
            return Err(RunError::arguments(format!(
                "--token-file {}: a token is at least 16 printable characters without spaces",
                f.display()
            )));
        }
        return Ok(Some(t));
    }
    if a.listen.ip().is_loopback() {
        return Ok(None);
    }
    use rand::Rng;
    let mut rng = rand::rng();
    Ok(Some(
        (0..32)
            .map(|_| format!("{:x}", rng.random_range(0..16u8)))
            .collect(),
    ))
}

/// Build the console: bays, procedures, token, station locks.
pub fn console(a: &ServeArgs, bound: SocketAddr) -> Result<Console, RunError> {
    let procedures = procedures(&a.procedures)?;
    let token = token(a)?;
    let mut bays = Vec::new();
    let mut locks = Vec::new();
    if let Some(file) = &a.bench {
        let bench = crate::session::benchfile::BenchFile::load(file)?;
        let mut previous = crate::console::bays::interrupted_by_station(&a.results, file);
        for st in bench.stations {
            #[cfg(unix)]
            locks.push(
                Box::new(crate::session::benchfile::lock_station(file, &st)?)
                    as Box<dyn std::any::Any + Send + Sync>,
            );
            bays.push(Arc::new(Bay {
                name: st.name.clone(),
                previous: Mutex::new(previous.remove(&st.name)),
                kind: BayKind::Station {
                    spec: Box::new(st),
                    file: file.clone(),
                },
                job: Mutex::new(None),
            }));
        }
    } else {
        let n = a.sim.unwrap_or(1);
        if !(1..=64).contains(&n) {
            return Err(RunError::arguments("--sim: 1 to 64 simulated bays"));
        }
        let speed =
            match parse_speed(&a.speed)? {
                Speed::Factor(f) => f,
                Speed::Max => return Err(RunError::arguments(
                    "--speed max is for a single run; a console's bays are paced (1 = real time)",
                )),
            };
        let cfg = sim_config(a.sim_config.as_deref(), false, &[])?;
        let mut previous = crate::console::bays::interrupted_simulated(&a.results, n).into_iter();
        for k in 1..=n {
            bays.push(Arc::new(Bay {
                name: k.to_string(),
                kind: BayKind::Sim {
                    cfg: Box::new(cfg.clone()),
                    speed,
                },
                job: Mutex::new(None),
                previous: Mutex::new(previous.next()),
            }));
        }
    }
    std::fs::create_dir_all(&a.results).map_err(crate::session::error::io_err(&a.results))?;
    Ok(Console {
        bays,
        results: a.results.clone(),
        procedures,
        token,
        hosts: bound
            .ip()
            .is_loopback()
            .then(|| crate::console::loopback_hosts(bound)),
        emergency: crate::session::emergency::Emergency::default(),
        public_url: a.public_url.as_deref().map(public_url).transpose()?,
        locks,
        closing: tokio::sync::watch::channel(false).0,
    })
}

pub fn cmd_serve(a: ServeArgs) -> anyhow::Result<ExitCode> {
    // Everything checked before the port is taken.
    let _ = procedures(&a.procedures)?;
    if let Some(u) = &a.public_url {
        public_url(u)?;
    }
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("starting the runtime")?;
    rt.block_on(async move {
        let listener = tokio::net::TcpListener::bind(a.listen)
            .await
            .with_context(|| format!("listening on {}", a.listen))?;
        let addr = listener.local_addr().context("the listening address")?;
        let console = Arc::new(console(&a, addr)?);
        println!(
            "packbench console: http://{addr}/ ({} bays{})",
            console.bays.len(),
            if a.bench.is_some() { "" } else { ", simulated" }
        );
        if console.public_url.is_none() {
            println!("note: no --public-url: labels carry the pack and run ids in text, not a QR code (this console's own address cannot be opened from a phone)");
        }
        if let Some(t) = &console.token {
            println!("access token: {t}");
            println!("open http://{addr}/?token={t} once in each browser (kept in a cookie), or send Authorization: Bearer {t}");
        }
        // Bays run tests for as long as the console lives.
        let _awake = crate::cli::run::stay_awake();
        let app = crate::console::router(console.clone());
        let stopping = console.clone();
        let mut closed = console.closing.subscribe();
        let listener = crate::console::timed::TimedListener::new(listener);
        let server = axum::serve(listener, app)
            .with_graceful_shutdown(async move { shutdown(stopping).await });
        // Once the bays are stopped, connections that do not close by
        // themselves (a browser holding a stream open) get a few seconds.
        let bounded = async move {
            let _ = closed.wait_for(|c| *c).await;
            tokio::time::sleep(crate::console::timed::CLOSE_GRACE).await;
        };
        tokio::select! {
            r = server => r.context("serving")?,
            _ = bounded => eprintln!("closing connections that stayed open"),
        }
        Ok::<(), anyhow::Error>(())
    })?;
    Ok(ExitCode::Ok)
}

/// Ctrl-C: every running bay to its safe stop (outputs off, confirmed,
/// runs marked interrupted), then the server ends; a second Ctrl-C sends
/// the safe state once more on fresh links and quits at once.
async fn shutdown(c: Arc<Console>) {
    if tokio::signal::ctrl_c().await.is_err() {
        std::future::pending::<()>().await;
    }
    eprintln!("\nCtrl-C: stopping every bay safely ... press Ctrl-C again to quit at once");
    for b in &c.bays {
        let g = match b.job.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        if let Some(j) = g.as_ref() {
            j.stop.request_stop();
        }
    }
    let em = c.emergency.clone();
    tokio::spawn(async move {
        if tokio::signal::ctrl_c().await.is_ok() {
            crate::cli::run::last_switch_off(&em).await;
        }
    });
    while c.bays.iter().any(|b| b.busy()) {
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    // Every live stream ends; the server then waits for its connections.
    let _ = c.closing.send(true);
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The public address: http(s) with a host, kept without its trailing
    /// slash; anything else refused with the option's name.
    #[test]
    fn a_public_url_is_an_http_address_with_a_host() {
        assert_eq!(
            public_url("https://bench.fernhollow.example/").unwrap(),
            "https://bench.fernhollow.example"
        );
        assert_eq!(
            public_url("http://192.168.1.20:8080").unwrap(),
            "http://192.168.1.20:8080"
        );
        for bad in [
            "bench.example",
            "ftp://x",
            "https://",
            "https:///x",
            "http://a b",
            "https://:80",
        ] {
            let e = public_url(bad).unwrap_err().to_string();
            assert!(e.contains(&format!("--public-url '{bad}'")), "{bad}: {e}");
        }
    }
}
