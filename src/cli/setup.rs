//! Commands for setting up a bench: `ports` (serial ports of this
//! machine), `probe` (identify an instrument, read its error queue, voltage
//! and current without changing its state) and `sim serve` (the simulated
//! instruments on pseudo-terminals or loopback TCP ports).

use crate::cli::args::pack_from_args;
use crate::cli::args::PackArgs;
use crate::cli::exit::ExitCode;
use engine::clock::{Clock, PacedClock};
use instrument::profile::Profile;
use instrument::scpi::{self, Session};
use instrument::transport::{self, LinkSpec};

use anyhow::{anyhow, bail, Context};
use clap::{Args, Subcommand};
use sim::serve::{self, Endpoint, ServeOptions};
use sim::server::SimRole;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;

#[derive(Debug, Args)]
pub struct ProbeArgs {
    /// Link: serial:DEVICE?baud=N..., or tcp:HOST:PORT.
    pub link: String,
    /// Profile: a built-in name (generic-scpi-source, -load, -source-sink,
    /// -meter) or a profile file. Default: generic-scpi-source.
    #[arg(long)]
    pub profile: Option<String>,
    /// Reply timeout, e.g. 500ms (default: the profile's).
    #[arg(long)]
    pub timeout: Option<String>,
}

#[derive(Debug, Args)]
pub struct SimArgs {
    #[command(subcommand)]
    pub command: SimCommand,
}

#[derive(Debug, Subcommand)]
pub enum SimCommand {
    /// Serve simulated instruments (sharing one simulated pack) on
    /// pseudo-terminals or loopback TCP ports until Ctrl-C.
    Serve(ServeArgs),
}

#[derive(Debug, Args)]
pub struct ServeArgs {
    /// Roles to serve: source, load, source-sink, meter (repeat, or comma-separated).
    #[arg(long, value_delimiter = ',', default_values = ["source", "load"])]
    pub role: Vec<String>,
    /// Serve each role on a new pseudo-terminal.
    #[arg(long, conflicts_with = "tcp")]
    pub pty: bool,
    /// Serve on TCP from this address, one port per role counting up
    /// (port 0: any free ports). Default 127.0.0.1:5025.
    #[arg(long)]
    pub tcp: Option<String>,
    /// Folder for stable symlinks to the pseudo-terminals (DIR/<role>).
    #[arg(long, requires = "pty")]
    pub link_dir: Option<PathBuf>,
    /// Speak Modbus RTU instead of SCPI (source and load), with the shipped
    /// generic-modbus-source and generic-modbus-load register maps.
    #[arg(long)]
    pub modbus: bool,
    /// Emulate a serial line of this baud rate (10 bits per byte).
    #[arg(long)]
    pub baud: Option<u32>,
    /// Bench seconds per wall second (1 = real time).
    #[arg(long, default_value = "1")]
    pub speed: f64,
    #[command(flatten)]
    pub pack_args: PackArgs,
    /// Simulated bench settings (pack condition, meter errors, faults), TOML.
    #[arg(long)]
    pub sim_config: Option<PathBuf>,
    /// Simulated instruments without measurement error.
    #[arg(long)]
    pub sim_ideal: bool,
    /// Inject a link fault: INSTRUMENT:KIND@TIME[:DELAY] (see `run --fault`).
    #[arg(long)]
    pub fault: Vec<String>,
    /// Write a bench file for the served endpoints here.
    #[arg(long)]
    pub bench_out: Option<PathBuf>,
    /// Reply timeout to put in that bench file, e.g. 300ms.
    #[arg(long)]
    pub bench_timeout: Option<String>,
    /// Log output changes and faults as JSON lines here.
    #[arg(long)]
    pub state_log: Option<PathBuf>,
}

/// `packbench ports`.
pub fn cmd_ports() -> anyhow::Result<ExitCode> {
    let ports = transport::list_ports().map_err(|e| anyhow!("cannot list serial ports: {e}"))?;
    if ports.is_empty() {
        println!("no serial ports found");
    }
    for p in ports {
        println!("{:<24} {}", p.path, p.kind);
    }
    Ok(ExitCode::Ok)
}

fn load_profile(name: &str) -> anyhow::Result<Profile> {
    if let Some(p) = Profile::builtin_named(name) {
        return Ok(p);
    }
    let path = Path::new(name);
    let text = model::procedure::read_text(path)
        .with_context(|| format!("profile '{name}' is neither a built-in nor a readable file"))?;
    Ok(Profile::from_toml(path, &text)?)
}

