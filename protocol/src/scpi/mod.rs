//! SCPI-style ASCII messages as IEEE 488.2 describes them, for both sides of the line.
//!
//! The master (daemon) encodes program messages and decodes response messages; the device
//! (simulator) splits received bytes into program messages, parses them into
//! [`ProgramUnit`]s (header + parameters) and formats responses. Main items:
//!
//! - Framing: [`split_message`] finds one message ended by LF (a CR before the LF is
//!   tolerated, since IEEE 488.2 counts CR as white space). Over a serial line there is no
//!   EOI, so the response terminator NL^END is sent as a plain LF ([`Terminator`]).
//! - Device side: [`parse_program_message`] returns the units that parsed before the first
//!   error and that error (IEEE 488.2 §6.1.6: a parser error discards the rest of the message).
//!   Compound headers are resolved with SCPI's "current path" rule (SCPI 1999.0 Vol 1 §6.2.4,
//!   from memory): after `OUTP1:VOLT 5;` a header `STAT ON` means `OUTP1:STAT ON`; a leading
//!   `:` starts again at the root; common commands (`*IDN?`) leave the path alone.
//! - Mnemonics: [`mnemonic_matches`] accepts the short form (the upper-case part of the
//!   pattern) or the long form, case-insensitively; a trailing number is a numeric suffix
//!   ([`Node::suffix`]), e.g. `OUTPut2`.
//! - Numbers: [`parse_nr1`], [`parse_nr2`], [`parse_nr3`] (the strict IEEE 488.2 response
//!   forms) and [`parse_nrf`] (the flexible decimal numeric program data); [`format_nr1`],
//!   [`format_nr3`].
//! - [`errors`]: the `SYSTem:ERRor?` queue and the standard error numbers.
//! - [`heater`]: OUR OWN invented command set for a multi-channel heater supply.
//!
//! Limits (every buffer is bounded): a message holds at most [`MAX_MESSAGE_LEN`] bytes,
//! [`MAX_UNITS`] units, [`MAX_PARAMS`] parameters per unit and [`MAX_NODES`] header nodes; a
//! program mnemonic has at most [`MAX_MNEMONIC_LEN`] characters (IEEE 488.2 §7.6.1, from
//! memory). Not supported: block data (`#…`), expression data, unit suffixes on numbers.

pub mod errors;
pub mod heater;

pub use errors::{ErrorEntry, ErrorQueue, StandardError};

use crate::text::{SHOWN_REPLY_CHARS, escape_bytes};

/// Longest program or response message accepted, terminator excluded.
pub const MAX_MESSAGE_LEN: usize = 1024;
/// Most program message units (or response units) in one message.
pub const MAX_UNITS: usize = 32;
/// Most parameters in one program message unit.
pub const MAX_PARAMS: usize = 16;
/// Most nodes in a resolved compound header.
pub const MAX_NODES: usize = 8;
/// Longest program mnemonic, suffix excluded (IEEE 488.2 §7.6.1.4, from memory: 12 characters).
pub const MAX_MNEMONIC_LEN: usize = 12;
/// Longest numeric token accepted.
pub const MAX_NUMBER_LEN: usize = 64;

/// SCPI's value for "not a number" in responses (SCPI 1999.0 Vol 1 §7.2.1.5, from memory).
pub const SCPI_NAN: f64 = 9.91e37;
/// SCPI's value for positive infinity in responses (same source, from memory).
pub const SCPI_INFINITY: f64 = 9.9e37;

/// The message terminator written after a program or response message.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Terminator {
    /// LF alone (IEEE 488.2's NL; on a serial line the END of NL^END cannot be signalled).
    #[default]
    Lf,
    /// CR LF, for devices or terminals that want it; the CR is white space to a 488.2 parser.
    CrLf,
}

impl Terminator {
    /// The bytes of the terminator.
    pub const fn bytes(self) -> &'static [u8] {
        match self {
            Terminator::Lf => b"\n",
            Terminator::CrLf => b"\r\n",
        }
    }
}

