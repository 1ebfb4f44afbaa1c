//! Time for the engine and the simulated bench: a simulation clock that
//! jumps straight to the next sample (a ten-hour procedure in well under a
//! second) and a paced clock that follows the wall clock, optionally sped
//! up. Times are seconds since the clock started.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

/// A source of run time shared by the engine and the simulated bench.
pub trait Clock: Send + Sync {
    /// Seconds since the clock started.
    fn now(&self) -> f64;
    /// Wait until `t` seconds (returns at once if already past).
    fn sleep_until(&self, t: f64) -> futures::future::BoxFuture<'_, ()>;
    /// Whether this clock is simulated (time does not pass by itself).
    fn is_simulated(&self) -> bool;
    /// Wall seconds the computer has spent suspended (asleep, hibernated)
    /// since the clock started: the run's time stood still while the pack
    /// did not. Zero where it cannot be known.
    fn slept_s(&self) -> f64 {
        0.0
    }
}

/// The gap between the clock that counts a suspend (boot time) and the
/// one that does not (monotonic), s; it grows by the length of each
/// suspend. Linux only (`CLOCK_BOOTTIME`); elsewhere `None`.
pub fn suspend_offset_s() -> Option<f64> {
    #[cfg(any(target_os = "linux", target_os = "android"))]
    {
        let read = |id| {
            let mut ts = libc::timespec {
                tv_sec: 0,
                tv_nsec: 0,
            };
            // SAFETY: clock_gettime writes the timespec we own.
            let ok = unsafe { libc::clock_gettime(id, &mut ts) } == 0;
            ok.then_some(ts.tv_sec as f64 + ts.tv_nsec as f64 * 1e-9)
        };
        let boot = read(libc::CLOCK_BOOTTIME)?;
        let mono = read(libc::CLOCK_MONOTONIC)?;
        Some(boot - mono)
    }
    #[cfg(not(any(target_os = "linux", target_os = "android")))]
    {
        None
    }
}

/// Simulation clock: time advances only when someone sleeps.
#[derive(Debug, Default)]
pub struct SimClock {
    bits: AtomicU64,
}

impl SimClock {
    pub fn new() -> Arc<SimClock> {
        Arc::new(SimClock::default())
    }
    pub fn set(&self, t: f64) {
        self.bits.store(t.to_bits(), Ordering::SeqCst);
    }
}

impl Clock for SimClock {
    fn now(&self) -> f64 {
        f64::from_bits(self.bits.load(Ordering::SeqCst))
    }
    fn sleep_until(&self, t: f64) -> futures::future::BoxFuture<'_, ()> {
        if t > self.now() {
            self.set(t);
        }
        Box::pin(std::future::ready(()))
    }
    fn is_simulated(&self) -> bool {
        true
    }
}

/// The last stretch of a paced wait spent yielding instead of on the timer, s.
const FINE_WAIT_S: f64 = 0.002;

/// Paced clock: run time = wall time × speed (speed 1 = real time).
#[derive(Debug)]
pub struct PacedClock {
    start: Instant,
    speed: f64,
    fine: bool,
    /// [`suspend_offset_s`] when the clock started.
    offset0: Option<f64>,
}

impl PacedClock {
    pub fn new(speed: f64) -> Arc<PacedClock> {
        Arc::new(PacedClock {
            start: Instant::now(),
            speed: if speed > 0.0 { speed } else { 1.0 },
            fine: true,
            offset0: suspend_offset_s(),
        })
    }

    /// A paced clock that only uses the timer (wakes within about a
    /// millisecond): for many stations on one thread, where yielding out
    /// the last stretch of every wait would cost more than it gains.
    pub fn coarse(speed: f64) -> Arc<PacedClock> {
        Arc::new(PacedClock {
            start: Instant::now(),
            speed: if speed > 0.0 { speed } else { 1.0 },
            fine: false,
            offset0: suspend_offset_s(),
        })
    }
}

impl Clock for PacedClock {
    fn now(&self) -> f64 {
        self.start.elapsed().as_secs_f64() * self.speed
    }
    /// At (about) real time the timer sleeps until shortly before the
    /// instant (its resolution is a millisecond and it may wake late), and
    /// the last stretch is waited out by yielding the thread, so samples
    /// keep their schedule to well under a millisecond. A sped-up clock
    /// (a simulator on the other end) only uses the timer.
    fn sleep_until(&self, t: f64) -> futures::future::BoxFuture<'_, ()> {
        Box::pin(async move {
            let fine = if self.fine && self.speed <= 2.0 {
                FINE_WAIT_S
            } else {
                0.0
            };
            let wait = ((t - self.now()) / self.speed).max(0.0);
            if wait > fine {
                tokio::time::sleep(Duration::from_secs_f64(wait - fine)).await;
            }
            while fine > 0.0 && self.now() < t {
                std::thread::yield_now();
            }
        })
    }
    fn is_simulated(&self) -> bool {
        false
    }
    fn slept_s(&self) -> f64 {
        match (self.offset0, suspend_offset_s()) {
            (Some(a), Some(b)) => (b - a).max(0.0),
            _ => 0.0,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// No suspend happens while a test runs: the offset stands still (to
    /// well under the 1 s the engine allows).
    #[test]
    fn an_awake_computer_has_slept_nothing() {
        let c = PacedClock::new(1.0);
        std::thread::sleep(Duration::from_millis(50));
        assert!(c.slept_s() < 0.05, "{}", c.slept_s());
        #[cfg(target_os = "linux")]
        assert!(suspend_offset_s().is_some());
    }

    #[test]
    fn sim_clock_jumps_and_never_goes_back() {
        let c = SimClock::new();
        futures::executor::block_on(c.sleep_until(36_000.0));
        assert_eq!(c.now(), 36_000.0);
        futures::executor::block_on(c.sleep_until(10.0));
        assert_eq!(c.now(), 36_000.0);
    }
}
