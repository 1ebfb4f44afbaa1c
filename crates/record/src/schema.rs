//! The version of the run record's layout. Every JSON record carries it
//! (`run.json`, `summary.json`, `sim-pack.json`, and the run-start line of
//! `events.jsonl`); a reader accepts its own version and older ones, and
//! says clearly when a file was written by a newer packbench. Records
//! written before the field existed are version 1.

use crate::error::ReadError;
use serde::de::DeserializeOwned;
use serde::Deserialize;
use std::path::Path;

/// The record layout this build writes and reads.
pub const SCHEMA_VERSION: u32 = 2;

/// The record version whose summaries carry their verdict (older ones are
/// judged on reading from the figures they hold).
pub const VERDICT_SINCE: u32 = 2;

/// The version of a record that does not say (written before the field).
pub fn unversioned() -> u32 {
    1
}

#[derive(Deserialize)]
struct Probe {
    #[serde(default = "unversioned")]
    schema_version: u32,
}

/// Refuse a record newer than this build understands.
pub fn check(path: &Path, found: u32) -> Result<(), ReadError> {
    if found > SCHEMA_VERSION {
        return Err(ReadError::Newer {
            path: path.to_path_buf(),
            found,
            supported: SCHEMA_VERSION,
        });
    }
    Ok(())
}

/// Read one JSON record: its version first (so a newer file is named as
/// newer, not as malformed), then the record.
pub fn read_json<T: DeserializeOwned>(path: &Path) -> Result<T, ReadError> {
    let text = std::fs::read_to_string(path).map_err(|error| ReadError::Io {
        path: path.to_path_buf(),
        error,
    })?;
    parse_json(path, &text)
}

/// [`read_json`] on text already read.
pub fn parse_json<T: DeserializeOwned>(path: &Path, text: &str) -> Result<T, ReadError> {
    let bad = |e: serde_json::Error| ReadError::Bad {
        path: path.to_path_buf(),
        line: e.line(),
        column: e.column(),
        message: e.to_string(),
    };
    let probe: Probe = serde_json::from_str(text).map_err(bad)?;
    check(path, probe.schema_version)?;
    serde_json::from_str(text).map_err(bad)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Deserialize, Debug)]
    struct Rec {
        #[serde(default = "unversioned")]
        schema_version: u32,
        x: u32,
    }

    #[test]
    fn newer_records_are_named_as_newer_older_ones_read() {
        let p = Path::new("run.json");
        let r: Rec = parse_json(p, r#"{"x": 3}"#).unwrap();
        assert_eq!((r.schema_version, r.x), (1, 3), "a record before the field");
        let r: Rec = parse_json(
            p,
            &format!(r#"{{"schema_version": {SCHEMA_VERSION}, "x": 4}}"#),
        )
        .unwrap();
        assert_eq!(r.x, 4);
        let e = parse_json::<Rec>(p, r#"{"schema_version": 99, "x": 5, "new": true}"#)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("run.json") && e.contains("newer packbench") && e.contains("version 99"),
            "{e}"
        );
        // Malformed is still malformed, with its place.
        let e = parse_json::<Rec>(p, "{\"x\": }").unwrap_err().to_string();
        assert!(e.starts_with("run.json:1:"), "{e}");
    }
}