/// What went wrong in an SCPI message; [`ScpiError::standard`] gives the error-queue number.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ScpiError {
    /// No LF within [`MAX_MESSAGE_LEN`] (or the caller's) limit.
    #[error("message longer than {max} bytes without a terminating LF: {shown}")]
    MessageTooLong {
        /// The limit.
        max: usize,
        /// The start of the bytes, escaped.
        shown: String,
    },
    /// A byte that may not appear at this place (non-ASCII, control character, stray symbol).
    #[error("invalid character {found} at byte {position} of {shown}")]
    InvalidCharacter {
        /// Byte offset within the message.
        position: usize,
        /// The offending byte, escaped.
        found: String,
        /// The message, escaped and truncated.
        shown: String,
    },
    /// The message structure is wrong (empty unit, missing separator, bad header).
    #[error("syntax error at byte {position} ({reason}) in {shown}")]
    Syntax {
        /// Byte offset within the message.
        position: usize,
        /// What was wrong.
        reason: &'static str,
        /// The message, escaped and truncated.
        shown: String,
    },
    /// A program mnemonic longer than [`MAX_MNEMONIC_LEN`].
    #[error("program mnemonic {mnemonic:?} is longer than {max} characters")]
    MnemonicTooLong {
        /// The mnemonic (truncated to 32 characters).
        mnemonic: String,
        /// The limit.
        max: usize,
    },
    /// A numeric suffix that does not fit in a `u32`.
    #[error("header suffix {text:?} out of range")]
    SuffixOutOfRange {
        /// The suffix digits (truncated).
        text: String,
    },
    /// Too many units, parameters or header nodes.
    #[error("too many {what} in one message (at most {max})")]
    TooMany {
        /// "units", "parameters" or "header nodes".
        what: &'static str,
        /// The limit.
        max: usize,
    },
    /// A number that does not have the required form.
    #[error("invalid number {text:?}: {reason}")]
    InvalidNumber {
        /// The text (truncated).
        text: String,
        /// Which form was expected or what was wrong.
        reason: &'static str,
    },
    /// A number whose magnitude does not fit in an `f64` or `i64`.
    #[error("number {text:?} is out of range (exponent too large)")]
    ExponentTooLarge {
        /// The text (truncated).
        text: String,
    },
    /// A numeric token longer than [`MAX_NUMBER_LEN`].
    #[error("number has more than {max} characters")]
    TooManyDigits {
        /// The limit.
        max: usize,
    },
    /// A number followed by a unit suffix, which this parser does not accept.
    #[error("unit suffix not allowed after number in {shown}")]
    SuffixNotAllowed {
        /// The parameter, escaped.
        shown: String,
    },
    /// Character program data longer than [`MAX_MNEMONIC_LEN`].
    #[error("character data {text:?} is longer than {max} characters")]
    CharacterDataTooLong {
        /// The text (truncated).
        text: String,
        /// The limit.
        max: usize,
    },
    /// A quoted string that is not closed or has a stray quote.
    #[error("invalid string data {shown}")]
    InvalidString {
        /// The text, escaped.
        shown: String,
    },
    /// A response that does not have the form the query expects.
    #[error("unexpected response: expected {expected}, got {shown}")]
    BadResponse {
        /// What was expected.
        expected: &'static str,
        /// The response, escaped and truncated.
        shown: String,
    },
}

impl ScpiError {
    /// The standard error number a device pushes onto its queue for this error.
    pub fn standard(&self) -> StandardError {
        use StandardError as S;
        match self {
            ScpiError::MessageTooLong { .. } => S::InputBufferOverrun,
            ScpiError::InvalidCharacter { .. } => S::InvalidCharacter,
            ScpiError::Syntax { .. } => S::SyntaxError,
            ScpiError::MnemonicTooLong { .. } => S::ProgramMnemonicTooLong,
            ScpiError::SuffixOutOfRange { .. } => S::HeaderSuffixOutOfRange,
            ScpiError::TooMany { .. } => S::TooMuchData,
            ScpiError::InvalidNumber { .. } => S::InvalidCharacterInNumber,
            ScpiError::ExponentTooLarge { .. } => S::ExponentTooLarge,
            ScpiError::TooManyDigits { .. } => S::TooManyDigits,
            ScpiError::SuffixNotAllowed { .. } => S::SuffixNotAllowed,
            ScpiError::CharacterDataTooLong { .. } => S::CharacterDataTooLong,
            ScpiError::InvalidString { .. } => S::InvalidStringData,
            ScpiError::BadResponse { .. } => S::QueryError,
        }
    }
}

