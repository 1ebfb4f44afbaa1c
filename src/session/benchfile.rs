//! Bench files (`bench.toml`): the stations of a shop's bench, each
//! binding roles — a source and a load, or one source-sink instrument, and
//! an optional meter (a voltmeter with sense leads at the pack terminals
//! and a temperature input) — to a link and an instrument profile.
//! Validated completely, with file:line:column errors, before any link is
//! opened.
//!
//! ```toml
//! [[station]]
//! name = "bay-1"
//! [station.source]
//! link = "serial:/dev/ttyUSB0?baud=115200&parity=none&flow=none"
//! profile = "generic-scpi-source"     # built-in, or a file relative to this one
//! [station.load]
//! link = "tcp:192.168.1.40:5025"
//! profile = "generic-scpi-load"
//! timeout = "500ms"                   # overrides the profile's reply timeout
//! # the load's own stated accuracy, over the profile's example figures
//! accuracy = { current = { reading_pct = 0.05, offset = 0.002, resolution = 0.0001 } }
//! ```

use instrument::profile::{Profile, ProfileRole};
use instrument::transport::LinkSpec;
use model::location::{toml_error, InputErrors, LocatedError, Location};
use serde::Deserialize;
use std::path::{Path, PathBuf};
use toml::Spanned;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawBench {
    station: Vec<Spanned<RawStation>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawStation {
    name: Spanned<String>,
    source: Option<RawBinding>,
    load: Option<RawBinding>,
    source_sink: Option<RawBinding>,
    meter: Option<RawBinding>,
    /// The pack on this station, for runs of several stations at once.
    pack: Option<Spanned<String>>,
    /// Its spec file (relative to the bench file), for a first test.
    pack_spec: Option<Spanned<String>>,
    /// This station's own procedure (relative to the bench file).
    procedure: Option<Spanned<String>>,
    /// Settings of a simulated station (pack condition, faults).
    sim_config: Option<Spanned<String>>,
    /// The pack's cell groups and temperature inputs on the meter's
    /// channels.
    groups: Option<Spanned<RawGroups>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawGroups {
    /// "direct" (each channel across one group) or "taps" (each channel a
    /// tap against the pack's negative terminal).
    wiring: Option<Spanned<String>>,
    /// One channel per group, group 1 first: a SCPI channel list.
    channels: Spanned<String>,
    #[serde(default)]
    temperature: Vec<Spanned<RawTemperature>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawTemperature {
    channel: Spanned<u32>,
    name: Spanned<String>,
    place: Option<Spanned<String>>,
    group: Option<Spanned<u32>>,
    max: Option<Spanned<String>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawBinding {
    link: Spanned<String>,
    profile: Spanned<String>,
    timeout: Option<Spanned<String>>,
    delay: Option<Spanned<String>>,
    /// The instrument's own stated accuracy, over its profile's example
    /// figures (`accuracy = { current = { reading_pct = 0.05, … } }`).
    accuracy: Option<Spanned<model::accuracy::Declared>>,
}

/// One instrument of a station, validated.
#[derive(Debug, Clone)]
pub struct Binding {
    pub link: LinkSpec,
    pub link_text: String,
    pub profile: Profile,
}

/// What drives the pack at a station.
#[derive(Debug, Clone)]
pub enum Drivers {
    Pair {
        source: Box<Binding>,
        load: Box<Binding>,
    },
    SourceSink(Box<Binding>),
}

/// A validated station.
#[derive(Debug, Clone)]
pub struct StationSpec {
    pub name: String,
    pub drivers: Drivers,
    pub meter: Option<Binding>,
    /// The pack id this station tests when several run at once.
    pub pack_id: Option<String>,
    pub pack_spec: Option<PathBuf>,
    pub procedure: Option<PathBuf>,
    pub sim_config: Option<PathBuf>,
    pub groups: Option<model::groups::GroupChannels>,
}

impl StationSpec {
    /// The source and load profiles (the same one for a source-sink).
    pub fn profiles(&self) -> (&Profile, &Profile) {
        match &self.drivers {
            Drivers::Pair { source, load } => (&source.profile, &load.profile),
            Drivers::SourceSink(b) => (&b.profile, &b.profile),
        }
    }

    /// A station on the embedded simulated bench (its links are `sim`).
    pub fn is_simulated(&self) -> bool {
        matches!(&self.drivers, Drivers::Pair { source, load }
            if source.link == LinkSpec::Sim && load.link == LinkSpec::Sim)
    }

    /// Every binding with its role name.
    pub fn bindings(&self) -> Vec<(&'static str, &Binding)> {
        let mut v: Vec<(&'static str, &Binding)> = match &self.drivers {
            Drivers::Pair { source, load } => vec![("source", &**source), ("load", &**load)],
            Drivers::SourceSink(b) => vec![("source-sink", &**b)],
        };
        if let Some(m) = &self.meter {
            v.push(("meter", m));
        }
        v
    }
}

/// A validated bench file.
#[derive(Debug, Clone)]
pub struct BenchFile {
    pub path: PathBuf,
    pub stations: Vec<StationSpec>,
}

/// Reading a bench file: where its text is, and every error found so far
/// (all are reported together).
struct Reader<'a> {
    path: &'a Path,
    text: &'a str,
    /// Profile, pack and procedure paths are relative to this folder.
    base: &'a Path,
    errors: Vec<LocatedError>,
}

impl Reader<'_> {
    /// An error at `span` (plus `extra` bytes: 1 skips a string's quote).
    fn err(&mut self, span: std::ops::Range<usize>, extra: usize, message: String) {
        self.errors.push(LocatedError {
            location: Location::at(self.path, self.text, span.start + extra),
            message,
        });
    }

    /// One station, validated; none when it has errors.
    fn station(
        &mut self,
        st: &Spanned<RawStation>,
        earlier: &[StationSpec],
    ) -> Option<StationSpec> {
        let span = st.span();
        let st = st.get_ref();
        let name = st.name.get_ref().clone();
        if name.is_empty()
            || !name
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || "-_.".contains(c))
        {
            self.err(
                st.name.span(),
                1,
                format!("station name '{name}': expected letters, digits, '-', '_' or '.'"),
            );
        }
        if earlier.iter().any(|s| s.name == name) {
            self.err(
                st.name.span(),
                1,
                format!("station '{name}' is named twice"),
            );
        }
        let drivers = self.drivers(st, &name, span.clone());
        let meter = st.meter.as_ref().map(|m| self.bind(m, ProfileRole::Meter));
        let sims = self.check_sim_links(st, &name, span);
        let (Some(drivers), Some(true) | None) = (drivers, meter.as_ref().map(|m| m.is_some()))
        else {
            return None;
        };
        if let Some(pk) = &st.pack {
            if let Err(e) = model::pack::check_pack_id(pk.get_ref()) {
                self.err(pk.span(), 1, e.to_string());
            }
        }
        if let (Some(t), 0) = (&st.sim_config, sims) {
            self.err(
                t.span(),
                1,
                "sim_config is for a simulated station (links \"sim\")".into(),
            );
        }
        let groups = match &st.groups {
            Some(g) => Some(self.groups(g, meter.as_ref().and_then(|m| m.as_ref()))?),
            None => None,
        };
        let file = |f: &Option<Spanned<String>>| f.as_ref().map(|t| self.base.join(t.get_ref()));
        Some(StationSpec {
            groups,
            name,
            drivers,
            meter: meter.flatten(),
            pack_id: st.pack.as_ref().map(|p| p.get_ref().clone()),
            pack_spec: file(&st.pack_spec),
            procedure: file(&st.procedure),
            sim_config: file(&st.sim_config),
        })
    }

    /// The cell groups' channels and the temperature inputs, checked:
    /// a meter that can read channels, one channel per group, no channel
    /// twice, named inputs, groups that exist.
    fn groups(
        &mut self,
        g: &Spanned<RawGroups>,
        meter: Option<&Binding>,
    ) -> Option<model::groups::GroupChannels> {
        use model::groups::{parse_channel_list, GroupChannels, TemperatureChannel, Wiring};
        let before = self.errors.len();
        let raw = g.get_ref();
        match meter {
            None => self.err(
                g.span(),
                0,
                "[station.groups] needs a [station.meter] that reads channels (e.g. profile = \"generic-scpi-scanner\")".into(),
            ),
            Some(m) => {
                let c = &m.profile.commands;
                if c.scan_read.is_none() && c.measure_channel_voltage.is_none() {
                    self.err(
                        g.span(),
                        0,
                        format!(
                            "[station.groups]: the meter's profile '{}' cannot read channels (it needs scan_list and scan_read, or measure_channel_voltage)",
                            m.profile.name
                        ),
                    );
                }
            }
        }
        let wiring = match raw.wiring.as_ref().map(|w| (w, w.get_ref().as_str())) {
            None | Some((_, "direct")) => Wiring::Direct,
            Some((_, "taps")) => Wiring::Taps,
            Some((w, other)) => {
                self.err(
                    w.span(),
                    1,
                    format!("wiring = \"{other}\": expected \"direct\" or \"taps\""),
                );
                Wiring::Direct
            }
        };
        let voltage = match parse_channel_list(raw.channels.get_ref()) {
            Ok(v) if v.len() <= 400 => v,
            Ok(v) => {
                self.err(
                    raw.channels.span(),
                    1,
                    format!("{} channels: at most 400 groups", v.len()),
                );
                Vec::new()
            }
            Err(e) => {
                self.err(
                    raw.channels.span(),
                    1,
                    format!("channels: {e}; expected a SCPI channel list, e.g. \"(@101:113)\""),
                );
                Vec::new()
            }
        };
        let mut seen: Vec<u32> = Vec::new();
        for &c in &voltage {
            if seen.contains(&c) {
                self.err(
                    raw.channels.span(),
                    1,
                    format!("channel {c} is listed twice"),
                );
            }
            seen.push(c);
        }
        let n = voltage.len() as u32;
        let mut temperatures = Vec::new();
        for t in &raw.temperature {
            let t = t.get_ref();
            let ch = *t.channel.get_ref();
            if seen.contains(&ch) {
                self.err(t.channel.span(), 0, format!("channel {ch} is already used"));
            }
            seen.push(ch);
            let name = t.name.get_ref().trim().to_string();
            if name.is_empty()
                || temperatures
                    .iter()
                    .any(|x: &TemperatureChannel| x.name == name)
            {
                self.err(
                    t.name.span(),
                    1,
                    format!("temperature input name '{name}': expected a name of its own"),
                );
            }
            if let Some(gr) = &t.group {
                if *gr.get_ref() == 0 || *gr.get_ref() > n {
                    self.err(
                        gr.span(),
                        0,
                        format!("group {}: expected 1 to {n}", gr.get_ref()),
                    );
                }
            }
            let max_c = match &t.max {
                Some(m) => match model::units::temperature_limit_c(m.get_ref()) {
                    Ok(v) => Some(v),
                    Err(e) => {
                        self.err(m.span(), 1, e.to_string());
                        None
                    }
                },
                None => None,
            };
            temperatures.push(TemperatureChannel {
                channel: ch,
                name,
                place: t
                    .place
                    .as_ref()
                    .map(|p| p.get_ref().clone())
                    .unwrap_or_default(),
                group: t.group.as_ref().map(|g| *g.get_ref()),
                max_c,
            });
        }
        (self.errors.len() == before).then_some(GroupChannels {
            wiring,
            voltage,
            temperatures,
        })
    }

    /// A source and a load, or one source-sink.
    fn drivers(
        &mut self,
        st: &RawStation,
        name: &str,
        span: std::ops::Range<usize>,
    ) -> Option<Drivers> {
        match (&st.source, &st.load, &st.source_sink) {
            (Some(s), Some(l), None) => {
                let s = self.bind(s, ProfileRole::Source);
                let l = self.bind(l, ProfileRole::Load);
                Some(Drivers::Pair {
                    source: Box::new(s?),
                    load: Box::new(l?),
                })
            }
            (None, None, Some(b)) => self
                .bind(b, ProfileRole::SourceSink)
                .map(|b| Drivers::SourceSink(Box::new(b))),
            (_, _, Some(_)) => {
                self.err(
                    span,
                    0,
                    format!(
                        "station '{name}': bind either source and load, or source_sink, not both"
                    ),
                );
                None
            }
            _ => {
                self.err(
                    span,
                    0,
                    format!("station '{name}': needs a source and a load, or a source_sink"),
                );
                None
            }
        }
    }

    /// The embedded simulated bench is a supply and a load on one
    /// simulated pack: `sim` is all of a station's links or none. Returns
    /// how many links are `sim`.
    fn check_sim_links(
        &mut self,
        st: &RawStation,
        name: &str,
        span: std::ops::Range<usize>,
    ) -> usize {
        let links: Vec<&Spanned<String>> = [&st.source, &st.load, &st.source_sink, &st.meter]
            .into_iter()
            .flatten()
            .map(|b| &b.link)
            .collect();
        let sims = links.iter().filter(|l| l.get_ref() == "sim").count();
        let sim_ok = st.source_sink.is_none() && st.meter.is_none();
        if sims > 0 && (sims < links.len() || !sim_ok) {
            let first = links
                .iter()
                .find(|l| l.get_ref() == "sim")
                .map(|l| l.span())
                .unwrap_or(span);
            self.err(
                first,
                1,
                format!(
                    "station '{name}': link \"sim\" (the embedded simulated bench) binds a source and a load together, with no meter or source-sink, and no real link beside it"
                ),
            );
        }
        sims
    }

    /// One instrument: its link, its profile (built in or a file) in the
    /// role it is bound to, and the link's own timeout and delay.
    fn bind(&mut self, b: &RawBinding, role: ProfileRole) -> Option<Binding> {
        let link_text = b.link.get_ref().clone();
        let link = match link_text.parse::<LinkSpec>() {
            Ok(l) => Some(l),
            Err(e) => {
                self.err(b.link.span(), 1 + e.offset, e.message);
                None
            }
        };
        let mut profile = self.profile(b)?;
        if profile.role != role {
            self.err(
                b.profile.span(),
                1,
                format!(
                    "profile '{}' is a {} profile, bound here as {}",
                    profile.name,
                    profile.role.name(),
                    role.name()
                ),
            );
            return None;
        }
        for (field, is_delay) in [(&b.timeout, false), (&b.delay, true)] {
            let Some(t) = field else { continue };
            match model::units::duration(t.get_ref()) {
                Ok(s) if s > 0.0 && s <= 600.0 || (is_delay && s == 0.0) => {
                    let ms = (s * 1000.0).round() as u64;
                    if is_delay {
                        profile.transport.delay_ms = ms;
                    } else {
                        profile.set_timeout_ms(ms.max(1));
                    }
                }
                _ => self.err(
                    t.span(),
                    1,
                    format!(
                        "'{}': expected a duration from 1 ms to 600 s, e.g. 500ms",
                        t.get_ref()
                    ),
                ),
            }
        }
        if let Some(a) = &b.accuracy {
            match a.get_ref().check("accuracy") {
                Ok(()) => profile.accuracy = profile.accuracy.overridden_by(a.get_ref()),
                Err(message) => self.err(a.span(), 1, message),
            }
        }
        Some(Binding {
            link: link?,
            link_text,
            profile,
        })
    }

    /// A built-in profile by name, else a profile file.
    fn profile(&mut self, b: &RawBinding) -> Option<Profile> {
        let pname = b.profile.get_ref();
        if let Some(p) = Profile::builtin_named(pname) {
            return Some(p);
        }
        let file = self.base.join(pname);
        match model::procedure::read_text(&file) {
            Ok(ptext) => match Profile::from_toml(&file, &ptext) {
                Ok(p) => Some(p),
                Err(e) => {
                    self.errors.extend(e.0);
                    None
                }
            },
            Err(e) => {
                let names: Vec<&str> = instrument::profile::BUILTIN
                    .iter()
                    .map(|(n, _)| *n)
                    .collect();
                self.err(
                    b.profile.span(),
                    1,
                    format!(
                        "profile '{pname}' is neither a built-in ({}) nor a readable file ({}: {e})",
                        names.join(", "),
                        file.display()
                    ),
                );
                None
            }
        }
    }
}

impl BenchFile {
    /// Read and validate a bench file.
    pub fn load(path: &Path) -> Result<BenchFile, InputErrors> {
        let text = model::procedure::read_text(path).map_err(|e| {
            InputErrors(vec![LocatedError {
                location: Location {
                    file: path.to_path_buf(),
                    line: 1,
                    column: 1,
                },
                message: format!("cannot read the bench file: {e}"),
            }])
        })?;
        BenchFile::parse(path, &text)
    }

    /// Validate bench-file text; profile paths are relative to `path`'s folder.
    pub fn parse(path: &Path, text: &str) -> Result<BenchFile, InputErrors> {
        let raw: RawBench =
            toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(path, text, &e)]))?;
        let mut r = Reader {
            path,
            text,
            base: path.parent().unwrap_or(Path::new(".")),
            errors: Vec::new(),
        };
        if raw.station.is_empty() {
            r.err(
                0..0,
                0,
                "a bench file needs at least one [[station]]".into(),
            );
        }
        let mut stations = Vec::new();
        for st in &raw.station {
            if let Some(s) = r.station(st, &stations) {
                stations.push(s);
            }
        }
        if !r.errors.is_empty() {
            return Err(InputErrors(r.errors));
        }
        Ok(BenchFile {
            path: path.to_path_buf(),
            stations,
        })
    }

    /// A station by name, or the only one.
    pub fn station(&self, name: Option<&str>) -> Result<&StationSpec, String> {
        let names: Vec<&str> = self.stations.iter().map(|s| s.name.as_str()).collect();
        match name {
            Some(n) => self.stations.iter().find(|s| s.name == n).ok_or_else(|| {
                format!(
                    "{}: no station '{n}' (stations: {})",
                    self.path.display(),
                    names.join(", ")
                )
            }),
            None if self.stations.len() == 1 => Ok(&self.stations[0]),
            None => Err(format!(
                "{}: several stations ({}): choose one with --station",
                self.path.display(),
                names.join(", ")
            )),
        }
    }
}

