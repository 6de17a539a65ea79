//! OUR OWN invented SCPI-style command set for a multi-channel DC heater supply.
//!
//! This command set is invented for stilt and its simulator; it copies no real instrument.
//! It uses SCPI's syntax rules and common commands, with these headers (`<n>` is the channel,
//! 1-based; an omitted suffix means channel 1, as in SCPI):
//!
//! | header | parameter | reply |
//! | --- | --- | --- |
//! | `*IDN?` | – | `STILT-SIM,HSUP-8 (invented),<serial>,<firmware>` |
//! | `*RST`, `*CLS` | – | – |
//! | `*OPC?` | – | `1` |
//! | `SYSTem:ERRor[:NEXT]?` | – | `<NR1>,"<text>"` |
//! | `SYSTem:CHANnels?` | – | NR1, the number of channels |
//! | `OUTPut<n>:VOLTage` | NRf volts, 0 to [`MAX_VOLTS`] | – |
//! | `OUTPut<n>:VOLTage?` | – | NR3 volts (the setpoint) |
//! | `OUTPut<n>:STATe` | `ON`, `OFF`, `1`, `0` | – |
//! | `OUTPut<n>:STATe?` | – | `1` or `0` |
//! | `MEASure<n>:VOLTage?` | – | NR3 volts at the terminals |
//! | `MEASure<n>:CURRent?` | – | NR3 amperes |
//!
//! Open-circuit detection: a heater is a resistor, so with the output on and a measurable
//! terminal voltage the current readback must be about V/R. A current far below that means a
//! broken wire or heater ([`OpenCircuitRule`]). With the output off (or near 0 V) the
//! readback says nothing, so the rule answers `None`.
//!
//! Main types: [`HeaterRequest`] (encode on the master, `from_unit` on the device),
//! [`HeaterReply`] (encode on the device, [`HeaterRequest::decode_reply`] on the master),
//! [`parse_heater_message`] for the device's whole-message handling.

use super::{
    CommonCommand, ErrorEntry, Header, Identity, Param, ProgramUnit, ScpiError, StandardError,
    Terminator, format_nr1, format_nr3, parse_nr1, parse_program_message, parse_response_number,
};
use crate::text::{SHOWN_REPLY_CHARS, escape_bytes};

/// Most channels the command set addresses.
pub const MAX_CHANNELS: u8 = 8;
/// Highest voltage setpoint accepted (invented rating of the invented supply).
pub const MAX_VOLTS: f64 = 24.0;
/// Digits after the point in NR3 replies.
pub const REPLY_DIGITS: usize = 6;
/// The invented manufacturer field of `*IDN?`.
pub const MANUFACTURER: &str = "STILT-SIM";
/// The invented model field of `*IDN?`.
pub const MODEL: &str = "HSUP-8 (invented)";

/// The identity a simulated supply reports.
pub fn simulated_identity(serial: &str, firmware: &str) -> Identity {
    Identity {
        manufacturer: MANUFACTURER.to_owned(),
        model: MODEL.to_owned(),
        serial: serial.to_owned(),
        firmware: firmware.to_owned(),
    }
}

/// One command or query of the heater supply.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum HeaterRequest {
    /// `*IDN?`
    Identify,
    /// `*RST`: all outputs off, setpoints 0 V.
    Reset,
    /// `*CLS`: clears the error queue.
    ClearStatus,
    /// `*OPC?`
    OperationComplete,
    /// `SYSTem:ERRor?`
    NextError,
    /// `SYSTem:CHANnels?`
    ChannelCount,
    /// `OUTPut<n>:VOLTage <V>`
    SetVoltage {
        /// Channel, 1-based.
        channel: u8,
        /// Setpoint in volts.
        volts: f64,
    },
    /// `OUTPut<n>:VOLTage?`
    QueryVoltage {
        /// Channel, 1-based.
        channel: u8,
    },
    /// `OUTPut<n>:STATe ON|OFF`
    SetOutput {
        /// Channel, 1-based.
        channel: u8,
        /// True to switch the output on.
        on: bool,
    },
    /// `OUTPut<n>:STATe?`
    QueryOutput {
        /// Channel, 1-based.
        channel: u8,
    },
    /// `MEASure<n>:VOLTage?`
    MeasureVoltage {
        /// Channel, 1-based.
        channel: u8,
    },
    /// `MEASure<n>:CURRent?`
    MeasureCurrent {
        /// Channel, 1-based.
        channel: u8,
    },
}