/// IEEE 488.2 white space: every byte 0x00–0x20 except LF (§7.4.1.2, from memory).
pub fn is_ws(b: u8) -> bool {
    b <= 0x20 && b != b'\n'
}

pub(crate) fn is_ws_char(c: char) -> bool {
    c.is_ascii() && is_ws(c as u8)
}

fn shown(b: &[u8]) -> String {
    escape_bytes(b, SHOWN_REPLY_CHARS)
}

fn clip(s: &str) -> String {
    s.chars().take(32).collect()
}

pub(crate) fn ascii(b: &[u8]) -> Result<&str, ScpiError> {
    if let Some(position) = b.iter().position(|&c| !c.is_ascii()) {
        return Err(ScpiError::InvalidCharacter {
            position,
            found: escape_bytes(&b[position..position + 1], 8),
            shown: shown(b),
        });
    }
    // All bytes are ASCII, so this cannot fail; map defensively instead of unwrapping.
    std::str::from_utf8(b).map_err(|_| ScpiError::InvalidCharacter {
        position: 0,
        found: String::new(),
        shown: shown(b),
    })
}

/// Finds one message at the start of `buf`, ended by LF; a CR before the LF is removed.
///
/// Returns `Ok(Some((message, consumed)))`, `Ok(None)` if no LF has arrived yet, or
/// [`ScpiError::MessageTooLong`] once `max_len` bytes arrived without an LF (the caller then
/// discards its buffer up to the next LF). Both sides use it: the device on program
/// messages, the master on response messages.
pub fn split_message(buf: &[u8], max_len: usize) -> Result<Option<(&[u8], usize)>, ScpiError> {
    match crate::text::find_line(buf, b"\n", max_len) {
        Ok(Some((len, consumed))) => {
            let mut body = &buf[..len];
            if let [rest @ .., b'\r'] = body {
                body = rest;
            }
            Ok(Some((body, consumed)))
        }
        Ok(None) => Ok(None),
        Err(_) => Err(ScpiError::MessageTooLong {
            max: max_len,
            shown: shown(buf),
        }),
    }
}

/// Splits `msg` at `sep` bytes that are outside quoted strings, trimming white space.
/// Fails with [`ScpiError::TooMany`] past `max` pieces and on an unclosed quote.
fn split_outside_quotes<'a>(
    msg: &'a [u8],
    sep: u8,
    max: usize,
    what: &'static str,
) -> Result<Vec<(usize, &'a [u8])>, ScpiError> {
    let mut pieces = Vec::new();
    let mut start = 0;
    let mut quote: Option<u8> = None;
    for (i, &b) in msg.iter().enumerate() {
        match quote {
            Some(q) if b == q => quote = None,
            Some(_) => {}
            None if b == b'"' || b == b'\'' => quote = Some(b),
            None if b == sep => {
                if pieces.len() + 1 >= max {
                    return Err(ScpiError::TooMany { what, max });
                }
                pieces.push((start, &msg[start..i]));
                start = i + 1;
            }
            None => {}
        }
    }
    if quote.is_some() {
        return Err(ScpiError::InvalidString { shown: shown(msg) });
    }
    pieces.push((start, &msg[start..]));
    Ok(pieces
        .into_iter()
        .map(|(off, p)| {
            let lead = p.iter().take_while(|&&b| is_ws(b)).count();
            let trail = p[lead..].iter().rev().take_while(|&&b| is_ws(b)).count();
            (off + lead, &p[lead..p.len() - trail])
        })
        .collect())
}

/// Splits a response message into its units (separated by `;` outside strings).
pub fn split_response_units(msg: &[u8]) -> Result<Vec<&[u8]>, ScpiError> {
    Ok(split_outside_quotes(msg, b';', MAX_UNITS, "units")?
        .into_iter()
        .map(|(_, p)| p)
        .collect())
}

