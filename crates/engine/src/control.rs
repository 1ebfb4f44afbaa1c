//! A handle to ask a running engine to stop (Ctrl-C). Stop is not abort:
//! a stop ends the run as `interrupted`, outputs off, summary written. A
//! waiting engine wakes at once when a stop is asked for.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use tokio::sync::Notify;

#[derive(Debug, Default)]
struct Inner {
    flag: AtomicBool,
    notify: Notify,
}

#[derive(Debug, Clone, Default)]
pub struct StopHandle(Arc<Inner>);

impl StopHandle {
    pub fn new() -> StopHandle {
        StopHandle::default()
    }
    pub fn request_stop(&self) {
        self.0.flag.store(true, Ordering::SeqCst);
        self.0.notify.notify_waiters();
    }
    pub fn stop_requested(&self) -> bool {
        self.0.flag.load(Ordering::SeqCst)
    }
    /// Resolves once a stop has been asked for.
    pub async fn wait(&self) {
        loop {
            let n = self.0.notify.notified();
            tokio::pin!(n);
            n.as_mut().enable();
            if self.stop_requested() {
                return;
            }
            n.await;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_waiting_task_wakes_on_stop() {
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .expect("runtime");
        rt.block_on(async {
            let h = StopHandle::new();
            let h2 = h.clone();
            let waiter = tokio::spawn(async move {
                h2.wait().await;
                true
            });
            tokio::task::yield_now().await;
            assert!(!waiter.is_finished());
            h.request_stop();
            let woke = tokio::time::timeout(std::time::Duration::from_secs(1), waiter).await;
            assert!(matches!(woke, Ok(Ok(true))), "{woke:?}");
            // A stop asked before waiting is seen at once.
            tokio::time::timeout(std::time::Duration::from_millis(100), h.wait())
                .await
                .expect("no wait after a stop");
        });
    }
}
