//! One segment file being written: creation with every object and attribute, batched
//! appends, flush to disk (H5Fflush + fsync), and a clean close.
//!
//! Main type: [`SegmentWriter`]. It does no threading of its own; the recorder thread
//! (`recorder.rs`) owns it. Benchmarks and tests use it directly.

use std::path::{Path, PathBuf};

use hdf5::types::VarLenUnicode;
use hdf5::{Dataset, File, H5Type, Location};
use ndarray::ArrayView2;

use crate::rows::{ControlRow, EventRow, TiltSample};

use super::RecordError;
use super::layout::*;

/// What a segment's root attributes say about the run and the segment.
#[derive(Debug, Clone, PartialEq)]
pub struct SegmentMeta {
    /// Identifier of the run (also the file name prefix).
    pub run_id: String,
    /// 0 for the run's first segment, then 1, 2 …
    pub segment_index: u32,
    /// UTC when the run started, ns since the Unix epoch.
    pub run_start_utc_ns: i64,
    /// UTC of the segment's start, ns since the Unix epoch.
    pub segment_start_utc_ns: i64,
    /// Run clock at the segment's start, seconds.
    pub segment_start_mono_s: f64,
    /// Host name of the recording machine.
    pub host: String,
    /// The stage's name from the configuration.
    pub stage_name: String,
    /// The full configuration, as TOML text.
    pub config_toml: String,
    /// Leg names in configuration order (columns of `control_legs`).
    pub leg_names: Vec<String>,
}

/// [`SegmentWriter::close`] failed.
#[derive(Debug)]
pub struct CloseFailed {
    /// What went wrong.
    pub error: RecordError,
    /// The segment, still open, when it may be closed later (keep it; see `close`).
    pub segment: Option<Box<SegmentWriter>>,
}

/// The file name of a segment: `<run-id>-<index:04>.h5`.
pub fn segment_file_name(run_id: &str, index: u32) -> String {
    format!("{run_id}-{index:04}.h5")
}

/// An open segment in SWMR write mode.
#[derive(Debug)]
pub struct SegmentWriter {
    path: PathBuf,
    file: File,
    tilt: Dataset,
    control: Dataset,
    legs_ds: Dataset,
    events: Dataset,
    state_ds: Dataset,
    legs: usize,
    n_tilt: usize,
    n_control: usize,
    n_events: usize,
    first_utc_ns: Option<i64>,
    last_utc_ns: Option<i64>,
    tilt_buf: Vec<TiltWire>,
    control_buf: Vec<ControlWire>,
    leg_buf: Vec<LegWire>,
    event_buf: Vec<EventWire>,
    leg_mismatch: Option<String>,
}

/// Appends `rows` to a one-dimensional dataset that holds `n` rows: one resize, one write
/// and one dataset flush. Returns the new row count.
fn append_rows<W: H5Type>(
    ds: &Dataset,
    n: usize,
    rows: &[W],
    e: &impl Fn(hdf5::Error) -> RecordError,
) -> Result<usize, RecordError> {
    let b = n + rows.len();
    ds.resize(b).map_err(e)?;
    ds.write_slice(rows, n..b).map_err(e)?;
    ds.flush().map_err(e)?;
    Ok(b)
}

/// A dataset of `W` rows that grows along its one axis: chunks of `chunk_rows`, shuffled
/// and deflated at `level`.
fn growable<W: H5Type>(
    file: &File,
    name: &str,
    chunk_rows: usize,
    level: u8,
) -> hdf5::Result<Dataset> {
    file.new_dataset::<W>()
        .chunk(chunk_rows.max(1))
        .shape(0..)
        .shuffle()
        .deflate(level)
        .create(name)
}

fn h5(path: &Path, what: &str) -> impl Fn(hdf5::Error) -> RecordError + use<> {
    let path = path.to_path_buf();
    let what = what.to_owned();
    move |e| RecordError::Hdf5 {
        path: path.clone(),
        what: what.clone(),
        source: e,
    }
}

fn attr_str(loc: &Location, name: &str, value: &str) -> hdf5::Result<()> {
    loc.new_attr::<VarLenUnicode>()
        .create(name)?
        .write_scalar(&varlen(value))
}

fn attr_num<T: H5Type>(loc: &Location, name: &str, value: T) -> hdf5::Result<()> {
    loc.new_attr::<T>().create(name)?.write_scalar(&value)
}

fn document(ds: &Dataset, name: &str, fields: &[FieldDoc]) -> hdf5::Result<()> {
    let summary = DATASET_SUMMARIES
        .iter()
        .find(|(n, _)| *n == name)
        .map_or("", |(_, s)| *s);
    attr_str(ds, "units", &units_text(fields))?;
    attr_str(ds, "description", &description_text(summary, fields))
}

