//! The SCPI error/event queue (`SYSTem:ERRor?`) and the standard error numbers.
//!
//! Main types: [`StandardError`] (the numbers and strings SCPI assigns), [`ErrorEntry`] (one
//! queue entry as sent on the wire, `-113,"Undefined header"`), and [`ErrorQueue`] (bounded
//! FIFO with the overflow rule).
//!
//! Source: SCPI 1999.0 Volume 2, "Command Reference", chapter 21 (Error/Event queue), and
//! IEEE 488.2-1992 for the command/execution/query error classes. The numbers and strings
//! below are from memory of those documents; they are the commonly used subset, not the
//! whole list.

use std::collections::VecDeque;

use super::ScpiError;

/// Longest error description kept or parsed (SCPI limits the string to 255 characters).
pub const MAX_ERROR_MESSAGE: usize = 255;

macro_rules! standard_errors {
    ($($variant:ident = $code:expr, $text:expr;)*) => {
        /// A standard SCPI error number with its standard description.
        #[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
        pub enum StandardError {
            $(
                #[doc = concat!("`", stringify!($code), ",\"", $text, "\"`")]
                $variant,
            )*
        }

        impl StandardError {
            /// Every standard error this crate knows, in order of the table.
            pub const ALL: &'static [StandardError] = &[$(StandardError::$variant),*];

            /// The error number (negative for standard errors, 0 for "No error").
            pub const fn code(self) -> i16 {
                match self { $(StandardError::$variant => $code,)* }
            }

            /// The standard description, as SCPI spells it.
            pub const fn message(self) -> &'static str {
                match self { $(StandardError::$variant => $text,)* }
            }

            /// The standard error with this number, if it is one this crate knows.
            pub fn from_code(code: i16) -> Option<StandardError> {
                match code { $($code => Some(StandardError::$variant),)* _ => None }
            }
        }
    };
}

standard_errors! {
    NoError = 0, "No error";
    CommandError = -100, "Command error";
    InvalidCharacter = -101, "Invalid character";
    SyntaxError = -102, "Syntax error";
    InvalidSeparator = -103, "Invalid separator";
    DataTypeError = -104, "Data type error";
    ParameterNotAllowed = -108, "Parameter not allowed";
    MissingParameter = -109, "Missing parameter";
    CommandHeaderError = -110, "Command header error";
    ProgramMnemonicTooLong = -112, "Program mnemonic too long";
    UndefinedHeader = -113, "Undefined header";
    HeaderSuffixOutOfRange = -114, "Header suffix out of range";
    NumericDataError = -120, "Numeric data error";
    InvalidCharacterInNumber = -121, "Invalid character in number";
    ExponentTooLarge = -123, "Exponent too large";
    TooManyDigits = -124, "Too many digits";
    NumericDataNotAllowed = -128, "Numeric data not allowed";
    InvalidSuffix = -131, "Invalid suffix";
    SuffixNotAllowed = -138, "Suffix not allowed";
    CharacterDataError = -140, "Character data error";
    InvalidCharacterData = -141, "Invalid character data";
    CharacterDataTooLong = -144, "Character data too long";
    CharacterDataNotAllowed = -148, "Character data not allowed";
    StringDataError = -150, "String data error";
    InvalidStringData = -151, "Invalid string data";
    StringDataNotAllowed = -158, "String data not allowed";
    ExecutionError = -200, "Execution error";
    ParameterError = -220, "Parameter error";
    SettingsConflict = -221, "Settings conflict";
    DataOutOfRange = -222, "Data out of range";
    TooMuchData = -223, "Too much data";
    IllegalParameterValue = -224, "Illegal parameter value";
    DeviceSpecificError = -300, "Device-specific error";
    QueueOverflow = -350, "Queue overflow";
    InputBufferOverrun = -363, "Input buffer overrun";
    QueryError = -400, "Query error";
    QueryInterrupted = -410, "Query INTERRUPTED";
    QueryUnterminated = -420, "Query UNTERMINATED";
    QueryDeadlocked = -430, "Query DEADLOCKED";
}

