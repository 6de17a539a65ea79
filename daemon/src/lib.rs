//! stiltd's library: the control core, the pipeline that runs it, and its sinks.
//!
//! The binaries (`src/bin/`) are thin: they parse the command line and call into here.

pub mod analysis;
pub mod core;
pub mod record;
pub mod rows;
