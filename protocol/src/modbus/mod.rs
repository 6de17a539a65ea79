//! Modbus RTU: the master's request encoder and reply decoder, and the server-side (device)
//! frame parser for the simulator.
//!
//! Supported functions: 03 read holding registers, 04 read input registers, 06 write single
//! register, 16 (0x10) write multiple registers, and exception responses. An RTU frame (ADU)
//! is `unit, function, data…, CRC low byte, CRC high byte`, at most [`MAX_ADU`] bytes, with
//! CRC-16/MODBUS ([`crc16`]). Sources: "MODBUS Application Protocol Specification V1.1b3"
//! (function and exception codes, quantity limits) and "MODBUS over Serial Line
//! Specification and Implementation Guide V1.02" (RTU framing, unit addresses, CRC order,
//! timing); section numbers quoted from memory.
//!
//! Why not tokio-modbus: it builds on tokio and tokio-util codecs and has no sans-IO
//! server-side frame parser, while this crate must stay tokio-free; the RTU codec is small.
//!
//! Main items: [`Request`], [`Response`], [`ExceptionCode`], [`encode_request`],
//! [`decode_response`] (master, length-driven, works on a byte stream), [`parse_request_frame`]
//! and [`decode_request`] (server), [`encode_response`], [`RegisterBank`] and [`handle_frame`]
//! (a complete server turn for the simulator), [`Transaction`] (plugs into
//! [`crate::session::Session`]). Submodules: [`timing`] (3.5/1.5-character silences and a
//! frame assembler) and [`rtd`] (OUR OWN invented RTD-thermometer register map).

pub mod rtd;
pub mod timing;

use crate::text::{SHOWN_REPLY_CHARS, escape_bytes};

/// Largest RTU ADU in bytes (serial line spec §2.5.1: 256).
pub const MAX_ADU: usize = 256;
/// Most registers in one read (function 03/04: 1 to 125, application protocol §6.3/§6.4).
pub const MAX_READ_REGISTERS: u16 = 125;
/// Most registers in one write multiple (function 16: 1 to 123, application protocol §6.12).
pub const MAX_WRITE_REGISTERS: u16 = 123;
/// The broadcast address (writes only; no reply).
pub const BROADCAST: u8 = 0;
/// Highest unicast server address (248–255 are reserved, serial line spec §2.2).
pub const MAX_UNIT: u8 = 247;

/// Function 03.
pub const READ_HOLDING_REGISTERS: u8 = 0x03;
/// Function 04.
pub const READ_INPUT_REGISTERS: u8 = 0x04;
/// Function 06.
pub const WRITE_SINGLE_REGISTER: u8 = 0x06;
/// Function 16.
pub const WRITE_MULTIPLE_REGISTERS: u8 = 0x10;

const CRC: crc::Crc<u16> = crc::Crc::<u16>::new(&crc::CRC_16_MODBUS);

/// CRC-16/MODBUS of `bytes` (poly 0x8005 reflected, init 0xFFFF). On the wire the low byte
/// goes first.
pub fn crc16(bytes: &[u8]) -> u16 {
    CRC.checksum(bytes)
}

/// A Modbus exception code (application protocol §7).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum ExceptionCode {
    /// 01: function not supported.
    IllegalFunction,
    /// 02: address (or address + quantity) not valid.
    IllegalDataAddress,
    /// 03: a value in the request is not allowed (quantity, byte count, register value).
    IllegalDataValue,
    /// 04: unrecoverable error in the server.
    ServerDeviceFailure,
    /// 05: accepted, processing takes long.
    Acknowledge,
    /// 06: busy with a long command.
    ServerDeviceBusy,
    /// 08: memory parity error.
    MemoryParityError,
    /// 0A: gateway path unavailable.
    GatewayPathUnavailable,
    /// 0B: gateway target failed to respond.
    GatewayTargetFailedToRespond,
    /// Any other code.
    Other(u8),
}

