//! The simulated instruments as real endpoints: each role served on a
//! pseudo-terminal (raw mode, kept open across client reconnects, with an
//! optional stable symlink) or on a loopback TCP port, all roles sharing
//! one battery model. Blocking threads, one per endpoint: an instrument
//! answers one message at a time. An optional line rate makes a
//! pseudo-terminal behave like a serial line of that baud rate (10 bits a
//! byte), which a pseudo-terminal by itself does not.

use super::bench::SimBench;
use super::lock::locked;
use super::modbus_slave::{checked_frame, silences, Reply as ModbusReply, Slave};
use super::server::{SimInstrument, SimRole};
use super::{SimConfig, SimHandle};
use engine::clock::Clock;
use instrument::link::{LineResponder, Response};
use model::pack::PackSpec;
use serde::Serialize;
use std::io::{self, Read, Write};
use std::net::{SocketAddr, TcpListener};
use std::path::{Path, PathBuf};
use std::sync::{mpsc, Arc, Mutex};
use std::time::{Duration, Instant};

/// Where to serve one role.
#[derive(Debug, Clone)]
pub enum Endpoint {
    /// A new pseudo-terminal; `symlink` is a stable name that follows it.
    Pty { symlink: Option<PathBuf> },
    /// A TCP port (loopback unless the caller chose otherwise).
    Tcp(SocketAddr),
}

/// How the endpoints behave.
#[derive(Debug, Clone, Default)]
pub struct ServeOptions {
    /// Emulate a serial line of this baud rate (10 bits per byte).
    pub baud: Option<u32>,
    /// Speak Modbus RTU with the shipped example register maps instead of
    /// SCPI (source and load).
    pub modbus: bool,
}

/// One served role and the link address a client uses.
#[derive(Debug, Clone)]
pub struct Served {
    pub role: SimRole,
    /// For `packbench run` / bench files: `serial:...` or `tcp:...`.
    pub link: String,
    /// The device path now (pseudo-terminals).
    pub device: Option<PathBuf>,
}

/// An entry of the server's state log (JSON lines).
#[derive(Debug, Clone, Serialize)]
pub struct StateEntry {
    /// Wall seconds since the server started.
    pub wall_s: f64,
    /// Bench seconds on the simulated clock.
    pub bench_s: f64,
    pub what: String,
    pub source_output_on: bool,
    pub load_input_on: bool,
    /// The true pack voltage at a protection trip.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub pack_voltage_v: Option<f64>,
}

/// How often the server advances the pack by itself, wall time: the
/// instruments' own protection acts on the pack whether or not a
/// controller is talking to them.
pub const TICK: Duration = Duration::from_millis(20);

struct Shared {
    handle: SimHandle,
    start: Instant,
    log: Option<Mutex<Box<dyn Write + Send>>>,
    last: Mutex<(bool, bool)>,
}

impl Shared {
    /// Log an event of the link (a client connecting).
    fn note(&self, what: &str) {
        let Some(log) = &self.log else { return };
        let (src, load) = match self.last.lock() {
            Ok(g) => *g,
            Err(p) => *p.into_inner(),
        };
        let e = StateEntry {
            wall_s: self.start.elapsed().as_secs_f64(),
            bench_s: self.handle.bench_time(),
            what: what.to_string(),
            source_output_on: src,
            load_input_on: load,
            pack_voltage_v: None,
        };
        if let (Ok(mut w), Ok(line)) = (log.lock(), serde_json::to_string(&e)) {
            let _ = writeln!(w, "{line}");
            let _ = w.flush();
        }
    }

    /// Advance the pack to the present with no message (the ticker), and
    /// log what its protection did.
    fn tick(&self) {
        self.handle.advance();
        self.log_changes(Vec::new());
    }

    /// After each message: log output changes and faults that fired.
    fn record(&self, inst: &mut SimInstrument) {
        let whats: Vec<(String, Option<f64>)> = inst
            .fired_log
            .drain(..)
            .map(|f| {
                (
                    format!(
                        "fault {}:{}",
                        f.fault.instrument.name(),
                        f.fault.kind.name()
                    ),
                    None,
                )
            })
            .collect();
        self.log_changes(whats);
    }