/// `packbench probe`: identify, error queue, voltage and current. Sends no
/// setting and leaves outputs as they are.
pub fn cmd_probe(a: ProbeArgs) -> anyhow::Result<ExitCode> {
    let spec: LinkSpec = a
        .link
        .parse()
        .map_err(|e: transport::LinkSpecError| anyhow!("{e}"))?;
    let mut profile = load_profile(a.profile.as_deref().unwrap_or("generic-scpi-source"))?;
    if let Some(t) = &a.timeout {
        let s = model::units::duration(t).map_err(|e| anyhow!("--timeout: {e}"))?;
        profile.set_timeout_ms(((s * 1000.0).round() as u64).max(1));
    }
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    rt.block_on(async move {
        let link = transport::open_for("probe", &spec, &profile).await?;
        let mut s = Session::with_framing("probe", link, profile.framing());
        let mut failures = 0;
        let c = profile.commands.clone();
        match s.query(&c.identify).await {
            Ok(idn) => {
                let fields = idn.split(',').count();
                println!("identify    {} -> {idn}", c.identify);
                if fields != 4 {
                    println!("            warning: IEEE 488.2 *IDN? has 4 comma-separated fields, this has {fields}");
                }
            }
            Err(e) => {
                failures += 1;
                println!("identify    {} -> FAILED: {e}", c.identify);
            }
        }
        if let Some(q) = &c.error_query {
            let mut n = 0;
            loop {
                match s.query(q).await {
                    Ok(r) => match scpi::parse_error_entry(&r) {
                        Ok((0, _)) => {
                            if n == 0 {
                                println!("errors      {q} -> none");
                            }
                            break;
                        }
                        Ok((code, text)) => {
                            n += 1;
                            println!("errors      {q} -> {code},\"{text}\"");
                            if n >= 32 {
                                break;
                            }
                        }
                        Err(m) => {
                            failures += 1;
                            println!("errors      {q} -> FAILED: {m}");
                            break;
                        }
                    },
                    Err(e) => {
                        failures += 1;
                        println!("errors      {q} -> FAILED: {e}");
                        break;
                    }
                }
            }
        }
        let mut reads = vec![("voltage", c.measure_voltage.clone())];
        if let Some(m) = &c.measure_current {
            reads.push(("current", m.clone()));
        }
        if let Some(m) = &c.measure_temperature {
            reads.push(("temperature", m.clone()));
        }
        for (what, q) in reads {
            match s.query_number(&q).await {
                Ok(x) => println!("{what:<11} {q} -> {x}"),
                Err(e) => {
                    failures += 1;
                    println!("{what:<11} {q} -> FAILED: {e}");
                }
            }
        }
        if failures > 0 {
            println!("{failures} check(s) failed: check wiring, link settings and profile");
            Ok::<ExitCode, anyhow::Error>(ExitCode::Failure)
        } else {
            println!("OK: link and profile answer as expected");
            Ok(ExitCode::Ok)
        }
    })
}

fn parse_role(s: &str) -> anyhow::Result<SimRole> {
    Ok(match s {
        "source" => SimRole::Source,
        "load" => SimRole::Load,
        "source-sink" => SimRole::SourceSink,
        "meter" => SimRole::Meter,
        other => bail!("--role '{other}': expected source, load, source-sink or meter"),
    })
}

/// `packbench sim ...`.
pub fn cmd_sim(a: SimArgs) -> anyhow::Result<ExitCode> {
    match a.command {
        SimCommand::Serve(s) => cmd_serve(s),
    }
}

