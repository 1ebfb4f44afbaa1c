//! What a run report draws, gathered in one pass over the run's log with
//! bounded memory: the time series thinned as they stream (a log of
//! millions of rows is never held whole), the capacity step's
//! voltage–charge curve, and the charge grids of the steps whose
//! differential curves the summary names.

use analysis::curves::{ChargeGrid, GRID_FRACTION, GRID_MAX_POINTS};
use model::groups::GroupSample;
use model::sample::Sample;
use record::import::{stream_log, LogFormat, Row};
use record::read::ReadError;
use record::Summary;
use std::path::Path;

/// Most points per plotted series (thinned evenly).
pub const MAX_POINTS: usize = 1500;

/// Evenly spaced points of a series of unknown length, at most
/// `2 * max` held: every `every`-th point is kept, and when the buffer is
/// full every other kept point is dropped and `every` doubles. The last
/// point is always kept.
#[derive(Debug, Clone)]
pub struct Thinned {
    max: usize,
    every: usize,
    seen: usize,
    points: Vec<(f64, f64)>,
    last: Option<(f64, f64)>,
}

impl Thinned {
    pub fn new(max: usize) -> Thinned {
        Thinned {
            max: max.max(2),
            every: 1,
            seen: 0,
            points: Vec::new(),
            last: None,
        }
    }

    pub fn push(&mut self, p: (f64, f64)) {
        if self.seen.is_multiple_of(self.every) {
            self.points.push(p);
            if self.points.len() >= 2 * self.max {
                let mut k = 0;
                self.points.retain(|_| {
                    k += 1;
                    k % 2 == 1
                });
                self.every *= 2;
            }
        }
        self.seen += 1;
        self.last = Some(p);
    }

    /// The points kept, the last one included.
    pub fn points(&self) -> Vec<(f64, f64)> {
        let mut out = self.points.clone();
        if let Some(l) = self.last {
            if out.last() != Some(&l) {
                out.push(l);
            }
        }
        out
    }

    /// Points seen.
    pub fn seen(&self) -> usize {
        self.seen
    }
}

/// The run report's chart data.
#[derive(Debug, Clone)]
pub struct ChartData {
    /// Voltage, current and temperature against time (h).
    pub voltage: Thinned,
    pub current: Thinned,
    pub temperature: Thinned,
    /// The capacity step: voltage against discharged charge (Ah).
    pub capacity: Option<Thinned>,
    /// Charge grids of the steps with differential curves, by step.
    pub grids: Vec<(u32, ChargeGrid)>,
    /// A pack read group by group: each group's voltage against time (h)
    /// and, in the capacity step, against discharged charge (Ah).
    pub groups: Vec<(Thinned, Thinned)>,
}

/// Gathers [`ChartData`] sample by sample.
pub struct ChartBuilder {
    data: ChartData,
    capacity_step: Option<u32>,
    /// Charge so far in the capacity step, and its previous sample.
    q: f64,
    prev: Option<Sample>,
    group_rows: Vec<GroupSample>,
    next_group: usize,
}

impl ChartBuilder {
    /// For the steps the summary names.
    pub fn new(s: &Summary) -> ChartBuilder {
        let mut steps: Vec<u32> = s
            .curves
            .iter()
            .flat_map(|c| {
                c.ica
                    .iter()
                    .map(|i| i.step)
                    .chain(c.dva.iter().map(|v| v.step))
            })
            .collect();
        steps.sort_unstable();
        steps.dedup();
        // Without a rating, the capacity measured stands in for the grid's
        // scale (a resolution, not a figure shown).
        let scale = s
            .pack
            .rated_capacity_ah
            .or(s.capacity.as_ref().map(|c| c.measured_ah))
            .unwrap_or(1.0);
        let grid = || ChargeGrid::new(GRID_FRACTION * scale, GRID_MAX_POINTS);
        ChartBuilder {
            data: ChartData {
                voltage: Thinned::new(MAX_POINTS),
                current: Thinned::new(MAX_POINTS),
                temperature: Thinned::new(MAX_POINTS),
                capacity: s.capacity.as_ref().map(|_| Thinned::new(MAX_POINTS)),
                grids: steps.into_iter().map(|k| (k, grid())).collect(),
                groups: Vec::new(),
            },
            capacity_step: s.capacity.as_ref().map(|c| c.step),
            q: 0.0,
            prev: None,
            group_rows: Vec::new(),
            next_group: 0,
        }
    }

