//! `packbench characterize`: the pulse-power levels of a log (one of our
//! run folders or any bench's CSV, read as `analyze` reads it) written as
//! the tables a BMS engineer loads.

use crate::cli::analyze::{analyze, AnalyzeArgs};
use crate::cli::exit::ExitCode;
use analysis::characterize::{LEVEL_REST_MIN_S, PULSE_MAX_S};
use anyhow::{bail, Context};
use clap::Args;
use report::tables;
use std::path::{Path, PathBuf};

#[derive(Debug, Args)]
pub struct CharacterizeArgs {
    #[command(flatten)]
    pub analyze: AnalyzeArgs,
    /// Folder for the tables (default: the run folder's
    /// `characterization/`, or `<log name>-characterization` here).
    #[arg(long)]
    pub out: Option<PathBuf>,
    /// csv: the CSV tables and the JSON of conditions; c: those and a C
    /// header for firmware.
    #[arg(long, default_value = "csv")]
    pub format: String,
}

fn write(dir: &Path, name: &str, text: &str) -> anyhow::Result<()> {
    let p = dir.join(name);
    std::fs::write(&p, text).with_context(|| format!("cannot write {}", p.display()))
}

pub fn cmd_characterize(a: CharacterizeArgs) -> anyhow::Result<ExitCode> {
    let header = match a.format.as_str() {
        "csv" => false,
        "c" => true,
        other => bail!("--format {other}: expected csv or c"),
    };
    let (s, _) = analyze(&a.analyze)?;
    let Some(c) = &s.characterization else {
        eprintln!(
            "no pulse-power levels in {}: a level is a discharge pulse of at most {PULSE_MAX_S:.0} s after a rest of at least {:.0} min",
            a.analyze.log.display(),
            LEVEL_REST_MIN_S / 60.0
        );
        return Ok(ExitCode::BadInput);
    };
    let out = match &a.out {
        Some(o) => o.clone(),
        None if a.analyze.log.is_dir() => a.analyze.log.join("characterization"),
        None => {
            let stem = a
                .analyze
                .log
                .file_stem()
                .and_then(|x| x.to_str())
                .unwrap_or("log");
            PathBuf::from(format!("{stem}-characterization"))
        }
    };
    std::fs::create_dir_all(&out).with_context(|| format!("cannot create {}", out.display()))?;
    let k = tables::Conditions {
        pack_id: &s.pack_id,
        run_id: &s.run_id,
        test_date: s.test_date,
        chemistry: s.pack.chemistry.name(),
        series: s.pack.series,
        rated_ah: s.pack.rated_capacity_ah,
    };
    write(&out, tables::OCV_CSV, &tables::ocv_csv(c))?;
    write(&out, tables::ECM1_CSV, &tables::ecm_csv(c, 1))?;
    write(&out, tables::ECM2_CSV, &tables::ecm_csv(c, 2))?;
    write(&out, tables::PULSE_CSV, &tables::pulse_csv(c))?;
    let json = serde_json::to_string_pretty(&tables::conditions_json(c, &k))?;
    write(&out, tables::CONDITIONS_JSON, &json)?;
    if header {
        write(&out, tables::C_HEADER, &tables::c_header(c, &k))?;
    }
    print!("{}", report::text::characterization_text(c));
    println!("tables written to {}", out.display());
    Ok(ExitCode::Ok)
}
