//! Open export formats for a run's record: plain CSV, Parquet, and the
//! Battery Data Format (BDF) of the Battery Data Alliance (a Linux
//! Foundation Energy project), as CSV and as Parquet.
//!
//! The run folder stays the record; an export is a copy in a form other
//! tools read as they are (pandas, polars, DuckDB, a shared data set).
//!
//! - **csv**: `<base>.samples.csv`, `<base>.steps.csv`, `<base>.cycles.csv`
//!   and `<base>.metadata.json`. Column names carry their units
//!   (`voltage_v`, `charge_ah`), as in `samples.csv`.
//! - **parquet**: the same three tables as `<base>.samples.parquet`,
//!   `.steps.parquet`, `.cycles.parquet`, with the run's metadata in each
//!   file's key-value metadata (keys `packbench.*`).
//! - **bdf**: `<base>.bdf.csv` and `<base>.bdf.parquet` with the BDF
//!   preferred labels as column names, and `<base>.bdf.metadata.json`
//!   beside them stating what BDF leaves to the metadata (the current sign,
//!   the test object, where the temperature sensor sits).
//!
//! BDF columns, as the format's published README defines them (checked
//! against <https://github.com/battery-data-alliance/battery-data-format>,
//! README "Defining the BDF for Cycler Time-Series Data"):
//! required `Test Time / s`, `Voltage / V`, `Current / A`; recommended
//! `Unix Time / s`, `Cycle Count / 1`, `Step Count / 1` (a monotonically
//! increasing index of steps); optional `Step Index / 1` (the position of
//! the row within its step), `Step Capacity / Ah` and `Step Energy / Wh`
//! (net change over the step so far), and `Surface Temperature T1 / degC`.
//! The header row holds the preferred labels, every row has the header's
//! column count, and a Parquet file is named `*.bdf.parquet`.
//! `Ambient Temperature / degC` is not written: packbench's one sensor sits
//! on the pack.
//!
//! `<base>` is `<pack-id>__<run-id>` (the format's README recommends
//! `Institution__Cell__Date_NNN`; both fields our own, with the date inside
//! the run id).

use analysis::integrate::Integrator;
use model::sample::Sample;
use parquet::basic::{Compression, LogicalType, Repetition, Type as Physical};
use parquet::data_type::{ByteArray, ByteArrayType, DoubleType, Int64Type};
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use parquet::file::writer::SerializedFileWriter;
use parquet::schema::types::Type;
use record::manifest::Manifest;
use record::Summary;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// What an export can fail with.
#[derive(Debug, thiserror::Error)]
pub enum ExportError {
    #[error(transparent)]
    Read(#[from] record::error::ReadError),
    #[error("{path}: {error}")]
    Io {
        path: PathBuf,
        error: std::io::Error,
    },
    #[error("{path}: writing Parquet: {error}")]
    Parquet {
        path: PathBuf,
        error: parquet::errors::ParquetError,
    },
    #[error("{path}: writing CSV: {error}")]
    Csv { path: PathBuf, error: csv::Error },
    #[error("{0}")]
    Target(String),
}

/// The export formats.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Csv,
    Parquet,
    Bdf,
}

impl std::str::FromStr for Format {
    type Err = String;
    fn from_str(s: &str) -> Result<Format, String> {
        match s {
            "csv" => Ok(Format::Csv),
            "parquet" => Ok(Format::Parquet),
            "bdf" => Ok(Format::Bdf),
            _ => Err(format!(
                "unknown export format '{s}'; expected csv, parquet or bdf"
            )),
        }
    }
}

/// The current sign, as every export states it.
pub const CURRENT_SIGN: &str =
    "positive = into the pack (charging), negative = out of the pack (discharging)";

/// One column of a table to write.
pub enum Data {
    F64(Vec<f64>),
    OptF64(Vec<Option<f64>>),
    I64(Vec<i64>),
    Str(Vec<String>),
    OptStr(Vec<Option<String>>),
}

impl Data {
    fn len(&self) -> usize {
        match self {
            Data::F64(v) => v.len(),
            Data::OptF64(v) => v.len(),
            Data::I64(v) => v.len(),
            Data::Str(v) => v.len(),
            Data::OptStr(v) => v.len(),
        }
    }

