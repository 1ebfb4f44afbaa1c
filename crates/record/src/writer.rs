//! The record's own writer: the engine hands samples and events to a
//! queue and goes on; a thread of the writer's own writes them, hands
//! them to the operating system as soon as the queue is empty, and syncs
//! them to the disk once a second. The control path never waits on the
//! disk: a writer that falls behind ([`LAG_MAX`]) or fails (no space, an
//! I/O error from a sync, a read-only folder) turns the engine's next
//! sample into an error, and the engine goes to the safe stop, still
//! checking its limits until the outputs are off.

use crate::event::{Event, Sink};
use model::groups::GroupSample;
use model::sample::Sample;
use std::io;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::mpsc;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// How often handed-over rows are synced to the disk (wall clock). Rows
/// reach the operating system as soon as the writer's queue is empty.
pub const FLUSH_INTERVAL: Duration = Duration::from_secs(1);

/// How long the writer may go without writing anything while rows wait
/// for it before the run stops safely. A healthy disk syncs in well under
/// a second (a slow memory card in a few hundred milliseconds); ten
/// seconds is a disk or share that has stalled, not one that is slow.
/// The engine keeps checking every limit meanwhile, so the bound limits
/// how much of the record is held only in memory, not how soon a limit
/// acts.
pub const LAG_MAX: Duration = Duration::from_secs(10);

/// How many rows may wait in the queue (about 64 bytes each: 4 MiB).
/// A paced run at 10 samples a second fills it in 1.8 hours, far past
/// [`LAG_MAX`]; a run on the simulated clock, which outruns any disk,
/// waits for the writer at this depth instead (nothing real is driven).
pub const QUEUE_MAX: usize = 65_536;

/// What the writer owns: the run's files, or a test's stand-in.
pub trait LogFiles: Sink + Send {
    /// Buffered rows to the operating system (a killed process loses
    /// nothing handed over).
    fn hand_off(&mut self) -> io::Result<()>;
    /// Everything handed over to the disk.
    fn sync(&mut self) -> io::Result<()>;
    /// Set space aside for the final records (done by the writer's
    /// thread as it starts, so the run does not wait for it).
    fn set_aside(&mut self) -> io::Result<()> {
        Ok(())
    }
    /// Free the space set aside for the final records (a full disk).
    /// Returns whether any was freed.
    fn free_reserve(&mut self) -> bool {
        false
    }
}

enum Item {
    Sample(Sample),
    Groups(GroupSample),
    Event(Box<Event>),
}

impl Item {
    fn is_row(&self) -> bool {
        !matches!(self, Item::Event(_))
    }
}

struct Shared {
    failed: AtomicBool,
    failure: Mutex<Option<String>>,
    /// Rows and events sent and not yet handled.
    pending: AtomicUsize,
    /// Milliseconds since `base` of the writer's last progress (or of
    /// the moment the queue stopped being empty).
    progress_ms: AtomicU64,
    base: Instant,
    /// What could not be written (after a failure).
    unwritten: Mutex<Unwritten>,
}

#[derive(Debug, Default, Clone)]
struct Unwritten {
    rows: u64,
    events: Vec<String>,
}

impl Shared {
    fn now_ms(&self) -> u64 {
        self.base.elapsed().as_millis() as u64
    }
    fn touch(&self) {
        self.progress_ms.store(self.now_ms(), Ordering::Relaxed);
    }
    fn since_progress(&self) -> Duration {
        Duration::from_millis(
            self.now_ms()
                .saturating_sub(self.progress_ms.load(Ordering::Relaxed)),
        )
    }
    fn fail(&self, msg: String) {
        if let Ok(mut g) = self.failure.lock() {
            if g.is_none() {
                *g = Some(msg);
            }
        }
        self.failed.store(true, Ordering::Release);
    }
    fn failure(&self) -> Option<String> {
        self.failure.lock().ok().and_then(|g| g.clone())
    }
}

