//! HDF5 recording of a run: segments written by a dedicated thread, and a streaming
//! reader with CSV export.
//!
//! - [`Recorder::start`] opens the first segment and spawns the writer thread, which owns
//!   every HDF5 handle; it returns the [`RecorderSink`] (a [`crate::rows::RowSink`] the
//!   control loop feeds without waiting on the disk) and a [`RecorderHandle`] (health for
//!   status and metrics).
//! - [`SegmentWriter`] is one segment file in SWMR write mode (used by the thread, the
//!   benchmark and tests).
//! - [`SegmentSet`] reads a set of segments in time order, streaming rows in bounded
//!   chunks; [`export_csv`] writes one stream as CSV.
//!
//! The file layout is the contract in `docs/recording.md`; its code is in [`layout`].

pub mod layout;
mod reader;
mod recorder;
mod segment;

use std::path::PathBuf;

pub use layout::{LAYOUT_VERSION, LayoutOptions};
pub use reader::{
    ControlRows, EventRows, FlatRows, FlatWire, SegmentInfo, SegmentSet, StreamKind, TiltRows,
    TimeWindow, export_csv, find_segments,
};
pub use recorder::{HealthSnapshot, Recorder, RecorderHandle, RecorderOptions, RecorderSink};
pub use segment::{SegmentMeta, SegmentWriter, segment_file_name};

/// What can go wrong while recording or reading recordings.
#[derive(Debug, thiserror::Error)]
pub enum RecordError {
    /// An HDF5 call failed.
    #[error("{path}: cannot {what}: {source}")]
    Hdf5 {
        /// The file.
        path: PathBuf,
        /// What was being done.
        what: String,
        /// HDF5's error.
        #[source]
        source: hdf5::Error,
    },
    /// A file-system call failed.
    #[error("{path}: cannot {what}: {source}")]
    Io {
        /// The file or folder.
        path: PathBuf,
        /// What was being done.
        what: String,
        /// The OS error.
        #[source]
        source: std::io::Error,
    },
    /// A segment file already exists (segments are never reopened or overwritten).
    #[error("{0}: already exists; a recording never overwrites or reopens a segment")]
    Exists(PathBuf),
    /// A file's contents do not follow the layout.
    #[error("{0}")]
    BadData(String),
    /// The options or configuration cannot be used.
    #[error("{0}")]
    Options(String),
}

/// Wall-clock UTC now, ns since the Unix epoch.
pub(crate) fn now_utc_ns() -> i64 {
    match std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH) {
        Ok(d) => i64::try_from(d.as_nanos()).unwrap_or(i64::MAX),
        Err(e) => -i64::try_from(e.duration().as_nanos()).unwrap_or(i64::MAX),
    }
}

/// This machine's host name (from the kernel; `unknown` when it cannot be read).
pub(crate) fn host_name() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .or_else(|_| std::fs::read_to_string("/etc/hostname"))
        .map(|s| s.trim().to_owned())
        .ok()
        .filter(|s| !s.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok())
        .unwrap_or_else(|| "unknown".into())
}