/// A reply of the heater supply (one response message unit).
#[derive(Debug, Clone, PartialEq)]
pub enum HeaterReply {
    /// Reply to `*IDN?`.
    Identity(Identity),
    /// Reply to `*OPC?` (`1`).
    OperationComplete,
    /// Reply to `SYSTem:ERRor?`.
    Error(ErrorEntry),
    /// Reply to `SYSTem:CHANnels?`.
    ChannelCount(u8),
    /// Volts (setpoint or measured).
    Volts(f64),
    /// Amperes measured.
    Amps(f64),
    /// Output state.
    Output(bool),
}

impl HeaterRequest {
    /// True if the device answers this request.
    pub fn is_query(&self) -> bool {
        !matches!(
            self,
            HeaterRequest::Reset
                | HeaterRequest::ClearStatus
                | HeaterRequest::SetVoltage { .. }
                | HeaterRequest::SetOutput { .. }
        )
    }

    /// Appends this request's program message unit, without terminator.
    pub fn encode_unit(&self, out: &mut Vec<u8>) {
        use HeaterRequest as R;
        let text = match *self {
            R::Identify => "*IDN?".to_owned(),
            R::Reset => "*RST".to_owned(),
            R::ClearStatus => "*CLS".to_owned(),
            R::OperationComplete => "*OPC?".to_owned(),
            R::NextError => "SYST:ERR?".to_owned(),
            R::ChannelCount => "SYST:CHAN?".to_owned(),
            R::SetVoltage { channel, volts } => {
                let mut v = Vec::new();
                format_nr3(volts, REPLY_DIGITS, &mut v);
                format!("OUTP{channel}:VOLT {}", String::from_utf8_lossy(&v))
            }
            R::QueryVoltage { channel } => format!("OUTP{channel}:VOLT?"),
            R::SetOutput { channel, on } => {
                format!("OUTP{channel}:STAT {}", if on { "ON" } else { "OFF" })
            }
            R::QueryOutput { channel } => format!("OUTP{channel}:STAT?"),
            R::MeasureVoltage { channel } => format!("MEAS{channel}:VOLT?"),
            R::MeasureCurrent { channel } => format!("MEAS{channel}:CURR?"),
        };
        // Each unit starts at the root so units can be concatenated with ';' safely.
        if !text.starts_with('*') {
            out.push(b':');
        }
        out.extend_from_slice(text.as_bytes());
    }

    /// Appends a whole program message for this request (unit + terminator).
    pub fn encode(&self, terminator: Terminator, out: &mut Vec<u8>) {
        self.encode_unit(out);
        out.extend_from_slice(terminator.bytes());
    }

