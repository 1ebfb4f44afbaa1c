//! Procedure files: the TOML as written ([`raw`]), its validation against a
//! pack ([`validate`]) and the resolved, immutable [`plan::Plan`].
//! Nothing here touches an instrument or a clock.

pub mod plan;
pub mod raw;
pub mod validate;

pub use plan::{
    DischargeMode, EndCondition, Envelope, FineSampling, OffsetPolicy, Plan, PlanStep, PulseLevel,
    ResultTag, StepKind, StepType,
};

use crate::location::{InputErrors, LocatedError, Location};
use crate::pack::PackSpec;
use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};

/// A procedure read from disk: its text (copied into `run.json`), its hash
/// and the plan it resolves to for one pack.
#[derive(Debug, Clone)]
pub struct LoadedProcedure {
    pub path: PathBuf,
    pub text: String,
    pub sha256: String,
    pub plan: Plan,
}

/// The largest procedure, bench or profile file read, bytes: far above
/// any real one (a few kB), so a wrong file is refused before it is parsed.
pub const MAX_INPUT_BYTES: u64 = 1 << 20;

/// Read a text input file, refusing one larger than [`MAX_INPUT_BYTES`].
pub fn read_limited(path: &Path) -> std::io::Result<Vec<u8>> {
    use std::io::Read;
    let f = std::fs::File::open(path)?;
    let mut bytes = Vec::new();
    f.take(MAX_INPUT_BYTES + 1).read_to_end(&mut bytes)?;
    if bytes.len() as u64 > MAX_INPUT_BYTES {
        return Err(std::io::Error::new(
            std::io::ErrorKind::InvalidData,
            format!("the file is larger than {} kB", MAX_INPUT_BYTES / 1024),
        ));
    }
    Ok(bytes)
}

/// Read a text input file (limited as [`read_limited`]; UTF-8).
pub fn read_text(path: &Path) -> std::io::Result<String> {
    String::from_utf8(read_limited(path)?).map_err(|e| {
        std::io::Error::new(
            std::io::ErrorKind::InvalidData,
            format!("not UTF-8 text (byte {})", e.utf8_error().valid_up_to() + 1),
        )
    })
}

/// Read and validate a procedure file for a pack.
pub fn load(path: &Path, pack: &PackSpec) -> Result<LoadedProcedure, InputErrors> {
    let bytes = read_limited(path).map_err(|e| {
        InputErrors(vec![LocatedError {
            location: Location {
                file: path.to_path_buf(),
                line: 1,
                column: 1,
            },
            message: format!("cannot read the procedure: {e}"),
        }])
    })?;
    let text = String::from_utf8(bytes).map_err(|e| {
        let offset = e.utf8_error().valid_up_to();
        let valid = String::from_utf8_lossy(&e.as_bytes()[..offset]).into_owned();
        InputErrors(vec![LocatedError {
            location: Location::at(path, &valid, offset),
            message: "the file is not valid UTF-8 text".into(),
        }])
    })?;
    let plan = validate::plan_from_text(path, &text, pack)?;
    Ok(LoadedProcedure {
        path: path.to_path_buf(),
        sha256: sha256_hex(text.as_bytes()),
        text,
        plan,
    })
}

pub fn sha256_hex(bytes: &[u8]) -> String {
    hex::encode(Sha256::digest(bytes))
}
