//! stiltd's library: the control core, the pipeline that runs it, and its sinks.
//!
//! - [`core`]: pure control code (PID, geometry, cascade), time as an argument;
//! - [`pipeline`]: readings in, ticks, rows out — the same in every world;
//! - [`sim`]: the in-process world (simulated stage wired to the pipeline);
//! - [`demo`]: `stiltd demo` and its summary;
//! - [`rows`]: the domain rows and the [`rows::RowSink`] trait;
//! - [`status`]: the live state and the change requests the outside world exchanges with the loop;
//! - [`record`]: the HDF5 recorder; [`analysis`]: spectra, Allan deviation, fits;
//! - [`report`]: `stiltd report` (run statistics, JSON, plots); [`tune`]: step and relay tests.
//! - [`acquire`]: serial acquisition tasks and the `SerialBackend` for real instruments;
//! - [`api`]: the HTTP API (JSON under `/v1`, live stream, metrics, access tokens).
//!
//! The binaries (`src/bin/`) are thin: they parse the command line and call into here.

pub mod acquire;
pub mod analysis;
pub mod api;
pub mod cmd;
pub mod core;
pub mod demo;
pub mod logging;
pub mod pipeline;
pub mod record;
pub mod report;
pub mod rows;
pub mod runtime;
pub mod sim;
pub mod status;
pub mod tune;
