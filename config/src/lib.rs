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
mod instruments;
pub mod materials;
pub mod raw;
mod spans;
pub mod types;
mod validate;

pub use errors::{ConfigError, ConfigErrors};
pub use instruments::port_map_port;
pub use materials::{MATERIALS, Material};
pub use types::*;

/// The built-in demo scenario: an invented basement breadboard on three aluminium legs.
pub const DEMO_SCENARIO: &str = include_str!("../examples/demo.toml");

/// The commented template for a real stage.
pub const HARDWARE_TEMPLATE: &str = include_str!("../examples/hardware-template.toml");

/// The demo stage wired to the hardware-in-the-loop simulator (`stiltd hil`); its
/// `[instruments] port_map` names the file the simulator writes.
pub const HIL_EXAMPLE: &str = include_str!("../examples/hil/stage.toml");

/// Where relative paths in a configuration are resolved, and overrides.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct LoadOptions {
    /// Folder that `instruments.port_map` is relative to (the configuration file's folder);
    /// `None` means the current directory.
    pub base_dir: Option<std::path::PathBuf>,
    /// A port map to use instead of `instruments.port_map` (e.g. the one a freshly started
    /// simulator just wrote).
    pub port_map: Option<std::path::PathBuf>,
}

/// Parses and validates a configuration held in memory.
///
/// `origin` names the text in error messages (usually the file's path). A relative
/// `instruments.port_map` is resolved against the current directory; see [`load_str_with`].
pub fn load_str(text: &str, origin: &str) -> Result<Config, ConfigErrors> {
    load_str_with(text, origin, &LoadOptions::default())
}

/// [`load_str`] with explicit [`LoadOptions`].
pub fn load_str_with(text: &str, origin: &str, opts: &LoadOptions) -> Result<Config, ConfigErrors> {
    let spans = spans::SpanIndex::build(text, origin)?;
    let (raw, unknown_keys) = raw::parse(text, &spans)?;
    validate::validate(raw, text, &spans, unknown_keys, opts)
}

/// Reads, parses and validates a configuration file; a relative `instruments.port_map`
/// is resolved against the file's folder.
pub fn load_file(path: &std::path::Path) -> Result<Config, ConfigErrors> {
    load_file_with(path, None)
}

/// [`load_file`], optionally with a port map that replaces `instruments.port_map`.
pub fn load_file_with(
    path: &std::path::Path,
    port_map: Option<&std::path::Path>,
) -> Result<Config, ConfigErrors> {
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
    let opts = LoadOptions {
        base_dir: path.parent().map(std::path::Path::to_path_buf),
        port_map: port_map.map(std::path::Path::to_path_buf),
    };
    load_str_with(&text, &origin, &opts)
}
