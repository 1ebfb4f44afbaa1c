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
}

impl PacedClock {
    pub fn new(speed: f64) -> Arc<PacedClock> {
        Arc::new(PacedClock {
            start: Instant::now(),
            speed: if speed > 0.0 { speed } else { 1.0 },
            fine: true,
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
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sim_clock_jumps_and_never_goes_back() {
        let c = SimClock::new();
        futures::executor::block_on(c.sleep_until(36_000.0));
        assert_eq!(c.now(), 36_000.0);
        futures::executor::block_on(c.sleep_until(10.0));
        assert_eq!(c.now(), 36_000.0);
    }
}