/// One entry of the error queue: a number and a description, as `SYSTem:ERRor?` returns it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ErrorEntry {
    /// The error number (0 means no error; negative numbers are SCPI's, positive the device's).
    pub code: i16,
    /// The description. SCPI allows device-specific detail after a `;`, e.g. `"Data out of range;volts"`.
    pub message: String,
}

impl ErrorEntry {
    /// The standard entry for `e`, with its standard description.
    pub fn standard(e: StandardError) -> Self {
        ErrorEntry {
            code: e.code(),
            message: e.message().to_owned(),
        }
    }

    /// The standard entry for `e` with device-specific detail appended after `;`.
    pub fn with_detail(e: StandardError, detail: &str) -> Self {
        let mut message = format!("{};{}", e.message(), detail);
        truncate_to_char_boundary(&mut message, MAX_ERROR_MESSAGE);
        ErrorEntry {
            code: e.code(),
            message,
        }
    }

    /// Appends the wire form `<NR1>,"<text>"` (double quotes inside doubled, per IEEE 488.2
    /// string response data) to `out`. No terminator is written.
    pub fn encode(&self, out: &mut Vec<u8>) {
        out.extend_from_slice(self.code.to_string().as_bytes());
        out.push(b',');
        super::encode_string(&self.message, out);
    }

    /// Parses the wire form `<NR1>,"<text>"` (surrounding whitespace allowed).
    pub fn parse(unit: &[u8]) -> Result<Self, ScpiError> {
        let s = super::ascii(unit)?;
        let s = s.trim_matches(super::is_ws_char);
        let (num, rest) = s.split_once(',').ok_or_else(|| ScpiError::BadResponse {
            expected: "<code>,\"<message>\"",
            shown: crate::text::escape_bytes(unit, crate::text::SHOWN_REPLY_CHARS),
        })?;
        let code = super::parse_nr1(num.trim_matches(super::is_ws_char))?;
        let code = i16::try_from(code).map_err(|_| ScpiError::BadResponse {
            expected: "an error number between -32768 and 32767",
            shown: crate::text::escape_bytes(unit, crate::text::SHOWN_REPLY_CHARS),
        })?;
        let message = super::parse_string(rest.trim_matches(super::is_ws_char))?;
        if message.len() > MAX_ERROR_MESSAGE {
            return Err(ScpiError::BadResponse {
                expected: "an error message of at most 255 characters",
                shown: crate::text::escape_bytes(unit, crate::text::SHOWN_REPLY_CHARS),
            });
        }
        Ok(ErrorEntry { code, message })
    }

    /// True for entry 0, "No error".
    pub fn is_no_error(&self) -> bool {
        self.code == 0
    }
}

fn truncate_to_char_boundary(s: &mut String, max: usize) {
    if s.len() > max {
        let mut cut = max;
        while !s.is_char_boundary(cut) {
            cut -= 1;
        }
        s.truncate(cut);
    }
}

/// The device's error queue: a bounded FIFO of [`ErrorEntry`].
///
/// Overflow rule (SCPI 1999.0 Vol 2 §21.8.1, from memory): when the queue is full, a new error
/// is discarded and the most recent entry is replaced by -350 "Queue overflow". Reading an
/// empty queue returns 0 "No error". `*CLS` empties it.
#[derive(Debug, Clone)]
pub struct ErrorQueue {
    entries: VecDeque<ErrorEntry>,
    capacity: usize,
}

impl ErrorQueue {
    /// Smallest capacity accepted; smaller requests are raised to it (SCPI asks for at least 2).
    pub const MIN_CAPACITY: usize = 2;

    /// A queue holding at most `capacity` entries (raised to [`Self::MIN_CAPACITY`]).
    pub fn new(capacity: usize) -> Self {
        let capacity = capacity.max(Self::MIN_CAPACITY);
        ErrorQueue {
            entries: VecDeque::with_capacity(capacity),
            capacity,
        }
    }

