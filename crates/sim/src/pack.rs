//! The simulated pack as the bench sees it: one lumped cell-equivalent
//! times the series count, or a string of parallel groups, each with its
//! own state of charge, polarisation, temperature, capacity, resistance
//! and self-discharge. The terminal voltage is the sum of the groups'.

use super::battery::{load_current_of, supply_current_by, LoadMode, PackCondition, PackModel};
use model::groups::Wiring;
use model::pack::PackSpec;
use model::simconfig::GroupsConfig;
use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use rand_distr::StandardNormal;

/// One group's kept state.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct GroupState {
    pub soc: f64,
    pub v1: f64,
    pub v2: f64,
    pub temperature_c: f64,
}

#[derive(Debug, Clone)]
pub struct SimPack {
    /// One model per group (series 1 each), or one lumped model.
    pub cells: Vec<PackModel>,
    /// True when `cells` are groups.
    pub grouped: bool,
    pub wiring: Wiring,
    /// Each group's self-discharge, A (inside the group, not at the
    /// terminals).
    pub leak_a: Vec<f64>,
    /// The pack electronics' standby draw, A.
    drain_a: f64,
}

impl SimPack {
    pub fn new(spec: &PackSpec, cond: PackCondition, groups: &GroupsConfig, seed: u64) -> SimPack {
        if groups.count == 0 {
            return SimPack {
                cells: vec![PackModel::new(spec, cond)],
                grouped: false,
                wiring: Wiring::Direct,
                leak_a: vec![0.0],
                drain_a: cond.standby_drain_a,
            };
        }
        // A separate generator, so the groups drawn do not move the
        // measurement noise of a lumped run.
        let mut rng = SmallRng::seed_from_u64(seed ^ 0x6772_6f75_7073);
        let mut normal = |sd_pct: f64| {
            let z: f64 = rng.sample(StandardNormal);
            z.clamp(-3.0, 3.0) * sd_pct / 100.0
        };
        let one = PackSpec {
            series: 1,
            ..spec.clone()
        };
        let mut cells = Vec::new();
        let mut leak_a = Vec::new();
        for g in 1..=groups.count {
            let set = groups.set.iter().find(|s| s.group == g);
            let cap = set
                .and_then(|s| s.capacity)
                .unwrap_or(1.0 + normal(groups.capacity_spread_pct));
            let res = set
                .and_then(|s| s.resistance)
                .unwrap_or(1.0 + normal(groups.resistance_spread_pct));
            let sd = set.and_then(|s| s.self_discharge_pct_per_day).unwrap_or(
                (groups.self_discharge_pct_per_day
                    + normal(100.0 * groups.self_discharge_spread_pct_per_day))
                .max(0.0),
            );
            let c = PackCondition {
                capacity_factor: cond.capacity_factor * cap.max(0.05),
                resistance_factor: cond.resistance_factor * res.max(0.05),
                standby_drain_a: 0.0,
                ..cond
            };
            let m = PackModel::new(&one, c);
            leak_a.push(m.capacity_ah * sd / 100.0 / 24.0);
            cells.push(m);
        }
        let mut p = SimPack {
            cells,
            grouped: true,
            wiring: groups.wiring,
            leak_a,
            drain_a: cond.standby_drain_a,
        };
        p.set_drains();
        p
    }

    /// Each group carries the electronics' draw and its own leak.
    fn set_drains(&mut self) {
        if !self.grouped {
            return;
        }
        for (c, l) in self.cells.iter_mut().zip(&self.leak_a) {
            c.drain_a = self.drain_a + l;
        }
    }

    /// State of charge: the groups' mean.
    pub fn soc(&self) -> f64 {
        self.cells.iter().map(|c| c.soc).sum::<f64>() / self.cells.len() as f64
    }

    /// The pack's temperature: the groups' mean.
    pub fn temperature_c(&self) -> f64 {
        self.cells.iter().map(|c| c.temperature_c).sum::<f64>() / self.cells.len() as f64
    }

    /// True capacity: the smallest group's (a string is as good as its
    /// weakest group).
    pub fn capacity_ah(&self) -> f64 {
        self.cells
            .iter()
            .map(|c| c.capacity_ah)
            .fold(f64::INFINITY, f64::min)
    }

    pub fn ambient_c(&self) -> f64 {
        self.cells[0].ambient_c
    }

    pub fn set_fault_heat(&mut self, w: f64, on_group: Option<u32>) {
        match on_group.filter(|_| self.grouped) {
            Some(g) => {
                for (i, c) in self.cells.iter_mut().enumerate() {
                    c.fault_heat_w = if i + 1 == g as usize { w } else { 0.0 };
                }
            }
            None => {
                let n = self.cells.len() as f64;
                for c in &mut self.cells {
                    c.fault_heat_w = w / n;
                }
            }
        }
    }

    pub fn terminal_voltage(&self, current: f64) -> f64 {
        self.cells.iter().map(|c| c.terminal_voltage(current)).sum()
    }

    pub fn open_voltage(&self) -> f64 {
        self.terminal_voltage(0.0)
    }

    /// Each group's voltage at a pack current (group 1 first).
    pub fn group_voltages(&self, current: f64) -> Vec<f64> {
        self.cells
            .iter()
            .map(|c| c.terminal_voltage(current))
            .collect()
    }

    pub fn group_temperatures(&self) -> Vec<f64> {
        self.cells.iter().map(|c| c.temperature_c).collect()
    }