/// How a queued writer ended.
#[derive(Debug, Clone, Default)]
pub struct WriterEnd {
    /// The first failure: an I/O error, or the writer stalled.
    pub failure: Option<String>,
    /// The writer did not finish in the time allowed (its thread is still
    /// blocked, on a stalled disk): what is on disk is all there is.
    pub stalled: bool,
    /// Rows that never reached the file.
    pub rows_lost: u64,
    /// Events that never reached the file, by name.
    pub events_lost: Vec<String>,
}

impl WriterEnd {
    /// Whether everything handed over is in the files, synced.
    pub fn complete(&self) -> bool {
        self.failure.is_none() && !self.stalled
    }

    /// One line for the operator and the record.
    pub fn describe(&self) -> Option<String> {
        if self.complete() {
            return None;
        }
        let mut s = self
            .failure
            .clone()
            .unwrap_or_else(|| "the record's writer did not finish".into());
        if self.stalled {
            s.push_str(
                "; the writer was still blocked at the end, so the log on disk may stop early",
            );
        }
        if self.rows_lost > 0 {
            s.push_str(&format!("; {} rows not written", self.rows_lost));
        }
        if !self.events_lost.is_empty() {
            s.push_str(&format!(
                "; events not written: {}",
                self.events_lost.join(", ")
            ));
        }
        Some(s)
    }
}

/// The engine's sink: a queue to a writer thread.
pub struct QueuedSink {
    tx: Option<mpsc::Sender<Item>>,
    shared: Arc<Shared>,
    done: mpsc::Receiver<()>,
    /// Paced (a real pack on the bench): a full queue is a fault. On the
    /// simulated clock the engine waits for the writer instead.
    paced: bool,
    lag_max: Duration,
    /// Rows handed to the writer.
    pub rows: usize,
}

impl QueuedSink {
    /// Start the writer thread on `files`.
    pub fn spawn(files: Box<dyn LogFiles>, paced: bool) -> io::Result<QueuedSink> {
        QueuedSink::spawn_with(files, paced, LAG_MAX)
    }

    /// As [`QueuedSink::spawn`], with another bound on the writer's lag
    /// (tests).
    pub fn spawn_with(
        files: Box<dyn LogFiles>,
        paced: bool,
        lag_max: Duration,
    ) -> io::Result<QueuedSink> {
        let (tx, rx) = mpsc::channel();
        let (done_tx, done) = mpsc::channel();
        let shared = Arc::new(Shared {
            failed: AtomicBool::new(false),
            failure: Mutex::new(None),
            pending: AtomicUsize::new(0),
            progress_ms: AtomicU64::new(0),
            base: Instant::now(),
            unwritten: Mutex::new(Unwritten::default()),
        });
        let s = Arc::clone(&shared);
        std::thread::Builder::new()
            .name("record-writer".into())
            .spawn(move || {
                Writer {
                    files,
                    shared: s,
                    last_sync: Instant::now(),
                    dirty: false,
                }
                .run(rx);
                let _ = done_tx.send(());
            })?;
        Ok(QueuedSink {
            tx: Some(tx),
            shared,
            done,
            paced,
            lag_max,
            rows: 0,
        })
    }

    /// The writer's failure, if it has one (or has just been found to lag).
    fn check(&self) -> io::Result<()> {
        if self.shared.failed.load(Ordering::Acquire) {
            let m = self
                .shared
                .failure()
                .unwrap_or_else(|| "the record's writer failed".into());
            return Err(io::Error::other(m));
        }
        let pending = self.shared.pending.load(Ordering::Relaxed);
        if pending > 0 {
            let lag = self.shared.since_progress();
            if lag > self.lag_max {
                let m = format!(
                    "the record's writer has written nothing for {:.1} s with {pending} records waiting (a stalled or failing disk)",
                    lag.as_secs_f64()
                );
                self.shared.fail(m.clone());
                return Err(io::Error::other(m));
            }
        }
        if self.paced && pending >= QUEUE_MAX {
            let m = format!("the record's writer is {pending} records behind");
            self.shared.fail(m.clone());
            return Err(io::Error::other(m));
        }
        Ok(())
    }

