//! Link addresses and how to open them: a serial port
//! (`serial:/dev/ttyUSB0?baud=115200&parity=none&flow=none`), a raw TCP
//! socket (`tcp:HOST:PORT`, 5025 being the usual SCPI socket port), or the
//! embedded simulated bench (`sim`). Serial ports are opened through
//! tokio-serial built without libudev.

use super::link::Link;
use super::{ErrorKind, InstrumentError};
use std::fmt;
use std::time::Duration;

/// Parity of a serial line.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Parity {
    None,
    Odd,
    Even,
}

/// Flow control of a serial line.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Flow {
    None,
    Software,
    Hardware,
}

/// Settings of a serial line.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SerialSpec {
    pub path: String,
    pub baud: u32,
    pub parity: Parity,
    pub flow: Flow,
    pub data_bits: u8,
    pub stop_bits: u8,
}

/// Where an instrument is.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum LinkSpec {
    /// The embedded simulated bench.
    Sim,
    Serial(SerialSpec),
    Tcp {
        host: String,
        port: u16,
    },
}

/// A link address that does not parse; `offset` is the byte in the text
/// where the problem starts.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{message}")]
pub struct LinkSpecError {
    pub offset: usize,
    pub message: String,
}

fn bad(offset: usize, message: String) -> LinkSpecError {
    LinkSpecError { offset, message }
}

/// The usual SCPI raw-socket port.
pub const SCPI_PORT: u16 = 5025;

impl std::str::FromStr for LinkSpec {
    type Err = LinkSpecError;

    fn from_str(text: &str) -> Result<LinkSpec, LinkSpecError> {
        let expected = "expected sim, serial:DEVICE[?baud=N&parity=none|odd|even&flow=none|software|hardware&data=5..8&stop=1|2] or tcp:HOST:PORT";
        if text == "sim" {
            return Ok(LinkSpec::Sim);
        }
        if let Some(rest) = text.strip_prefix("tcp:") {
            let base = 4;
            let Some(colon) = rest.rfind(':') else {
                return Err(bad(
                    base,
                    format!("link '{text}': a TCP link needs HOST:PORT (port {SCPI_PORT} is the usual SCPI socket)"),
                ));
            };
            let host = rest[..colon].trim_start_matches('[').trim_end_matches(']');
            if host.is_empty() || host.contains(char::is_whitespace) {
                return Err(bad(
                    base,
                    format!("link '{text}': expected a host name or address before ':PORT'"),
                ));
            }
            let port_text = &rest[colon + 1..];
            let port: u16 = match port_text.parse() {
                Ok(p) if p > 0 => p,
                _ => {
                    return Err(bad(
                        base + colon + 1,
                        format!(
                            "link '{text}': port '{port_text}' is not a number from 1 to 65535"
                        ),
                    ))
                }
            };
            return Ok(LinkSpec::Tcp {
                host: host.to_string(),
                port,
            });
        }
        if let Some(rest) = text.strip_prefix("serial:") {
            let base = 7;
            let (path, query) = match rest.split_once('?') {
                Some((p, q)) => (p, Some(q)),
                None => (rest, None),
            };
            if path.is_empty() {
                return Err(bad(
                    base,
                    format!("link '{text}': expected a device path after 'serial:'"),
                ));
            }
            let mut spec = SerialSpec {
                path: path.to_string(),
                baud: 9600,
                parity: Parity::None,
                flow: Flow::None,
                data_bits: 8,
                stop_bits: 1,
            };
            if let Some(q) = query {
                let mut off = base + path.len() + 1;
                for pair in q.split('&') {
                    let (k, v) = pair.split_once('=').ok_or_else(|| {
                        bad(
                            off,
                            format!("link '{text}': option '{pair}' needs a value (key=value)"),
                        )
                    })?;
                    let voff = off + k.len() + 1;
                    let what =
                        |e: &str| bad(voff, format!("link '{text}': {k}='{v}': expected {e}"));
                    match k {
                        "baud" => {
                            spec.baud = match v.parse::<u32>() {
                                Ok(b) if (50..=4_000_000).contains(&b) => b,
                                _ => return Err(what("a baud rate from 50 to 4000000")),
                            }
                        }
                        "parity" => {
                            spec.parity = match v {
                                "none" => Parity::None,
                                "odd" => Parity::Odd,
                                "even" => Parity::Even,
                                _ => return Err(what("none, odd or even")),
                            }
                        }
                        "flow" => {
                            spec.flow = match v {
                                "none" => Flow::None,
                                "software" => Flow::Software,
                                "hardware" => Flow::Hardware,
                                _ => return Err(what("none, software or hardware")),
                            }
                        }
                        "data" => {
                            spec.data_bits = match v.parse::<u8>() {
                                Ok(d) if (5..=8).contains(&d) => d,
                                _ => return Err(what("5, 6, 7 or 8 data bits")),
                            }
                        }
                        "stop" => {
                            spec.stop_bits = match v {
                                "1" => 1,
                                "2" => 2,
                                _ => return Err(what("1 or 2 stop bits")),
                            }
                        }
                        _ => {
                            return Err(bad(
                                off,
                                format!("link '{text}': unknown option '{k}', expected baud, parity, flow, data or stop"),
                            ))
                        }
                    }
                    off += pair.len() + 1;
                }
            }
            return Ok(LinkSpec::Serial(spec));
        }
        Err(bad(0, format!("link '{text}': {expected}")))
    }
}

