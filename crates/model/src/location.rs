//! Positions in text files: byte offsets (as the TOML parser reports them)
//! turned into the `file:line:column` that every input error carries.

use std::fmt;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// A place in a file, 1-based line and column (column counts characters).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Location {
    pub file: PathBuf,
    pub line: usize,
    pub column: usize,
}

impl Location {
    /// Locate a byte offset in `text`.
    pub fn at(file: &Path, text: &str, offset: usize) -> Location {
        let offset = offset.min(text.len());
        let mut line = 1;
        let mut line_start = 0;
        for (i, b) in text.bytes().enumerate().take(offset) {
            if b == b'\n' {
                line += 1;
                line_start = i + 1;
            }
        }
        let column = text
            .get(line_start..offset)
            .map(|s| s.chars().count())
            .unwrap_or(0)
            + 1;
        Location {
            file: file.to_path_buf(),
            line,
            column,
        }
    }

    /// Locate the start of a span.
    pub fn of_span(file: &Path, text: &str, span: &Range<usize>) -> Location {
        Location::at(file, text, span.start)
    }
}

impl fmt::Display for Location {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}:{}:{}", self.file.display(), self.line, self.column)
    }
}

/// An error at a place in a file.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{location}: {message}")]
pub struct LocatedError {
    pub location: Location,
    pub message: String,
}

/// Several errors found in one file, reported together.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub struct InputErrors(pub Vec<LocatedError>);

impl fmt::Display for InputErrors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, e) in self.0.iter().enumerate() {
            if i > 0 {
                writeln!(f)?;
            }
            write!(f, "{e}")?;
        }
        Ok(())
    }
}

/// Turn a TOML parse error into a located error.
pub fn toml_error(file: &Path, text: &str, err: &toml::de::Error) -> LocatedError {
    let location = match err.span() {
        Some(span) => Location::of_span(file, text, &span),
        None => Location {
            file: file.to_path_buf(),
            line: 1,
            column: 1,
        },
    };
    LocatedError {
        location,
        message: err.message().trim().to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn offsets_become_lines_and_columns() {
        let text = "a = 1\nbb = 2\n  c = 3";
        let p = Path::new("f.toml");
        assert_eq!(Location::at(p, text, 0).to_string(), "f.toml:1:1");
        assert_eq!(Location::at(p, text, 6).to_string(), "f.toml:2:1");
        assert_eq!(Location::at(p, text, 15).to_string(), "f.toml:3:3");
    }
}