impl ExceptionCode {
    /// The code byte.
    pub fn to_u8(self) -> u8 {
        match self {
            ExceptionCode::IllegalFunction => 0x01,
            ExceptionCode::IllegalDataAddress => 0x02,
            ExceptionCode::IllegalDataValue => 0x03,
            ExceptionCode::ServerDeviceFailure => 0x04,
            ExceptionCode::Acknowledge => 0x05,
            ExceptionCode::ServerDeviceBusy => 0x06,
            ExceptionCode::MemoryParityError => 0x08,
            ExceptionCode::GatewayPathUnavailable => 0x0A,
            ExceptionCode::GatewayTargetFailedToRespond => 0x0B,
            ExceptionCode::Other(c) => c,
        }
    }

    /// The code for a byte.
    pub fn from_u8(c: u8) -> Self {
        match c {
            0x01 => ExceptionCode::IllegalFunction,
            0x02 => ExceptionCode::IllegalDataAddress,
            0x03 => ExceptionCode::IllegalDataValue,
            0x04 => ExceptionCode::ServerDeviceFailure,
            0x05 => ExceptionCode::Acknowledge,
            0x06 => ExceptionCode::ServerDeviceBusy,
            0x08 => ExceptionCode::MemoryParityError,
            0x0A => ExceptionCode::GatewayPathUnavailable,
            0x0B => ExceptionCode::GatewayTargetFailedToRespond,
            c => ExceptionCode::Other(c),
        }
    }
}

impl std::fmt::Display for ExceptionCode {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{:02X} ({:?})", self.to_u8(), self)
    }
}

/// A request PDU.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Request {
    /// Function 03.
    ReadHoldingRegisters {
        /// First register address (0-based, as on the wire).
        start: u16,
        /// Number of registers, 1 to 125.
        count: u16,
    },
    /// Function 04.
    ReadInputRegisters {
        /// First register address.
        start: u16,
        /// Number of registers, 1 to 125.
        count: u16,
    },
    /// Function 06.
    WriteSingleRegister {
        /// Register address.
        address: u16,
        /// Value.
        value: u16,
    },
    /// Function 16.
    WriteMultipleRegisters {
        /// First register address.
        start: u16,
        /// Values, 1 to 123 of them.
        values: Vec<u16>,
    },
}

impl Request {
    /// The function code.
    pub fn function(&self) -> u8 {
        match self {
            Request::ReadHoldingRegisters { .. } => READ_HOLDING_REGISTERS,
            Request::ReadInputRegisters { .. } => READ_INPUT_REGISTERS,
            Request::WriteSingleRegister { .. } => WRITE_SINGLE_REGISTER,
            Request::WriteMultipleRegisters { .. } => WRITE_MULTIPLE_REGISTERS,
        }
    }

    /// True for functions that change the server (the only ones allowed on broadcast).
    pub fn is_write(&self) -> bool {
        matches!(
            self,
            Request::WriteSingleRegister { .. } | Request::WriteMultipleRegisters { .. }
        )
    }

    /// Checks quantities and address ranges against the specification's limits.
    pub fn validate(&self, unit: u8) -> Result<(), ModbusError> {
        let function = self.function();
        validate_unit(unit, function)?;
        let (start, quantity, max) = match self {
            Request::ReadHoldingRegisters { start, count }
            | Request::ReadInputRegisters { start, count } => (*start, *count, MAX_READ_REGISTERS),
            Request::WriteSingleRegister { .. } => return Ok(()),
            Request::WriteMultipleRegisters { start, values } => (
                *start,
                u16::try_from(values.len()).unwrap_or(u16::MAX),
                MAX_WRITE_REGISTERS,
            ),
        };
        if !(1..=max).contains(&quantity) {
            return Err(ModbusError::QuantityOutOfRange {
                unit,
                function,
                quantity,
                max,
            });
        }
        if u32::from(start) + u32::from(quantity) > 0x1_0000 {
            return Err(ModbusError::AddressOverflow {
                unit,
                function,
                start,
                quantity,
            });
        }
        Ok(())
    }
}

/// A request with its server address, as a server receives it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RequestFrame {
    /// Server address (0 = broadcast).
    pub unit: u8,
    /// The request.
    pub request: Request,
}