    fn send(&mut self, item: Item) -> io::Result<()> {
        let row = item.is_row();
        if row && !self.paced {
            // The simulated clock outruns any disk: wait for room.
            while self.shared.pending.load(Ordering::Relaxed) >= QUEUE_MAX
                && !self.shared.failed.load(Ordering::Acquire)
            {
                std::thread::sleep(Duration::from_micros(200));
            }
        }
        let Some(tx) = &self.tx else {
            return Err(io::Error::other("the record's writer is closed"));
        };
        if self.shared.pending.fetch_add(1, Ordering::AcqRel) == 0 {
            // The writer's lag counts from the moment it has work.
            self.shared.touch();
        }
        if tx.send(item).is_err() {
            self.shared.pending.fetch_sub(1, Ordering::AcqRel);
            self.shared.fail("the record's writer has stopped".into());
        }
        Ok(())
    }

    /// Close the queue and wait up to `wait` for the writer to write,
    /// hand over and sync what it holds.
    pub fn finish(mut self, wait: Duration) -> WriterEnd {
        self.tx = None;
        let stalled = self.done.recv_timeout(wait).is_err();
        let mut lost = self
            .shared
            .unwritten
            .lock()
            .map(|g| g.clone())
            .unwrap_or_default();
        if stalled {
            // What still waits in the queue is lost with the process.
            let n = self.shared.pending.load(Ordering::Relaxed) as u64;
            lost.rows += n;
        }
        WriterEnd {
            failure: self.shared.failure(),
            stalled,
            rows_lost: lost.rows,
            events_lost: lost.events,
        }
    }
}

impl Sink for QueuedSink {
    fn sample(&mut self, s: &Sample) -> io::Result<()> {
        self.check()?;
        self.rows += 1;
        self.send(Item::Sample(*s))
    }

    fn groups(&mut self, g: &GroupSample) -> io::Result<()> {
        self.check()?;
        self.send(Item::Groups(g.clone()))
    }

    /// Events are always queued (the final `outputs_off` and `run_end`
    /// included, so they are written where space allows); a failed
    /// writer is still reported to the engine.
    fn event(&mut self, e: &Event) -> io::Result<()> {
        self.send(Item::Event(Box::new(e.clone())))?;
        self.check()
    }
}

struct Writer {
    files: Box<dyn LogFiles>,
    shared: Arc<Shared>,
    last_sync: Instant,
    /// Handed over and not yet synced.
    dirty: bool,
}

fn event_name(e: &Event) -> String {
    serde_json::to_value(e)
        .ok()
        .and_then(|v| v.get("event").and_then(|n| n.as_str()).map(str::to_string))
        .unwrap_or_else(|| "event".into())
}

impl Writer {
    fn run(mut self, rx: mpsc::Receiver<Item>) {
        let r = self.files.set_aside();
        self.outcome(r);
        loop {
            let wait = if self.dirty {
                FLUSH_INTERVAL.saturating_sub(self.last_sync.elapsed())
            } else {
                Duration::from_secs(3600)
            };
            match rx.recv_timeout(wait) {
                Ok(item) => {
                    self.handle(item);
                    // Everything already waiting, then one hand-over.
                    while let Ok(item) = rx.try_recv() {
                        self.handle(item);
                    }
                    let r = self.files.hand_off();
                    self.outcome(r);
                    self.dirty = true;
                }
                Err(mpsc::RecvTimeoutError::Timeout) => {}
                Err(mpsc::RecvTimeoutError::Disconnected) => {
                    let r = self.files.hand_off();
                    self.outcome(r);
                    let r = self.files.sync();
                    self.outcome(r);
                    self.files.free_reserve();
                    return;
                }
            }
            if self.dirty && self.last_sync.elapsed() >= FLUSH_INTERVAL {
                let r = self.files.sync();
                self.outcome(r);
                self.last_sync = Instant::now();
                self.dirty = false;
            }
        }
    }