/// Splits one response unit into its comma-separated data elements.
pub fn split_response_fields(unit: &[u8]) -> Result<Vec<&[u8]>, ScpiError> {
    Ok(split_outside_quotes(unit, b',', MAX_PARAMS, "fields")?
        .into_iter()
        .map(|(_, p)| p)
        .collect())
}

/// Does the received mnemonic match `pattern` in short or long form, ignoring case?
///
/// The short form is the upper-case part of `pattern` (SCPI 1999.0 Vol 1 §6.2.1, from memory):
/// `mnemonic_matches("VOLTage", "volt")` and `("VOLTage", "VOLTAGE")` are true,
/// `("VOLTage", "VOLTA")` is false. Common-command patterns such as `"*IDN"` match exactly.
pub fn mnemonic_matches(pattern: &str, received: &str) -> bool {
    if received.eq_ignore_ascii_case(pattern) {
        return true;
    }
    let short_len = pattern
        .bytes()
        .take_while(|b| !b.is_ascii_lowercase())
        .count();
    short_len > 0 && received.eq_ignore_ascii_case(&pattern[..short_len])
}

/// One node of a compound header: a mnemonic with an optional numeric suffix.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Node {
    /// The mnemonic as received, without its suffix (e.g. `outp`).
    pub mnemonic: String,
    /// The numeric suffix, if one was given (`OUTP2` → 2).
    pub suffix: Option<u32>,
}

impl Node {
    /// Does this node match `pattern` (see [`mnemonic_matches`])?
    pub fn matches(&self, pattern: &str) -> bool {
        mnemonic_matches(pattern, &self.mnemonic)
    }
}

/// A parsed header.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Header {
    /// A common command such as `*IDN?`; `mnemonic` excludes the `*`.
    Common {
        /// The mnemonic without `*` (e.g. `IDN`).
        mnemonic: String,
        /// True if it ended in `?`.
        query: bool,
    },
    /// A compound (or simple) header, resolved to its full path from the root.
    Compound {
        /// The nodes from the root.
        nodes: Vec<Node>,
        /// True if it ended in `?`.
        query: bool,
    },
}

impl Header {
    /// True for a query header.
    pub fn is_query(&self) -> bool {
        match self {
            Header::Common { query, .. } | Header::Compound { query, .. } => *query,
        }
    }
}

/// One parameter of a program message unit.
#[derive(Debug, Clone, PartialEq)]
pub enum Param {
    /// Decimal numeric program data (any NRf form).
    Numeric(f64),
    /// Character program data such as `ON`, `OFF`, `MAX` (as received).
    Character(String),
    /// String program data, quotes removed and doubled quotes undone.
    String(String),
}

impl Param {
    /// The value as a number, or the standard error for a non-numeric parameter.
    pub fn as_f64(&self) -> Result<f64, StandardError> {
        match self {
            Param::Numeric(v) => Ok(*v),
            _ => Err(StandardError::DataTypeError),
        }
    }

    /// The value as a boolean: `ON`/`OFF`, or a number (rounded; non-zero is true, IEEE
    /// 488.2 §10.x boolean program data, from memory).
    pub fn as_bool(&self) -> Result<bool, StandardError> {
        match self {
            Param::Numeric(v) => Ok(v.round() != 0.0),
            Param::Character(c) if c.eq_ignore_ascii_case("ON") => Ok(true),
            Param::Character(c) if c.eq_ignore_ascii_case("OFF") => Ok(false),
            Param::Character(_) => Err(StandardError::IllegalParameterValue),
            Param::String(_) => Err(StandardError::DataTypeError),
        }
    }
}

/// One program message unit: a header and its parameters.
#[derive(Debug, Clone, PartialEq)]
pub struct ProgramUnit {
    /// The resolved header.
    pub header: Header,
    /// The parameters, in order.
    pub params: Vec<Param>,
}

/// The result of parsing a program message: the units before the first error, and that error.
#[derive(Debug, Clone, PartialEq)]
pub struct ProgramMessage {
    /// Units that parsed; a device executes them in order.
    pub units: Vec<ProgramUnit>,
    /// The first parser error, if any; the units after it were discarded.
    pub error: Option<ScpiError>,
}

