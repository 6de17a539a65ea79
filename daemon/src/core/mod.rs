//! The control core: pure code, no I/O, no clock reads, no tokio.
//!
//! - [`pid`]: one discrete PID loop ([`pid::Pid`]) with derivative on the measurement
//!   through a first-order filter, setpoint weighting, back-calculation anti-windup,
//!   output clamp and slew limit, bumpless manual↔auto and gain changes;
//! - [`geometry`]: the map between leg length changes and plate tilt, and its
//!   least-norm, zero-mean inverse;
//! - [`cascade`]: the [`cascade::Controller`] that ties tilt loops, leg loops and modes
//!   together into one `step(inputs, now)`;
//! - [`ramp`]: rate-limited setpoints.
//!
//! Time always comes in as an argument (seconds on the run's own clock), so the same
//! code runs at wall-clock rate, at a speed factor, and in virtual time.

pub mod cascade;
pub mod geometry;
pub mod interlocks;
pub mod pid;
pub mod ramp;