    /// Log protection trips, the given entries and an output change.
    fn log_changes(&self, mut whats: Vec<(String, Option<f64>)>) {
        let trips = self.handle.take_trips();
        let Some(log) = &self.log else {
            return;
        };
        for t in trips {
            whats.push((
                format!(
                    "protection {} {} at {:.4} (level {:.4})",
                    t.side, t.what, t.value, t.level
                ),
                Some(t.pack_voltage_v),
            ));
        }
        let now = (self.handle.source_output_on(), self.handle.load_input_on());
        if let Ok(mut last) = self.last.lock() {
            if *last != now {
                whats.push(("outputs".into(), None));
                *last = now;
            }
        }
        if whats.is_empty() {
            return;
        }
        let bench_s = self.handle.bench_time();
        let wall_s = self.start.elapsed().as_secs_f64();
        if let Ok(mut w) = log.lock() {
            for (what, pack_voltage_v) in whats {
                let e = StateEntry {
                    wall_s,
                    bench_s,
                    what,
                    source_output_on: now.0,
                    load_input_on: now.1,
                    pack_voltage_v,
                };
                if let Ok(line) = serde_json::to_string(&e) {
                    let _ = writeln!(w, "{line}");
                }
            }
            let _ = w.flush();
        }
    }
}

/// A running server.
pub struct SimServer {
    pub handle: SimHandle,
    pub served: Vec<Served>,
}

fn wire_sleep(baud: Option<u32>, bytes: usize) {
    if let Some(b) = baud {
        let secs = bytes as f64 * 10.0 / b as f64;
        std::thread::sleep(Duration::from_secs_f64(secs));
    }
}

/// What one request gets back.
enum Answer {
    /// Bytes to send, after a delay (a slow instrument).
    Send(Vec<u8>, Option<Duration>),
    Nothing,
}

/// Handle the bytes of one connection: requests cut off the stream by
/// `take`, each answered by `answer`, at the emulated line rate. Returns
/// `Err` when the instrument drops the link (a disconnect fault). Input
/// that never makes a request is dropped past `max_pending` bytes.
fn serve_requests<R: Read, W: Write>(
    reader: &mut R,
    writer: &mut W,
    opts: &ServeOptions,
    max_pending: usize,
    mut take: impl FnMut(&mut Vec<u8>) -> Option<Vec<u8>>,
    mut answer: impl FnMut(&[u8]) -> io::Result<Answer>,
) -> io::Result<()> {
    let mut pending: Vec<u8> = Vec::new();
    let mut buf = [0u8; 4096];
    // A client that went away cannot take replies, but the commands it
    // sent before going (an output off) still take effect.
    let mut can_write = true;
    loop {
        let n = reader.read(&mut buf)?;
        if n == 0 {
            return Ok(());
        }
        pending.extend_from_slice(&buf[..n]);
        if pending.len() > max_pending {
            pending.drain(..pending.len() - max_pending / 8);
        }
        while let Some(req) = take(&mut pending) {
            wire_sleep(opts.baud, req.len());
            let (out, delay) = match answer(&req)? {
                Answer::Nothing => continue,
                Answer::Send(out, delay) => (out, delay),
            };
            send_answer(writer, opts, &out, delay, &mut can_write);
        }
    }
}

/// Send an answer after its delay (a slow instrument) at the emulated
/// line rate; a client that went away takes no more (`can_write`).
fn send_answer<W: Write>(
    writer: &mut W,
    opts: &ServeOptions,
    out: &[u8],
    delay: Option<Duration>,
    can_write: &mut bool,
) {
    if let Some(d) = delay {
        std::thread::sleep(d);
    }
    wire_sleep(opts.baud, out.len());
    if *can_write && writer.write_all(out).and_then(|_| writer.flush()).is_err() {
        *can_write = false;
    }
}

/// SCPI: lines in, replies out.
fn serve_lines<R: Read, W: Write>(
    reader: &mut R,
    writer: &mut W,
    inst: &Arc<Mutex<SimInstrument>>,
    shared: &Shared,
    opts: &ServeOptions,
) -> io::Result<()> {
    let take = |p: &mut Vec<u8>| {
        let pos = p.iter().position(|&b| b == b'\n')?;
        Some(p.drain(..=pos).collect())
    };
    serve_requests(reader, writer, opts, 1 << 20, take, |line| {
        let text = String::from_utf8_lossy(&line[..line.len() - 1]).into_owned();
        let mut g = locked(inst);
        let a = g.respond(text.trim_end_matches('\r'));
        shared.record(&mut g);
        let with_end = |r: String| {
            let mut out = r.into_bytes();
            out.push(b'\n');
            out
        };
        Ok(match a? {
            Response::Nothing => Answer::Nothing,
            Response::Reply(r) => Answer::Send(with_end(r), None),
            Response::Late(r, delay) => Answer::Send(with_end(r), Some(delay)),
        })
    })
}