/// A response PDU.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Response {
    /// Reply to 03: the register values.
    ReadHoldingRegisters(Vec<u16>),
    /// Reply to 04: the register values.
    ReadInputRegisters(Vec<u16>),
    /// Reply to 06: the echo.
    WriteSingleRegister {
        /// Register address.
        address: u16,
        /// Value written.
        value: u16,
    },
    /// Reply to 16: start and count echoed.
    WriteMultipleRegisters {
        /// First register address.
        start: u16,
        /// Number of registers written.
        count: u16,
    },
    /// An exception reply (function code with bit 7 set).
    Exception {
        /// The function code of the request (without bit 7).
        function: u8,
        /// The exception code.
        code: ExceptionCode,
    },
}

/// Everything that can be wrong with a Modbus frame.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ModbusError {
    /// The CRC does not match; a server stays silent, a master retries.
    #[error("CRC mismatch: frame carries {received:#06X}, computed {computed:#06X}")]
    Crc {
        /// CRC found in the frame.
        received: u16,
        /// CRC computed over the frame.
        computed: u16,
    },
    /// The frame is too short, too long, or has bytes after its end.
    #[error("bad frame length {len}: {reason} (frame {shown})")]
    FrameLength {
        /// Length of the frame seen.
        len: usize,
        /// What was expected.
        reason: &'static str,
        /// The frame, escaped and truncated.
        shown: String,
    },
    /// An address outside 0..=247, or broadcast (0) for a read.
    #[error(
        "invalid server address {unit} for function {function:#04X}: allowed 1 to 247 (0 = broadcast, writes only)"
    )]
    InvalidUnit {
        /// The address.
        unit: u8,
        /// The function.
        function: u8,
    },
    /// A function this crate does not implement (server answers exception 01).
    #[error("unsupported function {function:#04X} for server {unit}; supported: 03, 04, 06, 16")]
    UnsupportedFunction {
        /// Server address.
        unit: u8,
        /// The function code.
        function: u8,
    },
    /// A register count outside the specification's limits (server answers exception 03).
    #[error("function {function:#04X}: register count {quantity} out of range 1 to {max}")]
    QuantityOutOfRange {
        /// Server address.
        unit: u8,
        /// The function code.
        function: u8,
        /// The count given.
        quantity: u16,
        /// The largest allowed.
        max: u16,
    },
    /// Start address + count runs past register 65535 (server answers exception 02).
    #[error("function {function:#04X}: registers {start} + {quantity} run past address 65535")]
    AddressOverflow {
        /// Server address.
        unit: u8,
        /// The function code.
        function: u8,
        /// First register.
        start: u16,
        /// Count.
        quantity: u16,
    },
    /// A byte count field that disagrees with the register count (server answers exception 03).
    #[error("function {function:#04X}: byte count {declared}, expected {expected}")]
    ByteCount {
        /// Server address.
        unit: u8,
        /// The function code.
        function: u8,
        /// Byte count in the frame.
        declared: u8,
        /// Byte count implied by the register count.
        expected: usize,
    },
    /// The reply came from another server.
    #[error("reply from server {received}, expected {expected}")]
    UnexpectedUnit {
        /// The address asked.
        expected: u8,
        /// The address in the reply.
        received: u8,
    },
    /// The reply carries another function code.
    #[error("reply with function {received:#04X}, expected {expected:#04X}")]
    UnexpectedFunction {
        /// The function asked.
        expected: u8,
        /// The function in the reply.
        received: u8,
    },
    /// A write reply whose echo differs from the request.
    #[error("write reply echo differs from the request: {shown}")]
    EchoMismatch {
        /// The reply frame, escaped.
        shown: String,
    },
    /// A response that cannot be encoded (e.g. too many registers).
    #[error("cannot encode response: {reason}")]
    Unencodable {
        /// What was wrong.
        reason: &'static str,
    },
}

