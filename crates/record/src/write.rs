//! Writing a run: the folder, the sample CSV and the event log as an
//! engine sink (flushed to disk at least every second), and atomic JSON
//! records.

use super::{CSV_COLUMNS, EVENTS_JSONL, SAMPLES_CSV};
use crate::event::{Event, Sink};
use crate::writer::LogFiles;
use model::groups::GroupSample;
use model::sample::Sample;
use serde::Serialize;
use std::fs::{self, File, OpenOptions};
use std::io::{self, BufWriter, Write};
use std::path::{Path, PathBuf};

pub use crate::writer::FLUSH_INTERVAL;

/// Folders synced by [`sync_dir`] in this process, for tests that check a
/// write reached its folder's entry.
static DIR_SYNCS: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);

std::thread_local! {
    static THREAD_DIR_SYNCS: std::cell::Cell<u64> = const { std::cell::Cell::new(0) };
}

/// How many folder syncs this process has made.
pub fn dir_syncs() -> u64 {
    DIR_SYNCS.load(std::sync::atomic::Ordering::Relaxed)
}

/// How many folder syncs this thread has made.
pub fn dir_syncs_on_this_thread() -> u64 {
    THREAD_DIR_SYNCS.with(|c| c.get())
}

/// Sync a folder, so a file created or renamed in it survives a power
/// cut (POSIX: fsync on the file does not make its directory entry
/// durable). A no-op where folders cannot be opened (Windows).
pub fn sync_dir(dir: &Path) -> io::Result<()> {
    #[cfg(unix)]
    {
        let dir = if dir.as_os_str().is_empty() {
            Path::new(".")
        } else {
            dir
        };
        File::open(dir)?.sync_all()?;
        DIR_SYNCS.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        THREAD_DIR_SYNCS.with(|c| c.set(c.get() + 1));
    }
    #[cfg(not(unix))]
    let _ = dir;
    Ok(())
}

