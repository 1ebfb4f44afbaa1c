//! Writing a run: the folder, the sample CSV and the event log as an
//! engine sink (flushed to disk at least every second), and atomic JSON
//! records.

use super::{CSV_COLUMNS, EVENTS_JSONL, SAMPLES_CSV};
use crate::engine::event::{Event, Sink};
use crate::sample::Sample;
use serde::Serialize;
use std::fs::{self, File, OpenOptions};
use std::io::{self, BufWriter, Write};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

/// How often buffered samples reach the disk (wall clock).
pub const FLUSH_INTERVAL: Duration = Duration::from_secs(1);

/// Write `bytes` to `path` through a temporary file and a rename.
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
    fs::rename(&tmp, path)
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
            Ok(()) => return Ok((id, dir)),
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
            Err(e) => return Err(e),
        }
    }
    Err(io::Error::other("could not find a free run id"))
}

/// The engine sink that writes `samples.csv` and `events.jsonl`.
pub struct RunLogSink {
    samples: BufWriter<File>,
    events: File,
    last_flush: Instant,
    pub rows: usize,
    line: String,
}

impl RunLogSink {
    pub fn create(dir: &Path) -> io::Result<RunLogSink> {
        let mut samples = BufWriter::with_capacity(64 * 1024, File::create(dir.join(SAMPLES_CSV))?);
        writeln!(samples, "{}", CSV_COLUMNS.join(","))?;
        samples.flush()?;
        let events = OpenOptions::new()
            .create(true)
            .append(true)
            .open(dir.join(EVENTS_JSONL))?;
        Ok(RunLogSink {
            samples,
            events,
            last_flush: Instant::now(),
            rows: 0,
            line: String::with_capacity(96),
        })
    }

    /// Push buffered rows to the disk.
    pub fn flush(&mut self) -> io::Result<()> {
        self.samples.flush()?;
        self.samples.get_ref().sync_data()?;
        self.last_flush = Instant::now();
        Ok(())
    }
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
        if self.last_flush.elapsed() >= FLUSH_INTERVAL {
            self.flush()?;
        }
        Ok(())
    }

    fn event(&mut self, e: &Event) -> io::Result<()> {
        // Samples before an event reach the disk before it does.
        self.flush()?;
        let mut line = serde_json::to_vec(e).map_err(io::Error::other)?;
        line.push(b'\n');
        self.events.write_all(&line)?;
        self.events.sync_data()
    }
}

impl Drop for RunLogSink {
    fn drop(&mut self) {
        let _ = self.samples.flush();
    }
}
