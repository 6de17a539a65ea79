//! A configurable ASCII line protocol, for instruments that speak their own request/reply text.
//!
//! A [`LineSpec`] says what to send (a query template such as `"TLT?\r"`), how a reply ends
//! (a terminator template such as `"\r\n"`), optionally how a reply must start, and for each
//! named value where it sits in the reply and how to scale it:
//!
//! - [`Locator::Delimited`]: split the reply at a delimiter and take field `index` (0-based);
//! - [`Locator::Pattern`]: a tiny pattern, a literal prefix and suffix around one number,
//!   written `"X={}mV"`. No regex crate: one number between two literals covers the replies
//!   we meet, is easy to explain in a config file, and cannot blow up in time or memory.
//!
//! Each value is `raw * scale + offset`. Templates use escapes `\r`, `\n`, `\t`, `\0`, `\\`
//! and `\xHH`. Numbers are decimal with optional sign, point and exponent (the IEEE 488.2
//! NRf shape, [`crate::scpi::parse_nrf`]).
//!
//! [`LineSpec`] is built from plain values ([`LineSpec::new`], [`FieldSpec`]) so the daemon's
//! config layer can map TOML onto it; every check returns a [`SpecError`], never a panic.
//! Decode errors ([`LineError`]) name the field and show the reply, escaped and truncated.
//!
//! Submodule [`tilt`]: OUR OWN invented tiltmeter reply format and its default spec.

pub mod tilt;

use std::sync::Arc;

use crate::text::{SHOWN_REPLY_CHARS, escape_bytes, find_line};

/// Largest accepted `max_reply_len`.
pub const MAX_REPLY_LEN_LIMIT: usize = 4096;
/// Most fields in one spec.
pub const MAX_FIELDS: usize = 32;

/// An invalid [`LineSpec`] or template.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SpecError {
    /// A bad escape in a template.
    #[error(
        "{what} template {template:?}: {reason} at character {position} (allowed escapes: \\r \\n \\t \\0 \\\\ \\xHH)"
    )]
    Escape {
        /// Which template.
        what: &'static str,
        /// The template as given.
        template: String,
        /// Character offset.
        position: usize,
        /// What was wrong.
        reason: &'static str,
    },
    /// A template that must not be empty is.
    #[error("{what} must not be empty")]
    Empty {
        /// Which part.
        what: &'static str,
    },
    /// No fields, or too many.
    #[error("a line spec needs 1 to {MAX_FIELDS} fields, got {got}")]
    FieldCount {
        /// Fields given.
        got: usize,
    },
    /// Two fields with one name.
    #[error("field name {name:?} is used twice")]
    DuplicateField {
        /// The name.
        name: String,
    },
    /// A field name that is empty or not `[A-Za-z0-9_]`.
    #[error("field name {name:?} is invalid: use letters, digits and '_'")]
    FieldName {
        /// The name.
        name: String,
    },
    /// A non-finite or zero scale, or a non-finite offset.
    #[error("field {field:?}: {what} = {value} is not allowed ({allowed})")]
    Number {
        /// The field.
        field: String,
        /// "scale" or "offset".
        what: &'static str,
        /// The value.
        value: f64,
        /// What is allowed.
        allowed: &'static str,
    },
    /// A pattern without exactly one `{}`.
    #[error(
        "field {field:?}: pattern {pattern:?} must contain exactly one {{}} marking the number"
    )]
    Pattern {
        /// The field.
        field: String,
        /// The pattern.
        pattern: String,
    },
    /// A delimiter or pattern literal that contains the reply terminator.
    #[error("field {field:?}: its delimiter or pattern contains the reply terminator")]
    ContainsTerminator {
        /// The field.
        field: String,
    },
    /// `max_reply_len` outside 1..=4096.
    #[error("max_reply_len = {got} out of range 1 to {MAX_REPLY_LEN_LIMIT}")]
    MaxLen {
        /// Value given.
        got: usize,
    },
}