    /// Decodes the device's response unit to this query (master side).
    ///
    /// `unit` is one response unit without terminator, e.g. from
    /// [`super::split_message`] and [`super::split_response_units`].
    pub fn decode_reply(&self, unit: &[u8]) -> Result<HeaterReply, ScpiError> {
        use HeaterRequest as R;
        let bad = |expected| ScpiError::BadResponse {
            expected,
            shown: escape_bytes(unit, SHOWN_REPLY_CHARS),
        };
        let text = super::ascii(unit)?.trim_matches(super::is_ws_char);
        match self {
            R::Identify => Ok(HeaterReply::Identity(Identity::parse(unit)?)),
            R::OperationComplete => match text {
                "1" => Ok(HeaterReply::OperationComplete),
                _ => Err(bad("1")),
            },
            R::NextError => Ok(HeaterReply::Error(ErrorEntry::parse(unit)?)),
            R::ChannelCount => {
                let n = parse_nr1(text)?;
                u8::try_from(n)
                    .ok()
                    .filter(|n| (1..=MAX_CHANNELS).contains(n))
                    .map(HeaterReply::ChannelCount)
                    .ok_or_else(|| bad("a channel count from 1 to 8"))
            }
            R::QueryVoltage { .. } | R::MeasureVoltage { .. } => {
                Ok(HeaterReply::Volts(parse_response_number(text)?))
            }
            R::MeasureCurrent { .. } => Ok(HeaterReply::Amps(parse_response_number(text)?)),
            R::QueryOutput { .. } => match parse_nr1(text) {
                Ok(0) => Ok(HeaterReply::Output(false)),
                Ok(1) => Ok(HeaterReply::Output(true)),
                _ => Err(bad("0 or 1")),
            },
            R::Reset | R::ClearStatus | R::SetVoltage { .. } | R::SetOutput { .. } => {
                Err(bad("no reply (this command is not a query)"))
            }
        }
    }

    /// Recognises a parsed unit on the device side. `channels` is how many channels the
    /// device has (1..=[`MAX_CHANNELS`]). The error is the entry to push on the error queue.
    pub fn from_unit(unit: &ProgramUnit, channels: u8) -> Result<HeaterRequest, ErrorEntry> {
        let channels = channels.clamp(1, MAX_CHANNELS);
        if let Some(c) = CommonCommand::from_header(&unit.header) {
            no_params(unit)?;
            return match c {
                CommonCommand::IdentifyQuery => Ok(HeaterRequest::Identify),
                CommonCommand::Reset => Ok(HeaterRequest::Reset),
                CommonCommand::ClearStatus => Ok(HeaterRequest::ClearStatus),
                CommonCommand::OperationCompleteQuery => Ok(HeaterRequest::OperationComplete),
                CommonCommand::OperationComplete => Err(ErrorEntry::with_detail(
                    StandardError::UndefinedHeader,
                    "*OPC is not supported; use *OPC?",
                )),
            };
        }
        let undefined = || ErrorEntry::standard(StandardError::UndefinedHeader);
        let Header::Compound { nodes, query } = &unit.header else {
            return Err(undefined());
        };
        let query = *query;
        let channel_of = |n: &super::Node| -> Result<u8, ErrorEntry> {
            let c = n.suffix.unwrap_or(1);
            u8::try_from(c)
                .ok()
                .filter(|c| (1..=channels).contains(c))
                .ok_or_else(|| {
                    ErrorEntry::with_detail(
                        StandardError::HeaderSuffixOutOfRange,
                        &format!("channel {c}; allowed 1 to {channels}"),
                    )
                })
        };
        match nodes.as_slice() {
            [a, b] if a.matches("SYSTem") && b.matches("ERRor") && query => {
                suffixless(&[a, b])?;
                no_params(unit)?;
                Ok(HeaterRequest::NextError)
            }
            [a, b, c]
                if a.matches("SYSTem") && b.matches("ERRor") && c.matches("NEXT") && query =>
            {
                suffixless(&[a, b, c])?;
                no_params(unit)?;
                Ok(HeaterRequest::NextError)
            }
            [a, b] if a.matches("SYSTem") && b.matches("CHANnels") && query => {
                suffixless(&[a, b])?;
                no_params(unit)?;
                Ok(HeaterRequest::ChannelCount)
            }
            [a, b] if a.matches("OUTPut") && b.matches("VOLTage") => {
                suffixless(&[b])?;
                let channel = channel_of(a)?;
                if query {
                    no_params(unit)?;
                    return Ok(HeaterRequest::QueryVoltage { channel });
                }
                let volts = one_param(unit)?.as_f64().map_err(ErrorEntry::standard)?;
                if !(0.0..=MAX_VOLTS).contains(&volts) {
                    return Err(ErrorEntry::with_detail(
                        StandardError::DataOutOfRange,
                        &format!("{volts} V; allowed 0 to {MAX_VOLTS} V"),
                    ));
                }
                Ok(HeaterRequest::SetVoltage { channel, volts })
            }
            [a, b] if a.matches("OUTPut") && b.matches("STATe") => {
                suffixless(&[b])?;
                let channel = channel_of(a)?;
                if query {
                    no_params(unit)?;
                    return Ok(HeaterRequest::QueryOutput { channel });
                }
                let on = one_param(unit)?.as_bool().map_err(ErrorEntry::standard)?;
                Ok(HeaterRequest::SetOutput { channel, on })
            }
            [a, b] if a.matches("MEASure") && b.matches("VOLTage") && query => {
                suffixless(&[b])?;
                no_params(unit)?;
                Ok(HeaterRequest::MeasureVoltage {
                    channel: channel_of(a)?,
                })
            }
            [a, b] if a.matches("MEASure") && b.matches("CURRent") && query => {
                suffixless(&[b])?;
                no_params(unit)?;
                Ok(HeaterRequest::MeasureCurrent {
                    channel: channel_of(a)?,
                })
            }
            _ => Err(undefined()),
        }
    }
}