fn cmd_serve(a: ServeArgs) -> anyhow::Result<ExitCode> {
    let roles: Vec<SimRole> = a
        .role
        .iter()
        .map(|r| parse_role(r))
        .collect::<anyhow::Result<_>>()?;
    for (i, r) in roles.iter().enumerate() {
        if roles[..i].contains(r) {
            bail!("--role {} is given twice", serve::role_name(*r));
        }
    }
    if !(a.speed.is_finite() && a.speed > 0.0 && a.speed <= 1e6) {
        bail!(
            "--speed {}: expected bench seconds per wall second, above 0",
            a.speed
        );
    }
    let pack =
        pack_from_args(&a.pack_args)?.unwrap_or_else(crate::session::request::default_sim_pack);
    let cfg = crate::cli::args::sim_config(a.sim_config.as_deref(), a.sim_ideal, &a.fault)?;
    if let Some(t) = &a.bench_timeout {
        model::units::duration(t).map_err(|e| anyhow!("--bench-timeout: {e}"))?;
    }
    let endpoints: Vec<(SimRole, Endpoint)> = if a.pty {
        if let Some(d) = &a.link_dir {
            std::fs::create_dir_all(d).with_context(|| format!("cannot create {}", d.display()))?;
        }
        roles
            .iter()
            .map(|r| {
                let symlink = a.link_dir.as_ref().map(|d| d.join(serve::role_name(*r)));
                (*r, Endpoint::Pty { symlink })
            })
            .collect()
    } else {
        let base: SocketAddr = a
            .tcp
            .as_deref()
            .unwrap_or("127.0.0.1:5025")
            .parse()
            .map_err(|_| anyhow!("--tcp: expected ADDRESS:PORT, e.g. 127.0.0.1:5025"))?;
        if !base.ip().is_loopback() {
            eprintln!("warning: serving on {} (not loopback): anyone on that network can drive the simulated bench", base.ip());
        }
        roles
            .iter()
            .enumerate()
            .map(|(i, r)| {
                let mut addr = base;
                if base.port() != 0 {
                    addr.set_port(base.port() + i as u16);
                }
                (*r, Endpoint::Tcp(addr))
            })
            .collect()
    };
    let state_log: Option<Box<dyn std::io::Write + Send>> = match &a.state_log {
        Some(p) => Some(Box::new(
            std::fs::File::create(p).with_context(|| format!("cannot create {}", p.display()))?,
        )),
        None => None,
    };
    let clock: Arc<dyn Clock> = PacedClock::new(a.speed);
    let server = serve::serve(
        &pack,
        &cfg,
        clock,
        &endpoints,
        &ServeOptions {
            baud: a.baud,
            modbus: a.modbus,
        },
        state_log,
    )
    .context("cannot start the simulated instruments")?;
    println!(
        "simulated {} {}S {} Ah pack, {}x real time",
        pack.chemistry, pack.series, pack.rated_capacity_ah, a.speed
    );
    for s in &server.served {
        let stable = match (&a.link_dir, s.device.is_some()) {
            (Some(d), true) => format!(
                "  (stable name: {})",
                d.join(serve::role_name(s.role)).display()
            ),
            _ => String::new(),
        };
        println!("{:<12} {}{stable}", serve::role_name(s.role), s.link);
    }
    if let Some(path) = &a.bench_out {
        let mut served = server.served.clone();
        if let Some(d) = &a.link_dir {
            // The bench file names the stable symlinks, which survive a
            // pseudo-terminal being replaced after a disconnect.
            for s in served.iter_mut().filter(|s| s.device.is_some()) {
                let l = d.join(serve::role_name(s.role));
                s.link = format!(
                    "serial:{}?baud={}&parity=none&flow=none",
                    l.display(),
                    a.baud.unwrap_or(115_200)
                );
            }
        }
        std::fs::write(
            path,
            serve::bench_file_text_with_groups(
                &served,
                a.bench_timeout.as_deref(),
                a.modbus,
                (cfg.groups.count > 0)
                    .then(|| {
                        model::groups::GroupChannels::sim_default(
                            cfg.groups.count,
                            cfg.groups.wiring,
                            &cfg.groups.sensors,
                        )
                    })
                    .as_ref(),
            ),
        )
        .with_context(|| format!("cannot write {}", path.display()))?;
        println!("bench file   {}", path.display());
    }
    println!("ready (Ctrl-C to stop)");
    use std::io::Write as _;
    let _ = std::io::stdout().flush();
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?;
    rt.block_on(async {
        let _ = tokio::signal::ctrl_c().await;
    });
    let _ = server;
    Ok(ExitCode::Ok)
}

#[cfg(test)]
mod tests {
    use super::*;
    use instrument::profile::ProfileRole;

    #[test]
    fn roles_parse() {
        assert_eq!(parse_role("source-sink").unwrap(), SimRole::SourceSink);
        assert!(parse_role("oven").is_err());
        assert_eq!(
            load_profile("generic-scpi-meter").unwrap().role,
            ProfileRole::Meter
        );
    }
}