/// Write `bytes` to `path` through a temporary file, a sync and a rename,
/// then sync the folder: after a crash or a power cut the file is either
/// the old one or the new one, and its name is on the disk.
///
/// The temporary file's name is this process's and this write's own
/// (`.run.json.<pid>.<n>.tmp`), so two processes, or two threads, writing
/// the same file never share one; it is made new (never follows a link
/// left at that name) and removed if the write fails.
pub fn atomic_write(path: &Path, bytes: &[u8]) -> io::Result<()> {
    static SEQ: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
    let n = SEQ.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = path.with_file_name(format!(".{name}.{}.{n}.tmp", std::process::id()));
    let written = (|| {
        let mut f = OpenOptions::new().write(true).create_new(true).open(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        halt_for_a_crash_test(&name);
        fs::rename(&tmp, path)
    })();
    if let Err(e) = written {
        let _ = fs::remove_file(&tmp);
        return Err(e);
    }
    sync_dir(path.parent().unwrap_or(Path::new(".")))
}

/// The variable naming the write a crash test stops the process at.
pub const HALT_VAR: &str = "PACKBENCH_TEST_HALT_BEFORE_RENAME";

/// A crash-test hook (`tests/it/crash.rs`): with
/// `PACKBENCH_TEST_HALT_BEFORE_RENAME=<file name>#<n>` set, the process
/// stops itself (SIGSTOP) at the n-th `atomic_write` of that file, its
/// temporary file whole and synced and not yet renamed, so the test kills
/// it in exactly that state instead of aiming at a window of
/// milliseconds. Unset in use, it costs one lookup per record file.
fn halt_for_a_crash_test(name: &str) {
    #[cfg(unix)]
    {
        // Writes of the one file named, counted.
        static WRITES: std::sync::atomic::AtomicU32 = std::sync::atomic::AtomicU32::new(0);
        let Some(want) = std::env::var_os(HALT_VAR) else {
            return;
        };
        let want = want.to_string_lossy();
        let Some((file, nth)) = want.rsplit_once('#') else {
            return;
        };
        if file != name {
            return;
        }
        let n = WRITES.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
        if nth.parse::<u32>().is_ok_and(|k| k == n) {
            // SAFETY: raise(3) with a valid signal number has no
            // preconditions; SIGSTOP stops this process until killed.
            unsafe {
                libc::raise(libc::SIGSTOP);
            }
        }
    }
    #[cfg(not(unix))]
    let _ = name;
}

/// Refuse a path below `root` that passes through a symbolic link (a
/// pack or run folder, or a file, that is a link could lead a write or a
/// served page outside the results folder). `root` itself may be a link:
/// the operator chose it. Parts that do not exist yet are fine.
pub fn refuse_links_below(root: &Path, path: &Path) -> io::Result<()> {
    let rel = path.strip_prefix(root).map_err(|_| {
        io::Error::new(
            io::ErrorKind::PermissionDenied,
            format!("{} is outside {}", path.display(), root.display()),
        )
    })?;
    let mut at = root.to_path_buf();
    for part in rel.components() {
        match part {
            std::path::Component::Normal(p) => at.push(p),
            _ => {
                return Err(io::Error::new(
                    io::ErrorKind::PermissionDenied,
                    format!(
                        "{}: only plain names below {}",
                        path.display(),
                        root.display()
                    ),
                ))
            }
        }
        match fs::symlink_metadata(&at) {
            Ok(m) if m.file_type().is_symlink() => {
                return Err(io::Error::new(
                    io::ErrorKind::PermissionDenied,
                    format!(
                    "{} is a symbolic link: packbench writes and serves only what lies inside {}",
                    at.display(),
                    root.display()
                ),
                ))
            }
            Ok(_) => {}
            Err(e) if e.kind() == io::ErrorKind::NotFound => return Ok(()),
            Err(e) => return Err(e),
        }
    }
    Ok(())
}

/// Read a file below `root` as text, refusing any symbolic link on the
/// way ([`refuse_links_below`]); on Unix the file itself is opened with
/// `O_NOFOLLOW`, so a link swapped in after the check is refused too.
pub fn read_inside(root: &Path, path: &Path) -> io::Result<String> {
    use std::io::Read;
    refuse_links_below(root, path)?;
    let mut o = OpenOptions::new();
    o.read(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        o.custom_flags(libc::O_NOFOLLOW);
    }
    let mut s = String::new();
    o.open(path)?.read_to_string(&mut s)?;
    Ok(s)
}

/// A run folder's lock: an exclusive OS lock (`flock` on Unix) on
/// `run.lock`, held for as long as one process drives the run. It goes
/// with the process whatever way that ends, so a lock file left by a
/// killed process does not hold; the file names the holder's process id
/// for the operator.
#[derive(Debug)]
pub struct RunLock {
    file: File,
    path: PathBuf,
}

/// Why a run's lock could not be taken.
#[derive(Debug, thiserror::Error)]
pub enum LockError {
    /// Another process holds it (its id as the file says).
    #[error("{path}: process {holder} is driving this run now")]
    Held { path: PathBuf, holder: String },
    #[error("{path}: {error}")]
    Io { path: PathBuf, error: io::Error },
}

impl RunLock {
    /// Take the lock of the run folder `dir`, or say who holds it.
    pub fn acquire(dir: &Path) -> Result<RunLock, LockError> {
        let path = dir.join(crate::RUN_LOCK);
        let io = |error| LockError::Io {
            path: path.clone(),
            error,
        };
        // A lock whose file was removed (by its holder's release) while
        // this process opened it is taken again on the new file.
        for _ in 0..8 {
            let mut file = OpenOptions::new()
                .create(true)
                .truncate(false)
                .read(true)
                .write(true)
                .open(&path)
                .map_err(io)?;
            match file.try_lock() {
                Ok(()) => {}
                Err(fs::TryLockError::WouldBlock) => {
                    let holder = fs::read_to_string(&path).unwrap_or_default();
                    let holder = holder.trim();
                    return Err(LockError::Held {
                        path,
                        holder: if holder.is_empty() {
                            "?".into()
                        } else {
                            holder.to_string()
                        },
                    });
                }
                Err(fs::TryLockError::Error(e)) => return Err(io(e)),
            }
            if !same_file(&file, &path) {
                continue;
            }
            file.set_len(0).map_err(io)?;
            file.write_all(format!("{}\n", std::process::id()).as_bytes())
                .map_err(io)?;
            file.sync_all().map_err(io)?;
            return Ok(RunLock { file, path });
        }
        Err(io(io::Error::other("the lock file keeps changing")))
    }

    /// Whether another process drives the run in `dir` now.
    pub fn is_held(dir: &Path) -> bool {
        match File::open(dir.join(crate::RUN_LOCK)) {
            Ok(f) => matches!(f.try_lock_shared(), Err(fs::TryLockError::WouldBlock)),
            Err(_) => false,
        }
    }

    /// Remove the lock file, then let go of the lock.
    pub fn release(self) {
        let _ = fs::remove_file(&self.path);
        drop(self.file);
    }
}

/// Whether an open file is still the one at `path` (not removed or
/// replaced since it was opened).
fn same_file(f: &File, path: &Path) -> bool {
    #[cfg(unix)]
    {
        use std::os::unix::fs::MetadataExt;
        match (f.metadata(), fs::metadata(path)) {
            (Ok(a), Ok(b)) => a.dev() == b.dev() && a.ino() == b.ino(),
            _ => false,
        }
    }
    #[cfg(not(unix))]
    {
        let _ = (f, path);
        true
    }
}

/// Write a value as pretty JSON, atomically.
pub fn write_json<T: Serialize>(path: &Path, value: &T) -> io::Result<()> {
    let mut bytes = serde_json::to_vec_pretty(value).map_err(io::Error::other)?;
    bytes.push(b'\n');
    atomic_write(path, &bytes)
}

/// Create `results/<pack>/<run-id>` with a unique run id.
pub fn create_run_folder(pack_dir: &Path, base_id: &str) -> io::Result<(String, PathBuf)> {
    fs::create_dir_all(pack_dir)?;
    for n in 1..1000 {
        let id = if n == 1 {
            base_id.to_string()
        } else {
            format!("{base_id}-{n}")
        };
        let dir = pack_dir.join(&id);
        match fs::create_dir(&dir) {
            Ok(()) => {
                // The new folder's entry on the disk before anything is
                // written into it.
                sync_dir(pack_dir)?;
                return Ok((id, dir));
            }
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(e) => return Err(e),
        }
    }
    Err(io::Error::other("could not find a free run id"))
}

/// The files of a run's log: `samples.csv`, `events.jsonl` and
/// `groups.csv`. Driven by the record's writer thread
/// ([`crate::writer::QueuedSink`]), which hands rows to the operating
/// system as they come and syncs them once a second.
pub struct RunLogSink {
    samples: BufWriter<File>,
    events: File,
    pub rows: usize,
    line: String,
    /// `groups.csv`, opened at the first group scan.
    groups: Option<BufWriter<File>>,
    dir: std::path::PathBuf,
}

impl RunLogSink {
    pub fn create(dir: &Path) -> io::Result<RunLogSink> {
        let mut samples = File::create(dir.join(SAMPLES_CSV))?;
        writeln!(samples, "{}", CSV_COLUMNS.join(","))?;
        RunLogSink::with(samples, dir)
    }

    /// Open an interrupted run's log to go on writing it. A line left
    /// half-written by the interruption is cut off first.
    pub fn append(dir: &Path) -> io::Result<RunLogSink> {
        for name in [SAMPLES_CSV, EVENTS_JSONL] {
            cut_partial_line(&dir.join(name))?;
        }
        let samples = OpenOptions::new()
            .append(true)
            .open(dir.join(SAMPLES_CSV))?;
        RunLogSink::with(samples, dir)
    }

    /// The sink on an open sample file; the event log is opened to append.
    fn with(samples: File, dir: &Path) -> io::Result<RunLogSink> {
        let samples = BufWriter::with_capacity(64 * 1024, samples);
        let events = OpenOptions::new()
            .create(true)
            .append(true)
            .open(dir.join(EVENTS_JSONL))?;
        Ok(RunLogSink {
            samples,
            events,
            rows: 0,
            line: String::with_capacity(96),
            groups: None,
            dir: dir.to_path_buf(),
        })
    }

    /// Push buffered rows to the disk.
    pub fn flush(&mut self) -> io::Result<()> {
        self.hand_off()?;
        self.sync()
    }
}

/// Bytes set aside in each run folder while the run is live, freed when
/// the disk fills so the final records (`outputs_off`, `run_end`, the
/// final `run.json`) still find room: several times what they take.
pub const RESERVE_BYTES: usize = 256 * 1024;

/// Write the reserve file (real blocks, not a sparse file: the file
/// system counts them as used when they are written, so no sync is
/// needed to hold the space).
fn set_aside(path: &Path) -> io::Result<()> {
    let mut f = File::create(path)?;
    f.write_all(&vec![0u8; RESERVE_BYTES])
}

impl LogFiles for RunLogSink {
    fn hand_off(&mut self) -> io::Result<()> {
        self.samples.flush()?;
        if let Some(g) = self.groups.as_mut() {
            g.flush()?;
        }
        Ok(())
    }

    fn sync(&mut self) -> io::Result<()> {
        self.samples.get_ref().sync_data()?;
        self.events.sync_data()?;
        if let Some(g) = self.groups.as_ref() {
            g.get_ref().sync_data()?;
        }
        Ok(())
    }

    fn set_aside(&mut self) -> io::Result<()> {
        set_aside(&self.dir.join(crate::RESERVE))
    }

    fn free_reserve(&mut self) -> bool {
        fs::remove_file(self.dir.join(crate::RESERVE)).is_ok()
    }
}

/// Cut a file back to its last complete line (a line the process was
/// killed while writing).
pub fn cut_partial_line(path: &Path) -> io::Result<()> {
    use std::io::{Read, Seek, SeekFrom};
    let mut f = OpenOptions::new().read(true).write(true).open(path)?;
    let len = f.metadata()?.len();
    // Read back from the end in blocks until a line end is found.
    let mut end = len;
    let mut buf = vec![0u8; 64 * 1024];
    let keep = loop {
        if end == 0 {
            break 0;
        }
        let start = end.saturating_sub(buf.len() as u64);
        let n = (end - start) as usize;
        f.seek(SeekFrom::Start(start))?;
        f.read_exact(&mut buf[..n])?;
        if let Some(p) = buf[..n].iter().rposition(|&b| b == b'\n') {
            break start + p as u64 + 1;
        }
        end = start;
    };
    if keep < len {
        f.set_len(keep)?;
        f.sync_all()?;
    }
    Ok(())
}

/// Format one CSV row (no quoting needed: numbers only).
pub fn format_row(s: &Sample, out: &mut String) {
    use std::fmt::Write as _;
    out.clear();
    let _ = write!(
        out,
        "{:.3},{},{},{:.6},{:.6},",
        s.t_s, s.step, s.cycle, s.voltage_v, s.current_a
    );
    if let Some(t) = s.temperature_c {
        let _ = write!(out, "{t:.2}");
    }
    out.push('\n');
}

impl Sink for RunLogSink {
    fn sample(&mut self, s: &Sample) -> io::Result<()> {
        let mut line = std::mem::take(&mut self.line);
        format_row(s, &mut line);
        let r = self.samples.write_all(line.as_bytes());
        self.line = line;
        r?;
        self.rows += 1;
        Ok(())
    }

    fn groups(&mut self, g: &GroupSample) -> io::Result<()> {
        use std::fmt::Write as _;
        if self.groups.is_none() {
            let path = self.dir.join(crate::GROUPS_CSV);
            let f = if path.exists() {
                cut_partial_line(&path)?;
                OpenOptions::new().append(true).open(&path)?
            } else {
                let mut f = File::create(&path)?;
                writeln!(f, "{}", group_columns(g).join(","))?;
                f
            };
            self.groups = Some(BufWriter::with_capacity(64 * 1024, f));
        }
        let mut line = String::with_capacity(32 + 10 * g.voltage_v.len());
        let _ = write!(line, "{:.3},{},{}", g.t_s, g.step, g.cycle);
        for v in &g.voltage_v {
            let _ = write!(line, ",{v:.5}");
        }
        for t in &g.temperature_c {
            line.push(',');
            if let Some(t) = t {
                let _ = write!(line, "{t:.2}");
            }
        }
        line.push(',');
        if let Some(k) = g.inferred {
            let _ = write!(line, "{k}");
        }
        line.push('\n');
        if let Some(w) = self.groups.as_mut() {
            w.write_all(line.as_bytes())?;
        }
        Ok(())
    }

    fn event(&mut self, e: &Event) -> io::Result<()> {
        // Samples before an event are written before it is.
        self.samples.flush()?;
        if let Some(g) = self.groups.as_mut() {
            g.flush()?;
        }
        let mut line = serde_json::to_vec(e).map_err(io::Error::other)?;
        line.push(b'\n');
        self.events.write_all(&line)?;
        // The end of a run is synced at once; the rest within a second.
        if matches!(e, Event::RunEnd { .. } | Event::OutputsOff { .. }) {
            self.samples.get_ref().sync_data()?;
            self.events.sync_data()?;
        }
        Ok(())
    }
}

/// The columns of `groups.csv` for a scan of this shape: time, step,
/// cycle, each group's volts, each temperature input by its position,
/// and the group read from the pack voltage (if one was). The inputs'
/// channels, names and places are in `run.json`.
pub fn group_columns(g: &GroupSample) -> Vec<String> {
    let mut c = vec!["t_s".to_string(), "step".into(), "cycle".into()];
    c.extend((1..=g.voltage_v.len()).map(|k| format!("group_{k}_v")));
    c.extend((1..=g.temperature_c.len()).map(|k| format!("temperature_{k}_c")));
    c.push("inferred_group".into());
    c
}

impl Drop for RunLogSink {
    fn drop(&mut self) {
        let _ = self.samples.flush();
        if let Some(g) = self.groups.as_mut() {
            let _ = g.flush();
        }
    }
}

/// Keep a pack's measured Peukert exponent with it (`peukert.toml`): the
/// exponent and the two runs it came from.
pub fn write_peukert(pack_dir: &Path, k: f64, runs: &[String]) -> io::Result<()> {
    #[derive(Serialize)]
    struct File<'a> {
        exponent: f64,
        from_runs: &'a [String],
    }
    let text = toml::to_string(&File {
        exponent: k,
        from_runs: runs,
    })
    .map_err(io::Error::other)?;
    atomic_write(&pack_dir.join(crate::PEUKERT_TOML), text.as_bytes())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// POSIX fsync(2): syncing a file does not make its directory entry
    /// durable; the folder must be synced too. Each atomic write and each
    /// new run folder syncs its parent.
    #[test]
    fn atomic_writes_and_new_run_folders_sync_their_folder() {
        let d = tempfile::tempdir().expect("tmp");
        let before = dir_syncs_on_this_thread();
        atomic_write(&d.path().join("run.json"), b"{}\n").expect("write");
        assert_eq!(dir_syncs_on_this_thread(), before + 1, "atomic write");
        let (_, run) = create_run_folder(&d.path().join("P1"), "r").expect("folder");
        assert_eq!(dir_syncs_on_this_thread(), before + 2, "new run folder");
        assert!(run.is_dir());
        assert_eq!(fs::read(d.path().join("run.json")).expect("read"), b"{}\n");
    }

    #[test]
    fn a_half_written_line_is_cut_off() {
        let d = tempfile::tempdir().expect("tmp");
        let p = d.path().join("x.csv");
        fs::write(&p, b"a,b\n1,2\n3,").expect("write");
        cut_partial_line(&p).expect("cut");
        assert_eq!(fs::read(&p).expect("read"), b"a,b\n1,2\n");
        // Complete files are left alone; a file with no line end is emptied.
        cut_partial_line(&p).expect("cut");
        assert_eq!(fs::read(&p).expect("read"), b"a,b\n1,2\n");
        fs::write(&p, b"partial").expect("write");
        cut_partial_line(&p).expect("cut");
        assert_eq!(fs::read(&p).expect("read").len(), 0);
    }
}
