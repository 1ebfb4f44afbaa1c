//! Serial ports as a normal user: packbench opens a port exclusively
//! (TIOCEXCL and an exclusive flock), so a second controller is refused as
//! busy; its own reopen after a lost link closes the old port first, and
//! the second Ctrl-C's last-resort switch-off writes through the port a
//! stuck session still holds instead of opening it again.
//!
//! CI runs as root, which TIOCEXCL does not stop. The outer test therefore
//! runs the inner one again as user `nobody` with `setpriv` (util-linux),
//! from a copy of this test binary in a world-readable folder. Not root:
//! the inner test runs as the present (normal) user directly.

use instrument::link::Link;
use instrument::profile::{Profile, ProfileRole};
use instrument::scpi::{Reopen, Session};
use instrument::transport::{self, LinkSpec};
use std::io::{Read, Write};
use std::os::unix::fs::PermissionsExt;
use std::sync::{mpsc, Arc};
use std::time::Duration;

const INNER: &str = "PACKBENCH_SERIAL_USER_INNER";

/// A pseudo-terminal with a line responder on its master side: replies to
/// queries, every line received sent to `lines`.
fn responder() -> (std::path::PathBuf, std::fs::File, mpsc::Receiver<String>) {
    use nix::sys::termios::{cfmakeraw, tcgetattr, tcsetattr, SetArg};
    let pty = nix::pty::openpty(None, None).unwrap();
    let mut t = tcgetattr(&pty.slave).unwrap();
    cfmakeraw(&mut t);
    tcsetattr(&pty.slave, SetArg::TCSANOW, &t).unwrap();
    let path = nix::unistd::ttyname(&pty.slave).unwrap();
    let slave = std::fs::File::from(pty.slave);
    let mut master = std::fs::File::from(pty.master);
    let (tx, rx) = mpsc::channel();
    let mut writer = master.try_clone().unwrap();
    std::thread::spawn(move || {
        let mut pending = Vec::new();
        let mut buf = [0u8; 256];
        while let Ok(n) = master.read(&mut buf) {
            if n == 0 {
                break;
            }
            pending.extend_from_slice(&buf[..n]);
            while let Some(i) = pending.iter().position(|&b| b == b'\n') {
                let line: Vec<u8> = pending.drain(..=i).collect();
                let line = String::from_utf8_lossy(&line).trim().to_string();
                let reply = match line.as_str() {
                    "*IDN?" => Some("packbench-test,pty-responder,0,1"),
                    "SYST:ERR?" => Some("0,\"No error\""),
                    "INP?" => Some("0"),
                    _ => None,
                };
                if let Some(r) = reply {
                    let _ = writer.write_all(format!("{r}\n").as_bytes());
                }
                let _ = tx.send(line);
            }
        }
    });
    (path, slave, rx)
}

fn spec(path: &std::path::Path) -> LinkSpec {
    format!(
        "serial:{}?baud=115200&parity=none&flow=none",
        path.display()
    )
    .parse()
    .unwrap()
}

async fn open(spec: &LinkSpec) -> Result<Link, instrument::InstrumentError> {
    transport::open("load", spec, Duration::from_millis(500)).await
}

fn got(rx: &mpsc::Receiver<String>, want: &str) -> bool {
    let deadline = std::time::Instant::now() + Duration::from_secs(3);
    while let Some(left) = deadline.checked_duration_since(std::time::Instant::now()) {
        match rx.recv_timeout(left) {
            Ok(l) if l == want => return true,
            Ok(_) => continue,
            Err(_) => return false,
        }
    }
    false
}

/// The checks, as whoever runs them.
fn reopen_and_last_resort_switch_off() {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let (path, _slave, rx) = responder();
        let spec = spec(&path);
        let profile = Profile::builtin(ProfileRole::Load);
        let link = open(&spec).await.unwrap();
        // Exclusive: a second controller on the same port is refused.
        let second = open(&spec).await.map(|_| ()).unwrap_err();
        assert!(
            second
                .message
                .contains("another program or another packbench"),
            "{second}"
        );
        let mut session = Session::with_framing("load", link, profile.framing());
        let again = spec.clone();
        let reopen: Reopen = Arc::new(move || {
            let s = again.clone();
            Box::pin(async move { open(&s).await })
        });
        session.set_reopen(Some(Arc::clone(&reopen)));
        assert!(session
            .query("*IDN?")
            .await
            .unwrap()
            .contains("pty-responder"));
        // A lost link is opened again on the same device: the old port
        // must be closed first.
        session
            .reopen()
            .await
            .unwrap_or_else(|e| panic!("reopen: {e}"));
        assert!(session
            .query("*IDN?")
            .await
            .unwrap()
            .contains("pty-responder"));
        // The second Ctrl-C with the session still holding the port.
        let em = packbench::session::emergency::Emergency::default();
        em.register(
            "bay-1 load".into(),
            reopen,
            profile,
            Some(path.display().to_string()),
        );
        let sent = em.all_off(Duration::from_millis(500)).await;
        assert_eq!(sent, vec![("bay-1 load".to_string(), true)]);
        assert!(got(&rx, "INP OFF"), "the load never got its switch-off");
        drop(session);
        // Once closed, the port is free for the next controller.
        open(&spec).await.unwrap();
    });
}

/// Run by the outer test only (as `nobody`).
#[test]
#[ignore = "run by serial_ports_reopen_and_switch_off_as_a_normal_user"]
fn inner_serial_checks() {
    if std::env::var_os(INNER).is_some() {
        reopen_and_last_resort_switch_off();
    }
}

#[test]
fn serial_ports_reopen_and_switch_off_as_a_normal_user() {
    // SAFETY: geteuid has no preconditions and cannot fail.
    if unsafe { libc::geteuid() } != 0 {
        // Already a normal user: TIOCEXCL applies as it is.
        reopen_and_last_resort_switch_off();
        return;
    }
    // A world-readable copy of this binary: the checkout may sit in a
    // folder `nobody` cannot enter.
    let dir = tempfile::tempdir().unwrap();
    std::fs::set_permissions(dir.path(), std::fs::Permissions::from_mode(0o755)).unwrap();
    let exe = dir.path().join("it");
    std::fs::copy(std::env::current_exe().unwrap(), &exe).unwrap();
    std::fs::set_permissions(&exe, std::fs::Permissions::from_mode(0o755)).unwrap();
    let out = std::process::Command::new("setpriv")
        .args([
            "--reuid=65534",
            "--regid=65534",
            "--clear-groups",
            "--inh-caps=-all",
        ])
        .arg(&exe)
        .args([
            "--exact",
            "serial_user::inner_serial_checks",
            "--ignored",
            "--test-threads=1",
        ])
        .env(INNER, "1")
        .current_dir(dir.path())
        .output()
        .expect("setpriv (util-linux) runs");
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(out.status.success(), "as nobody:\n{text}");
    assert!(
        text.contains("1 passed"),
        "the inner test did not run:\n{text}"
    );
}