impl SegmentWriter {
    /// Creates `path` (never overwriting an existing file), writes the root attributes,
    /// creates every dataset with its `units` and `description`, and switches to SWMR
    /// write mode. `legs` is the leg count of the run (columns of `control_legs`).
    pub fn create(
        path: &Path,
        meta: &SegmentMeta,
        opts: &LayoutOptions,
    ) -> Result<Self, RecordError> {
        if path.exists() {
            return Err(RecordError::Exists(path.to_path_buf()));
        }
        let file = match File::with_options()
            .with_fapl(|p| p.libver_latest())
            .create_excl(path)
        {
            Ok(f) => f,
            Err(err) => {
                // A full disk fails the superblock write after the file was made: the
                // empty file left would trip every reader of the folder. Removed only
                // when empty (an exclusive create that lost a race leaves another's file).
                if std::fs::metadata(path).is_ok_and(|m| m.len() == 0) {
                    let _ = std::fs::remove_file(path);
                }
                return Err(h5(path, "create the file")(err));
            }
        };
        // This call made the file: if it cannot be completed, it holds no rows and goes.
        Self::complete(file, path, meta, opts).inspect_err(|_| {
            let _ = std::fs::remove_file(path);
        })
    }

    /// The rest of [`SegmentWriter::create`], on the file it has just made.
    fn complete(
        file: File,
        path: &Path,
        meta: &SegmentMeta,
        opts: &LayoutOptions,
    ) -> Result<Self, RecordError> {
        let legs = meta.leg_names.len().max(1);
        let e = |w: &str| h5(path, w);
        let root: &Location = &file;
        (|| -> hdf5::Result<()> {
            attr_num(root, "layout_version", LAYOUT_VERSION)?;
            attr_str(
                root,
                "software",
                concat!("stilt-daemon ", env!("CARGO_PKG_VERSION")),
            )?;
            attr_str(root, "software_version", env!("CARGO_PKG_VERSION"))?;
            attr_str(root, "run_id", &meta.run_id)?;
            attr_str(
                root,
                "run_start_utc",
                &iso8601_utc(meta.run_start_utc_ns, true),
            )?;
            attr_num(root, "run_start_utc_ns", meta.run_start_utc_ns)?;
            attr_num(root, "segment_index", meta.segment_index)?;
            attr_str(
                root,
                "segment_start_utc",
                &iso8601_utc(meta.segment_start_utc_ns, true),
            )?;
            attr_num(root, "segment_start_utc_ns", meta.segment_start_utc_ns)?;
            attr_num(root, "segment_start_mono_s", meta.segment_start_mono_s)?;
            attr_str(root, "host", &meta.host)?;
            attr_str(root, "stage_name", &meta.stage_name)?;
            attr_str(root, "config_toml", &meta.config_toml)?;
            attr_str(
                root,
                "config_hash",
                &format!("fnv1a64:{:016x}", fnv1a64(meta.config_toml.as_bytes())),
            )?;
            attr_num(root, "leg_count", legs as u32)?;
            let names: Vec<VarLenUnicode> = (0..legs)
                .map(|i| varlen(meta.leg_names.get(i).map_or("?", String::as_str)))
                .collect();
            root.new_attr::<VarLenUnicode>()
                .shape(legs)
                .create("leg_names")?
                .write(&names)?;
            Ok(())
        })()
        .map_err(e("write the root attributes"))?;

        let lvl = opts.deflate_level.min(9);
        let tilt = growable::<TiltWire>(&file, DS_TILT, opts.tilt_chunk_rows, lvl)
            .map_err(e("create dataset tilt"))?;
        let control = growable::<ControlWire>(&file, DS_CONTROL, opts.control_chunk_rows, lvl)
            .map_err(e("create dataset control"))?;
        let legs_ds = file
            .new_dataset::<LegWire>()
            .chunk((opts.control_chunk_rows.max(1), legs))
            .shape((0.., legs))
            .shuffle()
            .deflate(lvl)
            .create(DS_CONTROL_LEGS)
            .map_err(e("create dataset control_legs"))?;
        let events = growable::<EventWire>(&file, DS_EVENTS, opts.event_chunk_rows, lvl)
            .map_err(e("create dataset events"))?;
        // Chunked too: contiguous datasets are unreadable by SWMR readers from HDF5 1.14.4.
        let state_ds = file
            .new_dataset::<StateWire>()
            .chunk(1)
            .shape(1)
            .create(DS_STATE)
            .map_err(e("create dataset segment_state"))?;
        (|| -> hdf5::Result<()> {
            document(&tilt, DS_TILT, TILT_FIELDS)?;
            document(&control, DS_CONTROL, CONTROL_FIELDS)?;
            document(&legs_ds, DS_CONTROL_LEGS, LEG_FIELDS)?;
            document(&events, DS_EVENTS, EVENT_FIELDS)?;
            document(&state_ds, DS_STATE, STATE_FIELDS)?;
            state_ds.write(&[StateWire {
                state: STATE_OPEN,
                ..StateWire::default()
            }])?;
            Ok(())
        })()
        .map_err(e("write the dataset attributes"))?;
        // Every object exists now: only raw data changes from here on (SWMR rule).
        file.start_swmr().map_err(e("start SWMR write mode"))?;
        Ok(SegmentWriter {
            path: path.to_path_buf(),
            file,
            tilt,
            control,
            legs_ds,
            events,
            state_ds,
            legs,
            n_tilt: 0,
            n_control: 0,
            n_events: 0,
            first_utc_ns: None,
            last_utc_ns: None,
            tilt_buf: Vec::new(),
            control_buf: Vec::new(),
            leg_buf: Vec::new(),
            event_buf: Vec::new(),
            leg_mismatch: None,
        })
    }