/// A station, held by one process: `packbench run` and `resume` for the
/// run, `packbench serve` for its lifetime. A station is its instruments,
/// not the file or the results folder that names them: each instrument's
/// link is locked by its canonical address (a serial device with its
/// links resolved, a TCP address with its host name resolved) with an
/// exclusive `flock` on a file in [`instrument_lock_dir`], so another
/// bench file, a copy of this one or another `--results` folder reaching
/// the same instrument is refused. The locks are dropped with the process
/// whatever way it ends. Simulated links lock nothing (each process has
/// its own simulated bench).
#[cfg(unix)]
pub fn lock_station(
    bench_file: &Path,
    station: &StationSpec,
) -> Result<Vec<nix::fcntl::Flock<std::fs::File>>, crate::session::error::RunError> {
    let dir = instrument_lock_dir();
    std::fs::create_dir_all(&dir).map_err(crate::session::error::io_err(&dir))?;
    let mut bindings: Vec<(&str, &Binding)> = match &station.drivers {
        Drivers::Pair { source, load } => vec![("source", source), ("load", load)],
        Drivers::SourceSink(b) => vec![("source-sink", b)],
    };
    if let Some(m) = &station.meter {
        bindings.push(("meter", m));
    }
    let mut keys: Vec<(&str, String)> = bindings
        .iter()
        .filter_map(|(role, b)| canonical_link(&b.link).map(|k| (*role, k)))
        .collect();
    if keys.is_empty() {
        // A simulated station: its bench is this process's own, so the
        // station is the bench file's (one console or run per station).
        let file = std::fs::canonicalize(bench_file).unwrap_or_else(|_| bench_file.to_path_buf());
        keys.push((
            "simulated bench",
            format!("sim:{}#{}", file.display(), station.name),
        ));
    }
    let mut held = Vec::new();
    let mut seen = Vec::new();
    for (role, key) in keys {
        if seen.contains(&key) {
            continue;
        }
        seen.push(key.clone());
        let path = dir.join(format!("{}.lock", lock_file_stem(&key)));
        let file = std::fs::OpenOptions::new()
            .create(true)
            .truncate(false)
            .read(true)
            .write(true)
            .open(&path)
            .map_err(crate::session::error::io_err(&path))?;
        match nix::fcntl::Flock::lock(file, nix::fcntl::FlockArg::LockExclusiveNonblock) {
            Ok(mut f) => {
                // Who holds it, for the operator who finds the file.
                use std::io::{Seek, Write};
                let _ = f.set_len(0);
                let _ = f.rewind();
                let _ = writeln!(
                    f,
                    "{} station {} of {}",
                    std::process::id(),
                    station.name,
                    bench_file.display()
                );
                held.push(f);
            }
            Err(_) => {
                let who = std::fs::read_to_string(&path).unwrap_or_default();
                let who = who.trim();
                return Err(crate::session::error::RunError::arguments(format!(
                    "station '{}' of {}: its {role} ({key}) is driven by another packbench process (run or serve) now{}: one process per instrument ({} is locked)",
                    station.name,
                    bench_file.display(),
                    if who.is_empty() {
                        String::new()
                    } else {
                        format!(" (process {who})")
                    },
                    path.display()
                )));
            }
        }
    }
    Ok(held)
}

