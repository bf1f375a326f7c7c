//! The one error type of the crate.
//!
//! An [`Error`] is a message plus the context known where it was raised: the file, the line
//! (1-based, the header is line 1) and the column or config key. It prints as one line, e.g.
//! `left.csv: line 17: column birth: not a date`; the binary prefixes `error: `.

use std::fmt;
use std::path::{Path, PathBuf};

/// What went wrong, in broad classes; the binary maps some of them to exit codes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ErrorKind {
    /// The config file is unreadable or says something invalid.
    Config,
    /// An input table is unreadable or malformed.
    Input,
    /// An output could not be written.
    Output,
    /// The data cannot support the requested run (e.g. an infeasible linkage with
    /// `stop_if_infeasible`).
    Infeasible,
    /// The run's estimated peak memory is over its memory budget; it stopped before making
    /// any candidate pair.
    OverBudget,
    /// The caller asked the run to stop ([`crate::pipeline::Progress::cancelled`]).
    Cancelled,
}

/// An error with the context needed to find its cause in the user's files.
#[derive(Debug, Clone)]
pub struct Error {
    kind: ErrorKind,
    message: String,
    file: Option<PathBuf>,
    line: Option<u64>,
    /// What `line` counts: "line" of a text file, or "row" of a Parquet file or data frame.
    place: &'static str,
    column: Option<String>,
}

/// The crate's result type.
pub type Result<T> = std::result::Result<T, Error>;

impl Error {
    /// A new error of `kind` with a plain message and no context yet.
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> Self {
        Error {
            kind,
            message: message.into(),
            file: None,
            line: None,
            place: "line",
            column: None,
        }
    }

    /// Shorthand for a config error.
    pub fn config(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Config, message)
    }

    /// Shorthand for an input error.
    pub fn input(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Input, message)
    }

    /// Shorthand for an output error.
    pub fn output(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Output, message)
    }

    /// Tags the error with a file, unless it already names one.
    pub fn with_file(mut self, path: &Path) -> Self {
        if self.file.is_none() {
            self.file = Some(path.to_path_buf());
        }
        self
    }

    /// Tags the error with a line number (1-based), unless it already has one.
    pub fn with_line(mut self, line: u64) -> Self {
        if self.line.is_none() {
            self.line = Some(line);
        }
        self
    }

    /// Tags the error with a 1-based record number of a table that has no lines (a Parquet
    /// file or a data frame), unless it already has a line or row.
    pub fn with_row(mut self, row: u64) -> Self {
        if self.line.is_none() {
            self.line = Some(row);
            self.place = "row";
        }
        self
    }

    /// Tags the error with a column name or config key, unless it already has one.
    pub fn with_column(mut self, column: impl Into<String>) -> Self {
        if self.column.is_none() {
            self.column = Some(column.into());
        }
        self
    }

    /// The same error without its line or row: for config text the user never saw as lines
    /// (a config given as a dictionary and rendered to TOML).
    pub fn without_line(mut self) -> Self {
        self.line = None;
        self.place = "line";
        self
    }

    /// What [`Error::line`] counts: "line" of a text file, or "row" of a Parquet file or
    /// data frame.
    pub fn place(&self) -> &'static str {
        self.place
    }

    /// The broad class of the error.
    pub fn kind(&self) -> ErrorKind {
        self.kind
    }

    /// The file the error names, if any.
    pub fn file(&self) -> Option<&Path> {
        self.file.as_deref()
    }

    /// The line (of a text file) or row (of a Parquet file or frame) the error names.
    pub fn line(&self) -> Option<u64> {
        self.line
    }

    /// The column or config key the error names.
    pub fn column(&self) -> Option<&str> {
        self.column.as_deref()
    }

    /// The message without context.
    pub fn message(&self) -> &str {
        &self.message
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if let Some(file) = &self.file {
            write!(f, "{}: ", file.display())?;
        }
        if let Some(line) = self.line {
            write!(f, "{} {line}: ", self.place)?;
        }
        if let Some(column) = &self.column {
            write!(f, "column {column}: ")?;
        }
        // Keep the error on one line whatever a library put in its message.
        let one_line: Vec<&str> = self.message.lines().map(str::trim).collect();
        write!(f, "{}", one_line.join(" "))
    }
}

impl std::error::Error for Error {}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn prints_context_on_one_line() {
        let e = Error::input("not a date\nsecond line")
            .with_column("birth")
            .with_line(17)
            .with_file(Path::new("left.csv"));
        assert_eq!(
            e.to_string(),
            "left.csv: line 17: column birth: not a date second line"
        );
    }

    #[test]
    fn first_context_wins() {
        let e = Error::input("x").with_line(3).with_line(9);
        assert_eq!(e.to_string(), "line 3: x");
    }
}