/// Parses a template with escapes into bytes.
pub fn parse_template(what: &'static str, template: &str) -> Result<Vec<u8>, SpecError> {
    let err = |position, reason| SpecError::Escape {
        what,
        template: template.chars().take(64).collect(),
        position,
        reason,
    };
    let mut out = Vec::with_capacity(template.len());
    let mut chars = template.char_indices();
    while let Some((i, c)) = chars.next() {
        if c != '\\' {
            if !c.is_ascii() {
                return Err(err(i, "non-ASCII character (write it as \\xHH bytes)"));
            }
            out.push(c as u8);
            continue;
        }
        match chars.next() {
            Some((_, 'r')) => out.push(b'\r'),
            Some((_, 'n')) => out.push(b'\n'),
            Some((_, 't')) => out.push(b'\t'),
            Some((_, '0')) => out.push(0),
            Some((_, '\\')) => out.push(b'\\'),
            Some((_, 'x')) => {
                let h: String = chars.by_ref().take(2).map(|(_, c)| c).collect();
                if h.len() != 2 {
                    return Err(err(i, "\\x needs two hex digits"));
                }
                out.push(
                    u8::from_str_radix(&h, 16).map_err(|_| err(i, "\\x needs two hex digits"))?,
                );
            }
            Some(_) => return Err(err(i, "unknown escape")),
            None => return Err(err(i, "lone backslash at the end")),
        }
    }
    Ok(out)
}

/// Where a value sits in a reply.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Locator {
    /// Field `index` (0-based) after splitting at `delimiter`.
    Delimited {
        /// The delimiter bytes (non-empty).
        delimiter: Vec<u8>,
        /// Field index, 0-based.
        index: usize,
    },
    /// The number between the first `prefix` and the next `suffix` (either may be empty:
    /// an empty prefix means the start of the reply, an empty suffix means "as long as the
    /// number goes").
    Pattern {
        /// Literal before the number.
        prefix: Vec<u8>,
        /// Literal after the number.
        suffix: Vec<u8>,
    },
}

/// One named value of a reply.
#[derive(Debug, Clone, PartialEq)]
pub struct FieldSpec {
    /// The value's name (`[A-Za-z0-9_]+`, unique in the spec).
    pub name: String,
    /// Where it is.
    pub locator: Locator,
    /// Multiplier applied to the raw number (finite, non-zero).
    pub scale: f64,
    /// Added after scaling (finite).
    pub offset: f64,
}

impl FieldSpec {
    /// A delimited field; `delimiter` is a template (e.g. `","` or `"\t"`).
    pub fn delimited(
        name: &str,
        delimiter: &str,
        index: usize,
        scale: f64,
        offset: f64,
    ) -> Result<Self, SpecError> {
        let delimiter = parse_template("delimiter", delimiter)?;
        if delimiter.is_empty() {
            return Err(SpecError::Empty { what: "delimiter" });
        }
        Ok(FieldSpec {
            name: name.to_owned(),
            locator: Locator::Delimited { delimiter, index },
            scale,
            offset,
        })
    }

    /// A pattern field, e.g. `"X={}mV"`; the pattern is a template with exactly one `{}`.
    pub fn pattern(name: &str, pattern: &str, scale: f64, offset: f64) -> Result<Self, SpecError> {
        let bad = || SpecError::Pattern {
            field: name.to_owned(),
            pattern: pattern.chars().take(64).collect(),
        };
        let (pre, post) = pattern.split_once("{}").ok_or_else(bad)?;
        if post.contains("{}") {
            return Err(bad());
        }
        Ok(FieldSpec {
            name: name.to_owned(),
            locator: Locator::Pattern {
                prefix: parse_template("pattern", pre)?,
                suffix: parse_template("pattern", post)?,
            },
            scale,
            offset,
        })
    }
}