/// Where the instruments' locks live: one folder for the whole machine,
/// whatever results folder a run writes to (`PACKBENCH_LOCK_DIR` moves it,
/// e.g. for a bench whose processes run in separate containers sharing a
/// folder).
pub fn instrument_lock_dir() -> PathBuf {
    if let Some(d) = std::env::var_os("PACKBENCH_LOCK_DIR") {
        return PathBuf::from(d);
    }
    let run_lock = Path::new("/run/lock");
    if run_lock.is_dir() {
        let d = run_lock.join("packbench");
        if std::fs::create_dir_all(&d).is_ok() {
            return d;
        }
    }
    std::env::temp_dir().join("packbench-locks")
}

/// An instrument link's canonical address: the serial device with every
/// link resolved, a TCP host resolved to its address. `None` for the
/// simulated bench.
pub fn canonical_link(link: &LinkSpec) -> Option<String> {
    match link {
        LinkSpec::Sim => None,
        LinkSpec::Serial(s) => {
            let p = Path::new(&s.path);
            let real = std::fs::canonicalize(p).unwrap_or_else(|_| p.to_path_buf());
            Some(format!("serial:{}", real.display()))
        }
        LinkSpec::Tcp { host, port } => {
            use std::net::ToSocketAddrs;
            let addr = (host.as_str(), *port)
                .to_socket_addrs()
                .ok()
                .and_then(|mut a| a.next())
                .map(|a| a.to_string())
                .unwrap_or_else(|| format!("{}:{port}", host.to_ascii_lowercase()));
            Some(format!("tcp:{addr}"))
        }
    }
}