/// Parses one program message (terminator already removed) into units.
///
/// Never panics; any input gives units and/or an error.
pub fn parse_program_message(msg: &[u8]) -> ProgramMessage {
    let mut units = Vec::new();
    let error = parse_units_into(msg, &mut units).err();
    ProgramMessage { units, error }
}

fn parse_units_into(msg: &[u8], units: &mut Vec<ProgramUnit>) -> Result<(), ScpiError> {
    if msg.len() > MAX_MESSAGE_LEN {
        return Err(ScpiError::MessageTooLong {
            max: MAX_MESSAGE_LEN,
            shown: shown(msg),
        });
    }
    ascii(msg)?;
    if msg.iter().all(|&b| is_ws(b)) {
        return Ok(());
    }
    let pieces = split_outside_quotes(msg, b';', MAX_UNITS, "units")?;
    let mut path: Vec<Node> = Vec::new();
    for (offset, piece) in pieces {
        if piece.is_empty() {
            return Err(ScpiError::Syntax {
                position: offset,
                reason: "empty program message unit",
                shown: shown(msg),
            });
        }
        units.push(parse_unit(msg, offset, piece, &mut path)?);
    }
    Ok(())
}

fn parse_unit(
    msg: &[u8],
    offset: usize,
    unit: &[u8],
    path: &mut Vec<Node>,
) -> Result<ProgramUnit, ScpiError> {
    let header_len = unit.iter().position(|&b| is_ws(b)).unwrap_or(unit.len());
    let (head, rest) = unit.split_at(header_len);
    let header = parse_header(msg, offset, head, path)?;
    let rest_start = rest.iter().take_while(|&&b| is_ws(b)).count();
    let rest = &rest[rest_start..];
    let mut params = Vec::new();
    if !rest.is_empty() {
        let base = offset + header_len + rest_start;
        for (poff, p) in split_outside_quotes(rest, b',', MAX_PARAMS, "parameters")? {
            params.push(parse_param(msg, base + poff, p)?);
        }
    }
    Ok(ProgramUnit { header, params })
}

fn parse_header(
    msg: &[u8],
    offset: usize,
    head: &[u8],
    path: &mut Vec<Node>,
) -> Result<Header, ScpiError> {
    let (body, query) = match head {
        [rest @ .., b'?'] => (rest, true),
        _ => (head, false),
    };
    let syntax = |pos: usize, reason| ScpiError::Syntax {
        position: offset + pos,
        reason,
        shown: shown(msg),
    };
    if let Some(b) = body.iter().position(|&b| b == b'?') {
        return Err(syntax(b, "'?' inside a header"));
    }
    if let [b'*', name @ ..] = body {
        check_mnemonic_chars(msg, offset + 1, name)?;
        let name = ascii(name)?;
        if name.is_empty() || !name.as_bytes()[0].is_ascii_alphabetic() {
            return Err(syntax(1, "common command needs a mnemonic after '*'"));
        }
        if name.len() > MAX_MNEMONIC_LEN {
            return Err(ScpiError::MnemonicTooLong {
                mnemonic: clip(name),
                max: MAX_MNEMONIC_LEN,
            });
        }
        return Ok(Header::Common {
            mnemonic: name.to_owned(),
            query,
        });
    }
    let (rooted, body, start) = match body {
        [b':', rest @ ..] => (true, rest, 1),
        _ => (false, body, 0),
    };
    let mut nodes: Vec<Node> = if rooted { Vec::new() } else { path.clone() };
    let mut pos = start;
    for part in body.split(|&b| b == b':') {
        if part.is_empty() {
            return Err(syntax(pos, "empty header node"));
        }
        check_mnemonic_chars(msg, offset + pos, part)?;
        if !part[0].is_ascii_alphabetic() {
            return Err(syntax(pos, "a header mnemonic must start with a letter"));
        }
        let digits = part.iter().rev().take_while(|b| b.is_ascii_digit()).count();
        let (name, suffix) = part.split_at(part.len() - digits);
        let name = ascii(name)?;
        if name.len() > MAX_MNEMONIC_LEN {
            return Err(ScpiError::MnemonicTooLong {
                mnemonic: clip(name),
                max: MAX_MNEMONIC_LEN,
            });
        }
        let suffix = if suffix.is_empty() {
            None
        } else {
            let text = ascii(suffix)?;
            Some(
                text.parse::<u32>()
                    .map_err(|_| ScpiError::SuffixOutOfRange { text: clip(text) })?,
            )
        };
        if nodes.len() >= MAX_NODES {
            return Err(ScpiError::TooMany {
                what: "header nodes",
                max: MAX_NODES,
            });
        }
        nodes.push(Node {
            mnemonic: name.to_owned(),
            suffix,
        });
        pos += part.len() + 1;
    }
    *path = nodes[..nodes.len() - 1].to_vec();
    Ok(Header::Compound { nodes, query })
}

