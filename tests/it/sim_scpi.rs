//! The simulated instruments as SCPI endpoints, spoken to through the same
//! session layer and in-memory link the engine uses.

use engine::clock::{Clock, SimClock};
use instrument::scpi::{parse_error_entry, Session};
use packbench::session::request::default_sim_pack;
use sim::{self, SimConfig};
use std::sync::Arc;
use std::time::Duration;

fn sessions() -> (Session, Session, sim::SimHandle, Arc<SimClock>) {
    let clock = SimClock::new();
    let c: Arc<dyn Clock> = clock.clone();
    let links = sim::build(&default_sim_pack(), &SimConfig::ideal(), c);
    let t = Duration::from_millis(100);
    (
        Session::new("source", links.source, "\n", t),
        Session::new("load", links.load, "\n", t),
        links.handle,
        clock,
    )
}

async fn next_error(s: &mut Session) -> i32 {
    parse_error_entry(&s.query("SYST:ERR?").await.unwrap())
        .unwrap()
        .0
}

#[tokio::test]
async fn identify_and_common_commands() {
    let (mut src, mut load, _, _) = sessions();
    let idn = src.query("*IDN?").await.unwrap();
    assert_eq!(idn.split(',').count(), 4, "{idn}");
    assert!(load
        .query("*idn?")
        .await
        .unwrap()
        .contains("simulated-load"));
    assert_eq!(src.query("*OPC?").await.unwrap(), "1");
    assert_eq!(src.query("SYST:VERS?").await.unwrap(), "1999.0");
    assert_eq!(src.query("SYST:ERR?").await.unwrap(), "0,\"No error\"");
}

#[tokio::test]
async fn errors_go_to_the_queue_with_standard_numbers() {
    let (mut src, _, _, _) = sessions();
    src.write("VOLTA 12").await.unwrap();
    src.write("VOLT").await.unwrap();
    src.write("VOLT 1000").await.unwrap();
    src.write("OUTP ON,1").await.unwrap();
    src.write("*CLS 1").await.unwrap();
    assert_eq!(src.query("SYST:ERR:COUN?").await.unwrap(), "5");
    assert_eq!(next_error(&mut src).await, -113); // undefined header
    assert_eq!(next_error(&mut src).await, -109); // missing parameter
    assert_eq!(next_error(&mut src).await, -222); // data out of range
    assert_eq!(next_error(&mut src).await, -108); // parameter not allowed
    assert_eq!(next_error(&mut src).await, -108);
    assert_eq!(next_error(&mut src).await, 0);
    // Command error sets ESR bit 5, execution error bit 4; *ESR? clears.
    src.write("FOO").await.unwrap();
    src.write("VOLT -1").await.unwrap();
    assert_eq!(src.query("*ESR?").await.unwrap(), "48");
    assert_eq!(src.query("*ESR?").await.unwrap(), "0");
    // *CLS empties the queue.
    src.write("*CLS").await.unwrap();
    assert_eq!(next_error(&mut src).await, 0);
}

#[tokio::test]
async fn queue_overflow_replaces_the_newest_entry() {
    let (mut src, _, _, _) = sessions();
    for _ in 0..25 {
        src.write("BOGUS").await.unwrap();
    }
    let mut codes = Vec::new();
    loop {
        let c = next_error(&mut src).await;
        if c == 0 {
            break;
        }
        codes.push(c);
    }
    assert_eq!(codes.len(), sim::server::QUEUE_DEPTH);
    assert_eq!(*codes.last().unwrap(), -350);
    assert!(codes[..codes.len() - 1].iter().all(|&c| c == -113));
}

#[tokio::test]
async fn compound_messages_and_forms() {
    let (mut src, mut load, handle, clock) = sessions();
    src.write("SOUR:VOLT 41.5;CURR 2.5").await.unwrap();
    assert_eq!(
        src.query("VOLT?;CURR?").await.unwrap(),
        "+4.15000E+01;+2.50000E+00"
    );
    src.write("source:voltage:level:immediate:amplitude 40")
        .await
        .unwrap();
    assert_eq!(src.query_number("SOUR:VOLT?").await.unwrap(), 40.0);
    assert_eq!(src.query("VOLT? MAX").await.unwrap(), "+1.50000E+02");
    // MIN/MAX/DEF and unit suffixes on parameters.
    load.write("CURR 2800mA").await.unwrap();
    assert!((load.query_number("CURR?").await.unwrap() - 2.8).abs() < 1e-12);
    load.write("FUNC RESistance").await.unwrap();
    assert_eq!(load.query("FUNC?").await.unwrap(), "RES");
    load.write("FUNC CURR;:INP ON").await.unwrap();
    assert!(handle.load_input_on());
    clock.set(3600.0);
    // One hour at 2.8 A: the state of charge fell by 2.8 Ah of the true capacity.
    let soc = handle.pack_soc();
    let expected = 0.5 - 2.8 / handle.true_capacity_ah();
    assert!((soc - expected).abs() < 1e-9, "{soc} vs {expected}");
    let reply = load.query("MEAS:VOLT?;CURR?").await.unwrap();
    let parts: Vec<f64> = reply.split(';').map(|p| p.parse().unwrap()).collect();
    assert!((parts[1] - 2.8).abs() < 1e-12);
    // *RST switches the input off.
    load.write("*RST").await.unwrap();
    assert!(!handle.load_input_on());
    assert_eq!(load.query("INP?").await.unwrap(), "0");
    // The header path inside a compound message (SCPI fact sheet,
    // "Compound commands and the header path"): after `MEAS:VOLT?` the path
    // is `MEAS:`, so `;CURR?` is `MEAS:CURR?` and both are answered ...
    load.write("*CLS").await.unwrap();
    let both = load.query("MEAS:VOLT?;CURR?").await.unwrap();
    let parts: Vec<f64> = both.split(';').map(|x| x.parse().unwrap()).collect();
    assert_eq!(parts.len(), 2, "two answers in one reply: {both}");
    assert!(parts[0] > 1.0, "a voltage first: {both}");
    assert_eq!(next_error(&mut load).await, 0);
    // ... while `;MEAS:CURR?` is `MEAS:MEAS:CURR?`: the voltage is answered
    // and the second unit is -113, undefined header.
    let first = load.query("MEAS:VOLT?;MEAS:CURR?").await.unwrap();
    assert!(
        first.parse::<f64>().is_ok_and(|v| v > 1.0),
        "only the voltage is answered: {first}"
    );
    assert_eq!(next_error(&mut load).await, -113);
    assert_eq!(next_error(&mut load).await, 0);
    // A leading colon goes back to the root.
    let rooted = load.query("MEAS:VOLT?;:MEAS:CURR?").await.unwrap();
    assert_eq!(rooted.split(';').count(), 2, "{rooted}");
    assert_eq!(next_error(&mut load).await, 0);
}