/// A reply that could not be decoded. Every variant names the field (where one is involved)
/// and shows the reply, escaped and truncated.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum LineError {
    /// No terminator within `max_reply_len` bytes.
    #[error("no reply terminator {terminator} within {max} bytes: {reply}")]
    TooLong {
        /// The limit.
        max: usize,
        /// The terminator, escaped.
        terminator: String,
        /// The reply so far.
        reply: String,
    },
    /// The reply does not start with the required prefix.
    #[error("reply does not start with {expected}: {reply}")]
    WrongPrefix {
        /// The prefix, escaped.
        expected: String,
        /// The reply.
        reply: String,
    },
    /// A delimited field index beyond the fields present.
    #[error("field {field:?}: needs field #{index} but the reply has {found} fields: {reply}")]
    MissingField {
        /// The field.
        field: String,
        /// Index wanted.
        index: usize,
        /// Fields found.
        found: usize,
        /// The reply.
        reply: String,
    },
    /// A pattern whose prefix or suffix is absent.
    #[error("field {field:?}: pattern {pattern} not found in {reply}")]
    PatternNotFound {
        /// The field.
        field: String,
        /// The pattern, escaped (`{}` marks the number).
        pattern: String,
        /// The reply.
        reply: String,
    },
    /// Text where a number should be.
    #[error("field {field:?}: {text} is not a number, in {reply}")]
    BadNumber {
        /// The field.
        field: String,
        /// The text found, escaped.
        text: String,
        /// The reply.
        reply: String,
    },
}

/// Values decoded from one reply, in the order of [`LineSpec::fields`].
#[derive(Debug, Clone, PartialEq)]
pub struct Reading(pub Vec<f64>);

/// A validated line protocol description. See the module docs.
#[derive(Debug, Clone, PartialEq)]
pub struct LineSpec {
    query: Vec<u8>,
    terminator: Vec<u8>,
    reply_prefix: Vec<u8>,
    max_reply_len: usize,
    fields: Vec<FieldSpec>,
}

impl LineSpec {
    /// Default longest reply body.
    pub const DEFAULT_MAX_REPLY_LEN: usize = 256;

    /// Builds and validates a spec: `query` and `reply_terminator` are templates (non-empty),
    /// `fields` are 1 to [`MAX_FIELDS`] uniquely named values. The reply prefix is empty and
    /// the reply length limit [`Self::DEFAULT_MAX_REPLY_LEN`]; change them with
    /// [`Self::with_reply_prefix`] and [`Self::with_max_reply_len`].
    pub fn new(
        query: &str,
        reply_terminator: &str,
        fields: Vec<FieldSpec>,
    ) -> Result<Self, SpecError> {
        let query = parse_template("query", query)?;
        if query.is_empty() {
            return Err(SpecError::Empty { what: "query" });
        }
        let terminator = parse_template("reply terminator", reply_terminator)?;
        if terminator.is_empty() {
            return Err(SpecError::Empty {
                what: "reply terminator",
            });
        }
        if fields.is_empty() || fields.len() > MAX_FIELDS {
            return Err(SpecError::FieldCount { got: fields.len() });
        }
        for (i, f) in fields.iter().enumerate() {
            if f.name.is_empty()
                || !f
                    .name
                    .bytes()
                    .all(|b| b.is_ascii_alphanumeric() || b == b'_')
            {
                return Err(SpecError::FieldName {
                    name: f.name.chars().take(64).collect(),
                });
            }
            if fields[..i].iter().any(|g| g.name == f.name) {
                return Err(SpecError::DuplicateField {
                    name: f.name.clone(),
                });
            }
            if !f.scale.is_finite() || f.scale == 0.0 {
                return Err(SpecError::Number {
                    field: f.name.clone(),
                    what: "scale",
                    value: f.scale,
                    allowed: "finite and non-zero",
                });
            }
            if !f.offset.is_finite() {
                return Err(SpecError::Number {
                    field: f.name.clone(),
                    what: "offset",
                    value: f.offset,
                    allowed: "finite",
                });
            }
            let contains = |hay: &[u8]| {
                hay.len() >= terminator.len()
                    && hay.windows(terminator.len()).any(|w| w == terminator)
            };
            let bad = match &f.locator {
                Locator::Delimited { delimiter, .. } => {
                    if delimiter.is_empty() {
                        return Err(SpecError::Empty { what: "delimiter" });
                    }
                    contains(delimiter)
                }
                Locator::Pattern { prefix, suffix } => contains(prefix) || contains(suffix),
            };
            if bad {
                return Err(SpecError::ContainsTerminator {
                    field: f.name.clone(),
                });
            }
        }
        Ok(LineSpec {
            query,
            terminator,
            reply_prefix: Vec::new(),
            max_reply_len: Self::DEFAULT_MAX_REPLY_LEN,
            fields,
        })
    }