/// A lock file's name for a canonical address: its letters and digits,
/// the rest as `_`.
fn lock_file_stem(key: &str) -> String {
    key.chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '.' || c == '-' {
                c
            } else {
                '_'
            }
        })
        .collect::<String>()
        .chars()
        .rev()
        .take(200)
        .collect::<Vec<char>>()
        .into_iter()
        .rev()
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
[[station]]
name = "bay-1"
[station.source]
link = "serial:/dev/ttyUSB0?baud=115200&parity=none&flow=none"
profile = "generic-scpi-source"
[station.load]
link = "tcp:127.0.0.1:5025"
profile = "generic-scpi-load"
timeout = "300ms"

[[station]]
name = "bay-2"
[station.source_sink]
link = "tcp:127.0.0.1:5030"
profile = "generic-scpi-source-sink"
[station.meter]
link = "tcp:127.0.0.1:5031"
profile = "generic-scpi-meter"
"#;

    #[test]
    fn a_bench_file_binds_roles_to_links_and_profiles() {
        let b = BenchFile::parse(Path::new("bench.toml"), GOOD).unwrap();
        assert_eq!(b.stations.len(), 2);
        let s1 = b.station(Some("bay-1")).unwrap();
        assert_eq!(s1.profiles().1.transport.timeout_ms, 300);
        let s2 = b.station(Some("bay-2")).unwrap();
        assert!(matches!(s2.drivers, Drivers::SourceSink(_)));
        assert!(s2.meter.is_some());
        assert!(b.station(None).is_err());
        assert!(b.station(Some("bay-9")).is_err());
    }

    fn err(text: &str) -> String {
        BenchFile::parse(Path::new("bench.toml"), text)
            .unwrap_err()
            .to_string()
    }

    /// A bench file states an instrument's own accuracy over its profile's
    /// example figures; a figure that is not one is refused with its place.
    #[test]
    fn an_instrument_states_its_own_accuracy() {
        let text = GOOD.replace(
            "timeout = \"300ms\"",
            "timeout = \"300ms\"\naccuracy = { current = { reading_pct = 0.05, offset = 0.002, resolution = 0.0001 } }",
        );
        let b = BenchFile::parse(Path::new("bench.toml"), &text).unwrap();
        let load = b.station(Some("bay-1")).unwrap().profiles().1;
        let c = load.accuracy.current.unwrap();
        assert_eq!((c.reading_pct, c.offset), (0.05, 0.002));
        // Its own figures: no longer the profile's examples; the voltage
        // stays the profile's.
        assert!(!load.accuracy.example);
        assert!(load.accuracy.voltage.is_some());
        let bad = GOOD.replace(
            "timeout = \"300ms\"",
            "timeout = \"300ms\"\naccuracy = { current = { reading_pct = -1.0 } }",
        );
        let e = err(&bad);
        assert!(
            e.contains("bench.toml:11:") && e.contains("reading_pct"),
            "{e}"
        );
    }

    const GROUPS: &str = r#"