    /// The cell of row `r` as CSV text (empty for none; floats in the
    /// shortest form that reads back to the same value).
    fn cell(&self, r: usize) -> String {
        match self {
            Data::F64(v) => v[r].to_string(),
            Data::OptF64(v) => v[r].map(|x| x.to_string()).unwrap_or_default(),
            Data::I64(v) => v[r].to_string(),
            Data::Str(v) => v[r].clone(),
            Data::OptStr(v) => v[r].clone().unwrap_or_default(),
        }
    }
}

/// A table: named columns of equal length.
pub struct Table {
    pub columns: Vec<(String, Data)>,
}

impl Table {
    fn rows(&self) -> usize {
        self.columns.first().map(|c| c.1.len()).unwrap_or(0)
    }

    fn push(&mut self, name: &str, data: Data) {
        self.columns.push((name.to_string(), data));
    }
}

/// Rows per Parquet row group.
const ROW_GROUP: usize = 1 << 20;

fn pq_err(path: &Path) -> impl Fn(parquet::errors::ParquetError) -> ExportError + '_ {
    move |error| ExportError::Parquet {
        path: path.to_path_buf(),
        error,
    }
}

/// Write a table as Parquet (Snappy), with key-value metadata.
pub fn write_parquet(
    path: &Path,
    table: &Table,
    metadata: &[(String, String)],
) -> Result<(), ExportError> {
    let err = pq_err(path);
    let mut fields = Vec::new();
    for (name, data) in &table.columns {
        let (physical, repetition, text) = match data {
            Data::F64(_) => (Physical::DOUBLE, Repetition::REQUIRED, false),
            Data::OptF64(_) => (Physical::DOUBLE, Repetition::OPTIONAL, false),
            Data::I64(_) => (Physical::INT64, Repetition::REQUIRED, false),
            Data::Str(_) => (Physical::BYTE_ARRAY, Repetition::REQUIRED, true),
            Data::OptStr(_) => (Physical::BYTE_ARRAY, Repetition::OPTIONAL, true),
        };
        let mut b = Type::primitive_type_builder(name, physical).with_repetition(repetition);
        if text {
            b = b.with_logical_type(Some(LogicalType::String));
        }
        fields.push(Arc::new(b.build().map_err(&err)?));
    }
    let schema = Type::group_type_builder("schema")
        .with_fields(fields)
        .build()
        .map_err(&err)?;
    let kv = metadata
        .iter()
        .map(|(k, v)| KeyValue::new(k.clone(), v.clone()))
        .collect();
    let props = WriterProperties::builder()
        .set_compression(Compression::SNAPPY)
        .set_key_value_metadata(Some(kv))
        .build();
    let file = std::fs::File::create(path).map_err(|error| ExportError::Io {
        path: path.to_path_buf(),
        error,
    })?;
    let mut w = SerializedFileWriter::new(file, Arc::new(schema), Arc::new(props)).map_err(&err)?;
    let n = table.rows();
    let mut start = 0;
    while start < n || (n == 0 && start == 0) {
        let end = (start + ROW_GROUP).min(n);
        let mut rg = w.next_row_group().map_err(&err)?;
        for (_, data) in &table.columns {
            let Some(mut col) = rg.next_column().map_err(&err)? else {
                break;
            };
            write_column(&mut col, data, start, end).map_err(&err)?;
            col.close().map_err(&err)?;
        }
        rg.close().map_err(&err)?;
        if n == 0 {
            break;
        }
        start = end;
    }
    w.close().map_err(&err)?;
    Ok(())
}