    /// Records an error, applying the overflow rule.
    pub fn push(&mut self, entry: ErrorEntry) {
        if entry.is_no_error() {
            return;
        }
        if self.entries.len() >= self.capacity {
            if let Some(last) = self.entries.back_mut() {
                *last = ErrorEntry::standard(StandardError::QueueOverflow);
            }
        } else {
            self.entries.push_back(entry);
        }
    }

    /// Records a standard error.
    pub fn push_standard(&mut self, e: StandardError) {
        self.push(ErrorEntry::standard(e));
    }

    /// Removes and returns the oldest entry, or 0 "No error" when empty.
    pub fn pop(&mut self) -> ErrorEntry {
        self.entries
            .pop_front()
            .unwrap_or_else(|| ErrorEntry::standard(StandardError::NoError))
    }

    /// Number of queued entries.
    pub fn len(&self) -> usize {
        self.entries.len()
    }

    /// True when no error is queued.
    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }

    /// Empties the queue (`*CLS`).
    pub fn clear(&mut self) {
        self.entries.clear();
    }
}

impl Default for ErrorQueue {
    /// A queue of 16 entries (a common practice size; SCPI fixes only the minimum).
    fn default() -> Self {
        ErrorQueue::new(16)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn standard_numbers_and_strings() {
        // SCPI 1999.0 Vol 2 ch. 21 (from memory).
        let cases = [
            (StandardError::NoError, 0, "No error"),
            (StandardError::CommandError, -100, "Command error"),
            (StandardError::UndefinedHeader, -113, "Undefined header"),
            (StandardError::DataOutOfRange, -222, "Data out of range"),
            (StandardError::QueueOverflow, -350, "Queue overflow"),
            (StandardError::QueryUnterminated, -420, "Query UNTERMINATED"),
        ];
        for (e, code, text) in cases {
            assert_eq!(e.code(), code);
            assert_eq!(e.message(), text);
            assert_eq!(StandardError::from_code(code), Some(e));
        }
        // Codes are unique.
        let mut codes: Vec<i16> = StandardError::ALL.iter().map(|e| e.code()).collect();
        codes.sort_unstable();
        codes.dedup();
        assert_eq!(codes.len(), StandardError::ALL.len());
    }

    #[test]
    fn queue_is_fifo_and_reports_no_error_when_empty() {
        let mut q = ErrorQueue::new(4);
        q.push_standard(StandardError::UndefinedHeader);
        q.push_standard(StandardError::DataOutOfRange);
        assert_eq!(q.pop().code, -113);
        assert_eq!(q.pop().code, -222);
        let e = q.pop();
        assert_eq!((e.code, e.message.as_str()), (0, "No error"));
    }

    #[test]
    fn overflow_replaces_the_newest_entry() {
        // SCPI 1999.0 Vol 2 §21.8.1 overflow rule (from memory).
        let mut q = ErrorQueue::new(2);
        q.push_standard(StandardError::UndefinedHeader);
        q.push_standard(StandardError::DataOutOfRange);
        q.push_standard(StandardError::SyntaxError);
        q.push_standard(StandardError::SyntaxError);
        assert_eq!(q.len(), 2);
        assert_eq!(q.pop().code, -113);
        assert_eq!(q.pop().code, -350);
        assert!(q.is_empty());
    }

    #[test]
    fn wire_form_round_trips() {
        let e = ErrorEntry::with_detail(StandardError::DataOutOfRange, "say \"hi\"");
        let mut out = Vec::new();
        e.encode(&mut out);
        assert_eq!(out, b"-222,\"Data out of range;say \"\"hi\"\"\"");
        assert_eq!(ErrorEntry::parse(&out).unwrap(), e);
        assert_eq!(
            ErrorEntry::parse(b"0,\"No error\"").unwrap(),
            ErrorEntry::standard(StandardError::NoError)
        );
        assert!(ErrorEntry::parse(b"-113").is_err());
        assert!(ErrorEntry::parse(b"99999,\"x\"").is_err());
    }
}