impl fmt::Display for LinkSpec {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            LinkSpec::Sim => write!(f, "sim"),
            LinkSpec::Tcp { host, port } => {
                if host.contains(':') {
                    write!(f, "tcp:[{host}]:{port}")
                } else {
                    write!(f, "tcp:{host}:{port}")
                }
            }
            LinkSpec::Serial(s) => {
                let parity = match s.parity {
                    Parity::None => "none",
                    Parity::Odd => "odd",
                    Parity::Even => "even",
                };
                let flow = match s.flow {
                    Flow::None => "none",
                    Flow::Software => "software",
                    Flow::Hardware => "hardware",
                };
                write!(
                    f,
                    "serial:{}?baud={}&parity={parity}&flow={flow}&data={}&stop={}",
                    s.path, s.baud, s.data_bits, s.stop_bits
                )
            }
        }
    }
}

fn link_err(name: &str, message: String) -> InstrumentError {
    InstrumentError {
        instrument: name.to_string(),
        kind: ErrorKind::LinkLost,
        message,
    }
}

/// Open the link of an instrument with its profile: a Modbus RTU
/// instrument's link carries its operations through the Modbus bridge.
pub async fn open_for(
    name: &str,
    spec: &LinkSpec,
    profile: &super::profile::Profile,
) -> Result<Link, InstrumentError> {
    let timeout = Duration::from_millis(profile.transport.timeout_ms);
    let link = open(name, spec, timeout).await?;
    Ok(match &profile.modbus {
        Some(map) => super::modbus::bridge(link, std::sync::Arc::clone(map)),
        None => link,
    })
}