fn write_column(
    col: &mut parquet::file::writer::SerializedColumnWriter<'_>,
    data: &Data,
    start: usize,
    end: usize,
) -> Result<(), parquet::errors::ParquetError> {
    fn levels<T: Clone>(v: &[Option<T>]) -> (Vec<T>, Vec<i16>) {
        let values = v.iter().flatten().cloned().collect();
        let defs = v.iter().map(|x| i16::from(x.is_some())).collect();
        (values, defs)
    }
    match data {
        Data::F64(v) => {
            col.typed::<DoubleType>()
                .write_batch(&v[start..end], None, None)?;
        }
        Data::OptF64(v) => {
            let (values, defs) = levels(&v[start..end]);
            col.typed::<DoubleType>()
                .write_batch(&values, Some(&defs), None)?;
        }
        Data::I64(v) => {
            col.typed::<Int64Type>()
                .write_batch(&v[start..end], None, None)?;
        }
        Data::Str(v) => {
            let values: Vec<ByteArray> = v[start..end]
                .iter()
                .map(|s| ByteArray::from(s.as_str()))
                .collect();
            col.typed::<ByteArrayType>()
                .write_batch(&values, None, None)?;
        }
        Data::OptStr(v) => {
            let (values, defs) = levels(&v[start..end]);
            let values: Vec<ByteArray> = values
                .iter()
                .map(|s: &String| ByteArray::from(s.as_str()))
                .collect();
            col.typed::<ByteArrayType>()
                .write_batch(&values, Some(&defs), None)?;
        }
    }
    Ok(())
}

/// Write a table as CSV with a header row.
pub fn write_csv(path: &Path, table: &Table) -> Result<(), ExportError> {
    let err = |error| ExportError::Csv {
        path: path.to_path_buf(),
        error,
    };
    let mut w = csv::Writer::from_path(path).map_err(err)?;
    w.write_record(table.columns.iter().map(|c| c.0.as_str()))
        .map_err(err)?;
    for r in 0..table.rows() {
        w.write_record(table.columns.iter().map(|c| c.1.cell(r)))
            .map_err(err)?;
    }
    w.flush().map_err(|error| ExportError::Io {
        path: path.to_path_buf(),
        error,
    })?;
    Ok(())
}

/// A run read for export.
pub struct RunRecord {
    pub dir: PathBuf,
    pub manifest: Manifest,
    pub summary: Summary,
    pub samples: Vec<Sample>,
}

impl RunRecord {
    /// Read a run folder of our own (run.json, summary.json, samples.csv).
    pub fn read(dir: &Path) -> Result<RunRecord, ExportError> {
        let summary = record::read::read_summary(&dir.join(record::SUMMARY_JSON))?;
        let manifest_path = dir.join(record::RUN_JSON);
        let samples_path = dir.join(record::SAMPLES_CSV);
        if !manifest_path.is_file() || !samples_path.is_file() {
            return Err(ExportError::Target(format!(
                "{}: not a run packbench recorded (no run.json or samples.csv; an imported test keeps its source log as it came)",
                dir.display()
            )));
        }
        let manifest = record::read::read_manifest(&manifest_path)?;
        let samples = record::read::read_samples(&samples_path)?.samples;
        Ok(RunRecord {
            dir: dir.to_path_buf(),
            manifest,
            summary,
            samples,
        })
    }

    /// `<pack-id>__<run-id>`.
    pub fn base(&self) -> String {
        format!("{}__{}", self.summary.pack_id, self.summary.run_id)
    }

    /// Run time 0 as Unix time, s (the manifest's UTC start).
    fn start_unix_s(&self) -> Result<f64, ExportError> {
        let t = chrono::DateTime::parse_from_rfc3339(&self.manifest.started_utc).map_err(|e| {
            ExportError::Target(format!(
                "{}: started_utc '{}' is not an RFC 3339 time: {e}",
                self.dir.join(record::RUN_JSON).display(),
                self.manifest.started_utc
            ))
        })?;
        Ok(t.timestamp_millis() as f64 / 1000.0)
    }

    /// The interruptions a resumed run's log spans (nothing is integrated
    /// across them, as in the analysis).
    fn breaks(&self) -> Vec<analysis::integrate::Interruption> {
        self.summary
            .resumed
            .iter()
            .map(|r| analysis::integrate::Interruption {
                last_before_s: r.last_sample_t_s,
                resumed_at_s: r.t_s,
            })
            .collect()
    }