    fn failed(&self) -> bool {
        self.shared.failed.load(Ordering::Acquire)
    }

    /// Note an error: the first one fails the run, and the space kept for
    /// the final records is freed.
    fn outcome(&mut self, r: io::Result<()>) -> bool {
        match r {
            Ok(()) => true,
            Err(e) => {
                if !self.failed() {
                    self.shared.fail(format!("cannot write the log: {e}"));
                }
                self.files.free_reserve();
                false
            }
        }
    }

    fn handle(&mut self, item: Item) {
        match item {
            Item::Sample(s) => {
                if self.failed() {
                    self.lost_row();
                } else {
                    let r = self.files.sample(&s);
                    if !self.outcome(r) {
                        self.lost_row();
                    }
                }
            }
            Item::Groups(g) => {
                if !self.failed() {
                    let r = self.files.groups(&g);
                    self.outcome(r);
                }
            }
            Item::Event(e) => {
                // Tried even after a failure: the record's end matters most.
                let mut r = self.files.event(&e);
                if r.is_err() && self.files.free_reserve() {
                    r = self.files.event(&e);
                }
                if !self.outcome(r) {
                    if let Ok(mut g) = self.shared.unwritten.lock() {
                        g.events.push(event_name(&e));
                    }
                }
            }
        }
        self.shared.pending.fetch_sub(1, Ordering::AcqRel);
        self.shared.touch();
    }

