//! Configuration errors: one [`ConfigError`] per problem, gathered in [`ConfigErrors`].
//!
//! Each error names where it is (origin, line, column, key path), what was found and
//! what is allowed, so a person can fix the file without reading the source.

use std::fmt;

/// One problem in a configuration file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ConfigError {
    /// The file (or other origin) the text came from.
    pub origin: String,
    /// Dotted key path, with array indices in brackets: `legs[1].length_m`.
    /// Empty for problems with the file as a whole.
    pub path: String,
    /// 1-based line of the offending value (or of its table when a key is missing); 0 if unknown.
    pub line: usize,
    /// 1-based column, counted in characters; 0 if unknown.
    pub column: usize,
    /// The offending value as written in the file, or empty when the key is missing.
    pub found: String,
    /// What is wrong.
    pub problem: String,
    /// What would be accepted instead.
    pub allowed: String,
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.origin)?;
        if self.line > 0 {
            write!(f, ":{}:{}", self.line, self.column)?;
        }
        write!(f, ": ")?;
        if !self.path.is_empty() {
            write!(f, "`{}`", self.path)?;
            if !self.found.is_empty() {
                write!(f, " = {}", self.found)?;
            }
            write!(f, ": ")?;
        }
        write!(f, "{}", self.problem)?;
        if !self.allowed.is_empty() {
            write!(f, " (allowed: {})", self.allowed)?;
        }
        Ok(())
    }
}

/// Every problem found in one configuration, in file order.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ConfigErrors(pub Vec<ConfigError>);

impl fmt::Display for ConfigErrors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let n = self.0.len();
        writeln!(
            f,
            "{n} configuration error{}:",
            if n == 1 { "" } else { "s" }
        )?;
        for e in &self.0 {
            writeln!(f, "  {e}")?;
        }
        Ok(())
    }
}

impl std::error::Error for ConfigErrors {}

impl ConfigErrors {
    /// Sorts errors into file order so the output reads top to bottom.
    pub(crate) fn sorted(mut self) -> Self {
        self.0
            .sort_by(|a, b| (a.line, a.column, &a.path).cmp(&(b.line, b.column, &b.path)));
        self.0.dedup();
        self
    }
}
