//! Shared text helpers: bounded line framing and a printable rendering of device bytes.
//!
//! [`find_line`] locates a terminator within a bounded window, so that a device which never
//! sends its terminator cannot make a reader buffer without limit. [`escape_bytes`] renders
//! arbitrary bytes as a short, printable, escaped string for error messages.

use std::fmt::Write as _;

/// Default number of characters of a reply shown in error messages.
pub const SHOWN_REPLY_CHARS: usize = 64;

/// A message grew past its allowed length without a terminator.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("no terminator {terminator} within {max_len} bytes (received so far: {shown})")]
pub struct LineTooLong {
    /// The longest allowed message body, terminator excluded.
    pub max_len: usize,
    /// The terminator that was expected, escaped.
    pub terminator: String,
    /// The start of the received bytes, escaped and truncated.
    pub shown: String,
}

/// Finds the first `terminator` in `buf`, looking at no more than `max_len` body bytes.
///
/// Returns `Ok(Some((body_len, consumed)))` where `buf[..body_len]` is the message without its
/// terminator and `consumed = body_len + terminator.len()`; `Ok(None)` if more bytes are needed;
/// `Err` if `max_len` body bytes are present and no terminator follows them. An empty
/// terminator never matches (constructors elsewhere reject it), so it yields `Ok(None)` or
/// `Err` but never a panic.
pub fn find_line(
    buf: &[u8],
    terminator: &[u8],
    max_len: usize,
) -> Result<Option<(usize, usize)>, LineTooLong> {
    let window = buf.len().min(max_len.saturating_add(terminator.len()));
    if !terminator.is_empty()
        && let Some(pos) = buf[..window]
            .windows(terminator.len())
            .position(|w| w == terminator)
    {
        return Ok(Some((pos, pos + terminator.len())));
    }
    if buf.len() >= max_len.saturating_add(terminator.len().max(1)) {
        return Err(LineTooLong {
            max_len,
            terminator: escape_bytes(terminator, 16),
            shown: escape_bytes(buf, SHOWN_REPLY_CHARS),
        });
    }
    Ok(None)
}

/// Renders bytes as printable ASCII: `\r`, `\n`, `\t`, `\\`, `\"` and `\xHH` escapes, wrapped
/// in double quotes, truncated after about `max_chars` output characters with a note of how
/// many bytes were left out.
pub fn escape_bytes(bytes: &[u8], max_chars: usize) -> String {
    let mut out = String::with_capacity(max_chars.min(256) + 16);
    out.push('"');
    let mut shown = 0;
    for (i, &b) in bytes.iter().enumerate() {
        let before = out.len();
        match b {
            b'\r' => out.push_str("\\r"),
            b'\n' => out.push_str("\\n"),
            b'\t' => out.push_str("\\t"),
            b'\\' => out.push_str("\\\\"),
            b'"' => out.push_str("\\\""),
            0x20..=0x7e => out.push(b as char),
            _ => {
                let _ = write!(out, "\\x{b:02X}");
            }
        }
        shown += out.len() - before;
        if shown >= max_chars && i + 1 < bytes.len() {
            out.push('"');
            let _ = write!(out, "...({} more bytes)", bytes.len() - i - 1);
            return out;
        }
    }
    out.push('"');
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn finds_crlf_and_reports_lengths() {
        assert_eq!(find_line(b"AB\r\nCD", b"\r\n", 10), Ok(Some((2, 4))));
        assert_eq!(find_line(b"AB\r", b"\r\n", 10), Ok(None));
        assert_eq!(find_line(b"", b"\n", 10), Ok(None));
    }

    #[test]
    fn overlong_without_terminator_is_an_error() {
        let e = find_line(b"0123456789", b"\n", 4).unwrap_err();
        assert_eq!(e.max_len, 4);
        // A terminator exactly after max_len body bytes is still accepted.
        assert_eq!(find_line(b"0123\n", b"\n", 4), Ok(Some((4, 5))));
        assert!(find_line(b"01234\n", b"\n", 4).is_err());
    }

    #[test]
    fn escapes_and_truncates() {
        assert_eq!(escape_bytes(b"T,1\r\n\x00", 64), "\"T,1\\r\\n\\x00\"");
        let s = escape_bytes(&[b'a'; 100], 10);
        assert!(s.starts_with("\"aaaaaaaaaa\"...(90 more bytes)"), "{s}");
    }

    proptest! {
        #[test]
        fn find_line_never_panics_and_stays_in_window(
            buf in proptest::collection::vec(any::<u8>(), 0..300),
            term in proptest::collection::vec(any::<u8>(), 0..3),
            max in 0usize..200,
        ) {
            match find_line(&buf, &term, max) {
                Ok(Some((body, consumed))) => {
                    prop_assert!(body <= max);
                    prop_assert_eq!(&buf[body..consumed], &term[..]);
                }
                Ok(None) => prop_assert!(buf.len() < max + term.len().max(1)),
                Err(_) => prop_assert!(buf.len() >= max),
            }
        }

        #[test]
        fn escape_is_printable(buf in proptest::collection::vec(any::<u8>(), 0..300)) {
            let s = escape_bytes(&buf, 40);
            prop_assert!(s.chars().all(|c| (' '..='~').contains(&c)));
            prop_assert!(s.len() < 40 + 40);
        }
    }
}