    /// The run's group log, read on the samples' grid.
    pub fn with_groups(mut self, rows: Vec<GroupSample>) -> ChartBuilder {
        let n = rows.first().map_or(0, |g| g.voltage_v.len());
        self.data.groups = (0..n)
            .map(|_| (Thinned::new(MAX_POINTS / 2), Thinned::new(MAX_POINTS / 2)))
            .collect();
        self.group_rows = rows;
        self
    }

    /// The group scan taken with this sample, if there is one.
    fn group_row(&mut self, x: &Sample) -> Option<usize> {
        while let Some(g) = self.group_rows.get(self.next_group) {
            if g.t_s < x.t_s - 1e-9 || (g.t_s <= x.t_s + 1e-9 && g.step < x.step) {
                self.next_group += 1;
                continue;
            }
            if (g.t_s - x.t_s).abs() <= 1e-9 && g.step == x.step {
                self.next_group += 1;
                return Some(self.next_group - 1);
            }
            return None;
        }
        None
    }

    pub fn push(&mut self, x: &Sample) {
        let h = x.t_s / 3600.0;
        self.data.voltage.push((h, x.voltage_v));
        self.data.current.push((h, x.current_a));
        if let Some(t) = x.temperature_c {
            self.data.temperature.push((h, t));
        }
        if Some(x.step) == self.capacity_step {
            // As analysis::curves::charge_curve over the step's samples.
            if let Some(p) = self.prev.filter(|p| p.step == x.step) {
                self.q += ((p.current_a + x.current_a) * 0.5 * (x.t_s - p.t_s) / 3600.0).abs();
            }
            if let Some(c) = self.data.capacity.as_mut() {
                c.push((self.q, x.voltage_v));
            }
        }
        if let Some((_, g)) = self.data.grids.iter_mut().find(|(k, _)| *k == x.step) {
            g.push(x.t_s, x.voltage_v, x.current_a);
        }
        if !self.group_rows.is_empty() {
            if let Some(i) = self.group_row(x) {
                let in_cap = Some(x.step) == self.capacity_step;
                let q = self.q;
                for (k, &v) in self.group_rows[i].voltage_v.iter().enumerate() {
                    if let Some((t, c)) = self.data.groups.get_mut(k) {
                        t.push((h, v));
                        if in_cap {
                            c.push((q, v));
                        }
                    }
                }
            }
        }
        self.prev = Some(*x);
    }

    pub fn finish(self) -> ChartData {
        self.data
    }
}

/// A run's chart data from its log, streamed.
pub fn from_log(s: &Summary, samples_csv: &Path) -> Result<ChartData, ReadError> {
    let mut b = ChartBuilder::new(s);
    if s.groups.is_some() {
        if let Some(dir) = samples_csv.parent() {
            if let Some(rows) = record::read::read_groups(dir)? {
                b = b.with_groups(rows);
            }
        }
    }
    stream_log(samples_csv, &LogFormat::default(), |r: Row| {
        b.push(&r.sample())
    })?;
    Ok(b.finish())
}

/// Chart data from samples in memory (tests, and callers that hold them).
pub fn from_samples(s: &Summary, samples: &[Sample]) -> ChartData {
    let mut b = ChartBuilder::new(s);
    for x in samples {
        b.push(x);
    }
    b.finish()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Thinning as it streams holds at most twice the target, spaces the
    /// points evenly and keeps the first and the last.
    #[test]
    fn thinning_while_streaming_is_bounded_and_even() {
        for n in [1usize, 10, 2999, 3000, 3001, 1_000_000] {
            let mut t = Thinned::new(1500);
            for k in 0..n {
                t.push((k as f64, 0.0));
                assert!(t.points.len() < 3000);
            }
            let p = t.points();
            assert_eq!(p.first().map(|x| x.0), Some(0.0));
            assert_eq!(p.last().map(|x| x.0), Some((n - 1) as f64));
            assert!(p.len() <= 3001, "{n}: {}", p.len());
            if n >= 3000 {
                assert!(p.len() >= 1500, "{n}: {}", p.len());
                // Even spacing (the last point aside).
                let gaps: Vec<f64> = p[..p.len() - 1]
                    .windows(2)
                    .map(|w| w[1].0 - w[0].0)
                    .collect();
                assert!(gaps.iter().all(|g| *g == gaps[0]), "{n}");
            }
        }
    }
}
