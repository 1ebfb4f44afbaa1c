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
use std::time::Duration;

/// How often handed-over rows are synced to the disk (wall clock). Rows
/// reach the operating system as soon as the writer's queue is empty.
pub const FLUSH_INTERVAL: Duration = Duration::from_secs(1);

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
pub fn atomic_write(path: &Path, bytes: &[u8]) -> io::Result<()> {
    let tmp = path.with_extension(format!(
        "{}.tmp",
        path.extension().and_then(|e| e.to_str()).unwrap_or("")
    ));
    {
        let mut f = File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
    }
    fs::rename(&tmp, path)?;
    sync_dir(path.parent().unwrap_or(Path::new(".")))
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
        set_aside(&dir.join(crate::RESERVE))?;
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

/// Write the reserve file (real blocks, not a sparse file).
fn set_aside(path: &Path) -> io::Result<()> {
    let mut f = File::create(path)?;
    f.write_all(&vec![0u8; RESERVE_BYTES])?;
    f.sync_data()
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
