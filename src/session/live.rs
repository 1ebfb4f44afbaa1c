//! Live status of running stations: a sink wrapper keeps a small board per
//! station up to date from the samples and events the engine sends, and a
//! display draws the boards (redrawn in place on a terminal, plain lines
//! otherwise).
//!
//! How the estimates are made (shown to the operator as estimates):
//! - **State of charge**: a coulomb count from the last anchor: the end of
//!   a charge on its taper or its −ΔV (100 %) or the end of a discharge at
//!   its cutoff (0 %), against the capacity measured from full to cutoff in
//!   this run once known, else the rated capacity. Unknown until the run
//!   has passed an anchor.
//! - **Time to the step's end**: the smallest of the estimates its end
//!   conditions allow: what is left of a time limit; what is left of a
//!   charge or energy limit at the present current or power; a discharge
//!   to a cutoff: the state of charge left at the present current; a charge
//!   still at constant current: the charge missing to full at the present
//!   current (a lower bound: the taper comes after it). Where the state of
//!   charge is not known yet (a discharge to empty at the run's start, a
//!   run resumed), the dry run's charge for the step (the same plan played
//!   on the simulated pack, computed off the control path once the run is
//!   paced) less the charge the step has counted, at the present current;
//!   a charge in its taper: the dry run's time for the step less the time
//!   it has run. Nothing is shown when no estimate applies (a rest to
//!   settle, no dry run).
//! - **After the outputs are confirmed off** the tile reads zero current
//!   and power; **after a resume** inside a step that goes on, the step's
//!   kind, elapsed time and counted charge continue from the log.

use analysis::integrate::Integrator;
use model::procedure::{EndCondition, Plan, StepKind, StepType};
use model::sample::Sample;
use model::status::RunStatus;
use model::units::HumanDuration;
use record::event::{EndKind, Event, Sink};
use std::sync::{Arc, Mutex, OnceLock};

/// What the display shows of one station.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Live {
    pub station: String,
    pub pack_id: String,
    pub state: BoardState,
    pub step: u32,
    pub steps: u32,
    pub phase: String,
    /// The step's kind, once a step has started.
    pub kind: Option<StepType>,
    pub run_t_s: f64,
    pub step_elapsed_s: f64,
    pub voltage_v: f64,
    pub current_a: f64,
    pub power_w: f64,
    pub temperature_c: Option<f64>,
    pub step_ah: f64,
    pub step_wh: f64,
    /// Estimated state of charge, 0..1.
    pub soc: Option<f64>,
    /// Estimated time to the step's end, s, and whether it is a lower bound.
    pub eta_s: Option<(f64, bool)>,
    pub alarms: Vec<String>,
    pub samples: u64,
    /// A station that reads groups: the lowest and the highest group now
    /// (group number, volts).
    pub group_low: Option<(u32, f64)>,
    pub group_high: Option<(u32, f64)>,
}

impl Live {
    /// Whether the station's run has ended.
    pub fn is_final(&self) -> bool {
        self.state.is_final()
    }

    /// One status line.
    pub fn line(&self) -> String {
        let mut s = format!(
            "{:<10} {:<8} {:<11} step {}/{} {:<10} {:>8.3} V {:>8.3} A {:>8.1} W  step {:>7.3} Ah {:>7.1} Wh",
            self.station,
            self.pack_id,
            self.state.name(),
            self.step,
            self.steps,
            self.kind.map_or("", |k| k.name()),
            self.voltage_v,
            self.current_a,
            self.power_w,
            self.step_ah,
            self.step_wh,
        );
        match self.soc {
            Some(x) => s.push_str(&format!("  SOC ~{:.0}%", x * 100.0)),
            None => s.push_str("  SOC ?"),
        }
        if let Some((eta, lower)) = self.eta_s {
            s.push_str(&format!(
                "  ends in {}{}",
                if lower { ">" } else { "~" },
                HumanDuration(eta.max(0.0).round())
            ));
        }
        s.push_str(&format!(
            "  run {}",
            HumanDuration(self.run_t_s.max(0.0).round())
        ));
        if let Some(t) = self.temperature_c {
            s.push_str(&format!("  {t:.1} degC"));
        }
        if let (Some((gl, vl)), Some((gh, vh))) = (self.group_low, self.group_high) {
            s.push_str(&format!(
                "  groups: low #{gl} {vl:.3} V, high #{gh} {vh:.3} V"
            ));
        }
        if let Some(a) = self.alarms.last() {
            s.push_str(&format!("  ALARM: {a}"));
        }
        s
    }
}

