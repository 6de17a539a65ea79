//! The simulated stage.