fn check_mnemonic_chars(msg: &[u8], offset: usize, part: &[u8]) -> Result<(), ScpiError> {
    if let Some(i) = part
        .iter()
        .position(|&b| !(b.is_ascii_alphanumeric() || b == b'_'))
    {
        return Err(ScpiError::InvalidCharacter {
            position: offset + i,
            found: escape_bytes(&part[i..i + 1], 8),
            shown: shown(msg),
        });
    }
    Ok(())
}

fn parse_param(msg: &[u8], offset: usize, p: &[u8]) -> Result<Param, ScpiError> {
    let text = ascii(p)?;
    match p.first() {
        None => Err(ScpiError::Syntax {
            position: offset,
            reason: "missing parameter between commas",
            shown: shown(msg),
        }),
        Some(b'"' | b'\'') => Ok(Param::String(parse_string(text)?)),
        Some(b'+' | b'-' | b'.' | b'0'..=b'9') => {
            let num_len = p.iter().position(|&b| is_ws(b)).unwrap_or(p.len());
            if num_len < p.len() {
                return Err(ScpiError::SuffixNotAllowed { shown: shown(p) });
            }
            Ok(Param::Numeric(parse_nrf(text)?))
        }
        Some(c) if c.is_ascii_alphabetic() => {
            check_mnemonic_chars(msg, offset, p)?;
            if p.len() > MAX_MNEMONIC_LEN {
                return Err(ScpiError::CharacterDataTooLong {
                    text: clip(text),
                    max: MAX_MNEMONIC_LEN,
                });
            }
            Ok(Param::Character(text.to_owned()))
        }
        Some(_) => Err(ScpiError::InvalidCharacter {
            position: offset,
            found: escape_bytes(&p[..1], 8),
            shown: shown(msg),
        }),
    }
}

/// Parses IEEE 488.2 string data: `"…"` or `'…'`, with the quote doubled inside.
pub fn parse_string(s: &str) -> Result<String, ScpiError> {
    let bad = || ScpiError::InvalidString {
        shown: shown(s.as_bytes()),
    };
    let q = match s.as_bytes().first() {
        Some(&q @ (b'"' | b'\'')) => q as char,
        _ => return Err(bad()),
    };
    let inner = s[1..].strip_suffix(q).ok_or_else(bad)?;
    let mut out = String::with_capacity(inner.len());
    let mut chars = inner.chars().peekable();
    while let Some(c) = chars.next() {
        if c == q && chars.next() != Some(q) {
            return Err(bad());
        }
        out.push(c);
    }
    Ok(out)
}

/// Appends `s` as IEEE 488.2 string response data in double quotes (`"` doubled).
pub fn encode_string(s: &str, out: &mut Vec<u8>) {
    out.push(b'"');
    for b in s.bytes() {
        if b == b'"' {
            out.push(b'"');
        }
        out.push(b);
    }
    out.push(b'"');
}

#[derive(Default)]
struct NumberShape {
    mantissa_digits: usize,
    point: bool,
    exponent: bool,
}