    pub fn supply_current(&self, v_set: f64, i_limit: f64) -> f64 {
        if !self.grouped {
            return self.cells[0].supply_current(v_set, i_limit);
        }
        supply_current_by(|i| self.terminal_voltage(i), v_set, i_limit)
    }

    pub fn load_current(&self, mode: LoadMode, value: f64) -> f64 {
        if !self.grouped {
            return self.cells[0].load_current(mode, value);
        }
        // The string behaves as one source of EMF Σe behind Σr.
        let e: f64 = self.cells.iter().map(|c| c.emf_cell()).sum();
        let r: f64 = self.cells.iter().map(|c| c.r0_cell()).sum();
        load_current_of(e, r, mode, value)
    }

    /// Advance every group by `dt` at a pack current: the terminal charge
    /// and the energy over the interval.
    pub fn step(&mut self, dt: f64, current: f64) -> (f64, f64) {
        let mut ah = 0.0;
        let mut wh = 0.0;
        for c in &mut self.cells {
            let (a, w) = c.step(dt, current);
            ah = a;
            wh += w;
        }
        (ah, wh)
    }

    /// For each group, the charge it would still give at a pack current
    /// (negative: a discharge) before its own voltage under that current
    /// fell to `cutoff_v`: each group's state run forward alone.
    pub fn to_cutoff(&self, current: f64, cutoff_v: f64) -> Vec<f64> {
        if current >= 0.0 {
            return vec![0.0; self.cells.len()];
        }
        self.cells
            .iter()
            .map(|c| {
                let mut m = c.clone();
                let mut out = 0.0;
                let dt = 1.0;
                let mut last_v = m.terminal_voltage(current);
                let mut t = 0.0;
                while last_v > cutoff_v && t < 200_000.0 {
                    let before = last_v;
                    let (ah, _) = m.step(dt, current);
                    let v = m.terminal_voltage(current);
                    if v <= cutoff_v {
                        // Interpolate to the crossing within the last second.
                        let f = ((before - cutoff_v) / (before - v)).clamp(0.0, 1.0);
                        out += -ah * f;
                        last_v = v;
                        break;
                    }
                    out += -ah;
                    last_v = v;
                    t += dt;
                }
                out
            })
            .collect()
    }

    pub fn group_states(&self) -> Vec<GroupState> {
        if !self.grouped {
            return Vec::new();
        }
        self.cells
            .iter()
            .map(|c| GroupState {
                soc: c.soc,
                v1: c.v1,
                v2: c.v2,
                temperature_c: c.temperature_c,
            })
            .collect()
    }

    pub fn restore_groups(&mut self, states: &[GroupState]) {
        if !self.grouped || states.len() != self.cells.len() {
            return;
        }
        for (c, s) in self.cells.iter_mut().zip(states) {
            c.soc = s.soc;
            c.v1 = s.v1;
            c.v2 = s.v2;
            c.temperature_c = s.temperature_c;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use model::pack::Chemistry;
    use model::simconfig::GroupSet;

    fn spec() -> PackSpec {
        PackSpec {
            chemistry: Chemistry::LiIon,
            series: 13,
            rated_capacity_ah: 10.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        }
    }

    fn cond() -> PackCondition {
        PackCondition {
            capacity_factor: 1.0,
            resistance_factor: 1.0,
            initial_soc: 0.8,
            ambient_c: 25.0,
            standby_drain_a: 0.0,
        }
    }

    /// Thirteen equal groups behave as the lumped thirteen-cell pack.
    #[test]
    fn equal_groups_add_up_to_the_lumped_pack() {
        let g = GroupsConfig {
            count: 13,
            capacity_spread_pct: 0.0,
            resistance_spread_pct: 0.0,
            self_discharge_pct_per_day: 0.0,
            self_discharge_spread_pct_per_day: 0.0,
            ..GroupsConfig::default()
        };
        let mut a = SimPack::new(&spec(), cond(), &g, 1);
        let mut b = SimPack::new(&spec(), cond(), &GroupsConfig::default(), 1);
        for _ in 0..3600 {
            a.step(1.0, -5.0);
            b.step(1.0, -5.0);
        }
        let (va, vb) = (a.terminal_voltage(-5.0), b.terminal_voltage(-5.0));
        assert!((va - vb).abs() < 1e-9, "{va} {vb}");
        assert!((a.soc() - b.soc()).abs() < 1e-12);
    }

    /// A weak group falls to the cutoff first while the string's voltage
    /// is still above series × cutoff; its own remaining charge is then
    /// nil and the others' is positive.
    #[test]
    fn the_weak_group_reaches_its_cutoff_first() {
        let g = GroupsConfig {
            count: 13,
            capacity_spread_pct: 0.0,
            resistance_spread_pct: 0.0,
            set: vec![GroupSet {
                group: 7,
                capacity: Some(0.88),
                resistance: None,
                self_discharge_pct_per_day: None,
            }],
            ..GroupsConfig::default()
        };
        let mut p = SimPack::new(&spec(), cond(), &g, 1);
        let mut n = 0;
        while p.group_voltages(-5.0)[6] > 3.0 && n < 20_000 {
            p.step(1.0, -5.0);
            n += 1;
        }
        assert!(p.terminal_voltage(-5.0) > 13.0 * 3.0);
        let rest = p.to_cutoff(-5.0, 3.0);
        assert!(rest[6] < 0.01, "{rest:?}");
        assert!(rest[0] > 0.5, "{rest:?}");
    }
}