fn suffixless(nodes: &[&super::Node]) -> Result<(), ErrorEntry> {
    if nodes.iter().all(|n| n.suffix.is_none()) {
        Ok(())
    } else {
        Err(ErrorEntry::with_detail(
            StandardError::HeaderSuffixOutOfRange,
            "this node takes no suffix",
        ))
    }
}

fn no_params(unit: &ProgramUnit) -> Result<(), ErrorEntry> {
    if unit.params.is_empty() {
        Ok(())
    } else {
        Err(ErrorEntry::standard(StandardError::ParameterNotAllowed))
    }
}

fn one_param(unit: &ProgramUnit) -> Result<&Param, ErrorEntry> {
    match unit.params.as_slice() {
        [p] => Ok(p),
        [] => Err(ErrorEntry::standard(StandardError::MissingParameter)),
        _ => Err(ErrorEntry::standard(StandardError::ParameterNotAllowed)),
    }
}

impl HeaterReply {
    /// Appends this reply's response unit, without terminator (device side).
    pub fn encode_unit(&self, out: &mut Vec<u8>) {
        match self {
            HeaterReply::Identity(id) => id.encode(out),
            HeaterReply::OperationComplete => out.push(b'1'),
            HeaterReply::Error(e) => e.encode(out),
            HeaterReply::ChannelCount(n) => format_nr1(i64::from(*n), out),
            HeaterReply::Volts(v) | HeaterReply::Amps(v) => format_nr3(*v, REPLY_DIGITS, out),
            HeaterReply::Output(on) => out.push(if *on { b'1' } else { b'0' }),
        }
    }
}

/// Appends a response message: the units joined by `;` and the terminator (IEEE 488.2
/// §8.4: units of one response message are separated by `;`). Writes nothing for no units,
/// since a message without queries gets no response.
pub fn encode_response(replies: &[HeaterReply], terminator: Terminator, out: &mut Vec<u8>) {
    if replies.is_empty() {
        return;
    }
    for (i, r) in replies.iter().enumerate() {
        if i > 0 {
            out.push(b';');
        }
        r.encode_unit(out);
    }
    out.extend_from_slice(terminator.bytes());
}

/// A program message as the device understood it.
#[derive(Debug, Clone, PartialEq)]
pub struct HeaterMessage {
    /// Requests to execute, in order.
    pub requests: Vec<HeaterRequest>,
    /// The first error; the units from that one on were not recognised or were discarded.
    pub error: Option<ErrorEntry>,
}