/// Checks the shape `[+-] digits [. digits] [E [+-] digits]` and reports what it contained.
fn number_shape(s: &str) -> Result<NumberShape, ScpiError> {
    if s.len() > MAX_NUMBER_LEN {
        return Err(ScpiError::TooManyDigits {
            max: MAX_NUMBER_LEN,
        });
    }
    let bad = |reason| ScpiError::InvalidNumber {
        text: clip(s),
        reason,
    };
    let b = s.as_bytes();
    let mut i = 0;
    let mut shape = NumberShape::default();
    if matches!(b.first(), Some(b'+' | b'-')) {
        i += 1;
    }
    while i < b.len() && b[i].is_ascii_digit() {
        i += 1;
        shape.mantissa_digits += 1;
    }
    if i < b.len() && b[i] == b'.' {
        shape.point = true;
        i += 1;
        while i < b.len() && b[i].is_ascii_digit() {
            i += 1;
            shape.mantissa_digits += 1;
        }
    }
    if shape.mantissa_digits == 0 {
        return Err(bad("no digits in the mantissa"));
    }
    if i < b.len() && (b[i] == b'e' || b[i] == b'E') {
        shape.exponent = true;
        i += 1;
        if i < b.len() && (b[i] == b'+' || b[i] == b'-') {
            i += 1;
        }
        let start = i;
        while i < b.len() && b[i].is_ascii_digit() {
            i += 1;
        }
        if i == start {
            return Err(bad("no digits in the exponent"));
        }
    }
    if i != b.len() {
        return Err(bad("unexpected character"));
    }
    Ok(shape)
}

fn to_f64(s: &str) -> Result<f64, ScpiError> {
    let v: f64 = s.parse().map_err(|_| ScpiError::InvalidNumber {
        text: clip(s),
        reason: "not a decimal number",
    })?;
    if v.is_finite() {
        Ok(v)
    } else {
        Err(ScpiError::ExponentTooLarge { text: clip(s) })
    }
}

/// Parses NR1 (IEEE 488.2 §8.7.2, from memory): an optional sign and digits, no point.
pub fn parse_nr1(s: &str) -> Result<i64, ScpiError> {
    let shape = number_shape(s)?;
    if shape.point || shape.exponent {
        return Err(ScpiError::InvalidNumber {
            text: clip(s),
            reason: "NR1 is an integer without point or exponent",
        });
    }
    s.parse::<i64>()
        .map_err(|_| ScpiError::ExponentTooLarge { text: clip(s) })
}

/// Parses NR2 (IEEE 488.2 §8.7.3, from memory): digits with an explicit point, no exponent.
pub fn parse_nr2(s: &str) -> Result<f64, ScpiError> {
    let shape = number_shape(s)?;
    if !shape.point || shape.exponent {
        return Err(ScpiError::InvalidNumber {
            text: clip(s),
            reason: "NR2 needs a decimal point and no exponent",
        });
    }
    to_f64(s)
}

/// Parses NR3 (IEEE 488.2 §8.7.4, from memory): an explicit point and an exponent.
pub fn parse_nr3(s: &str) -> Result<f64, ScpiError> {
    let shape = number_shape(s)?;
    if !shape.point || !shape.exponent {
        return Err(ScpiError::InvalidNumber {
            text: clip(s),
            reason: "NR3 needs a decimal point and an exponent",
        });
    }
    to_f64(s)
}

/// Parses NRf, the flexible decimal numeric program data (IEEE 488.2 §7.7.2): any of NR1, NR2,
/// NR3, with or without point and exponent. Values that overflow `f64` are errors.
pub fn parse_nrf(s: &str) -> Result<f64, ScpiError> {
    number_shape(s)?;
    to_f64(s)
}

/// Parses a numeric response element (NR1/NR2/NR3), mapping SCPI's 9.91E37 to NaN and
/// ±9.9E37 to ±infinity.
pub fn parse_response_number(s: &str) -> Result<f64, ScpiError> {
    let v = parse_nrf(s)?;
    Ok(if v == SCPI_NAN {
        f64::NAN
    } else if v == SCPI_INFINITY {
        f64::INFINITY
    } else if v == -SCPI_INFINITY {
        f64::NEG_INFINITY
    } else {
        v
    })
}

/// Appends an integer in NR1 form.
pub fn format_nr1(v: i64, out: &mut Vec<u8>) {
    out.extend_from_slice(v.to_string().as_bytes());
}

