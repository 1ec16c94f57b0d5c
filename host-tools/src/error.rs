//! The one error type of the host tool: a message, where it happened, and the
//! process exit code it maps to.

use std::fmt;
use std::path::{Path, PathBuf};

/// Exit code: clean run, nothing found.
pub const EXIT_CLEAN: u8 = 0;
/// Exit code: drift found (used by subcommands that look for drift).
pub const EXIT_DRIFT: u8 = 1;
/// Exit code: bad input or usage.
pub const EXIT_BAD_INPUT: u8 = 2;

/// Where an error happened: a file, optionally a 1-based line (of a text
/// log) or a 0-based row (of an array log), optionally a 1-based column
/// (field number) with the column's name.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Location {
    /// The file.
    pub path: PathBuf,
    /// 1-based line number.
    pub line: Option<u64>,
    /// 0-based row index of an array log (NumPy's own index).
    pub row: Option<u64>,
    /// 1-based field number.
    pub column: Option<usize>,
    /// Name of the column (feature or time), when known.
    pub name: Option<String>,
}

impl Location {
    /// A whole file.
    pub fn file(path: &Path) -> Self {
        Location {
            path: path.to_path_buf(),
            line: None,
            row: None,
            column: None,
            name: None,
        }
    }

    /// A line of a file.
    pub fn line(path: &Path, line: u64) -> Self {
        Location {
            line: Some(line),
            ..Location::file(path)
        }
    }

    /// A cell: line, 1-based column and the column's name.
    pub fn cell(path: &Path, line: u64, column: usize, name: &str) -> Self {
        Location {
            line: Some(line),
            column: Some(column),
            name: Some(name.to_string()),
            ..Location::file(path)
        }
    }

    /// A value of an array log: 0-based row, 1-based column and the column's
    /// name.
    pub fn row_cell(path: &Path, row: u64, column: usize, name: &str) -> Self {
        Location {
            row: Some(row),
            column: Some(column),
            name: Some(name.to_string()),
            ..Location::file(path)
        }
    }

    /// Names the column without a field number.
    pub fn named(mut self, name: &str) -> Self {
        self.name = Some(name.to_string());
        self
    }
}

impl fmt::Display for Location {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.path.display())?;
        if let Some(line) = self.line {
            write!(f, ":{line}")?;
            if let Some(col) = self.column {
                write!(f, ":{col}")?;
            }
        } else if let Some(row) = self.row {
            write!(f, ": row {row}")?;
            if let Some(col) = self.column {
                write!(f, ", column {col}")?;
            }
        } else if let Some(col) = self.column {
            write!(f, ": column {col}")?;
        }
        match self.name.as_deref() {
            Some("") => f.write_str(" (unnamed column)"),
            Some(name) => write!(f, " ({name})"),
            None => Ok(()),
        }
    }
}

/// An error with its exit code and, when it concerns a file, its location.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Error {
    /// Process exit code this error maps to.
    pub code: u8,
    /// Where, when the error concerns a file.
    pub location: Option<Box<Location>>,
    /// What went wrong and what was expected.
    pub message: String,
}

/// Result with [`Error`].
pub type Result<T, E = Error> = std::result::Result<T, E>;

impl Error {
    /// Bad input or usage (exit code 2).
    pub fn input(message: impl Into<String>) -> Self {
        Error {
            code: EXIT_BAD_INPUT,
            location: None,
            message: message.into(),
        }
    }

    /// Bad input at a location (exit code 2).
    pub fn at(location: Location, message: impl Into<String>) -> Self {
        Error::input(message).with_location(location)
    }

    /// A file that cannot be read or written (exit code 2).
    pub fn io(path: &Path, what: &str, err: &std::io::Error) -> Self {
        Error::at(Location::file(path), format!("cannot {what}: {err}"))
    }

    /// Sets or replaces the location.
    pub fn with_location(mut self, location: Location) -> Self {
        self.location = Some(Box::new(location));
        self
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.location {
            Some(loc) => write!(f, "{loc}: {}", self.message),
            None => f.write_str(&self.message),
        }
    }
}

impl std::error::Error for Error {}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn location_formats() {
        let p = Path::new("logs/a.csv");
        let e = Error::at(
            Location::cell(p, 1207, 5, "motor_current_left"),
            "expected a number, found \"12..3\"",
        );
        assert_eq!(
            e.to_string(),
            "logs/a.csv:1207:5 (motor_current_left): expected a number, found \"12..3\""
        );
        assert_eq!(Location::file(p).to_string(), "logs/a.csv");
        assert_eq!(
            Location::line(p, 1).named("x").to_string(),
            "logs/a.csv:1 (x)"
        );
        assert_eq!(
            Location::row_cell(Path::new("logs/b.npy"), 0, 3, "vib").to_string(),
            "logs/b.npy: row 0, column 3 (vib)"
        );
        assert_eq!(e.code, EXIT_BAD_INPUT);
    }
}