/// Where a station's run is, as its board shows it.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub enum BoardState {
    /// Validated, links not yet open.
    #[default]
    Starting,
    Running,
    Completed,
    Aborted,
    Interrupted,
    /// It never ran: the links could not be opened or the record failed.
    Failed,
}

impl BoardState {
    pub fn name(&self) -> &'static str {
        match self {
            BoardState::Starting => "starting",
            BoardState::Running => "running",
            BoardState::Completed => "completed",
            BoardState::Aborted => "aborted",
            BoardState::Interrupted => "interrupted",
            BoardState::Failed => "failed",
        }
    }

    /// The station's run has ended.
    pub fn is_final(&self) -> bool {
        matches!(
            self,
            BoardState::Completed
                | BoardState::Aborted
                | BoardState::Interrupted
                | BoardState::Failed
        )
    }
}

impl From<RunStatus> for BoardState {
    fn from(s: RunStatus) -> BoardState {
        match s {
            RunStatus::Running | RunStatus::Imported => BoardState::Running,
            RunStatus::Completed => BoardState::Completed,
            RunStatus::Aborted => BoardState::Aborted,
            RunStatus::Interrupted => BoardState::Interrupted,
        }
    }
}

/// A station's board, shared between its run and the display.
#[derive(Debug, Clone, Default)]
pub struct Board(pub Arc<Mutex<Live>>);

impl Board {
    pub fn new(station: &str, pack_id: &str) -> Board {
        Board(Arc::new(Mutex::new(Live {
            station: station.to_string(),
            pack_id: pack_id.to_string(),
            state: BoardState::Starting,
            ..Live::default()
        })))
    }

    /// A copy of the board now.
    pub fn get(&self) -> Live {
        match self.0.lock() {
            Ok(g) => g.clone(),
            Err(p) => p.into_inner().clone(),
        }
    }

    pub fn update(&self, f: impl FnOnce(&mut Live)) {
        let mut g = match self.0.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        f(&mut g);
    }
}

/// Where the state of charge was last known.
#[derive(Debug, Clone, Copy)]
struct Anchor {
    soc: f64,
    net_ah: f64,
}

/// What the dry run expects of one step.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Expected {
    pub step: u32,
    pub duration_s: f64,
    /// Net charge, Ah (positive into the pack).
    pub ah: f64,
}

/// The dry run's steps, filled in by a thread of its own once ready (see
/// `drive`) and read without waiting (the estimator is on the control
/// path). Empty until then, or if it never comes: the tile shows the
/// estimates the end conditions give without it.
#[derive(Debug, Clone, Default)]
pub struct ForecastCell(Arc<OnceLock<Vec<Expected>>>);

impl ForecastCell {
    /// Fill it (once; later calls change nothing).
    pub fn set(&self, steps: Vec<Expected>) {
        let _ = self.0.set(steps);
    }

    /// A forecast already made.
    pub fn ready(steps: Vec<Expected>) -> ForecastCell {
        let cell = ForecastCell::default();
        cell.set(steps);
        cell
    }

    fn step(&self, step: u32) -> Option<&Expected> {
        self.0.get()?.iter().find(|s| s.step == step)
    }
}

/// The live estimator, fed the same samples and events as the log.
#[derive(Debug, Clone)]
pub struct Estimator<'a> {
    plan: &'a Plan,
    step: Integrator,
    run: Integrator,
    step_t0: f64,
    step_index: u32,
    anchor: Option<Anchor>,
    capacity_ah: f64,
    forecast: Option<ForecastCell>,
}

impl<'a> Estimator<'a> {
    pub fn new(plan: &'a Plan) -> Estimator<'a> {
        Estimator {
            plan,
            step: Integrator::default(),
            run: Integrator::default(),
            step_t0: 0.0,
            step_index: 0,
            anchor: None,
            capacity_ah: plan.pack.rated_capacity_ah,
            forecast: None,
        }
    }

    /// Estimate with the dry run's steps where the state of charge is not
    /// known.
    pub fn with_forecast(mut self, f: Option<ForecastCell>) -> Estimator<'a> {
        self.forecast = f;
        self
    }

