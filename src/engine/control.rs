//! A handle to ask a running engine to stop (Ctrl-C). Stop is not abort:
//! a stop ends the run as `interrupted`, outputs off, summary written.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

#[derive(Debug, Clone, Default)]
pub struct StopHandle(Arc<AtomicBool>);

impl StopHandle {
    pub fn new() -> StopHandle {
        StopHandle::default()
    }
    pub fn request_stop(&self) {
        self.0.store(true, Ordering::SeqCst);
    }
    pub fn stop_requested(&self) -> bool {
        self.0.load(Ordering::SeqCst)
    }
}