    fn lost_row(&self) {
        if let Ok(mut g) = self.shared.unwritten.lock() {
            g.rows += 1;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::atomic::AtomicBool;

    /// Files that fail or block on command, and count what they got.
    #[derive(Clone, Default)]
    struct Probe {
        rows: Arc<AtomicUsize>,
        events: Arc<Mutex<Vec<String>>>,
        handed: Arc<AtomicUsize>,
        syncs: Arc<AtomicUsize>,
        fail_sync: Arc<AtomicBool>,
        fail_rows: Arc<AtomicBool>,
        block: Arc<AtomicBool>,
    }

    impl Sink for Probe {
        fn sample(&mut self, _: &Sample) -> io::Result<()> {
            while self.block.load(Ordering::Relaxed) {
                std::thread::sleep(Duration::from_millis(2));
            }
            if self.fail_rows.load(Ordering::Relaxed) {
                return Err(io::Error::other("No space left on device"));
            }
            self.rows.fetch_add(1, Ordering::Relaxed);
            Ok(())
        }
        fn event(&mut self, e: &Event) -> io::Result<()> {
            self.events.lock().unwrap().push(event_name(e));
            Ok(())
        }
    }

    impl LogFiles for Probe {
        fn hand_off(&mut self) -> io::Result<()> {
            self.handed.fetch_add(1, Ordering::Relaxed);
            Ok(())
        }
        fn sync(&mut self) -> io::Result<()> {
            self.syncs.fetch_add(1, Ordering::Relaxed);
            if self.fail_sync.load(Ordering::Relaxed) {
                return Err(io::Error::from_raw_os_error(5));
            }
            Ok(())
        }
    }

    fn sample(t: f64) -> Sample {
        Sample {
            t_s: t,
            step: 1,
            cycle: 1,
            voltage_v: 3.7,
            current_a: -1.0,
            temperature_c: None,
        }
    }

    fn end() -> Event {
        Event::RunEnd {
            t_s: 1.0,
            status: model::status::RunStatus::Aborted,
            reason: None,
        }
    }

    #[test]
    fn rows_and_events_reach_the_files_in_order() {
        let p = Probe::default();
        let mut q = QueuedSink::spawn(Box::new(p.clone()), true).unwrap();
        for k in 0..1000 {
            q.sample(&sample(k as f64)).unwrap();
        }
        q.event(&end()).unwrap();
        let e = q.finish(Duration::from_secs(10));
        assert!(e.complete(), "{e:?}");
        assert_eq!(p.rows.load(Ordering::Relaxed), 1000);
        assert_eq!(*p.events.lock().unwrap(), ["run_end"]);
        assert!(p.syncs.load(Ordering::Relaxed) >= 1, "synced at the end");
    }

    /// Finding: a failed fsync was dropped and the run ended completed.
    #[test]
    fn a_failed_sync_fails_the_next_sample() {
        let p = Probe::default();
        p.fail_sync.store(true, Ordering::Relaxed);
        let mut q = QueuedSink::spawn(Box::new(p.clone()), true).unwrap();
        let t0 = Instant::now();
        let mut err = None;
        let mut k = 0;
        while t0.elapsed() < Duration::from_secs(5) {
            if let Err(e) = q.sample(&sample(k as f64)) {
                err = Some(e.to_string());
                break;
            }
            k += 1;
            std::thread::sleep(Duration::from_millis(20));
        }
        let err = err.expect("a sync error must reach the engine");
        assert!(err.contains("cannot write the log"), "{err}");
        // Within about one sync interval, not at the end of the run.
        assert!(t0.elapsed() < FLUSH_INTERVAL * 3, "{:?}", t0.elapsed());
        q.event(&end()).unwrap_err();
        let e = q.finish(Duration::from_secs(5));
        assert!(!e.complete());
        assert!(e.describe().unwrap().contains("cannot write the log"));
        // The final event is still written where the files take it.
        assert_eq!(*p.events.lock().unwrap(), ["run_end"]);
    }

    #[test]
    fn a_stalled_writer_is_reported_within_its_bound_and_the_sender_never_waits() {
        let p = Probe::default();
        p.block.store(true, Ordering::Relaxed);
        let lag = Duration::from_millis(300);
        let mut q = QueuedSink::spawn_with(Box::new(p.clone()), true, lag).unwrap();
        let t0 = Instant::now();
        let mut slowest = Duration::ZERO;
        let mut failed_at = None;
        for k in 0..400 {
            let t = Instant::now();
            let r = q.sample(&sample(k as f64));
            slowest = slowest.max(t.elapsed());
            if let Err(e) = r {
                assert!(e.to_string().contains("written nothing"), "{e}");
                failed_at = Some(t0.elapsed());
                break;
            }
            std::thread::sleep(Duration::from_millis(5));
        }
        let at = failed_at.expect("the stall is found");
        assert!(at >= lag && at < lag + Duration::from_millis(500), "{at:?}");
        // No hand-over waited on the blocked file.
        assert!(slowest < Duration::from_millis(50), "{slowest:?}");
        let e = q.finish(Duration::from_millis(100));
        assert!(e.stalled && e.rows_lost > 0, "{e:?}");
        p.block.store(false, Ordering::Relaxed);
    }

    #[test]
    fn rows_after_a_failure_are_counted_as_lost_and_events_still_go() {
        let p = Probe::default();
        p.fail_rows.store(true, Ordering::Relaxed);
        let mut q = QueuedSink::spawn(Box::new(p.clone()), true).unwrap();
        let _ = q.sample(&sample(0.0));
        let e = q.finish(Duration::from_secs(5));
        assert_eq!(e.rows_lost, 1);
        let p2 = Probe::default();
        let mut q = QueuedSink::spawn(Box::new(p2.clone()), true).unwrap();
        q.event(&end()).unwrap();
        assert!(q.finish(Duration::from_secs(5)).complete());
        assert_eq!(p2.events.lock().unwrap().len(), 1);
    }

    /// At 1 Hz each row reaches the operating system before the next one
    /// is taken (finding: every other second was missed).
    #[test]
    fn every_row_is_handed_over_before_the_next_arrives_at_one_hertz() {
        let p = Probe::default();
        let mut q = QueuedSink::spawn(Box::new(p.clone()), true).unwrap();
        for k in 0..3 {
            q.sample(&sample(k as f64)).unwrap();
            std::thread::sleep(Duration::from_millis(150));
            assert!(
                p.handed.load(Ordering::Relaxed) > k,
                "row {k} not handed over"
            );
        }
        let _ = q.finish(Duration::from_secs(5));
    }
}