    /// Requires every reply to start with `prefix` (a template); helps to resynchronise.
    pub fn with_reply_prefix(mut self, prefix: &str) -> Result<Self, SpecError> {
        self.reply_prefix = parse_template("reply prefix", prefix)?;
        Ok(self)
    }

    /// Sets the longest reply body, 1 to [`MAX_REPLY_LEN_LIMIT`] bytes.
    pub fn with_max_reply_len(mut self, max: usize) -> Result<Self, SpecError> {
        if !(1..=MAX_REPLY_LEN_LIMIT).contains(&max) {
            return Err(SpecError::MaxLen { got: max });
        }
        self.max_reply_len = max;
        Ok(self)
    }

    /// The query bytes.
    pub fn query(&self) -> &[u8] {
        &self.query
    }

    /// The reply terminator bytes.
    pub fn terminator(&self) -> &[u8] {
        &self.terminator
    }

    /// The required reply prefix (may be empty).
    pub fn reply_prefix(&self) -> &[u8] {
        &self.reply_prefix
    }

    /// The longest reply body.
    pub fn max_reply_len(&self) -> usize {
        self.max_reply_len
    }

    /// The fields, in the order of [`Reading`].
    pub fn fields(&self) -> &[FieldSpec] {
        &self.fields
    }

    /// Position of the field called `name`.
    pub fn index_of(&self, name: &str) -> Option<usize> {
        self.fields.iter().position(|f| f.name == name)
    }

    /// The value called `name` in `reading`.
    pub fn value(&self, reading: &Reading, name: &str) -> Option<f64> {
        self.index_of(name).and_then(|i| reading.0.get(i).copied())
    }

    /// Appends the query bytes.
    pub fn encode_query(&self, out: &mut Vec<u8>) {
        out.extend_from_slice(&self.query);
    }

    /// Decodes one reply from the start of `buf`: `Ok(Some((reading, consumed)))`, `Ok(None)`
    /// if the terminator has not arrived, or an error (the caller then drops `consumed`
    /// bytes if the reply was complete, or its whole buffer for [`LineError::TooLong`]).
    pub fn decode(&self, buf: &[u8]) -> Result<Option<(Reading, usize)>, LineError> {
        match find_line(buf, &self.terminator, self.max_reply_len) {
            Ok(Some((len, consumed))) => Ok(Some((self.parse_reply(&buf[..len])?, consumed))),
            Ok(None) => Ok(None),
            Err(e) => Err(LineError::TooLong {
                max: e.max_len,
                terminator: e.terminator,
                reply: e.shown,
            }),
        }
    }

    /// Decodes one reply body (terminator removed).
    pub fn parse_reply(&self, line: &[u8]) -> Result<Reading, LineError> {
        let shown = || escape_bytes(line, SHOWN_REPLY_CHARS);
        if !line.starts_with(&self.reply_prefix) {
            return Err(LineError::WrongPrefix {
                expected: escape_bytes(&self.reply_prefix, 32),
                reply: shown(),
            });
        }
        let mut values = Vec::with_capacity(self.fields.len());
        for f in &self.fields {
            let text = match &f.locator {
                Locator::Delimited { delimiter, index } => {
                    let mut n = 0;
                    let mut found = None;
                    for (i, part) in split_bytes(line, delimiter).enumerate() {
                        n = i + 1;
                        if i == *index {
                            found = Some(part);
                            break;
                        }
                    }
                    found.ok_or_else(|| LineError::MissingField {
                        field: f.name.clone(),
                        index: *index,
                        found: n,
                        reply: shown(),
                    })?
                }
                Locator::Pattern { prefix, suffix } => pattern_find(line, prefix, suffix)
                    .ok_or_else(|| LineError::PatternNotFound {
                        field: f.name.clone(),
                        pattern: format!(
                            "{}{{}}{}",
                            escape_bytes(prefix, 24),
                            escape_bytes(suffix, 24)
                        ),
                        reply: shown(),
                    })?,
            };
            let raw = parse_number(text).ok_or_else(|| LineError::BadNumber {
                field: f.name.clone(),
                text: escape_bytes(text, 32),
                reply: shown(),
            })?;
            values.push(raw * f.scale + f.offset);
        }
        Ok(Reading(values))
    }
}