[[station]]
name = "bay-3"
[station.source]
link = "tcp:127.0.0.1:5025"
profile = "generic-scpi-source"
[station.load]
link = "tcp:127.0.0.1:5026"
profile = "generic-scpi-load"
[station.meter]
link = "tcp:127.0.0.1:5027"
profile = "generic-scpi-scanner"
[station.groups]
wiring = "taps"
channels = "(@101:113)"
[[station.groups.temperature]]
channel = 207
name = "group 7 surface"
place = "cell side, middle"
group = 7
max = "50degC"
[[station.groups.temperature]]
channel = 250
name = "ambient"
place = "air beside the pack"
"#;

    #[test]
    fn groups_map_channels_to_groups_and_sensors() {
        let b = BenchFile::parse(Path::new("bench.toml"), GROUPS).unwrap();
        let g = b.stations[0].groups.as_ref().unwrap();
        assert_eq!(g.wiring, model::groups::Wiring::Taps);
        assert_eq!(g.voltage, (101..=113).collect::<Vec<u32>>());
        assert_eq!(g.temperatures.len(), 2);
        assert_eq!(g.temperatures[0].max_c, Some(50.0));
        assert_eq!(g.temperatures[0].group, Some(7));
        assert_eq!(g.sensor_on(7), Some(0));
    }

    /// Each mistake is located (file:line:column) before any link opens.
    #[test]
    fn bad_groups_are_located() {
        let e = err(&GROUPS.replace("(@101:113)", "(@113:101)"));
        assert!(e.starts_with("bench.toml:15:13:"), "{e}");
        assert!(e.contains("not ascending"), "{e}");
        let e = err(&GROUPS.replace("channel = 207", "channel = 105"));
        assert!(e.starts_with("bench.toml:17:11:"), "{e}");
        assert!(e.contains("channel 105 is already used"), "{e}");
        let e = err(&GROUPS.replace("group = 7", "group = 14"));
        assert!(e.starts_with("bench.toml:20:9:"), "{e}");
        assert!(e.contains("expected 1 to 13"), "{e}");
        let e = err(&GROUPS.replace("wiring = \"taps\"", "wiring = \"star\""));
        assert!(e.starts_with("bench.toml:14:11:"), "{e}");
        let e = err(&GROUPS.replace("max = \"50degC\"", "max = \"hot\""));
        assert!(e.starts_with("bench.toml:21:8:"), "{e}");
        let e = err(&GROUPS.replace("name = \"ambient\"", "name = \"group 7 surface\""));
        assert!(e.contains("a name of its own"), "{e}");
        // A meter that cannot read channels, and none at all.
        let e = err(&GROUPS.replace("generic-scpi-scanner", "generic-scpi-meter"));
        assert!(e.starts_with("bench.toml:13:1:"), "{e}");
        assert!(e.contains("cannot read channels"), "{e}");
        let no_meter = GROUPS.replace(
            "[station.meter]\nlink = \"tcp:127.0.0.1:5027\"\nprofile = \"generic-scpi-scanner\"\n",
            "",
        );
        let e = err(&no_meter);
        assert!(e.contains("needs a [station.meter]"), "{e}");
    }

    #[test]
    fn sim_links_make_a_simulated_station() {
        let text = "[[station]]\nname = \"s\"\n[station.source]\nlink = \"sim\"\nprofile = \"generic-scpi-source\"\n[station.load]\nlink = \"sim\"\nprofile = \"generic-scpi-load\"\n";
        let b = BenchFile::parse(Path::new("bench.toml"), text).unwrap();
        assert!(b.stations[0].is_simulated());
        let mixed = text.replacen("link = \"sim\"", "link = \"tcp:127.0.0.1:5025\"", 1);
        let e = err(&mixed);
        assert!(e.starts_with("bench.toml:7:9:"), "{e}");
        assert!(e.contains("no real link beside it"), "{e}");
    }

    #[test]
    fn bad_bench_files_are_located() {
        let e = err(&GOOD.replace("[station.load]", "[station.lod]"));
        assert!(e.starts_with("bench.toml:7:"), "{e}");
        assert!(e.contains("unknown field `lod`"), "{e}");
        let e = err(&GOOD.replace("tcp:127.0.0.1:5025", "tcp:127.0.0.1:50x25"));
        assert!(e.starts_with("bench.toml:8:23:"), "{e}");
        let e = err(&GOOD.replace(
            "profile = \"generic-scpi-load\"",
            "profile = \"generic-scpi-source\"",
        ));
        assert!(e.starts_with("bench.toml:9:12:"), "{e}");
        assert!(e.contains("bound here as load"), "{e}");
        let e = err(&GOOD.replace("timeout = \"300ms\"", "timeout = \"soon\""));
        assert!(e.starts_with("bench.toml:10:12:"), "{e}");
        let e = err(&GOOD.replace("generic-scpi-meter", "no-such-profile.toml"));
        assert!(e.contains("neither a built-in"), "{e}");
    }
}