    /// The run's metadata as key-value pairs.
    pub fn metadata(&self) -> Vec<(String, String)> {
        let m = &self.manifest;
        let s = &self.summary;
        let mut out =
            vec![
            ("packbench.pack_id", s.pack_id.clone()),
            ("packbench.run_id", s.run_id.clone()),
            ("packbench.status", s.status.name().to_string()),
            ("packbench.test_date", s.test_date.to_string()),
            ("packbench.started_utc", m.started_utc.clone()),
            (
                "packbench.finished_utc",
                m.finished_utc.clone().unwrap_or_default(),
            ),
            ("packbench.procedure_title", m.procedure.title.clone()),
            ("packbench.procedure_sha256", m.procedure.sha256.clone()),
            ("packbench.tool", format!("{} {}", m.tool.name, m.tool.version)),
            ("packbench.bench", m.bench.kind.clone()),
            (
                "packbench.pack",
                serde_json::to_string(&s.pack).unwrap_or_default(),
            ),
            ("packbench.current_sign", CURRENT_SIGN.to_string()),
            (
                "packbench.test_time",
                "run time, s from started_utc (a resumed run's time includes the time it was down)"
                    .to_string(),
            ),
            (
                "packbench.record_schema_version",
                s.schema_version.to_string(),
            ),
        ];
        if let Some(c) = &s.capacity {
            out.push(("packbench.capacity_ah", c.measured_ah.to_string()));
        }
        // The verdict's figures; an absent one says why.
        let v = &s.verdict;
        for (k, f) in [
            ("packbench.soh_pct", &v.soh_pct),
            ("packbench.corrected_ah", &v.corrected_ah),
            ("packbench.dcir_mohm", &v.resistance_mohm),
            ("packbench.new_nominal_ah", &v.new_nominal_ah),
        ] {
            out.push((
                k,
                match f.get() {
                    Some(x) => x.to_string(),
                    None => format!("absent: {}", f.why().map(|w| w.words()).unwrap_or("")),
                },
            ));
        }
        // Each figure's expanded uncertainty (the reported 95 % interval's
        // half-width), or why there is none.
        let u = &v.uncertainty;
        for (k, b) in [
            ("packbench.capacity_ah_u95", &u.measured_ah),
            ("packbench.corrected_ah_u95", &u.corrected_ah),
            ("packbench.soh_pct_u95", &u.soh_pct),
            ("packbench.dcir_mohm_u95", &u.resistance_mohm),
            (
                "packbench.coulombic_efficiency_pct_u95",
                &u.coulombic_efficiency_pct,
            ),
        ] {
            out.push((
                k,
                match (b, &u.absent) {
                    (Some(b), _) => b.half_width().to_string(),
                    (None, Some(w)) => format!("absent: {w}"),
                    (None, None) => "absent: no figure".to_string(),
                },
            ));
        }
        out.push((
            "packbench.uncertainty",
            format!(
                "95 % intervals (GUM, JCGM 100:2008; Monte Carlo per JCGM 101:2008 where a rectangular term dominates); {}",
                u.basis_line()
            ),
        ));
        if let Some(d) = v.grade.value().and_then(|g| g.decision.as_ref()) {
            out.push(("packbench.decision_rule", d.rule.clone()));
            out.push(("packbench.grade_conditional", d.conditional.to_string()));
        }
        out.push((
            "packbench.grade",
            v.grade_label().map(str::to_string).unwrap_or_else(|| {
                format!("absent: {}", v.grade.why().map(|w| w.words()).unwrap_or(""))
            }),
        ));
        out.into_iter().map(|(k, v)| (k.to_string(), v)).collect()
    }