/// Open a link. `name` is the instrument's role, for messages.
pub async fn open(name: &str, spec: &LinkSpec, timeout: Duration) -> Result<Link, InstrumentError> {
    match spec {
        LinkSpec::Sim => Err(link_err(
            name,
            "the 'sim' link is the embedded simulated bench: use `packbench run --sim`, or serve it with `packbench sim serve`".into(),
        )),
        LinkSpec::Tcp { host, port } => {
            let addr = format!("{host}:{port}");
            let s = tokio::time::timeout(timeout, tokio::net::TcpStream::connect(&addr))
                .await
                .map_err(|_| link_err(name, format!("connecting to {addr} timed out")))?
                .map_err(|e| link_err(name, format!("cannot connect to {addr}: {e}")))?;
            // Small SCPI messages must leave at once, not wait for Nagle.
            s.set_nodelay(true)
                .map_err(|e| link_err(name, format!("cannot set TCP no-delay on {addr}: {e}")))?;
            Ok(Box::new(s))
        }
        LinkSpec::Serial(s) => {
            use tokio_serial::SerialPortBuilderExt;
            let builder = tokio_serial::new(&s.path, s.baud)
                .parity(match s.parity {
                    Parity::None => tokio_serial::Parity::None,
                    Parity::Odd => tokio_serial::Parity::Odd,
                    Parity::Even => tokio_serial::Parity::Even,
                })
                .flow_control(match s.flow {
                    Flow::None => tokio_serial::FlowControl::None,
                    Flow::Software => tokio_serial::FlowControl::Software,
                    Flow::Hardware => tokio_serial::FlowControl::Hardware,
                })
                .data_bits(match s.data_bits {
                    5 => tokio_serial::DataBits::Five,
                    6 => tokio_serial::DataBits::Six,
                    7 => tokio_serial::DataBits::Seven,
                    _ => tokio_serial::DataBits::Eight,
                })
                .stop_bits(if s.stop_bits == 2 {
                    tokio_serial::StopBits::Two
                } else {
                    tokio_serial::StopBits::One
                });
            // Exclusive (the default: TIOCEXCL and an exclusive flock): a
            // second controller on the same port is refused as busy. This
            // process's own reopen closes the old port first, and its
            // last-resort switch-off writes through the open port.
            let port = builder.open_native_async().map_err(|e| {
                link_err(
                    name,
                    format!(
                        "cannot open serial port {}: {e}{}",
                        s.path,
                        if e.to_string().contains("lock") || e.to_string().contains("busy") {
                            " (is another program or another packbench using it?)"
                        } else {
                            ""
                        }
                    ),
                )
            })?;
            #[cfg(unix)]
            {
                Ok(Box::new(open_ports::SerialLink::new(port, &s.path)))
            }
            #[cfg(not(unix))]
            {
                Ok(Box::new(port))
            }
        }
    }
}

/// A serial port found on this machine.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PortInfo {
    pub path: String,
    pub kind: String,
}