#[tokio::test]
async fn a_silent_instrument_times_out_instead_of_answering_zero() {
    let clock = SimClock::new();
    let c: Arc<dyn Clock> = clock.clone();
    let mut cfg = SimConfig::ideal();
    cfg.faults.link.push("load:no-reply@10s".parse().unwrap());
    let links = sim::build(&default_sim_pack(), &cfg, c);
    let mut load = Session::new("load", links.load, "\n", Duration::from_millis(50));
    assert!(load.query_number("MEAS:VOLT?").await.is_ok());
    clock.set(11.0);
    let e = load.query_number("MEAS:VOLT?").await.unwrap_err();
    assert_eq!(e.kind, instrument::ErrorKind::Timeout);
}

/// Answers its first query 250 ms late, every other at once.
struct LateOnce {
    n: usize,
}

impl instrument::link::LineResponder for LateOnce {
    fn respond(&mut self, line: &str) -> Result<instrument::link::Response, std::io::Error> {
        use instrument::link::Response;
        self.n += 1;
        let reply = match line {
            "*OPC?" => "1".to_string(),
            "*IDN?" => "packbench-test,late-once,0,1".to_string(),
            other => format!("reply to {other}"),
        };
        Ok(if self.n == 1 {
            Response::Late(reply, Duration::from_millis(250))
        } else {
            Response::Reply(reply)
        })
    }
}

#[tokio::test]
async fn a_late_reply_is_never_taken_for_the_next_query() {
    use instrument::link::{InMemoryLink, LineResponder};
    use std::sync::Mutex;
    let r: Arc<Mutex<dyn LineResponder>> = Arc::new(Mutex::new(LateOnce { n: 0 }));
    let mut s = Session::new(
        "x",
        Box::new(InMemoryLink::new(r)),
        "\n",
        Duration::from_millis(200),
    );
    let e = s.query("MEAS:VOLT?").await.unwrap_err();
    assert_eq!(e.kind, instrument::ErrorKind::Timeout);
    // The late "reply to MEAS:VOLT?" arrives during resynchronisation and
    // is skipped; the next query gets its own answer.
    s.resync().await.unwrap();
    assert_eq!(
        s.query("*IDN?").await.unwrap(),
        "packbench-test,late-once,0,1"
    );
    assert_eq!(s.query("MEAS:CURR?").await.unwrap(), "reply to MEAS:CURR?");
}

/// Answers every query at once with a CR-terminated reply (an instrument
/// set to end its responses with CR).
struct CrEcho;

impl instrument::link::LineResponder for CrEcho {
    fn respond(&mut self, line: &str) -> Result<instrument::link::Response, std::io::Error> {
        Ok(instrument::link::Response::Reply(format!("{line}-ok\r")))
    }
}

#[tokio::test]
async fn framing_follows_the_profile_terminator_and_delay() {
    use instrument::link::{InMemoryLink, LineResponder};
    use instrument::scpi::Framing;
    use std::sync::Mutex;
    let r: Arc<Mutex<dyn LineResponder>> = Arc::new(Mutex::new(CrEcho));
    // The in-memory link ends replies with LF after the instrument's CR
    // (a CR LF terminator); a session reading up to CR drops the LF left
    // over at the start of the next reply.
    let framing = Framing {
        write_term: "\n".into(),
        read_term: b'\r',
        timeout: Duration::from_millis(200),
        delay: Duration::from_millis(40),
    };
    let mut s = Session::with_framing("x", Box::new(InMemoryLink::new(r)), framing);
    let t0 = std::time::Instant::now();
    assert_eq!(s.query("A?").await.unwrap(), "A?-ok");
    assert_eq!(s.query("B?").await.unwrap(), "B?-ok");
    // The second exchange waited out the inter-command delay.
    assert!(
        t0.elapsed() >= Duration::from_millis(40),
        "{:?}",
        t0.elapsed()
    );
}