/// A byte stream that can wait for its next byte a bounded time (how a
/// receiver hears the silence that ends a Modbus RTU frame).
pub trait WaitRead: Read {
    /// Whether a byte is there to read within `timeout`.
    fn wait_readable(&mut self, timeout: Duration) -> io::Result<bool>;
}

impl WaitRead for std::net::TcpStream {
    fn wait_readable(&mut self, timeout: Duration) -> io::Result<bool> {
        self.set_read_timeout(Some(timeout.max(Duration::from_micros(1))))?;
        let mut b = [0u8; 1];
        let r = self.peek(&mut b);
        self.set_read_timeout(None)?;
        match r {
            Ok(_) => Ok(true),
            Err(e)
                if matches!(
                    e.kind(),
                    io::ErrorKind::WouldBlock | io::ErrorKind::TimedOut
                ) =>
            {
                Ok(false)
            }
            Err(e) => Err(e),
        }
    }
}

#[cfg(unix)]
impl WaitRead for std::fs::File {
    fn wait_readable(&mut self, timeout: Duration) -> io::Result<bool> {
        use nix::poll::{poll, PollFd, PollFlags, PollTimeout};
        use std::os::fd::AsFd;
        let mut fds = [PollFd::new(self.as_fd(), PollFlags::POLLIN)];
        // poll(2) counts whole milliseconds: a sub-millisecond silence
        // waits one.
        let ms = u16::try_from(timeout.as_micros().div_ceil(1000)).unwrap_or(u16::MAX);
        let n = poll(&mut fds, PollTimeout::from(ms)).map_err(io::Error::from)?;
        Ok(n > 0)
    }
}

/// Modbus RTU: request frames in, reply frames out. Frames are delimited
/// as a receiver on the line delimits them (Modbus over Serial Line V1.02
/// §2.5.1.1): a frame ends at a silence of 3.5 characters; a gap of more
/// than 1.5 characters inside it, a wrong CRC, or a frame too short or
/// too long makes it discarded whole, with no reply. So noise or a
/// truncated request costs that frame only: no later request is read
/// shifted, and no stale answers come in a burst.
fn serve_modbus<R: WaitRead, W: Write>(
    reader: &mut R,
    writer: &mut W,
    inst: &Arc<Mutex<SimInstrument>>,
    shared: &Shared,
    opts: &ServeOptions,
    slave: &Slave,
) -> io::Result<()> {
    let (t15, t35) = silences(opts.baud);
    let mut buf = [0u8; 512];
    let mut can_write = true;
    loop {
        // The first byte of a frame: wait as long as it takes.
        let n = reader.read(&mut buf)?;
        if n == 0 {
            return Ok(());
        }
        let mut frame = buf[..n].to_vec();
        let mut broken = false;
        let mut last = std::time::Instant::now();
        while reader.wait_readable(t35)? {
            let gap = last.elapsed();
            let n = reader.read(&mut buf)?;
            if n == 0 {
                return Ok(());
            }
            if gap > t15 {
                broken = true;
            }
            if frame.len() < 1024 {
                frame.extend_from_slice(&buf[..n]);
            }
            last = std::time::Instant::now();
        }
        let Some(req) = checked_frame(&frame, broken) else {
            continue;
        };
        wire_sleep(opts.baud, req.len());
        let r = {
            let mut g = locked(inst);
            let r = slave.handle(&mut g, req);
            shared.record(&mut g);
            r
        };
        let (out, delay) = match r {
            ModbusReply::Silence => continue,
            ModbusReply::Disconnect => {
                return Err(io::Error::new(
                    io::ErrorKind::ConnectionReset,
                    "simulated disconnect",
                ))
            }
            ModbusReply::Frame(f) => (f, None),
            ModbusReply::Late(f, d) => (f, Some(d)),
        };
        send_answer(writer, opts, &out, delay, &mut can_write);
    }
}

/// One connection, in the protocol the server speaks.
fn serve_conn<R: WaitRead, W: Write>(
    reader: &mut R,
    writer: &mut W,
    inst: &Arc<Mutex<SimInstrument>>,
    shared: &Shared,
    opts: &ServeOptions,
    slave: Option<&Slave>,
) -> io::Result<()> {
    match slave {
        Some(s) => serve_modbus(reader, writer, inst, shared, opts, s),
        None => serve_lines(reader, writer, inst, shared, opts),
    }
}

#[cfg(unix)]
fn set_raw(fd: &std::os::fd::OwnedFd) -> io::Result<()> {
    use nix::sys::termios::{cfmakeraw, tcgetattr, tcsetattr, SetArg};
    let mut t = tcgetattr(fd).map_err(io::Error::from)?;
    cfmakeraw(&mut t);
    tcsetattr(fd, SetArg::TCSANOW, &t).map_err(io::Error::from)
}