impl ModbusError {
    /// For a request a server received with a good CRC: the exception reply it owes, as
    /// `(unit, function, code)`. `None` for errors that get no reply (CRC, framing, address).
    pub fn exception_reply(&self) -> Option<(u8, u8, ExceptionCode)> {
        match *self {
            ModbusError::UnsupportedFunction { unit, function } => {
                Some((unit, function, ExceptionCode::IllegalFunction))
            }
            ModbusError::QuantityOutOfRange { unit, function, .. }
            | ModbusError::ByteCount { unit, function, .. } => {
                Some((unit, function, ExceptionCode::IllegalDataValue))
            }
            ModbusError::AddressOverflow { unit, function, .. } => {
                Some((unit, function, ExceptionCode::IllegalDataAddress))
            }
            _ => None,
        }
    }
}

fn validate_unit(unit: u8, function: u8) -> Result<(), ModbusError> {
    let write = function == WRITE_SINGLE_REGISTER || function == WRITE_MULTIPLE_REGISTERS;
    if unit > MAX_UNIT || (unit == BROADCAST && !write) {
        return Err(ModbusError::InvalidUnit { unit, function });
    }
    Ok(())
}

fn push_u16(out: &mut Vec<u8>, v: u16) {
    out.extend_from_slice(&v.to_be_bytes());
}

fn be16(b: &[u8], at: usize) -> u16 {
    match b.get(at..at + 2) {
        Some(&[hi, lo]) => u16::from_be_bytes([hi, lo]),
        _ => 0,
    }
}

fn append_crc(out: &mut Vec<u8>, frame_start: usize) {
    let c = crc16(&out[frame_start..]);
    out.extend_from_slice(&c.to_le_bytes());
}

fn check_crc(frame: &[u8]) -> Result<(), ModbusError> {
    let n = frame.len();
    let received = u16::from_le_bytes([frame[n - 2], frame[n - 1]]);
    let computed = crc16(&frame[..n - 2]);
    if received != computed {
        return Err(ModbusError::Crc { received, computed });
    }
    Ok(())
}

fn shown(b: &[u8]) -> String {
    escape_bytes(b, SHOWN_REPLY_CHARS)
}

/// Appends the RTU frame of `request` to `unit`, CRC included, after validating it.
pub fn encode_request(unit: u8, request: &Request, out: &mut Vec<u8>) -> Result<(), ModbusError> {
    request.validate(unit)?;
    let start = out.len();
    out.push(unit);
    out.push(request.function());
    match request {
        Request::ReadHoldingRegisters { start, count }
        | Request::ReadInputRegisters { start, count } => {
            push_u16(out, *start);
            push_u16(out, *count);
        }
        Request::WriteSingleRegister { address, value } => {
            push_u16(out, *address);
            push_u16(out, *value);
        }
        Request::WriteMultipleRegisters { start, values } => {
            push_u16(out, *start);
            push_u16(out, values.len() as u16);
            out.push((values.len() * 2) as u8);
            for v in values {
                push_u16(out, *v);
            }
        }
    }
    append_crc(out, start);
    Ok(())
}

/// Appends the RTU frame of `response` from `unit`, CRC included (server side).
pub fn encode_response(
    unit: u8,
    response: &Response,
    out: &mut Vec<u8>,
) -> Result<(), ModbusError> {
    let start = out.len();
    out.push(unit);
    match response {
        Response::ReadHoldingRegisters(values) | Response::ReadInputRegisters(values) => {
            if values.is_empty() || values.len() > usize::from(MAX_READ_REGISTERS) {
                out.truncate(start);
                return Err(ModbusError::Unencodable {
                    reason: "a read reply carries 1 to 125 registers",
                });
            }
            out.push(if matches!(response, Response::ReadHoldingRegisters(_)) {
                READ_HOLDING_REGISTERS
            } else {
                READ_INPUT_REGISTERS
            });
            out.push((values.len() * 2) as u8);
            for v in values {
                push_u16(out, *v);
            }
        }
        Response::WriteSingleRegister { address, value } => {
            out.push(WRITE_SINGLE_REGISTER);
            push_u16(out, *address);
            push_u16(out, *value);
        }
        Response::WriteMultipleRegisters { start: s, count } => {
            out.push(WRITE_MULTIPLE_REGISTERS);
            push_u16(out, *s);
            push_u16(out, *count);
        }
        Response::Exception { function, code } => {
            out.push(function | 0x80);
            out.push(code.to_u8());
        }
    }
    append_crc(out, start);
    Ok(())
}

