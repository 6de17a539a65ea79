//! The simulated stage that stands in for real hardware in the demo and the tests.
//!
//! A [`SimStage`] holds the physics of a levelling stage: each leg is a two-node lumped
//! thermal model (a small heater node coupled to the leg body, the body coupled to the
//! room air), leg length follows leg temperature through α·L, and the plate's tilt is
//! the plane through the leg tops plus the floor's own tilt. The room ([`environment`])
//! swings daily, wanders slowly and has a gradient across the stage; the floor drifts
//! and wobbles. The instruments ([`SimStage::read_tilt`], [`SimStage::read_thermometer`])
//! add their own noise, drift, quantisation and range.
//!
//! Everything linear is advanced exactly (matrix exponential with the inputs held over
//! the step), so any step size is stable and a run does not depend on how it is sliced.
//! A run is deterministic for a given seed: every noise source draws from its own
//! ChaCha8 stream, so the disturbances are the same whatever the controller does.
//!
//! # Hardware in the loop
//!
//! On top of the stage sit the device sides of its three instruments ([`devices`]), a fault
//! schedule ([`faults`]) and the [`Rig`] that ties them to one `SimStage`, all sans-IO: bytes
//! in, bytes out, time as a parameter, testable without a port. The `stilt-hil-sim` binary
//! puts each instrument on its own pseudo-terminal so the daemon can be run over real serial
//! I/O. **Every command set and register map is our own invention** (defined in
//! `stilt-protocol`); none copies a real instrument.
//!
//! ## The binary
//!
//! ```text
//! stilt-hil-sim [CONFIG] [--port-map PATH] [--speed N] [--faults PATH] [--state PATH]
//!               [--duration SECONDS] [--thermometer-unit N]
//! ```
//!
//! - `CONFIG`: a stage config (`stilt_config::load_file_with` and the port map it has just
//!   written); without it, the built-in demo. Its `[instruments.thermometer]` units become
//!   the units of the emulated thermometer bus (hil-sim/README.md).
//! - `--port-map PATH` (default `./hil-ports.toml`): where the [port map](crate::portmap) goes.
//! - `--speed N` (default 1, up to 100000): simulated seconds per wall-clock second.
//! - `--faults PATH`: a fault schedule ([`faults`]).
//! - `--state PATH`: the heater supply's state as JSON, rewritten (atomically) whenever a
//!   command changes it and before the reply to that message leaves, so a test sees what the
//!   daemon commanded even if it kills the simulator.
//! - `--duration SECONDS`: stop after this much wall-clock time (otherwise SIGTERM/SIGINT).
//! - `--thermometer-unit N` (default 1): the thermometer's Modbus address for a stage
//!   without `[instruments]`.
//!
//! It opens one pty pair per instrument (`tokio_serial::SerialStream::pair()`), keeps the
//! master side, closes its own slave fd so the daemon can open the slave path exclusively,
//! writes the port map, and prints `ready` on stdout. On exit it prints one line of JSON:
//! `wall_time_s`, `speed`, then [`rig::Summary`] (`sim_time_s`, per-instrument
//! [`rig::LinkCounters`], `thermometer_units` ([`rig::UnitSummary`]), `heater_power_w` per
//! channel as last commanded, `heater_state`).
//! Logs go to stderr (`RUST_LOG` filters them). While no one holds the slave open, reading the
//! master fails with EIO; the simulator waits 50 ms and retries, so the daemon may connect
//! late, disconnect and reconnect.
//!
//! Simulated time advances every 10 ms of wall time by the measured elapsed time × speed.
//! The tiltmeter samples at the config's `tiltmeter.rate_hz` in simulated time and answers
//! each query at once with its latest sample; the thermometer scans every 12.5 ms × averaging
//! of simulated time and answers after the Modbus t3.5 silence (≈ 2 ms at 19200 baud); the
//! heater supply answers each program message at once. Fault times are simulated seconds;
//! `late_reply` delays are wall-clock milliseconds, since the daemon's timeouts are.
//!
//! ## Disconnect
//!
//! `disconnect` makes the line dead both ways (input discarded, nothing sent, queued replies
//! dropped) while the pty stays open at the same path. Hanging up for real would mean closing
//! the master, which deletes `/dev/pts/N`; a new pair gets a new number the daemon's config
//! does not name, and a pty has no modem-status line to drop. So the daemon sees what a pulled
//! RS-232 cable without handshake lines looks like: silence, found by its reply timeouts.
//!
//! This crate knows the stage's physics, the device side of each protocol and fault
//! schedules. It never knows the daemon's internals.

pub mod devices;
pub mod environment;
pub mod faults;
pub mod noise;
pub mod portmap;
pub mod rig;
pub mod stage;
pub mod thermal;

pub use rig::Rig;
pub use stage::{SimStage, TiltReading, Truth};

/// Seconds in a day, for the daily cycles.
pub const DAY_S: f64 = 86_400.0;