/// A new pseudo-terminal in raw mode: (master, our own slave fd kept open
/// so the master survives client reconnects, device path).
#[cfg(unix)]
fn new_pty() -> io::Result<(std::fs::File, std::fs::File, PathBuf)> {
    let r = nix::pty::openpty(None, None).map_err(io::Error::from)?;
    set_raw(&r.slave)?;
    let path = nix::unistd::ttyname(&r.slave).map_err(io::Error::from)?;
    Ok((
        std::fs::File::from(r.master),
        std::fs::File::from(r.slave),
        path,
    ))
}

/// Pseudo-terminals are Unix-only; elsewhere serve on TCP.
#[cfg(not(unix))]
fn new_pty() -> io::Result<(std::fs::File, std::fs::File, PathBuf)> {
    Err(io::Error::new(
        io::ErrorKind::Unsupported,
        "pseudo-terminals are Unix-only: serve on tcp instead",
    ))
}

#[cfg(not(unix))]
fn point_symlink(_link: &Path, _target: &Path) -> io::Result<()> {
    Ok(())
}

#[cfg(unix)]
fn point_symlink(link: &Path, target: &Path) -> io::Result<()> {
    let tmp = link.with_extension("new-link");
    let _ = std::fs::remove_file(&tmp);
    std::os::unix::fs::symlink(target, &tmp)?;
    std::fs::rename(&tmp, link)
}

fn serial_link(path: &Path, baud: Option<u32>) -> String {
    format!(
        "serial:{}?baud={}&parity=none&flow=none",
        path.display(),
        baud.unwrap_or(115_200)
    )
}

/// Serve the given roles on one simulated pack. Returns once every
/// endpoint is ready; the endpoints run on their own threads until the
/// process ends.
pub fn serve(
    spec: &PackSpec,
    cfg: &SimConfig,
    clock: Arc<dyn Clock>,
    roles: &[(SimRole, Endpoint)],
    opts: &ServeOptions,
    state_log: Option<Box<dyn Write + Send>>,
) -> io::Result<SimServer> {
    let bench = Arc::new(Mutex::new(SimBench::new(spec, cfg, clock)));
    let handle = SimHandle::from_bench(Arc::clone(&bench));
    let shared = Arc::new(Shared {
        handle: handle.clone(),
        start: Instant::now(),
        log: state_log.map(Mutex::new),
        last: Mutex::new((false, false)),
    });
    {
        // The pack lives on when no controller talks: its instruments'
        // protection with it.
        let shared = Arc::clone(&shared);
        std::thread::spawn(move || loop {
            std::thread::sleep(TICK);
            shared.tick();
        });
    }
    let mut served = Vec::new();
    for (role, endpoint) in roles {
        let slave = if opts.modbus {
            let profile_role = match role {
                SimRole::Source => instrument::profile::ProfileRole::Source,
                SimRole::Load => instrument::profile::ProfileRole::Load,
                other => {
                    return Err(io::Error::new(
                        io::ErrorKind::Unsupported,
                        format!(
                        "--modbus serves a source and a load; there is no Modbus map for the {}",
                        role_name(*other)
                    ),
                    ))
                }
            };
            Some(Arc::new(Slave::for_role(profile_role).ok_or_else(
                || io::Error::other("the shipped Modbus profile is missing"),
            )?))
        } else {
            None
        };
        let inst = Arc::new(Mutex::new(SimInstrument::new(
            Arc::clone(&bench),
            *role,
            Arc::new(Mutex::new(super::server::Traffic::default())),
        )));
        let shared = Arc::clone(&shared);
        let baud = opts.baud;
        let opts = opts.clone();
        match endpoint {
            Endpoint::Tcp(addr) => {
                let listener = TcpListener::bind(addr)?;
                let local = listener.local_addr()?;
                served.push(Served {
                    role: *role,
                    link: format!("tcp:{}:{}", local.ip(), local.port()),
                    device: None,
                });
                std::thread::spawn(move || {
                    for conn in listener.incoming() {
                        let Ok(stream) = conn else { continue };
                        shared.note(&format!("{} client connected", role_name(inst_role(&inst))));
                        let _ = stream.set_nodelay(true);
                        let Ok(mut reader) = stream.try_clone() else {
                            continue;
                        };
                        let mut writer = stream;
                        let _ = serve_conn(
                            &mut reader,
                            &mut writer,
                            &inst,
                            &shared,
                            &opts,
                            slave.as_deref(),
                        );
                        let _ = writer.shutdown(std::net::Shutdown::Both);
                    }
                });
            }
            Endpoint::Pty { symlink } => {
                let modbus = slave.clone();
                let (tx, rx) = mpsc::channel::<io::Result<PathBuf>>();
                let symlink = symlink.clone();
                std::thread::spawn(move || {
                    let mut first = Some(tx);
                    loop {
                        let made = new_pty().and_then(|(m, s, path)| {
                            if let Some(l) = &symlink {
                                point_symlink(l, &path)?;
                            }
                            Ok((m, s, path))
                        });
                        let (master, slave, path) = match made {
                            Ok(x) => x,
                            Err(e) => {
                                if let Some(tx) = first.take() {
                                    let _ = tx.send(Err(e));
                                }
                                return;
                            }
                        };
                        if let Some(tx) = first.take() {
                            let _ = tx.send(Ok(path.clone()));
                        } else {
                            eprintln!(
                                "{} moved to {}",
                                role_name(inst_role(&inst)),
                                path.display()
                            );
                        }
                        let Ok(mut reader) = master.try_clone() else {
                            return;
                        };
                        let mut writer = master;
                        // Returns only on a simulated disconnect (or a
                        // failed pseudo-terminal): the device then goes
                        // away and a new one takes its place.
                        let _ = serve_conn(
                            &mut reader,
                            &mut writer,
                            &inst,
                            &shared,
                            &opts,
                            modbus.as_deref(),
                        );
                        drop(slave);
                        drop(writer);
                        drop(reader);
                    }
                });
                let path = rx
                    .recv()
                    .map_err(|_| io::Error::other("pseudo-terminal thread ended"))??;
                served.push(Served {
                    role: *role,
                    link: serial_link(&path, baud),
                    device: Some(path),
                });
            }
        }
    }
    Ok(SimServer { handle, served })
}