/// Master side: decodes the reply of `unit` to `request` from the start of `buf`.
///
/// The reply's length follows from its function code and byte count, so this works on a
/// byte stream without relying on inter-frame silences (which USB serial adapters blur).
/// Returns `Ok(None)` until the whole frame is present; checks the address, the function,
/// the byte count, the CRC, and for writes the echo.
pub fn decode_response(
    buf: &[u8],
    unit: u8,
    request: &Request,
) -> Result<Option<(Response, usize)>, ModbusError> {
    let function = request.function();
    let Some(&got_unit) = buf.first() else {
        return Ok(None);
    };
    if got_unit != unit {
        return Err(ModbusError::UnexpectedUnit {
            expected: unit,
            received: got_unit,
        });
    }
    let Some(&got_fn) = buf.get(1) else {
        return Ok(None);
    };
    let len = if got_fn == function | 0x80 {
        5
    } else if got_fn != function {
        return Err(ModbusError::UnexpectedFunction {
            expected: function,
            received: got_fn,
        });
    } else {
        match request {
            Request::ReadHoldingRegisters { count, .. }
            | Request::ReadInputRegisters { count, .. } => {
                let Some(&bc) = buf.get(2) else {
                    return Ok(None);
                };
                let expected = usize::from(*count) * 2;
                if usize::from(bc) != expected {
                    return Err(ModbusError::ByteCount {
                        unit,
                        function,
                        declared: bc,
                        expected,
                    });
                }
                5 + expected
            }
            Request::WriteSingleRegister { .. } | Request::WriteMultipleRegisters { .. } => 8,
        }
    };
    if buf.len() < len {
        return Ok(None);
    }
    let frame = &buf[..len];
    check_crc(frame)?;
    if got_fn & 0x80 != 0 {
        return Ok(Some((
            Response::Exception {
                function,
                code: ExceptionCode::from_u8(frame[2]),
            },
            len,
        )));
    }
    let response = match request {
        Request::ReadHoldingRegisters { .. } | Request::ReadInputRegisters { .. } => {
            let values: Vec<u16> = frame[3..len - 2]
                .chunks_exact(2)
                .map(|c| u16::from_be_bytes([c[0], c[1]]))
                .collect();
            if function == READ_HOLDING_REGISTERS {
                Response::ReadHoldingRegisters(values)
            } else {
                Response::ReadInputRegisters(values)
            }
        }
        Request::WriteSingleRegister { address, value } => {
            let (a, v) = (be16(frame, 2), be16(frame, 4));
            if (a, v) != (*address, *value) {
                return Err(ModbusError::EchoMismatch {
                    shown: shown(frame),
                });
            }
            Response::WriteSingleRegister {
                address: a,
                value: v,
            }
        }
        Request::WriteMultipleRegisters { start, values } => {
            let (s, c) = (be16(frame, 2), be16(frame, 4));
            if (s, usize::from(c)) != (*start, values.len()) {
                return Err(ModbusError::EchoMismatch {
                    shown: shown(frame),
                });
            }
            Response::WriteMultipleRegisters { start: s, count: c }
        }
    };
    Ok(Some((response, len)))
}

/// Length of the request frame starting `buf`, if it can be known yet.
fn request_len(buf: &[u8]) -> Result<Option<usize>, ModbusError> {
    let (Some(&unit), Some(&function)) = (buf.first(), buf.get(1)) else {
        return Ok(None);
    };
    match function {
        READ_HOLDING_REGISTERS | READ_INPUT_REGISTERS | WRITE_SINGLE_REGISTER => Ok(Some(8)),
        WRITE_MULTIPLE_REGISTERS => Ok(buf.get(6).map(|&bc| 9 + usize::from(bc))),
        _ => Err(ModbusError::UnsupportedFunction { unit, function }),
    }
}

