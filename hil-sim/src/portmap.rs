//! The port map: a small TOML file telling a daemon which pty each instrument is on.
//!
//! The simulator writes it once all its ptys are open; a daemon config includes it. Shape
//! (exactly this, keys in this order):
//!
//! ```toml
//! # written by stilt-hil-sim; include it from a daemon config
//! [ports]
//! tiltmeter = "/dev/pts/N"
//! thermometer = "/dev/pts/M"
//! heater = "/dev/pts/K"
//! [serial]
//! tiltmeter_baud = 115200
//! thermometer_baud = 19200
//! heater_baud = 115200
//! thermometer_unit = 1
//! ```
//!
//! Main type: [`PortMap`] ([`PortMap::to_toml`], [`PortMap::parse`], [`PortMap::write_atomic`]).

use std::path::Path;

use serde::Deserialize;

/// Where each instrument is, and how its line is set.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PortMap {
    /// The tiltmeter's pty (slave side).
    pub tiltmeter: String,
    /// The thermometer's pty.
    pub thermometer: String,
    /// The heater supply's pty.
    pub heater: String,
    /// Tiltmeter baud rate.
    pub tiltmeter_baud: u32,
    /// Thermometer baud rate.
    pub thermometer_baud: u32,
    /// Heater supply baud rate.
    pub heater_baud: u32,
    /// The thermometer's Modbus unit address.
    pub thermometer_unit: u8,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawMap {
    ports: RawPorts,
    serial: RawSerial,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPorts {
    tiltmeter: String,
    thermometer: String,
    heater: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSerial {
    tiltmeter_baud: u32,
    thermometer_baud: u32,
    heater_baud: u32,
    thermometer_unit: u8,
}

/// A port map that cannot be read.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error(
    "port map {origin}: {problem} (expected the [ports] and [serial] tables that stilt-hil-sim writes)"
)]
pub struct PortMapError {
    /// Where it came from.
    pub origin: String,
    /// What is wrong (the TOML parser's message names the key).
    pub problem: String,
}

impl PortMap {
    /// The file's text, in the documented shape.
    pub fn to_toml(&self) -> String {
        let s = |v: &str| toml::Value::String(v.to_owned()).to_string();
        format!(
            "# written by stilt-hil-sim; include it from a daemon config\n\
             [ports]\n\
             tiltmeter = {}\n\
             thermometer = {}\n\
             heater = {}\n\
             [serial]\n\
             tiltmeter_baud = {}\n\
             thermometer_baud = {}\n\
             heater_baud = {}\n\
             thermometer_unit = {}\n",
            s(&self.tiltmeter),
            s(&self.thermometer),
            s(&self.heater),
            self.tiltmeter_baud,
            self.thermometer_baud,
            self.heater_baud,
            self.thermometer_unit
        )
    }

    /// Reads a port map's text; `origin` names it in errors.
    pub fn parse(text: &str, origin: &str) -> Result<PortMap, PortMapError> {
        let raw: RawMap = toml::from_str(text).map_err(|e| PortMapError {
            origin: origin.to_owned(),
            problem: e.to_string().trim().to_owned(),
        })?;
        Ok(PortMap {
            tiltmeter: raw.ports.tiltmeter,
            thermometer: raw.ports.thermometer,
            heater: raw.ports.heater,
            tiltmeter_baud: raw.serial.tiltmeter_baud,
            thermometer_baud: raw.serial.thermometer_baud,
            heater_baud: raw.serial.heater_baud,
            thermometer_unit: raw.serial.thermometer_unit,
        })
    }

    /// Writes the map to `path` through a temporary file and a rename, so a reader never
    /// sees half a file.
    pub fn write_atomic(&self, path: &Path) -> std::io::Result<()> {
        write_atomic(path, self.to_toml().as_bytes())
    }
}

/// Writes `bytes` to `path` via `path` + ".tmp" and a rename.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let mut tmp = path.as_os_str().to_owned();
    tmp.push(".tmp");
    std::fs::write(&tmp, bytes)?;
    std::fs::rename(&tmp, path)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn map() -> PortMap {
        PortMap {
            tiltmeter: "/dev/pts/3".into(),
            thermometer: "/dev/pts/4".into(),
            heater: "/dev/pts/5".into(),
            tiltmeter_baud: 115_200,
            thermometer_baud: 19_200,
            heater_baud: 115_200,
            thermometer_unit: 1,
        }
    }

    #[test]
    fn writes_exactly_the_documented_shape() {
        let want = "# written by stilt-hil-sim; include it from a daemon config\n\
                    [ports]\n\
                    tiltmeter = \"/dev/pts/3\"\n\
                    thermometer = \"/dev/pts/4\"\n\
                    heater = \"/dev/pts/5\"\n\
                    [serial]\n\
                    tiltmeter_baud = 115200\n\
                    thermometer_baud = 19200\n\
                    heater_baud = 115200\n\
                    thermometer_unit = 1\n";
        assert_eq!(map().to_toml(), want);
        assert_eq!(PortMap::parse(want, "x").unwrap(), map());
    }

    #[test]
    fn odd_paths_survive_and_bad_maps_are_refused() {
        let mut m = map();
        m.heater = "/tmp/a \"b\"\\c".into();
        assert_eq!(PortMap::parse(&m.to_toml(), "x").unwrap(), m);
        let e = PortMap::parse("[ports]\ntiltmeter = 1\n", "m.toml").unwrap_err();
        assert!(e.to_string().contains("m.toml"), "{e}");
        let bad = map()
            .to_toml()
            .replace("thermometer_unit = 1", "thermometer_unit = 300");
        assert!(PortMap::parse(&bad, "x").is_err());
    }
}
