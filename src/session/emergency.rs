//! The last-resort switch-off: every running station's instruments sent
//! their safe state (a second Ctrl-C). A serial port this process holds is
//! written through its open descriptor (an exclusive port cannot be opened
//! twice); any other link is opened afresh.

use instrument::profile::Profile;
use instrument::scpi::Reopen;
use std::sync::Arc;

/// One instrument to switch off: its name, a way to open its link afresh,
/// its profile, and its serial device if it is on one.
type Entry = (String, Reopen, Profile, Option<String>);

/// Every running station's instruments, to switch off when the running
/// sessions cannot be waited for (a second Ctrl-C).
#[derive(Clone, Default)]
pub struct Emergency(Arc<std::sync::Mutex<Vec<Entry>>>);

impl Emergency {
    pub fn register(
        &self,
        name: String,
        reopen: Reopen,
        profile: Profile,
        serial_path: Option<String>,
    ) {
        if let Ok(mut g) = self.0.lock() {
            g.push((name, reopen, profile, serial_path));
        }
    }

    /// Send every registered instrument its safe state, all at once, each
    /// within `timeout`. Returns (instrument, sent).
    pub async fn all_off(&self, timeout: std::time::Duration) -> Vec<(String, bool)> {
        let list = match self.0.lock() {
            Ok(g) => g.clone(),
            Err(p) => p.into_inner().clone(),
        };
        let tries = list
            .iter()
            .map(|(name, reopen, profile, serial)| async move {
                if let Some(sent) = through_open_port(serial.as_deref(), profile, timeout).await {
                    return (name.clone(), sent);
                }
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

/// The safe state written through a serial port this process holds open:
/// `None` when it holds none (open a fresh link instead). A terminator
/// goes first, ending any line a stuck session left half-written.
async fn through_open_port(
    path: Option<&str>,
    profile: &Profile,
    timeout: std::time::Duration,
) -> Option<bool> {
    #[cfg(unix)]
    {
        use instrument::transport::open_ports;
        let path = path?.to_string();
        if !open_ports::is_open(&path) {
            return None;
        }
        let term = profile.transport.write_termination.clone();
        let mut bytes = term.clone().into_bytes();
        for c in &profile.session.safe_state {
            bytes.extend_from_slice(c.as_bytes());
            bytes.extend_from_slice(term.as_bytes());
        }
        let r = tokio::task::spawn_blocking(move || open_ports::write_all(&path, &bytes, timeout))
            .await;
        match r {
            Ok(Ok(true)) => Some(true),
            Ok(Ok(false)) => None,
            _ => Some(false),
        }
    }
    #[cfg(not(unix))]
    {
        let _ = (path, profile, timeout);
        None
    }
}