    /// The segment's path.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Rows written so far: (tilt, control, events).
    pub fn rows(&self) -> (u64, u64, u64) {
        (
            self.n_tilt as u64,
            self.n_control as u64,
            self.n_events as u64,
        )
    }

    /// The file's current size in bytes, as HDF5 sees it (including unflushed growth).
    pub fn size_bytes(&self) -> u64 {
        self.file.size()
    }

    /// Takes the note about a control row whose leg count differed from the run's, if any.
    pub fn take_leg_mismatch(&mut self) -> Option<String> {
        self.leg_mismatch.take()
    }

    fn see_time(&mut self, t: i64) {
        self.first_utc_ns = Some(self.first_utc_ns.map_or(t, |f| f.min(t)));
        self.last_utc_ns = Some(self.last_utc_ns.map_or(t, |l| l.max(t)));
    }

    /// Appends tiltmeter readings: one resize, one write and one dataset flush.
    pub fn append_tilt(&mut self, rows: &[TiltSample]) -> Result<(), RecordError> {
        let mut buf = std::mem::take(&mut self.tilt_buf);
        buf.clear();
        buf.extend(rows.iter().map(TiltWire::from));
        let r = self.append_tilt_wire(&buf);
        self.tilt_buf = buf;
        r
    }

    /// Appends rows already in wire form (benchmarks; the same path as [`Self::append_tilt`]).
    pub fn append_tilt_wire(&mut self, rows: &[TiltWire]) -> Result<(), RecordError> {
        if rows.is_empty() {
            return Ok(());
        }
        let e = h5(&self.path, "append to tilt");
        self.n_tilt = append_rows(&self.tilt, self.n_tilt, rows, &e)?;
        for r in rows {
            self.see_time(r.t_utc_ns);
        }
        Ok(())
    }

    /// Appends control rows to `control` and their legs to `control_legs`. A row with
    /// fewer legs than the run is padded with [`LegWire::MISSING`]; extra legs are not
    /// stored (and noted, see [`Self::take_leg_mismatch`]).
    pub fn append_control(&mut self, rows: &[ControlRow]) -> Result<(), RecordError> {
        if rows.is_empty() {
            return Ok(());
        }
        let mut cbuf = std::mem::take(&mut self.control_buf);
        let mut lbuf = std::mem::take(&mut self.leg_buf);
        cbuf.clear();
        lbuf.clear();
        for r in rows {
            cbuf.push(ControlWire::from(r));
            if r.legs.len() != self.legs && self.leg_mismatch.is_none() {
                self.leg_mismatch = Some(format!(
                    "control row {} has {} legs, the run has {}: missing legs stored as NaN/missing, extra legs not stored",
                    r.tick,
                    r.legs.len(),
                    self.legs
                ));
            }
            lbuf.extend(
                (0..self.legs).map(|j| r.legs.get(j).map_or(LegWire::MISSING, LegWire::from)),
            );
        }
        let res = self.append_control_wire(&cbuf, &lbuf);
        self.control_buf = cbuf;
        self.leg_buf = lbuf;
        res
    }

    fn append_control_wire(
        &mut self,
        rows: &[ControlWire],
        legs: &[LegWire],
    ) -> Result<(), RecordError> {
        let (a, b) = (self.n_control, self.n_control + rows.len());
        let e = h5(&self.path, "append to control");
        let view = ArrayView2::from_shape((rows.len(), self.legs), legs)
            .map_err(|err| RecordError::BadData(format!("control_legs batch shape: {err}")))?;
        // control_legs first: a SWMR reader that refreshes control, then control_legs,
        // always finds the legs of every control row it saw (docs/recording.md).
        self.legs_ds.resize((b, self.legs)).map_err(&e)?;
        self.legs_ds.write_slice(view, (a..b, ..)).map_err(&e)?;
        self.legs_ds.flush().map_err(&e)?;
        self.n_control = append_rows(&self.control, a, rows, &e)?;
        for r in rows {
            self.see_time(r.t_utc_ns);
        }
        Ok(())
    }

