//! A shared state's lock, taken even if a thread panicked while holding it:
//! the simulated bench goes on serving (a poisoned lock holds the same data).

use std::sync::{Mutex, MutexGuard};

/// Lock `m`, recovering it from poisoning.
pub fn locked<T: ?Sized>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    match m.lock() {
        Ok(g) => g,
        Err(p) => p.into_inner(),
    }
}