/// The serial ports of this machine (scanned from the system, no libudev).
pub fn list_ports() -> Result<Vec<PortInfo>, String> {
    let ports = tokio_serial::available_ports().map_err(|e| e.to_string())?;
    Ok(ports
        .into_iter()
        .map(|p| PortInfo {
            path: p.port_name,
            kind: match p.port_type {
                tokio_serial::SerialPortType::UsbPort(u) => {
                    format!("USB {:04x}:{:04x}", u.vid, u.pid)
                }
                tokio_serial::SerialPortType::PciPort => "PCI".into(),
                tokio_serial::SerialPortType::BluetoothPort => "Bluetooth".into(),
                tokio_serial::SerialPortType::Unknown => "other".into(),
            },
        })
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn link_addresses_parse_and_print_back() {
        let s: LinkSpec = "serial:/dev/ttyUSB0?baud=115200&parity=none&flow=none"
            .parse()
            .unwrap();
        match &s {
            LinkSpec::Serial(x) => {
                assert_eq!(x.path, "/dev/ttyUSB0");
                assert_eq!(x.baud, 115_200);
            }
            other => panic!("{other:?}"),
        }
        assert_eq!(s.to_string().parse::<LinkSpec>().unwrap(), s);
        let t: LinkSpec = "tcp:192.168.1.40:5025".parse().unwrap();
        assert_eq!(
            t,
            LinkSpec::Tcp {
                host: "192.168.1.40".into(),
                port: 5025
            }
        );
        assert_eq!("sim".parse::<LinkSpec>().unwrap(), LinkSpec::Sim);
    }

    #[test]
    fn bad_link_addresses_say_where_and_what() {
        let e = "tcp:host:99999".parse::<LinkSpec>().unwrap_err();
        assert_eq!(e.offset, 9);
        assert!(e.message.contains("1 to 65535"), "{e}");
        let e = "serial:/dev/ttyS0?baud=fast"
            .parse::<LinkSpec>()
            .unwrap_err();
        assert_eq!(e.offset, 23);
        let e = "serial:/dev/ttyS0?baud=9600&colour=red"
            .parse::<LinkSpec>()
            .unwrap_err();
        assert_eq!(e.offset, 28);
        assert!(e.message.contains("unknown option 'colour'"), "{e}");
        let e = "usb:1".parse::<LinkSpec>().unwrap_err();
        assert_eq!(e.offset, 0);
        assert!(e.message.contains("expected sim, serial:"), "{e}");
        assert!("tcp:host".parse::<LinkSpec>().is_err());
        assert!("serial:".parse::<LinkSpec>().is_err());
    }
}

/// The serial ports this process has open, by device path. A port opened
/// exclusively cannot be opened a second time, not even by this process
/// (the flock) and not by a normal user (TIOCEXCL); the last-resort
/// switch-off therefore writes through a duplicate of the open port's
/// descriptor instead of opening it again. The entry goes when its link
/// is dropped, so a reopen after a lost link finds the port free.
#[cfg(unix)]
pub mod open_ports {
    use std::io;
    use std::os::fd::{AsFd, AsRawFd, OwnedFd};
    use std::pin::Pin;
    use std::sync::{Arc, Mutex};
    use std::task::{Context, Poll};
    use std::time::{Duration, Instant};
    use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};

    type Registry = Mutex<Vec<(String, Arc<OwnedFd>)>>;

    fn registry() -> &'static Registry {
        static PORTS: std::sync::OnceLock<Registry> = std::sync::OnceLock::new();
        PORTS.get_or_init(|| Mutex::new(Vec::new()))
    }

    fn lock() -> std::sync::MutexGuard<'static, Vec<(String, Arc<OwnedFd>)>> {
        match registry().lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        }
    }

    /// An open serial port, registered while it lives.
    pub struct SerialLink {
        stream: tokio_serial::SerialStream,
        entry: Option<Arc<OwnedFd>>,
    }

    impl SerialLink {
        pub fn new(stream: tokio_serial::SerialStream, path: &str) -> SerialLink {
            let raw = stream.as_raw_fd();
            // SAFETY: `raw` is the descriptor of `stream`, which is alive for
            // the whole call; it is only borrowed to duplicate it.
            let borrowed = unsafe { std::os::fd::BorrowedFd::borrow_raw(raw) };
            let entry = nix::unistd::dup(borrowed).ok().map(Arc::new);
            if let Some(fd) = &entry {
                lock().push((path.to_string(), Arc::clone(fd)));
            }
            SerialLink { stream, entry }
        }
    }

    impl Drop for SerialLink {
        fn drop(&mut self) {
            if let Some(fd) = self.entry.take() {
                lock().retain(|(_, f)| !Arc::ptr_eq(f, &fd));
            }
        }
    }

    impl AsyncRead for SerialLink {
        fn poll_read(
            mut self: Pin<&mut Self>,
            cx: &mut Context<'_>,
            buf: &mut ReadBuf<'_>,
        ) -> Poll<io::Result<()>> {
            Pin::new(&mut self.stream).poll_read(cx, buf)
        }
    }

    impl AsyncWrite for SerialLink {
        fn poll_write(
            mut self: Pin<&mut Self>,
            cx: &mut Context<'_>,
            buf: &[u8],
        ) -> Poll<io::Result<usize>> {
            Pin::new(&mut self.stream).poll_write(cx, buf)
        }
        fn poll_flush(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
            Pin::new(&mut self.stream).poll_flush(cx)
        }
        fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
            Pin::new(&mut self.stream).poll_shutdown(cx)
        }
    }

    /// Is a port open in this process?
    pub fn is_open(path: &str) -> bool {
        lock().iter().any(|(p, _)| p == path)
    }

    /// Write bytes to a port this process has open, through its duplicate
    /// descriptor, within `within`. `Ok(false)`: the port is not open here.
    pub fn write_all(path: &str, bytes: &[u8], within: Duration) -> io::Result<bool> {
        let Some(fd) = lock()
            .iter()
            .find(|(p, _)| p == path)
            .map(|(_, f)| Arc::clone(f))
        else {
            return Ok(false);
        };
        let deadline = Instant::now() + within;
        let mut rest = bytes;
        while !rest.is_empty() {
            match nix::unistd::write(fd.as_fd(), rest) {
                Ok(n) => rest = &rest[n..],
                Err(nix::errno::Errno::EAGAIN) | Err(nix::errno::Errno::EINTR) => {
                    if Instant::now() >= deadline {
                        return Err(io::Error::new(
                            io::ErrorKind::TimedOut,
                            format!(
                                "port {path} (fd {}) would not take the bytes",
                                fd.as_raw_fd()
                            ),
                        ));
                    }
                    std::thread::sleep(Duration::from_millis(2));
                }
                Err(e) => return Err(io::Error::from(e)),
            }
        }
        Ok(true)
    }
}
