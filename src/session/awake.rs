//! Keeping the computer awake while a run is live: a suspended or
//! hibernated bench PC stops the run's clock while the pack does not stop
//! (the engine detects a suspend that happened anyway and stops safely).
//!
//! On Linux the run asks logind for a sleep inhibitor lock through
//! `systemd-inhibit` (the well-kept tool of the init system, so no D-Bus
//! client is built in), held by a helper that ends when this process
//! does, however it ends. On macOS `caffeinate -i -w PID` does the same.
//! Elsewhere nothing is asked: the operator is told to switch sleep off.

use std::process::{Child, Command, Stdio};
use std::sync::{Arc, Mutex};

/// The inhibitor, released when dropped (and when the process dies).
pub struct StayAwake(Option<Arc<Mutex<Child>>>);

impl StayAwake {
    /// Ask the OS not to suspend. Returns the guard and, when nothing
    /// could be asked, a note for the operator.
    pub fn ask(why: &str) -> (StayAwake, Option<String>) {
        let pid = std::process::id();
        let cmd = if cfg!(target_os = "linux") {
            let mut c = Command::new("systemd-inhibit");
            c.args([
                "--what=sleep:idle:handle-lid-switch",
                "--who=packbench",
                &format!("--why={why}"),
                "--mode=block",
                "sh",
                "-c",
                &format!("while kill -0 {pid} 2>/dev/null; do sleep 2; done"),
            ]);
            Some(c)
        } else if cfg!(target_os = "macos") {
            let mut c = Command::new("caffeinate");
            c.args(["-i", "-w", &pid.to_string()]);
            Some(c)
        } else {
            None
        };
        let Some(mut cmd) = cmd else {
            return (
                StayAwake(None),
                Some("this system cannot be asked to stay awake: switch sleep and hibernation off for the run (a suspend is detected and stops the run)".into()),
            );
        };
        let spawned = cmd
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn();
        match spawned {
            Ok(child) => {
                // A helper that ends at once could not take the lock (no
                // logind, no permission): said from a watcher, so the run
                // does not wait for the answer.
                let child = Arc::new(Mutex::new(child));
                let watched = Arc::clone(&child);
                let _ = std::thread::Builder::new()
                    .name("stay-awake".into())
                    .spawn(move || {
                        for _ in 0..20 {
                            std::thread::sleep(std::time::Duration::from_millis(50));
                            let done = match watched.lock() {
                                Ok(mut c) => c.try_wait().ok().flatten(),
                                Err(_) => return,
                            };
                            if let Some(st) = done {
                                if !st.success() {
                                    eprintln!("note: could not ask the system to stay awake ({st}): switch sleep and hibernation off for the run (a suspend is detected and stops the run)");
                                }
                                return;
                            }
                        }
                    });
                (StayAwake(Some(child)), None)
            }
            Err(e) => (
                StayAwake(None),
                Some(format!(
                    "could not ask the system to stay awake ({e}): switch sleep and hibernation off for the run (a suspend is detected and stops the run)"
                )),
            ),
        }
    }

    /// Whether the OS was asked and the helper holds the lock.
    pub fn held(&self) -> bool {
        self.0.is_some()
    }
}

impl Drop for StayAwake {
    fn drop(&mut self) {
        if let Some(c) = self.0.as_ref() {
            if let Ok(mut c) = c.lock() {
                let _ = c.kill();
                let _ = c.wait();
            }
        }
    }
}