    /// Appends events.
    pub fn append_events(&mut self, rows: &[EventRow]) -> Result<(), RecordError> {
        if rows.is_empty() {
            return Ok(());
        }
        let mut buf = std::mem::take(&mut self.event_buf);
        buf.clear();
        buf.extend(rows.iter().map(EventWire::from));
        let e = h5(&self.path, "append to events");
        let res = append_rows(&self.events, self.n_events, &buf, &e);
        if let Ok(n) = res {
            self.n_events = n;
            for r in &buf {
                self.see_time(r.t_utc_ns);
            }
        }
        self.event_buf = buf;
        res.map(|_| ())
    }

    fn write_state(&self, state: u8, dropped_rows_run: u64) -> Result<(), RecordError> {
        let s = StateWire {
            state,
            tilt_rows: self.n_tilt as u64,
            control_rows: self.n_control as u64,
            event_rows: self.n_events as u64,
            dropped_rows_run,
            first_utc_ns: self.first_utc_ns.unwrap_or(0),
            last_utc_ns: self.last_utc_ns.unwrap_or(0),
            updated_utc_ns: super::now_utc_ns(),
        };
        let e = h5(&self.path, "update segment_state");
        self.state_ds.write(&[s]).map_err(&e)?;
        self.state_ds.flush().map_err(&e)
    }

    /// Makes everything appended so far durable: updates `segment_state`, flushes the
    /// file (H5Fflush) and, when `sync`, fsyncs it (H5Fflush alone does not).
    pub fn flush(&mut self, dropped_rows_run: u64, sync: bool) -> Result<(), RecordError> {
        self.write_state(STATE_OPEN, dropped_rows_run)?;
        self.file
            .flush()
            .map_err(h5(&self.path, "flush the file"))?;
        if sync {
            fsync_file(&self.file).map_err(|source| RecordError::Io {
                path: self.path.clone(),
                what: "fsync".into(),
                source,
            })?;
        }
        Ok(())
    }

    /// Marks the segment closed in `segment_state`, syncs and closes it.
    ///
    /// When the final flush fails (a full disk), the segment comes back in the error with
    /// its handles intact. Do not drop it then: after a failed write, closing HDF5 objects
    /// can leave dangling ids behind (HDF5 1.10.8 frees a dataset whose flush failed but
    /// keeps its id), and the next `start_swmr` of any file crashes on them (seen in the
    /// full-disk test). Keep it, and try again once space returns.
    pub fn close(mut self, dropped_rows_run: u64) -> Result<PathBuf, CloseFailed> {
        if let Err(error) = self
            .write_state(STATE_CLOSED, dropped_rows_run)
            .and_then(|()| self.flush_file_only())
        {
            return Err(CloseFailed {
                error,
                segment: Some(Box::new(self)),
            });
        }
        // Nothing is dirty now, so closing does not write.
        let path = self.path.clone();
        let SegmentWriter {
            file,
            tilt,
            control,
            legs_ds,
            events,
            state_ds,
            ..
        } = self;
        drop((tilt, control, legs_ds, events, state_ds));
        file.close().map_err(|e| CloseFailed {
            error: h5(&path, "close the file")(e),
            segment: None,
        })?;
        Ok(path)
    }

    fn flush_file_only(&mut self) -> Result<(), RecordError> {
        self.file
            .flush()
            .map_err(h5(&self.path, "flush the file"))?;
        fsync_file(&self.file).map_err(|source| RecordError::Io {
            path: self.path.clone(),
            what: "fsync".into(),
            source,
        })
    }
}

/// fsyncs the file descriptor that HDF5's sec2 driver holds for `file`.
#[allow(unsafe_code)]
fn fsync_file(file: &File) -> std::io::Result<()> {
    use hdf5_sys::h5f::H5Fget_vfd_handle;
    use hdf5_sys::h5p::H5P_DEFAULT;
    hdf5::sync::sync(|| {
        let mut handle: *mut std::ffi::c_void = std::ptr::null_mut();
        // SAFETY: `file.id()` is a valid, open file id (we hold `file`); the HDF5 global
        // lock is held by `sync`. With the default sec2 driver, H5Fget_vfd_handle stores in
        // `handle` a pointer to the driver's `int fd`, valid while the file is open; we read
        // it once and fsync that descriptor, which we do not close.
        let rc = unsafe { H5Fget_vfd_handle(file.id(), H5P_DEFAULT, &mut handle) };
        if rc < 0 || handle.is_null() {
            return Err(std::io::Error::other("H5Fget_vfd_handle failed"));
        }
        let fd = unsafe { *(handle as *const libc::c_int) };
        if unsafe { libc::fsync(fd) } != 0 {
            return Err(std::io::Error::last_os_error());
        }
        Ok(())
    })
}