/// Server side, on a byte stream: decodes one request from the start of `buf`, its length
/// following from the function code. Prefer [`parse_request_frame`] on frames split by
/// [`timing::FrameAssembler`]: after an unknown function the stream cannot be resynchronised
/// without silences.
pub fn decode_request(buf: &[u8]) -> Result<Option<(RequestFrame, usize)>, ModbusError> {
    match request_len(buf) {
        Ok(Some(len)) if buf.len() >= len => {
            parse_request_frame(&buf[..len]).map(|f| Some((f, len)))
        }
        Ok(_) => Ok(None),
        // The CRC of an unknown function's frame cannot be located on a stream.
        Err(e) => Err(e),
    }
}

/// Server side: parses one complete RTU frame (as split by silences).
///
/// Checks the CRC first (a bad CRC gets no reply), then the address, the function, the
/// quantities and the byte count; errors that deserve an exception reply say so through
/// [`ModbusError::exception_reply`].
pub fn parse_request_frame(frame: &[u8]) -> Result<RequestFrame, ModbusError> {
    let len = frame.len();
    if len < 4 {
        return Err(ModbusError::FrameLength {
            len,
            reason: "an RTU frame has at least 4 bytes",
            shown: shown(frame),
        });
    }
    if len > MAX_ADU {
        return Err(ModbusError::FrameLength {
            len,
            reason: "an RTU frame has at most 256 bytes",
            shown: shown(frame),
        });
    }
    check_crc(frame)?;
    let (unit, function) = (frame[0], frame[1]);
    if unit > MAX_UNIT {
        return Err(ModbusError::InvalidUnit { unit, function });
    }
    let expect_len = |want: usize, reason| {
        if len == want {
            Ok(())
        } else {
            Err(ModbusError::FrameLength {
                len,
                reason,
                shown: shown(frame),
            })
        }
    };
    let request = match function {
        READ_HOLDING_REGISTERS | READ_INPUT_REGISTERS => {
            expect_len(8, "a read request has 8 bytes")?;
            let (start, count) = (be16(frame, 2), be16(frame, 4));
            if function == READ_HOLDING_REGISTERS {
                Request::ReadHoldingRegisters { start, count }
            } else {
                Request::ReadInputRegisters { start, count }
            }
        }
        WRITE_SINGLE_REGISTER => {
            expect_len(8, "a write-single request has 8 bytes")?;
            Request::WriteSingleRegister {
                address: be16(frame, 2),
                value: be16(frame, 4),
            }
        }
        WRITE_MULTIPLE_REGISTERS => {
            if len < 9 {
                return Err(ModbusError::FrameLength {
                    len,
                    reason: "a write-multiple request has at least 9 bytes",
                    shown: shown(frame),
                });
            }
            let (start, quantity, bc) = (be16(frame, 2), be16(frame, 4), frame[6]);
            if !(1..=MAX_WRITE_REGISTERS).contains(&quantity) {
                return Err(ModbusError::QuantityOutOfRange {
                    unit,
                    function,
                    quantity,
                    max: MAX_WRITE_REGISTERS,
                });
            }
            let expected = usize::from(quantity) * 2;
            if usize::from(bc) != expected || len != 9 + expected {
                return Err(ModbusError::ByteCount {
                    unit,
                    function,
                    declared: bc,
                    expected,
                });
            }
            let values = frame[7..7 + expected]
                .chunks_exact(2)
                .map(|c| u16::from_be_bytes([c[0], c[1]]))
                .collect();
            Request::WriteMultipleRegisters { start, values }
        }
        _ => return Err(ModbusError::UnsupportedFunction { unit, function }),
    };
    request.validate(unit)?;
    Ok(RequestFrame { unit, request })
}

/// The server's registers, as the simulator provides them.
pub trait RegisterBank {
    /// Reads one holding register; `IllegalDataAddress` for addresses that do not exist.
    fn read_holding(&self, address: u16) -> Result<u16, ExceptionCode>;
    /// Reads one input register.
    fn read_input(&self, address: u16) -> Result<u16, ExceptionCode>;
    /// Checks that `values` may be written from `start` (address and value ranges), without
    /// writing. The default accepts what [`Self::read_holding`] can read.
    fn check_write(&self, start: u16, values: &[u16]) -> Result<(), ExceptionCode> {
        for i in 0..values.len() {
            self.read_holding(start.wrapping_add(i as u16))?;
        }
        Ok(())
    }
    /// Writes one holding register (called only after [`Self::check_write`] accepted it).
    fn write_holding(&mut self, address: u16, value: u16);
}