    /// The samples with units in the column names, and the running net
    /// charge and energy within each step.
    pub fn samples_table(&self, bdf: bool) -> Result<Table, ExportError> {
        let t0 = self.start_unix_s()?;
        let breaks = self.breaks();
        let n = self.samples.len();
        let mut step_ah = Vec::with_capacity(n);
        let mut step_wh = Vec::with_capacity(n);
        let mut step_count = Vec::with_capacity(n);
        let mut step_index = Vec::with_capacity(n);
        let mut g = Integrator::default();
        let mut prev: Option<&Sample> = None;
        let (mut count, mut index) = (0i64, 0i64);
        for s in &self.samples {
            match prev {
                Some(p) if p.step == s.step => {
                    if analysis::integrate::spans_any(&breaks, p.t_s, s.t_s) {
                        g.break_segment();
                    }
                    index += 1;
                }
                _ => {
                    g = Integrator::default();
                    count += 1;
                    index = 1;
                }
            }
            g.push(s.t_s, s.voltage_v, s.current_a);
            step_ah.push(g.ah);
            step_wh.push(g.wh);
            step_count.push(count);
            step_index.push(index);
            prev = Some(s);
        }
        let col = |f: fn(&Sample) -> f64| Data::F64(self.samples.iter().map(f).collect());
        let temps = self.samples.iter().any(|s| s.temperature_c.is_some());
        let mut t = Table {
            columns: Vec::new(),
        };
        if bdf {
            t.push("Test Time / s", col(|s| s.t_s));
            t.push("Voltage / V", col(|s| s.voltage_v));
            t.push("Current / A", col(|s| s.current_a));
            t.push(
                "Unix Time / s",
                Data::F64(self.samples.iter().map(|s| t0 + s.t_s).collect()),
            );
            t.push(
                "Cycle Count / 1",
                Data::I64(self.samples.iter().map(|s| i64::from(s.cycle)).collect()),
            );
            t.push("Step Count / 1", Data::I64(step_count));
            t.push("Step Index / 1", Data::I64(step_index));
            t.push("Step Capacity / Ah", Data::F64(step_ah));
            t.push("Step Energy / Wh", Data::F64(step_wh));
            if temps {
                t.push(
                    "Surface Temperature T1 / degC",
                    Data::OptF64(self.samples.iter().map(|s| s.temperature_c).collect()),
                );
            }
        } else {
            t.push("t_s", col(|s| s.t_s));
            t.push(
                "unix_time_s",
                Data::F64(self.samples.iter().map(|s| t0 + s.t_s).collect()),
            );
            t.push(
                "step",
                Data::I64(self.samples.iter().map(|s| i64::from(s.step)).collect()),
            );
            t.push(
                "cycle",
                Data::I64(self.samples.iter().map(|s| i64::from(s.cycle)).collect()),
            );
            t.push("voltage_v", col(|s| s.voltage_v));
            t.push("current_a", col(|s| s.current_a));
            t.push(
                "temperature_c",
                Data::OptF64(self.samples.iter().map(|s| s.temperature_c).collect()),
            );
            t.push("step_charge_ah", Data::F64(step_ah));
            t.push("step_energy_wh", Data::F64(step_wh));
        }
        Ok(t)
    }

    /// The per-step figures of `summary.json`.
    pub fn steps_table(&self) -> Table {
        let st = &self.summary.steps;
        let f = |g: fn(&analysis::StepSummary) -> f64| Data::F64(st.iter().map(g).collect());
        let o =
            |g: fn(&analysis::StepSummary) -> Option<f64>| Data::OptF64(st.iter().map(g).collect());
        let mut t = Table {
            columns: Vec::new(),
        };
        t.push(
            "step",
            Data::I64(st.iter().map(|s| i64::from(s.step)).collect()),
        );
        t.push(
            "cycle",
            Data::I64(st.iter().map(|s| i64::from(s.cycle)).collect()),
        );
        t.push(
            "phase",
            Data::Str(st.iter().map(|s| s.phase.clone()).collect()),
        );
        t.push(
            "kind",
            Data::Str(st.iter().map(|s| s.kind.to_string()).collect()),
        );
        t.push(
            "name",
            Data::OptStr(st.iter().map(|s| s.name.clone()).collect()),
        );
        t.push(
            "samples",
            Data::I64(st.iter().map(|s| s.samples as i64).collect()),
        );
        t.push("start_s", f(|s| s.start_s));
        t.push("duration_s", f(|s| s.duration_s));
        t.push("charge_ah", f(|s| s.charge_ah));
        t.push("energy_wh", f(|s| s.energy_wh));
        t.push("charge_in_ah", f(|s| s.charge_in_ah));
        t.push("charge_out_ah", f(|s| s.charge_out_ah));
        t.push("energy_in_wh", f(|s| s.energy_in_wh));
        t.push("energy_out_wh", f(|s| s.energy_out_wh));
        t.push("start_voltage_v", o(|s| s.start_voltage_v));
        t.push("end_voltage_v", o(|s| s.end_voltage_v));
        t.push("min_voltage_v", o(|s| s.min_voltage_v));
        t.push("max_voltage_v", o(|s| s.max_voltage_v));
        t.push("mean_current_a", o(|s| s.mean_current_a));
        t.push("max_temperature_c", o(|s| s.max_temperature_c));
        t.push(
            "end_reason",
            Data::OptStr(st.iter().map(|s| s.end_reason.clone()).collect()),
        );
        t
    }