/// Device side: parses one program message (terminator removed) into heater requests.
///
/// Simplification (documented): processing stops at the first unit that fails, whether the
/// failure is a parser error or an unknown header or a bad value; the earlier units are kept.
pub fn parse_heater_message(msg: &[u8], channels: u8) -> HeaterMessage {
    let parsed = parse_program_message(msg);
    let mut requests = Vec::with_capacity(parsed.units.len());
    for unit in &parsed.units {
        match HeaterRequest::from_unit(unit, channels) {
            Ok(r) => requests.push(r),
            Err(e) => {
                return HeaterMessage {
                    requests,
                    error: Some(e),
                };
            }
        }
    }
    HeaterMessage {
        requests,
        error: parsed
            .error
            .map(|e| ErrorEntry::with_detail(e.standard(), &e.to_string())),
    }
}

/// Open-circuit check from the voltage and current readbacks.
///
/// Above `min_volts` at the terminals, a conductance `I/V` below `min_siemens` means the
/// heater circuit is open. Pick `min_siemens` well below `1/R_heater` (e.g. a tenth).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OpenCircuitRule {
    /// Below this terminal voltage the check cannot decide.
    pub min_volts: f64,
    /// Conductance under which the circuit counts as open.
    pub min_siemens: f64,
}

impl OpenCircuitRule {
    /// `Some(true)` if the readbacks show an open circuit, `Some(false)` if current flows as
    /// expected, `None` when the voltage is too low (or a value is not finite) to decide.
    pub fn is_open(&self, measured_volts: f64, measured_amps: f64) -> Option<bool> {
        if !measured_volts.is_finite()
            || !measured_amps.is_finite()
            || measured_volts.abs() < self.min_volts
        {
            return None;
        }
        Some((measured_amps / measured_volts).abs() < self.min_siemens)
    }
}

/// Several requests sent as one program message, units joined by `;` (IEEE 488.2 §7.1: a
/// program message is one or more program message units), with one response message
/// whose units (joined by `;`, §8.4) answer the queries in order. One write and one reply
/// instead of one per channel: the daemon sets and reads back every output this way.
#[derive(Debug, Clone, PartialEq)]
pub struct HeaterBatch(pub Vec<HeaterRequest>);

impl HeaterBatch {
    fn queries(&self) -> impl Iterator<Item = &HeaterRequest> {
        self.0.iter().filter(|r| r.is_query())
    }
}

impl crate::session::Exchange for HeaterBatch {
    /// One reply per query, in order.
    type Reply = Vec<HeaterReply>;
    type Error = ScpiError;

    fn encode(&self, out: &mut Vec<u8>) {
        for (i, r) in self.0.iter().enumerate() {
            if i > 0 {
                out.push(b';');
            }
            r.encode_unit(out);
        }
        out.extend_from_slice(Terminator::Lf.bytes());
    }

    fn expects_reply(&self) -> bool {
        self.queries().next().is_some()
    }

    fn decode_reply(&self, buf: &[u8]) -> Result<Option<(Vec<HeaterReply>, usize)>, ScpiError> {
        let Some((line, consumed)) = super::split_message(buf, super::MAX_MESSAGE_LEN)? else {
            return Ok(None);
        };
        let units = super::split_response_units(line)?;
        let n = self.queries().count();
        if units.len() != n {
            return Err(ScpiError::BadResponse {
                expected: "one response unit per query of the message",
                shown: escape_bytes(line, SHOWN_REPLY_CHARS),
            });
        }
        let replies = self
            .queries()
            .zip(units)
            .map(|(q, u)| q.decode_reply(u))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(Some((replies, consumed)))
    }
}

impl crate::session::Exchange for HeaterRequest {
    type Reply = HeaterReply;
    type Error = ScpiError;

    fn encode(&self, out: &mut Vec<u8>) {
        HeaterRequest::encode(self, Terminator::Lf, out);
    }

    fn expects_reply(&self) -> bool {
        self.is_query()
    }

    fn decode_reply(&self, buf: &[u8]) -> Result<Option<(HeaterReply, usize)>, ScpiError> {
        let Some((line, consumed)) = super::split_message(buf, super::MAX_MESSAGE_LEN)? else {
            return Ok(None);
        };
        Ok(Some((self.decode_reply(line)?, consumed)))
    }
}
