//! Sans-IO instrument protocols for stilt: bytes in, frames or values out.
//!
//! No I/O and no clocks live here: time is always a parameter. Wherever a function needs
//! the time it takes `now: std::time::Duration`, measured since an arbitrary, monotonic
//! origin chosen by the caller (the daemon passes `Instant::now() - start`, the simulator
//! and tests pass virtual times). Only differences between two `now`s carry meaning.
//!
//! Modules:
//! - [`scpi`]: IEEE 488.2 / SCPI-style ASCII messages, the standard error queue, and our
//!   own invented heater-supply command set ([`scpi::heater`]).
//! - [`modbus`]: Modbus RTU codec for both master and server, CRC-16/MODBUS, inter-frame
//!   silence timing and a frame assembler, and our own invented RTD-thermometer register
//!   map ([`modbus::rtd`]).
//! - [`mod@line`]: a configurable ASCII line protocol ([`line::LineSpec`]) and our own invented
//!   tiltmeter reply format ([`line::tilt`]).
//! - [`convert`]: sensor conversions (IEC 60751 platinum RTDs, NTC thermistors, linear).
//! - [`session`]: a generic sans-IO request/reply master session with timeouts and retries.
//! - [`text`]: shared helpers for line framing and for showing device bytes in errors.
//!
//! Conventions shared by every decoder: `decode(&[u8])` returns `Ok(Some((value, consumed)))`
//! when a whole message was found at the start of the buffer, `Ok(None)` when more bytes are
//! needed, and `Err(..)` for bytes that can never become a valid message. Decoders never
//! panic and never hold more than a documented, bounded number of bytes.

pub mod convert;
pub mod line;
pub mod modbus;
pub mod scpi;
pub mod session;
pub mod text;