/// Executes a parsed request against `bank`; an exception becomes a [`Response::Exception`].
/// Writes are all-or-nothing: every register is checked before any is written.
pub fn serve(request: &Request, bank: &mut dyn RegisterBank) -> Response {
    let function = request.function();
    let exc = |code| Response::Exception { function, code };
    match request {
        Request::ReadHoldingRegisters { start, count }
        | Request::ReadInputRegisters { start, count } => {
            let mut values = Vec::with_capacity(usize::from(*count));
            for i in 0..*count {
                let a = start.wrapping_add(i);
                let v = if function == READ_HOLDING_REGISTERS {
                    bank.read_holding(a)
                } else {
                    bank.read_input(a)
                };
                match v {
                    Ok(v) => values.push(v),
                    Err(code) => return exc(code),
                }
            }
            if function == READ_HOLDING_REGISTERS {
                Response::ReadHoldingRegisters(values)
            } else {
                Response::ReadInputRegisters(values)
            }
        }
        Request::WriteSingleRegister { address, value } => {
            if let Err(code) = bank.check_write(*address, &[*value]) {
                return exc(code);
            }
            bank.write_holding(*address, *value);
            Response::WriteSingleRegister {
                address: *address,
                value: *value,
            }
        }
        Request::WriteMultipleRegisters { start, values } => {
            if let Err(code) = bank.check_write(*start, values) {
                return exc(code);
            }
            for (i, v) in values.iter().enumerate() {
                bank.write_holding(start.wrapping_add(i as u16), *v);
            }
            Response::WriteMultipleRegisters {
                start: *start,
                count: values.len() as u16,
            }
        }
    }
}

/// One complete server turn for the simulator: parses `frame`, executes it if it is for
/// `own_unit` (or a broadcast write), and appends the reply frame to `out`.
///
/// Returns `Ok(true)` if a reply was written, `Ok(false)` if none is due (another server's
/// frame, a broadcast), and `Err` for frames that get no reply (bad CRC, bad length); the
/// error is for the simulator's log.
pub fn handle_frame(
    frame: &[u8],
    own_unit: u8,
    bank: &mut dyn RegisterBank,
    out: &mut Vec<u8>,
) -> Result<bool, ModbusError> {
    match parse_request_frame(frame) {
        Ok(RequestFrame { unit, request }) => {
            if unit != own_unit && unit != BROADCAST {
                return Ok(false);
            }
            let response = serve(&request, bank);
            if unit == BROADCAST {
                return Ok(false);
            }
            encode_response(unit, &response, out)?;
            Ok(true)
        }
        Err(e) => match e.exception_reply() {
            Some((unit, function, code)) if unit == own_unit => {
                encode_response(unit, &Response::Exception { function, code }, out)?;
                Ok(true)
            }
            Some(_) => Ok(false),
            None => Err(e),
        },
    }
}

/// A request to one server, for [`crate::session::Session`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Transaction {
    /// Server address (0 = broadcast: no reply expected).
    pub unit: u8,
    /// The request. Prefer [`Transaction::new`], which validates it: an invalid request
    /// encodes to nothing and would only time out.
    pub request: Request,
}

impl Transaction {
    /// A validated transaction (see [`Request::validate`]).
    pub fn new(unit: u8, request: Request) -> Result<Self, ModbusError> {
        request.validate(unit)?;
        Ok(Transaction { unit, request })
    }
}

impl crate::session::Exchange for Transaction {
    type Reply = Response;
    type Error = ModbusError;

    fn encode(&self, out: &mut Vec<u8>) {
        let _ = encode_request(self.unit, &self.request, out);
    }

    fn expects_reply(&self) -> bool {
        self.unit != BROADCAST
    }

    fn decode_reply(&self, buf: &[u8]) -> Result<Option<(Response, usize)>, ModbusError> {
        decode_response(buf, self.unit, &self.request)
    }
}

#[cfg(test)]
mod tests;