/// Appends `v` in NR3 form with `digits` digits after the point, e.g. `+1.500000E+00`.
/// NaN and infinities are sent as SCPI's 9.91E+37 and ±9.9E+37.
pub fn format_nr3(v: f64, digits: usize, out: &mut Vec<u8>) {
    if v.is_nan() {
        out.extend_from_slice(b"9.91E+37");
        return;
    }
    if v.is_infinite() {
        out.extend_from_slice(if v > 0.0 { b"9.9E+37" } else { b"-9.9E+37" });
        return;
    }
    let digits = digits.clamp(1, 17);
    let s = format!("{:+.*E}", digits, v);
    // Rust writes "+1.500000E0" / "-2.5E-3"; normalise the exponent to a sign and two digits.
    match s.split_once('E') {
        Some((mantissa, exp)) => {
            let e: i32 = exp.parse().unwrap_or(0);
            out.extend_from_slice(mantissa.as_bytes());
            out.extend_from_slice(
                format!("E{}{:02}", if e < 0 { '-' } else { '+' }, e.abs()).as_bytes(),
            );
        }
        None => out.extend_from_slice(s.as_bytes()),
    }
}

/// Appends a program message made of `units` joined by `;`, then the terminator.
pub fn encode_program_message(units: &[&str], terminator: Terminator, out: &mut Vec<u8>) {
    for (i, u) in units.iter().enumerate() {
        if i > 0 {
            out.push(b';');
        }
        out.extend_from_slice(u.as_bytes());
    }
    out.extend_from_slice(terminator.bytes());
}

/// The common commands of IEEE 488.2 §10 that this crate handles.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CommonCommand {
    /// `*IDN?`: identification query.
    IdentifyQuery,
    /// `*RST`: reset to the default state.
    Reset,
    /// `*CLS`: clear status, including the error queue.
    ClearStatus,
    /// `*OPC`: set the operation-complete bit.
    OperationComplete,
    /// `*OPC?`: answers `1` when all pending operations are done.
    OperationCompleteQuery,
}

impl CommonCommand {
    /// Recognises a common command header; `None` for other headers.
    pub fn from_header(h: &Header) -> Option<Self> {
        let Header::Common { mnemonic, query } = h else {
            return None;
        };
        let m = mnemonic.to_ascii_uppercase();
        match (m.as_str(), query) {
            ("IDN", true) => Some(CommonCommand::IdentifyQuery),
            ("RST", false) => Some(CommonCommand::Reset),
            ("CLS", false) => Some(CommonCommand::ClearStatus),
            ("OPC", false) => Some(CommonCommand::OperationComplete),
            ("OPC", true) => Some(CommonCommand::OperationCompleteQuery),
            _ => None,
        }
    }
}

/// The four fields of an `*IDN?` response (IEEE 488.2 §10.14, from memory: manufacturer,
/// model, serial number, firmware level, separated by commas).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Identity {
    /// Manufacturer.
    pub manufacturer: String,
    /// Model.
    pub model: String,
    /// Serial number (`0` if none).
    pub serial: String,
    /// Firmware level (`0` if none).
    pub firmware: String,
}

impl Identity {
    /// Appends the response `maker,model,serial,firmware` (commas removed from the fields).
    pub fn encode(&self, out: &mut Vec<u8>) {
        for (i, f) in [
            &self.manufacturer,
            &self.model,
            &self.serial,
            &self.firmware,
        ]
        .into_iter()
        .enumerate()
        {
            if i > 0 {
                out.push(b',');
            }
            out.extend(
                f.bytes()
                    .filter(|&b| b != b',' && b != b';' && (0x20..0x7f).contains(&b)),
            );
        }
    }

    /// Parses an `*IDN?` response unit: exactly four comma-separated fields.
    pub fn parse(unit: &[u8]) -> Result<Self, ScpiError> {
        let s = ascii(unit)?;
        let fields: Vec<&str> = s.split(',').map(|f| f.trim_matches(is_ws_char)).collect();
        match fields.as_slice() {
            [m, model, serial, fw] => Ok(Identity {
                manufacturer: (*m).to_owned(),
                model: (*model).to_owned(),
                serial: (*serial).to_owned(),
                firmware: (*fw).to_owned(),
            }),
            _ => Err(ScpiError::BadResponse {
                expected: "four comma-separated *IDN? fields",
                shown: shown(unit),
            }),
        }
    }
}

#[cfg(test)]
mod tests;
