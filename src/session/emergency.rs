//! The last-resort switch-off: every running station's instruments, sent
//! their safe state on fresh links (a second Ctrl-C).

use instrument::profile::Profile;
use instrument::scpi::Reopen;
use std::sync::Arc;

/// Every running station's instruments, to switch off on fresh links
/// when the running sessions cannot be waited for (a second Ctrl-C).
#[derive(Clone, Default)]
pub struct Emergency(Arc<std::sync::Mutex<Vec<(String, Reopen, Profile)>>>);

impl Emergency {
    pub fn register(&self, name: String, reopen: Reopen, profile: Profile) {
        if let Ok(mut g) = self.0.lock() {
            g.push((name, reopen, profile));
        }
    }

    /// Send every registered instrument its safe state on a fresh link,
    /// all at once, each within `timeout`. Returns (instrument, sent).
    pub async fn all_off(&self, timeout: std::time::Duration) -> Vec<(String, bool)> {
        let list = match self.0.lock() {
            Ok(g) => g.clone(),
            Err(p) => p.into_inner().clone(),
        };
        let tries = list.iter().map(|(name, reopen, profile)| async move {
            let r = tokio::time::timeout(
                timeout,
                instrument::safe_state_on_new_link(name, reopen, profile),
            )
            .await;
            (name.clone(), matches!(r, Ok(Ok(()))))
        });
        futures::future::join_all(tries).await
    }
}