fn trim(b: &[u8]) -> &[u8] {
    let start = b
        .iter()
        .position(|c| !c.is_ascii_whitespace())
        .unwrap_or(b.len());
    let end = b
        .iter()
        .rposition(|c| !c.is_ascii_whitespace())
        .map_or(start, |e| e + 1);
    &b[start..end.max(start)]
}

/// Splits at a non-empty delimiter (an empty one yields the whole input).
fn split_bytes<'a>(hay: &'a [u8], delim: &'a [u8]) -> impl Iterator<Item = &'a [u8]> + 'a {
    let mut rest = Some(hay);
    std::iter::from_fn(move || {
        let r = rest?;
        if delim.is_empty() {
            rest = None;
            return Some(r);
        }
        match find(r, delim) {
            Some(i) => {
                rest = Some(&r[i + delim.len()..]);
                Some(&r[..i])
            }
            None => {
                rest = None;
                Some(r)
            }
        }
    })
}

fn find(hay: &[u8], needle: &[u8]) -> Option<usize> {
    if needle.is_empty() {
        return Some(0);
    }
    hay.windows(needle.len()).position(|w| w == needle)
}

fn pattern_find<'a>(line: &'a [u8], prefix: &[u8], suffix: &[u8]) -> Option<&'a [u8]> {
    let start = find(line, prefix)? + prefix.len();
    let rest = &line[start..];
    if suffix.is_empty() {
        // The number runs as far as number characters go.
        let lead = rest.iter().take_while(|b| **b == b' ').count();
        let len = rest[lead..]
            .iter()
            .take_while(|b| b.is_ascii_digit() || matches!(b, b'+' | b'-' | b'.' | b'e' | b'E'))
            .count();
        return Some(&rest[..lead + len]);
    }
    Some(&rest[..find(rest, suffix)?])
}

fn parse_number(text: &[u8]) -> Option<f64> {
    let t = std::str::from_utf8(trim(text)).ok()?;
    crate::scpi::parse_nrf(t).ok()
}

/// A query with its spec, for [`crate::session::Session`] (the `Arc` makes cloning cheap).
#[derive(Debug, Clone)]
pub struct LineQuery(pub Arc<LineSpec>);

impl crate::session::Exchange for LineQuery {
    type Reply = Reading;
    type Error = LineError;

    fn encode(&self, out: &mut Vec<u8>) {
        self.0.encode_query(out);
    }

