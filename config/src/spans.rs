//! Where each key sits in the file: key path → byte span, and byte offset → line:column.
//!
//! Built once from toml's span-preserving parse tree so that validation errors, which
//! are found after serde has already turned the text into structs, can still point at
//! the exact place in the file.

use std::collections::HashMap;
use std::ops::Range;

use toml::de::{DeTable, DeValue};

use crate::errors::{ConfigError, ConfigErrors};

/// Byte spans of every key path in one TOML text.
pub(crate) struct SpanIndex {
    origin: String,
    /// Line start offsets, for offset → line:column.
    line_starts: Vec<usize>,
    text: String,
    /// path → span of its value (tables: the span toml reports for the table).
    values: HashMap<String, Range<usize>>,
    /// path → span of its key (absent for array elements and the root).
    keys: HashMap<String, Range<usize>>,
}

impl SpanIndex {
    /// Parses `text` far enough to know every key's position.
    /// A TOML syntax error becomes a single [`ConfigError`] with its position.
    pub(crate) fn build(text: &str, origin: &str) -> Result<Self, ConfigErrors> {
        let mut idx = SpanIndex {
            origin: origin.to_string(),
            line_starts: std::iter::once(0)
                .chain(text.match_indices('\n').map(|(i, _)| i + 1))
                .collect(),
            text: text.to_string(),
            values: HashMap::new(),
            keys: HashMap::new(),
        };
        match DeTable::parse(text) {
            Ok(table) => {
                let span = table.span();
                idx.values.insert(String::new(), span);
                idx.walk_table("", table.get_ref());
                Ok(idx)
            }
            Err(e) => {
                let span = e.span().unwrap_or(0..0);
                Err(ConfigErrors(vec![idx.error_at(
                    span,
                    "",
                    String::new(),
                    format!("TOML syntax error: {}", e.message().trim()),
                    "valid TOML (see https://toml.io)".into(),
                )]))
            }
        }
    }

    fn walk_table(&mut self, prefix: &str, table: &DeTable<'_>) {
        for (k, v) in table.iter() {
            let path = join(prefix, k.get_ref());
            self.keys.insert(path.clone(), k.span());
            self.walk_value(path, v.span(), v.get_ref());
        }
    }

    fn walk_value(&mut self, path: String, span: Range<usize>, value: &DeValue<'_>) {
        match value {
            DeValue::Table(t) => self.walk_table(&path, t),
            DeValue::Array(items) => {
                for (i, item) in items.iter().enumerate() {
                    self.walk_value(format!("{path}[{i}]"), item.span(), item.get_ref());
                }
            }
            _ => {}
        }
        self.values.insert(path, span);
    }

    /// The span of `path`, or of its nearest ancestor present in the file.
    pub(crate) fn span_of(&self, path: &str) -> Range<usize> {
        let mut p = path.to_string();
        loop {
            if let Some(s) = self.values.get(&p) {
                return s.clone();
            }
            match p.rfind(['.', '[']) {
                Some(i) => p.truncate(i),
                None => return self.values.get("").cloned().unwrap_or(0..0),
            }
        }
    }

    /// The deepest key path whose value span contains `span` (empty if none).
    pub(crate) fn innermost_containing(&self, span: &Range<usize>) -> String {
        self.values
            .iter()
            .filter(|(p, s)| {
                !p.is_empty() && s.start <= span.start && span.end <= s.end.max(s.start + 1)
            })
            .min_by_key(|(p, s)| (s.end - s.start, std::cmp::Reverse(p.len())))
            .map(|(p, _)| p.clone())
            .unwrap_or_default()
    }

    /// The span of the key itself at `path` (falls back to [`SpanIndex::span_of`]).
    pub(crate) fn key_span_of(&self, path: &str) -> Range<usize> {
        self.keys
            .get(path)
            .cloned()
            .unwrap_or_else(|| self.span_of(path))
    }

    /// The text of the value at `path`, shortened for messages.
    pub(crate) fn found(&self, path: &str) -> String {
        match self.values.get(path) {
            Some(s) => snippet(&self.text, s.clone()),
            None => String::new(),
        }
    }

    /// 1-based line and column (in characters) of a byte offset.
    pub(crate) fn line_col(&self, offset: usize) -> (usize, usize) {
        let offset = offset.min(self.text.len());
        let line = self.line_starts.partition_point(|&s| s <= offset);
        let start = self.line_starts[line.saturating_sub(1)];
        let col = self
            .text
            .get(start..offset)
            .map(|s| s.chars().count())
            .unwrap_or(0);
        (line, col + 1)
    }

    /// An error located at `span`.
    pub(crate) fn error_at(
        &self,
        span: Range<usize>,
        path: &str,
        found: String,
        problem: String,
        allowed: String,
    ) -> ConfigError {
        let (line, column) = self.line_col(span.start);
        ConfigError {
            origin: self.origin.clone(),
            path: path.to_string(),
            line,
            column,
            found,
            problem,
            allowed,
        }
    }

    /// An error about the value at `path` (or its table, when the key is missing).
    pub(crate) fn error(&self, path: &str, problem: String, allowed: String) -> ConfigError {
        self.error_at(self.span_of(path), path, self.found(path), problem, allowed)
    }
}

fn join(prefix: &str, key: &str) -> String {
    if prefix.is_empty() {
        key.to_string()
    } else {
        format!("{prefix}.{key}")
    }
}

fn snippet(text: &str, span: Range<usize>) -> String {
    let s = text.get(span).unwrap_or("").trim();
    let first_line = s.lines().next().unwrap_or("");
    let mut out: String = first_line.chars().take(60).collect();
    if out.len() < s.len() {
        out.push('…');
    }
    out
}