    /// A resumed run: a step that goes on keeps its elapsed time and
    /// counts from the log (nothing integrated across the break).
    pub fn resuming(mut self, r: Option<&engine::ResumePoint>) -> Estimator<'a> {
        let Some(r) = r else { return self };
        let (Some(st), Some(c)) = (self.plan.steps.get(r.position), r.carried) else {
            return self;
        };
        self.step_index = st.index;
        self.step = c.counters;
        self.step.break_segment();
        self.step_t0 = r.t_run_s - c.elapsed_s;
        self
    }

    /// Time to the end of a step from the dry run's charge for it, at the
    /// present current, s.
    fn forecast_left(&self, step: u32, i: f64) -> Option<f64> {
        let f = self.forecast.as_ref()?.step(step)?;
        (f.ah.abs() > 0.0 && i > 1e-6).then(|| (f.ah.abs() - self.step.ah.abs()) / i * 3600.0)
    }

    /// A plan step by its number (steps are numbered by position from 1).
    fn step_of(&self, index: u32) -> Option<&'a model::procedure::PlanStep> {
        let plan: &'a Plan = self.plan;
        plan.steps
            .get((index as usize).checked_sub(1)?)
            .filter(|p| p.index == index)
    }

    pub fn soc(&self) -> Option<f64> {
        self.anchor.map(|a| {
            (a.soc + (self.run.ah - a.net_ah) / self.capacity_ah.max(1e-9)).clamp(0.0, 1.2)
        })
    }

    pub fn sample(&mut self, s: &Sample, live: &mut Live) {
        if s.step != self.step_index {
            self.step_index = s.step;
            self.step = Integrator::default();
            self.step_t0 = s.t_s;
        }
        self.step.push(s.t_s, s.voltage_v, s.current_a);
        self.run.push(s.t_s, s.voltage_v, s.current_a);
        live.state = BoardState::Running;
        live.step = s.step;
        live.run_t_s = s.t_s;
        live.step_elapsed_s = s.t_s - self.step_t0;
        live.voltage_v = s.voltage_v;
        live.current_a = s.current_a;
        live.power_w = s.voltage_v * s.current_a;
        live.temperature_c = s.temperature_c;
        live.step_ah = self.step.ah;
        live.step_wh = self.step.wh;
        live.soc = self.soc();
        live.eta_s = self.eta(s, live.step_elapsed_s);
        live.samples += 1;
    }

    /// Time to the step's end, s (and whether a lower bound).
    pub fn eta(&self, s: &Sample, elapsed: f64) -> Option<(f64, bool)> {
        let st = self.step_of(s.step)?;
        let i = s.current_a.abs();
        let p = (s.voltage_v * s.current_a).abs();
        let soc = self.soc();
        let mut best: Option<(f64, bool)> = None;
        let mut offer = |x: f64, lower: bool| {
            if x.is_finite() && x >= 0.0 && best.is_none_or(|(b, _)| x < b) {
                best = Some((x, lower));
            }
        };
        if let Some(d) = st.pulse_duration_s() {
            offer(d - elapsed, false);
        }
        for c in &st.ends {
            match *c {
                EndCondition::Time { seconds } => offer(seconds - elapsed, false),
                EndCondition::Charge { ah } if i > 1e-6 => {
                    offer((ah - self.step.ah.abs()) / i * 3600.0, false)
                }
                // (The measured share is near the rated share: the
                // estimate takes the rated one.)
                EndCondition::ChargeOfMeasured { rated_ah, .. } if i > 1e-6 => {
                    offer((rated_ah - self.step.ah.abs()) / i * 3600.0, true)
                }
                EndCondition::Energy { wh } if p > 1e-6 => {
                    offer((wh - self.step.wh.abs()) / p * 3600.0, false)
                }
                EndCondition::VoltageBelow { .. } if s.current_a < -1e-6 => match soc {
                    Some(x) => offer(x * self.capacity_ah / i * 3600.0, false),
                    None => {
                        if let Some(x) = self.forecast_left(s.step, i) {
                            offer(x, false);
                        }
                    }
                },
                EndCondition::CurrentBelow { .. } | EndCondition::PeakDrop { .. } => {
                    if let StepKind::Charge { voltage_v, .. } = &st.kind {
                        // Constant current still: the missing charge at
                        // this current; the taper comes after.
                        let taper = s.voltage_v >= 0.98 * voltage_v;
                        if taper {
                            // In its taper: what the dry run's step took,
                            // less what this one has run.
                            if let Some(f) = self.forecast.as_ref().and_then(|f| f.step(s.step)) {
                                offer(f.duration_s - elapsed, false);
                            }
                        } else if s.current_a > 1e-6 {
                            match soc {
                                Some(x) => {
                                    offer((1.0 - x).max(0.0) * self.capacity_ah / i * 3600.0, true)
                                }
                                None => {
                                    if let Some(x) = self.forecast_left(s.step, i) {
                                        offer(x, true);
                                    }
                                }
                            }
                        }
                    }
                }
                _ => {}
            }
        }
        best
    }

    pub fn event(&mut self, e: &Event, live: &mut Live) {
        match e {
            Event::RunStart { steps, .. } => {
                live.steps = *steps;
                live.state = BoardState::Running;
            }
            Event::Resumed { step, .. } => {
                live.steps = self.plan.steps.len() as u32;
                live.step = *step;
                live.state = BoardState::Running;
                // The step's kind is the plan's (a step that goes on has no
                // start event of its own); its counts go on from the log.
                live.kind = self.step_of(*step).map(|p| p.kind.step_type());
                if self.step_index == *step {
                    live.step_ah = self.step.ah;
                    live.step_wh = self.step.wh;
                }
                // Nothing is integrated across the interruption.
                self.run.break_segment();
                self.step.break_segment();
            }
            Event::OutputsOff {
                source_off_confirmed: true,
                load_off_confirmed: true,
                ..
            } => {
                // Confirmed off: nothing flows, whatever the last sample
                // read.
                live.current_a = 0.0;
                live.power_w = 0.0;
                live.eta_s = None;
            }
            Event::StepStart {
                step, phase, kind, ..
            } => {
                live.step = *step;
                live.phase = phase.clone();
                live.kind = Some(*kind);
                live.step_ah = 0.0;
                live.step_wh = 0.0;
                live.eta_s = None;
                if live.steps == 0 {
                    live.steps = self.plan.steps.len() as u32;
                }
            }
            Event::StepEnd { step, end_kind, .. } => {
                let kind = self.step_of(*step).map(|p| &p.kind);
                match (kind, end_kind) {
                    (Some(StepKind::Charge { .. }), EndKind::CurrentBelow | EndKind::PeakDrop) => {
                        self.anchor = Some(Anchor {
                            soc: 1.0,
                            net_ah: self.run.ah,
                        })
                    }
                    (Some(StepKind::Discharge { .. }), k) if k.is_cutoff() => {
                        if let Some(a) = self.anchor.filter(|a| a.soc == 1.0) {
                            let q = a.net_ah - self.run.ah;
                            if q > 0.0 {
                                self.capacity_ah = q;
                            }
                        }
                        self.anchor = Some(Anchor {
                            soc: 0.0,
                            net_ah: self.run.ah,
                        });
                    }
                    _ => {}
                }
                live.soc = self.soc();
            }
            Event::Breach { message, .. } => live.alarms.push(format!("safety stop: {message}")),
            Event::InstrumentError { kind, message, .. } if !kind.ends_with("_retry") => {
                live.alarms.push(format!("instrument: {message}"))
            }
            Event::Alarm { message, .. } | Event::Warning { message, .. } => {
                live.alarms.push(message.clone())
            }
            Event::RunEnd { status, .. } => {
                live.state = BoardState::from(*status);
                live.eta_s = None;
            }
            _ => {}
        }
    }
}