    /// The per-cycle figures of `summary.json`.
    pub fn cycles_table(&self) -> Table {
        let c = &self.summary.cycles;
        let f = |g: fn(&analysis::CycleSummary) -> f64| Data::F64(c.iter().map(g).collect());
        let mut t = Table {
            columns: Vec::new(),
        };
        t.push(
            "cycle",
            Data::I64(c.iter().map(|x| i64::from(x.cycle)).collect()),
        );
        t.push("charge_ah", f(|x| x.charge_ah));
        t.push("discharge_ah", f(|x| x.discharge_ah));
        t.push("charge_wh", f(|x| x.charge_wh));
        t.push("discharge_wh", f(|x| x.discharge_wh));
        t.push(
            "coulombic_efficiency_pct",
            Data::OptF64(c.iter().map(|x| x.coulombic_efficiency_pct).collect()),
        );
        t.push(
            "energy_efficiency_pct",
            Data::OptF64(c.iter().map(|x| x.energy_efficiency_pct).collect()),
        );
        t
    }

    /// The BDF sidecar: what the format leaves to the metadata.
    fn bdf_sidecar(&self) -> serde_json::Value {
        let s = &self.summary;
        serde_json::json!({
            "format": "Battery Data Format (BDF), time-series table; column labels and fixed units as the Battery Data Alliance's README defines them",
            "format_reference": "https://github.com/battery-data-alliance/battery-data-format",
            "current_sign": CURRENT_SIGN,
            "test_object": {
                "kind": if s.pack.series > 1 { "pack" } else { "cell" },
                "id": s.pack_id,
                "chemistry": s.pack.chemistry.to_string(),
                "cells_in_series": s.pack.series,
                "rated_capacity_ah": s.pack.rated_capacity_ah,
                "note": "BDF files hold one cell each; this file holds the pack's terminal voltage and current (one test object)",
            },
            "columns": {
                "Test Time / s": "run time since started_utc (a resumed run's time includes the time it was down)",
                "Unix Time / s": "started_utc + Test Time",
                "Cycle Count / 1": "the procedure's cycle number (0 before the first cycle)",
                "Step Count / 1": "1 for the first step run, +1 at each new step",
                "Step Index / 1": "1 for a step's first row, +1 each row",
                "Step Capacity / Ah": "net charge since the step's start, trapezoidal rule, sign as the current",
                "Step Energy / Wh": "net energy since the step's start, trapezoidal rule, sign as the current",
                "Surface Temperature T1 / degC": "the pack's temperature sensor",
            },
            "run": {
                "run_id": s.run_id,
                "status": s.status.name(),
                "test_date": s.test_date,
                "started_utc": self.manifest.started_utc,
                "finished_utc": self.manifest.finished_utc,
                "procedure": self.manifest.procedure.title,
                "procedure_sha256": self.manifest.procedure.sha256,
                "tool": format!("{} {}", self.manifest.tool.name, self.manifest.tool.version),
            },
        })
    }
}

fn write_json(path: &Path, value: &serde_json::Value) -> Result<(), ExportError> {
    let io = |error| ExportError::Io {
        path: path.to_path_buf(),
        error,
    };
    let mut f = std::fs::File::create(path).map_err(io)?;
    let text = serde_json::to_string_pretty(value).unwrap_or_default();
    f.write_all(text.as_bytes()).map_err(io)?;
    f.write_all(b"\n").map_err(io)
}

