//! stilt's configuration, in two stages.
//!
//! A scenario or stage file is TOML. [`load_str`] parses it into the raw structs of
//! [`raw`], which mirror the file exactly, then [`validate`] turns them into a typed
//! [`Config`] whose fields carry their units in their names (`length_m`, `rate_hz`) and
//! whose invariants (at least three legs, not collinear, rates that divide, limits that
//! make sense) are already checked. Every problem becomes a [`ConfigError`] naming the
//! key path, the file's line and column, the value found and what is allowed; problems
//! are collected into [`ConfigErrors`] rather than stopping at the first.
//!
//! This crate knows TOML, serde, validation and units. It never knows tokio, HTTP,
//! HDF5 or serial ports.
//!
//! ```
//! let cfg = stilt_config::load_str(stilt_config::DEMO_SCENARIO, "demo.toml").unwrap();
//! assert_eq!(cfg.legs.len(), 3);
//! ```

pub mod errors;
pub mod materials;
pub mod raw;
mod spans;
pub mod types;
mod validate;

pub use errors::{ConfigError, ConfigErrors};
pub use materials::{MATERIALS, Material};
pub use types::*;

/// The built-in demo scenario: an invented basement breadboard on three aluminium legs.
pub const DEMO_SCENARIO: &str = include_str!("../examples/demo.toml");

/// The commented template for a real stage.
pub const HARDWARE_TEMPLATE: &str = include_str!("../examples/hardware-template.toml");

/// Parses and validates a configuration held in memory.
///
/// `origin` names the text in error messages (usually the file's path).
pub fn load_str(text: &str, origin: &str) -> Result<Config, ConfigErrors> {
    let spans = spans::SpanIndex::build(text, origin)?;
    let (raw, unknown_keys) = raw::parse(text, &spans)?;
    validate::validate(raw, text, &spans, unknown_keys)
}

/// Reads, parses and validates a configuration file.
pub fn load_file(path: &std::path::Path) -> Result<Config, ConfigErrors> {
    let origin = path.display().to_string();
    let text = std::fs::read_to_string(path).map_err(|e| {
        ConfigErrors(vec![ConfigError {
            origin: origin.clone(),
            path: String::new(),
            line: 0,
            column: 0,
            found: String::new(),
            problem: format!("cannot read the file: {e}"),
            allowed: "a readable UTF-8 TOML file".into(),
        }])
    })?;
    load_str(&text, &origin)
}