/// A sink that keeps a board up to date and passes everything on.
pub struct LiveSink<'a> {
    pub inner: &'a mut dyn Sink,
    pub board: Board,
    pub est: Estimator<'a>,
}

impl Sink for LiveSink<'_> {
    fn sample(&mut self, s: &Sample) -> std::io::Result<()> {
        self.inner.sample(s)?;
        let est = &mut self.est;
        self.board.update(|l| est.sample(s, l));
        Ok(())
    }
    fn event(&mut self, e: &Event) -> std::io::Result<()> {
        self.inner.event(e)?;
        let est = &mut self.est;
        self.board.update(|l| est.event(e, l));
        Ok(())
    }
    fn groups(&mut self, g: &model::groups::GroupSample) -> std::io::Result<()> {
        self.inner.groups(g)?;
        if let Some((lo, hi)) = g.extremes() {
            self.board.update(|l| {
                l.group_low = Some(lo);
                l.group_high = Some(hi);
            });
        }
        Ok(())
    }
}

/// How the status is shown.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum DisplayMode {
    /// Redrawn in place (a terminal).
    Terminal,
    /// A plain line per station at this wall-clock interval, s.
    Lines(f64),
    /// Nothing.
    Quiet,
}

/// Draw the boards until every station's run has ended.
pub async fn display(boards: Vec<Board>, mode: DisplayMode) {
    match mode {
        DisplayMode::Quiet => {}
        DisplayMode::Terminal => {
            let multi = indicatif::MultiProgress::with_draw_target(
                indicatif::ProgressDrawTarget::stderr_with_hz(4),
            );
            let style = indicatif::ProgressStyle::with_template("{msg}")
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_spinner());
            let bars: Vec<indicatif::ProgressBar> = boards
                .iter()
                .map(|_| {
                    let b = multi.add(indicatif::ProgressBar::new_spinner());
                    b.set_style(style.clone());
                    b
                })
                .collect();
            loop {
                let mut all_done = true;
                for (b, board) in bars.iter().zip(&boards) {
                    let l = board.get();
                    all_done &= l.is_final();
                    b.set_message(l.line());
                }
                if all_done {
                    for b in &bars {
                        b.finish();
                    }
                    break;
                }
                tokio::time::sleep(std::time::Duration::from_millis(250)).await;
            }
        }
        DisplayMode::Lines(every) => {
            let every = std::time::Duration::from_secs_f64(every.max(0.1));
            let poll = std::time::Duration::from_millis(100).min(every);
            let mut last = std::time::Instant::now();
            loop {
                tokio::time::sleep(poll).await;
                let due = last.elapsed() >= every;
                if due {
                    last = std::time::Instant::now();
                }
                let mut all_done = true;
                for board in &boards {
                    let l = board.get();
                    all_done &= l.is_final();
                    if due && !l.is_final() {
                        eprintln!("{}", l.line());
                    }
                }
                if all_done {
                    break;
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use model::pack::{Chemistry, PackSpec};
    use model::procedure::validate::plan_from_text;
    use std::path::Path;

    fn plan() -> Plan {
        let pack = PackSpec {
            chemistry: Chemistry::LiIon,
            series: 10,
            rated_capacity_ah: 10.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
        let text = r#"
title = "t"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.8V/cell"
current_max = "1C"
temperature_max = "55degC"
[[phase]]
name = "p"
  [[phase.step]]
  kind = "charge"
  current = "0.5C"
  voltage = "4.2V/cell"
  ends = ["current < 0.05C", "time > 5h"]
  [[phase.step]]
  kind = "discharge"
  current = "0.2C"
  ends = ["voltage < 3.0V/cell", "time > 7h"]
"#;
        plan_from_text(Path::new("t.toml"), text, &pack).expect("plan")
    }

    fn s(t: f64, step: u32, v: f64, i: f64) -> Sample {
        Sample {
            t_s: t,
            step,
            cycle: 1,
            voltage_v: v,
            current_a: i,
            temperature_c: None,
        }
    }

    #[test]
    fn soc_and_time_left_follow_the_coulomb_count() {
        let p = plan();
        let mut e = Estimator::new(&p);
        let mut l = Live::default();
        // Charge: no anchor yet, so no SOC; the time limit gives an estimate.
        e.sample(&s(0.0, 1, 40.0, 5.0), &mut l);
        assert_eq!(l.soc, None);
        assert_eq!(l.eta_s, Some((5.0 * 3600.0, false)));
        e.sample(&s(3600.0, 1, 42.0, 0.4), &mut l);
        e.event(
            &Event::StepEnd {
                t_s: 3600.0,
                step: 1,
                end_kind: EndKind::CurrentBelow,
                end_reason: String::new(),
            },
            &mut l,
        );
        assert_eq!(l.soc, Some(1.0));
        // 2 A discharge for 1 h from full: 8 Ah of 10 left, 4 h to go.
        e.sample(&s(3601.0, 2, 39.0, -2.0), &mut l);
        e.sample(&s(7201.0, 2, 37.0, -2.0), &mut l);
        let soc = l.soc.expect("soc");
        assert!((soc - 0.8).abs() < 1e-3, "{soc}");
        let (eta, lower) = l.eta_s.expect("eta");
        assert!(!lower);
        assert!((eta - 4.0 * 3600.0).abs() < 10.0, "{eta}");
        assert!(l.line().contains("SOC ~80%"), "{}", l.line());
    }

    /// A discharge to the cutoff with no state of charge known yet (the
    /// run's first step): the dry run's charge for the step less what the
    /// step has counted, at the present current, not the time cap.
    #[test]
    fn a_discharge_from_an_unknown_state_takes_the_dry_runs_charge() {
        let p = plan();
        let forecast = vec![Expected {
            step: 2,
            duration_s: 5.0 * 3600.0,
            ah: -10.0,
        }];
        let mut e = Estimator::new(&p).with_forecast(Some(ForecastCell::ready(forecast)));
        let mut l = Live::default();
        e.sample(&s(0.0, 2, 39.0, -2.0), &mut l);
        assert_eq!(l.soc, None);
        assert_eq!(l.eta_s, Some((5.0 * 3600.0, false)));
        // 1 h at 2 A: 2 Ah counted, 8 Ah left at 2 A: 4 h (the cap: 6 h).
        e.sample(&s(3600.0, 2, 37.0, -2.0), &mut l);
        let (eta, lower) = l.eta_s.expect("eta");
        assert!((eta - 4.0 * 3600.0).abs() < 1e-6, "{eta}");
        assert!(!lower);
        // Without the dry run: only the time cap.
        let mut e = Estimator::new(&p);
        e.sample(&s(0.0, 2, 39.0, -2.0), &mut l);
        e.sample(&s(3600.0, 2, 37.0, -2.0), &mut l);
        assert_eq!(l.eta_s, Some((6.0 * 3600.0, false)));
    }

    /// Outputs confirmed off: the tile reads zero, whatever the last
    /// sample read; not when one could not be confirmed.
    #[test]
    fn outputs_confirmed_off_read_zero() {
        let p = plan();
        let mut e = Estimator::new(&p);
        let mut l = Live::default();
        e.sample(&s(10.0, 2, 38.0, -1.998), &mut l);
        let off = |source: bool, load: bool| Event::OutputsOff {
            t_s: 11.0,
            reason: "stop".into(),
            source_off_confirmed: source,
            load_off_confirmed: load,
        };
        e.event(&off(true, false), &mut l);
        assert_eq!(l.current_a, -1.998);
        e.event(&off(true, true), &mut l);
        assert_eq!((l.current_a, l.power_w, l.eta_s), (0.0, 0.0, None));
        assert_eq!(l.voltage_v, 38.0, "the pack's voltage is still read");
    }

    /// A resumed discharge goes on: its kind, its counted charge and its
    /// elapsed time continue (nothing integrated across the break).
    #[test]
    fn a_resumed_step_continues_its_counts_and_kind() {
        let p = plan();
        let mut counters = Integrator::default();
        counters.push(0.0, 38.0, -2.0);
        counters.push(2349.0, 38.0, -2.0);
        let point = engine::ResumePoint {
            position: 1,
            t_run_s: 6000.0,
            last_sample_t_s: 5990.0,
            gap_s: 10.0,
            carried: Some(engine::Carried {
                elapsed_s: 2349.0,
                counters,
            }),
        };
        let mut e = Estimator::new(&p).resuming(Some(&point));
        let mut l = Live::default();
        e.event(
            &Event::Resumed {
                t_s: 6000.0,
                step: 2,
                last_sample_t_s: 5990.0,
                gap_s: 10.0,
                rule: String::new(),
            },
            &mut l,
        );
        assert_eq!(l.kind, Some(StepType::Discharge));
        assert!((l.step_ah + 1.305).abs() < 1e-12, "{}", l.step_ah);
        e.sample(&s(6000.0, 2, 37.9, -2.0), &mut l);
        assert!((l.step_ah + 1.305).abs() < 1e-12, "{}", l.step_ah);
        e.sample(&s(6036.0, 2, 37.9, -2.0), &mut l);
        assert!((l.step_ah + 1.325).abs() < 1e-12, "{}", l.step_ah);
        assert_eq!(l.step_elapsed_s, 2385.0);
        // The 7 h cap less the 2385 s the step has run.
        assert_eq!(l.eta_s, Some((7.0 * 3600.0 - 2385.0, false)));
    }

    /// A charge in its taper: the dry run's time for the step less the
    /// time it has run (not the 5 h cap).
    #[test]
    fn a_taper_takes_the_dry_runs_time() {
        let p = plan();
        let forecast = vec![Expected {
            step: 1,
            duration_s: 3.0 * 3600.0,
            ah: 8.0,
        }];
        let mut e = Estimator::new(&p).with_forecast(Some(ForecastCell::ready(forecast)));
        let mut l = Live::default();
        e.sample(&s(0.0, 1, 40.0, 5.0), &mut l);
        e.sample(&s(7200.0, 1, 42.0, 1.0), &mut l);
        assert_eq!(l.eta_s, Some((3600.0, false)));
    }
}