/// Export one run folder into `out`; the files written.
pub fn export_run(dir: &Path, out: &Path, format: Format) -> Result<Vec<PathBuf>, ExportError> {
    let run = RunRecord::read(dir)?;
    std::fs::create_dir_all(out).map_err(|error| ExportError::Io {
        path: out.to_path_buf(),
        error,
    })?;
    let base = run.base();
    let meta = run.metadata();
    let p = |suffix: &str| out.join(format!("{base}{suffix}"));
    let mut files = Vec::new();
    match format {
        Format::Csv => {
            for (suffix, table) in [
                (".samples.csv", run.samples_table(false)?),
                (".steps.csv", run.steps_table()),
                (".cycles.csv", run.cycles_table()),
            ] {
                write_csv(&p(suffix), &table)?;
                files.push(p(suffix));
            }
            let json: serde_json::Map<String, serde_json::Value> = meta
                .into_iter()
                .map(|(k, v)| (k, serde_json::Value::String(v)))
                .collect();
            write_json(&p(".metadata.json"), &serde_json::Value::Object(json))?;
            files.push(p(".metadata.json"));
        }
        Format::Parquet => {
            for (suffix, table) in [
                (".samples.parquet", run.samples_table(false)?),
                (".steps.parquet", run.steps_table()),
                (".cycles.parquet", run.cycles_table()),
            ] {
                write_parquet(&p(suffix), &table, &meta)?;
                files.push(p(suffix));
            }
        }
        Format::Bdf => {
            let table = run.samples_table(true)?;
            write_csv(&p(".bdf.csv"), &table)?;
            files.push(p(".bdf.csv"));
            write_parquet(&p(".bdf.parquet"), &table, &meta)?;
            files.push(p(".bdf.parquet"));
            write_json(&p(".bdf.metadata.json"), &run.bdf_sidecar())?;
            files.push(p(".bdf.metadata.json"));
        }
    }
    Ok(files)
}

/// The run folders a target names: a run folder itself, or every run of a
/// pack folder that packbench recorded (imported tests are left out).
pub fn runs_of(target: &Path) -> Result<Vec<PathBuf>, ExportError> {
    if target.join(record::SUMMARY_JSON).is_file() {
        return Ok(vec![target.to_path_buf()]);
    }
    if !target.join(record::PACK_TOML).is_file() {
        return Err(ExportError::Target(format!(
            "{}: neither a run folder (no summary.json) nor a pack folder (no pack.toml)",
            target.display()
        )));
    }
    let mut runs: Vec<PathBuf> = std::fs::read_dir(target)
        .map_err(|error| ExportError::Io {
            path: target.to_path_buf(),
            error,
        })?
        .flatten()
        .map(|e| e.path())
        .filter(|p| p.join(record::SUMMARY_JSON).is_file() && p.join(record::SAMPLES_CSV).is_file())
        .collect();
    runs.sort();
    Ok(runs)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn formats_parse_and_unknown_is_named() {
        assert_eq!("bdf".parse::<Format>(), Ok(Format::Bdf));
        assert_eq!("parquet".parse::<Format>(), Ok(Format::Parquet));
        let e = "xlsx".parse::<Format>().unwrap_err();
        assert!(e.contains("csv, parquet or bdf"), "{e}");
    }

    #[test]
    fn parquet_round_trips_through_the_crates_reader() {
        use parquet::file::reader::{FileReader, SerializedFileReader};
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("t.parquet");
        let table = Table {
            columns: vec![
                ("Voltage / V".into(), Data::F64(vec![3.7, 3.6, 3.5])),
                ("n".into(), Data::I64(vec![1, 2, 3])),
                ("t".into(), Data::OptF64(vec![Some(25.0), None, Some(26.5)])),
                (
                    "s".into(),
                    Data::OptStr(vec![None, Some("end".into()), None]),
                ),
            ],
        };
        write_parquet(&path, &table, &[("k".into(), "v".into())]).unwrap();
        let r = SerializedFileReader::new(std::fs::File::open(&path).unwrap()).unwrap();
        let md = r.metadata().file_metadata();
        assert_eq!(md.num_rows(), 3);
        let kv = md.key_value_metadata().unwrap();
        assert!(kv
            .iter()
            .any(|k| k.key == "k" && k.value.as_deref() == Some("v")));
        let rows: Vec<String> = r
            .get_row_iter(None)
            .unwrap()
            .map(|row| row.unwrap().to_string())
            .collect();
        assert_eq!(rows.len(), 3);
        assert!(rows[1].contains("Voltage / V: 3.6"), "{}", rows[1]);
        assert!(rows[1].contains("t: null"), "{}", rows[1]);
        assert!(rows[1].contains("s: \"end\""), "{}", rows[1]);
    }
}