    fn decode_reply(&self, buf: &[u8]) -> Result<Option<(Reading, usize)>, LineError> {
        self.0.decode(buf)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn spec() -> LineSpec {
        LineSpec::new(
            "MEAS?\\r",
            "\\r\\n",
            vec![
                FieldSpec::delimited("a", ";", 1, 2.0, 1.0).unwrap(),
                FieldSpec::pattern("volts", "U={}mV", 1e-3, 0.0).unwrap(),
                FieldSpec::pattern("tail", "#{}", 1.0, 0.0).unwrap(),
            ],
        )
        .unwrap()
    }

    #[test]
    fn templates() {
        assert_eq!(parse_template("q", "TLT?\\r").unwrap(), b"TLT?\r");
        assert_eq!(
            parse_template("q", "a\\x1B\\\\\\n\\t\\0").unwrap(),
            b"a\x1b\\\n\t\0"
        );
        for bad in ["\\q", "\\", "\\x1", "\\xZZ", "é"] {
            assert!(parse_template("q", bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn decodes_delimited_and_pattern_fields() {
        let s = spec();
        let r = b"ID;12.5;U= -250.0mV; #7e1\r\nnext";
        let (reading, used) = s.decode(r).unwrap().unwrap();
        assert_eq!(used, r.len() - 4);
        assert_eq!(reading.0, vec![26.0, -0.25, 70.0]);
        assert_eq!(s.value(&reading, "volts"), Some(-0.25));
        assert_eq!(s.value(&reading, "nope"), None);
        assert_eq!(s.decode(b"ID;12.5"), Ok(None));
    }

    #[test]
    fn errors_name_the_field_and_show_the_reply() {
        let s = spec();
        let e = s.parse_reply(b"ID").unwrap_err();
        assert!(
            matches!(&e, LineError::MissingField { field, index: 1, found: 1, .. } if field == "a")
        );
        let e = s.parse_reply(b"ID;x1;U=1mV;#1").unwrap_err();
        let msg = e.to_string();
        assert!(
            msg.contains("\"a\"") && msg.contains("\"x1\"") && msg.contains("ID;x1;U=1mV;#1"),
            "{msg}"
        );
        let e = s.parse_reply(b"ID;1;V=1mV;#1\x07").unwrap_err();
        assert!(matches!(&e, LineError::PatternNotFound { field, .. } if field == "volts"));
        let long = vec![b'x'; 300];
        let e = s.decode(&long).unwrap_err();
        let msg = e.to_string();
        assert!(msg.contains("more bytes") && msg.len() < 300, "{msg}");
    }

    #[test]
    fn validation_errors() {
        let f = || FieldSpec::delimited("a", ",", 0, 1.0, 0.0).unwrap();
        assert!(matches!(
            LineSpec::new("", "\\n", vec![f()]),
            Err(SpecError::Empty { .. })
        ));
        assert!(matches!(
            LineSpec::new("Q", "", vec![f()]),
            Err(SpecError::Empty { .. })
        ));
        assert!(matches!(
            LineSpec::new("Q", "\\n", vec![]),
            Err(SpecError::FieldCount { got: 0 })
        ));
        assert!(matches!(
            LineSpec::new("Q", "\\n", vec![f(), f()]),
            Err(SpecError::DuplicateField { .. })
        ));
        let mut g = f();
        g.scale = 0.0;
        assert!(matches!(
            LineSpec::new("Q", "\\n", vec![g]),
            Err(SpecError::Number { what: "scale", .. })
        ));
        let mut g = f();
        g.offset = f64::NAN;
        assert!(LineSpec::new("Q", "\\n", vec![g]).is_err());
        let mut g = f();
        g.name = "a b".into();
        assert!(matches!(
            LineSpec::new("Q", "\\n", vec![g]),
            Err(SpecError::FieldName { .. })
        ));
        assert!(FieldSpec::pattern("p", "no marker", 1.0, 0.0).is_err());
        assert!(FieldSpec::pattern("p", "{}{}", 1.0, 0.0).is_err());
        assert!(FieldSpec::delimited("d", "", 0, 1.0, 0.0).is_err());
        let nl = FieldSpec::delimited("d", "\\n", 0, 1.0, 0.0).unwrap();
        assert!(matches!(
            LineSpec::new("Q", "\\n", vec![nl]),
            Err(SpecError::ContainsTerminator { .. })
        ));
        let s = LineSpec::new("Q", "\\n", vec![f()]).unwrap();
        assert!(s.clone().with_max_reply_len(0).is_err());
        assert!(s.clone().with_max_reply_len(5000).is_err());
        let s = s.with_reply_prefix("OK,").unwrap();
        assert!(matches!(
            s.parse_reply(b"NO,1"),
            Err(LineError::WrongPrefix { .. })
        ));
        assert_eq!(
            s.parse_reply(b"OK,1").unwrap_err(),
            LineError::BadNumber {
                field: "a".into(),
                text: "\"OK\"".into(),
                reply: "\"OK,1\"".into()
            }
        );
    }

    proptest! {
        #[test]
        fn decode_never_panics_and_is_bounded(buf in proptest::collection::vec(any::<u8>(), 0..400)) {
            let s = spec();
            match s.decode(&buf) {
                Ok(Some((r, n))) => { prop_assert_eq!(r.0.len(), 3); prop_assert!(n <= buf.len() && n <= 258); }
                Ok(None) => prop_assert!(buf.len() < 258),
                Err(_) => {}
            }
        }

        #[test]
        fn spec_construction_never_panics(
            q in "\\PC{0,12}", t in "\\PC{0,6}", d in "\\PC{0,4}", p in "\\PC{0,10}",
            idx in 0usize..5, scale in any::<f64>(), offset in any::<f64>(),
        ) {
            let mut fields = Vec::new();
            if let Ok(f) = FieldSpec::delimited("d", &d, idx, scale, offset) { fields.push(f); }
            if let Ok(f) = FieldSpec::pattern("p", &p, scale, offset) { fields.push(f); }
            if let Ok(s) = LineSpec::new(&q, &t, fields) {
                let _ = s.decode(b"1,2,3\r\n");
            }
        }
    }
}