fn inst_role(inst: &Arc<Mutex<SimInstrument>>) -> SimRole {
    locked(inst).role()
}

/// The name of a role on the command line and in bench files.
pub fn role_name(role: SimRole) -> &'static str {
    match role {
        SimRole::Source => "source",
        SimRole::Load => "load",
        SimRole::SourceSink => "source-sink",
        SimRole::Meter => "meter",
    }
}

/// The built-in profile for a served role.
pub fn role_profile(role: SimRole, modbus: bool) -> &'static str {
    match role {
        SimRole::Source if modbus => "generic-modbus-source",
        SimRole::Load if modbus => "generic-modbus-load",
        SimRole::Source => "generic-scpi-source",
        SimRole::Load => "generic-scpi-load",
        SimRole::SourceSink => "generic-scpi-source-sink",
        SimRole::Meter => "generic-scpi-meter",
    }
}

/// A bench file for the served endpoints (one station named `sim`).
/// [`bench_file_text`] for a simulated pack built of groups: the meter is
/// the scanner on the groups' channels, and the station reads them.
pub fn bench_file_text_with_groups(
    served: &[Served],
    timeout: Option<&str>,
    modbus: bool,
    groups: Option<&model::groups::GroupChannels>,
) -> String {
    let mut s = bench_file_text(served, timeout, modbus);
    let Some(g) = groups.filter(|_| served.iter().any(|x| x.role == SimRole::Meter)) else {
        return s;
    };
    s = s.replace(
        "profile = \"generic-scpi-meter\"",
        "profile = \"generic-scpi-scanner\"",
    );
    s.push_str(&format!(
        "[station.groups]\nwiring = \"{}\"\nchannels = \"{}\"\n",
        g.wiring.name(),
        model::groups::channel_list(&g.voltage)
    ));
    for t in &g.temperatures {
        s.push_str(&format!(
            "[[station.groups.temperature]]\nchannel = {}\nname = \"{}\"\nplace = \"{}\"\n",
            t.channel, t.name, t.place
        ));
        if let Some(gr) = t.group {
            s.push_str(&format!("group = {gr}\n"));
        }
    }
    s
}

pub fn bench_file_text(served: &[Served], timeout: Option<&str>, modbus: bool) -> String {
    let mut s = String::from(
        "# Written by `packbench sim serve`: the simulated instruments as a bench.\n[[station]]\nname = \"sim\"\n",
    );
    for sv in served {
        let table = match sv.role {
            SimRole::SourceSink => "source_sink",
            other => role_name(other),
        };
        s.push_str(&format!(
            "[station.{table}]\nlink = \"{}\"\nprofile = \"{}\"\n",
            sv.link,
            role_profile(sv.role, modbus)
        ));
        if let Some(t) = timeout {
            s.push_str(&format!("timeout = \"{t}\"\n"));
        }
    }
    s
}
