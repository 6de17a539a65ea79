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
