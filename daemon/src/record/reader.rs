//! Reading recordings: a set of segments in time order, streamed in bounded chunks over
//! an optional UTC window, and CSV export.
//!
//! Main types: [`SegmentSet`] (open, sort, describe segments), [`TiltRows`],
//! [`ControlRows`], [`EventRows`] (iterators of domain rows), [`TimeWindow`],
//! [`StreamKind`], and the function [`export_csv`].
//!
//! Every file is opened in SWMR read mode, which also works on closed segments and on
//! segments whose writer died; datasets are refreshed when a segment is opened, so a
//! live segment yields the rows of its last flush (rows are read up to the counts in
//! `segment_state`, which the writer updates at every flush and at close). Memory stays bounded by the
//! chunk size (4096 rows by default) whatever the length of the run.

use std::io::Write;
use std::path::{Path, PathBuf};

use hdf5::types::VarLenUnicode;
use hdf5::{Dataset, File, H5Type, OpenMode};

use crate::rows::{ControlRow, EventRow, TiltSample};

use super::RecordError;
use super::layout::*;

/// A half-open UTC window `[from, to)`, ns since the Unix epoch; `None` is unbounded.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct TimeWindow {
    /// Rows at or after this time.
    pub from_utc_ns: Option<i64>,
    /// Rows before this time.
    pub to_utc_ns: Option<i64>,
}

impl TimeWindow {
    /// The unbounded window.
    pub const ALL: TimeWindow = TimeWindow {
        from_utc_ns: None,
        to_utc_ns: None,
    };

    /// Whether `t` lies in the window.
    pub fn contains(&self, t: i64) -> bool {
        self.from_utc_ns.is_none_or(|f| t >= f) && self.to_utc_ns.is_none_or(|e| t < e)
    }

    /// Whether some time in `[lo, hi]` lies in the window.
    pub fn overlaps(&self, lo: i64, hi: i64) -> bool {
        self.from_utc_ns.is_none_or(|f| hi >= f) && self.to_utc_ns.is_none_or(|e| lo < e)
    }
}

/// Which stream of a recording.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum StreamKind {
    /// The `tilt` dataset.
    Tilt,
    /// The `control` and `control_legs` datasets.
    Control,
    /// The `events` dataset.
    Events,
}

impl StreamKind {
    /// Every stream.
    pub const ALL: [StreamKind; 3] = [StreamKind::Tilt, StreamKind::Control, StreamKind::Events];

    /// `tilt`, `control` or `events`.
    pub fn as_str(self) -> &'static str {
        match self {
            StreamKind::Tilt => "tilt",
            StreamKind::Control => "control",
            StreamKind::Events => "events",
        }
    }

    /// Inverse of [`StreamKind::as_str`].
    pub fn parse(s: &str) -> Option<StreamKind> {
        StreamKind::ALL.into_iter().find(|k| k.as_str() == s)
    }
}

/// What a segment's attributes and `segment_state` say.
#[derive(Debug, Clone, PartialEq)]
pub struct SegmentInfo {
    /// The file.
    pub path: PathBuf,
    /// Layout version the file was written with.
    pub layout_version: u32,
    /// Run id.
    pub run_id: String,
    /// Index of the segment in its run.
    pub segment_index: u32,
    /// UTC of the run's start, ns.
    pub run_start_utc_ns: i64,
    /// UTC of the segment's start, ns.
    pub segment_start_utc_ns: i64,
    /// Stage name.
    pub stage_name: String,
    /// Leg names (columns of `control_legs`).
    pub leg_names: Vec<String>,
    /// Whether the writer closed the segment cleanly (false: live, or the writer died).
    pub closed: bool,
    /// Rows (tilt, control, events) at the last `segment_state` update.
    pub rows_at_last_update: (u64, u64, u64),
    /// Smallest and largest row time in the segment at the last update, UTC ns.
    pub utc_range_ns: Option<(i64, i64)>,
}

/// Opens a segment for reading: SWMR read mode, which works on live, crashed and
/// closed segments alike.
fn open_file(path: &Path) -> Result<File, RecordError> {
    File::open_as(path, OpenMode::ReadSWMR).map_err(|source| RecordError::Hdf5 {
        path: path.to_path_buf(),
        what: "open the segment (SWMR read)".into(),
        source,
    })
}

fn bad(path: &Path, what: &str, e: impl std::fmt::Display) -> RecordError {
    RecordError::BadData(format!(
        "{}: {what}: {e} (not a stilt segment of layout {LAYOUT_VERSION}?)",
        path.display()
    ))
}

fn attr_string(f: &File, path: &Path, name: &str) -> Result<String, RecordError> {
    f.attr(name)
        .and_then(|a| a.read_scalar::<VarLenUnicode>())
        .map(|s| s.as_str().to_owned())
        .map_err(|e| bad(path, &format!("root attribute {name}"), e))
}

fn attr_scalar<T: H5Type>(f: &File, path: &Path, name: &str) -> Result<T, RecordError> {
    f.attr(name)
        .and_then(|a| a.read_scalar::<T>())
        .map_err(|e| bad(path, &format!("root attribute {name}"), e))
}

impl SegmentInfo {
    /// Reads a segment's description.
    pub fn read(path: &Path) -> Result<SegmentInfo, RecordError> {
        let f = open_file(path)?;
        let layout_version: u32 = attr_scalar(&f, path, "layout_version")?;
        if layout_version > LAYOUT_VERSION {
            return Err(RecordError::BadData(format!(
                "{}: layout version {layout_version} is newer than this reader's {LAYOUT_VERSION}; use a newer stiltd",
                path.display()
            )));
        }
        let leg_names = f
            .attr("leg_names")
            .and_then(|a| a.read_raw::<VarLenUnicode>())
            .map_err(|e| bad(path, "root attribute leg_names", e))?
            .into_iter()
            .map(|s| s.as_str().to_owned())
            .collect();
        let st = f
            .dataset(DS_STATE)
            .and_then(|d| {
                d.refresh()?;
                d.read_raw::<StateWire>()
            })
            .map_err(|e| bad(path, "dataset segment_state", e))?;
        let st = st.first().copied().unwrap_or_default();
        let any = st.tilt_rows + st.control_rows + st.event_rows > 0;
        Ok(SegmentInfo {
            path: path.to_path_buf(),
            layout_version,
            run_id: attr_string(&f, path, "run_id")?,
            segment_index: attr_scalar(&f, path, "segment_index")?,
            run_start_utc_ns: attr_scalar(&f, path, "run_start_utc_ns")?,
            segment_start_utc_ns: attr_scalar(&f, path, "segment_start_utc_ns")?,
            stage_name: attr_string(&f, path, "stage_name")?,
            leg_names,
            closed: st.state == STATE_CLOSED,
            rows_at_last_update: (st.tilt_rows, st.control_rows, st.event_rows),
            utc_range_ns: any.then_some((st.first_utc_ns, st.last_utc_ns)),
        })
    }
}

/// The `*.h5` files directly in `dir`, sorted by name; empty files are skipped.
pub fn find_segments(dir: &Path) -> Result<Vec<PathBuf>, RecordError> {
    let io = |source| RecordError::Io {
        path: dir.to_path_buf(),
        what: "list the folder".into(),
        source,
    };
    let mut v = Vec::new();
    for e in std::fs::read_dir(dir).map_err(io)? {
        let p = e.map_err(io)?.path();
        if p.is_file() && p.extension().is_some_and(|x| x == "h5") {
            // An empty file holds nothing to read (a segment whose creation was cut short
            // by a crash): skipped, so that it does not stop the rest being read.
            if std::fs::metadata(&p).is_ok_and(|m| m.len() == 0) {
                tracing::warn!(path = %p.display(), "skipping an empty .h5 file");
                continue;
            }
            v.push(p);
        }
    }
    v.sort();
    Ok(v)
}

/// A set of segments sorted by time (segment start UTC, then run id, then index).
#[derive(Debug, Clone, PartialEq)]
pub struct SegmentSet {
    segs: Vec<SegmentInfo>,
    chunk_rows: usize,
}

impl SegmentSet {
    /// Reads the descriptions of `paths` and sorts them by time.
    pub fn open(paths: &[PathBuf]) -> Result<SegmentSet, RecordError> {
        let mut segs = paths
            .iter()
            .map(|p| SegmentInfo::read(p))
            .collect::<Result<Vec<_>, _>>()?;
        segs.sort_by(|a, b| {
            (a.segment_start_utc_ns, &a.run_id, a.segment_index).cmp(&(
                b.segment_start_utc_ns,
                &b.run_id,
                b.segment_index,
            ))
        });
        Ok(SegmentSet {
            segs,
            chunk_rows: 4096,
        })
    }

    /// Every segment in `dir` (see [`find_segments`]).
    pub fn open_dir(dir: &Path) -> Result<SegmentSet, RecordError> {
        SegmentSet::open(&find_segments(dir)?)
    }

    /// Rows read from the file at a time (at least 1; default 4096).
    pub fn with_chunk_rows(mut self, n: usize) -> SegmentSet {
        self.chunk_rows = n.max(1);
        self
    }

    /// The segments, in time order.
    pub fn segments(&self) -> &[SegmentInfo] {
        &self.segs
    }

    fn cursor(&self, w: TimeWindow, ds: &'static str, extra: Option<&'static str>) -> Cursor {
        // A cleanly closed segment knows its time range exactly: skip it if outside.
        let segs = self
            .segs
            .iter()
            .filter(|s| !s.closed || s.utc_range_ns.is_some_and(|(lo, hi)| w.overlaps(lo, hi)))
            .map(|s| s.path.clone())
            .collect();
        Cursor {
            segs,
            next: 0,
            open: None,
            chunk_rows: self.chunk_rows,
            ds,
            extra,
        }
    }

    /// Tiltmeter readings in the window, in file order.
    pub fn tilt(&self, window: TimeWindow) -> TiltRows {
        FlatRows::new(self.cursor(window, DS_TILT, None), window)
    }

    /// Control rows (with their legs) in the window, in file order.
    pub fn control(&self, window: TimeWindow) -> ControlRows {
        ControlRows {
            cur: self.cursor(window, DS_CONTROL, Some(DS_CONTROL_LEGS)),
            window,
            buf: Vec::new().into_iter(),
            legs: Vec::new(),
            nlegs: 0,
            at: 0,
            done: false,
        }
    }

    /// Events in the window, in file order.
    pub fn events(&self, window: TimeWindow) -> EventRows {
        FlatRows::new(self.cursor(window, DS_EVENTS, None), window)
    }
}

struct OpenSeg {
    path: PathBuf,
    _file: File,
    ds: Dataset,
    extra: Option<Dataset>,
    len: usize,
    at: usize,
    legs: usize,
}

/// Walks the segments of one stream, a chunk at a time.
struct Cursor {
    segs: Vec<PathBuf>,
    next: usize,
    open: Option<OpenSeg>,
    chunk_rows: usize,
    ds: &'static str,
    extra: Option<&'static str>,
}

impl std::fmt::Debug for Cursor {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Cursor")
            .field("segs", &self.segs)
            .field("next", &self.next)
            .field("ds", &self.ds)
            .finish()
    }
}

impl Cursor {
    fn open_seg(&self, path: &Path) -> Result<OpenSeg, RecordError> {
        let file = open_file(path)?;
        let e = |what: &str| {
            let p = path.to_path_buf();
            let what = what.to_owned();
            move |source| RecordError::Hdf5 {
                path: p.clone(),
                what: what.clone(),
                source,
            }
        };
        // segment_state first: the writer updates it after the rows it counts were
        // flushed, so the datasets refreshed next hold at least that many rows. Rows past
        // that count are not trusted: after a failed write (a full disk) the extent may
        // have grown without its data reaching the file (the fill value, zeros, shows).
        let st = file
            .dataset(DS_STATE)
            .and_then(|d| {
                d.refresh()?;
                d.read_raw::<StateWire>()
            })
            .map_err(e("read segment_state"))?;
        let st = st.first().copied().unwrap_or_default();
        let counted = match self.ds {
            DS_TILT => st.tilt_rows,
            DS_CONTROL => st.control_rows,
            _ => st.event_rows,
        };
        let ds = file
            .dataset(self.ds)
            .map_err(e(&format!("open dataset {}", self.ds)))?;
        // Main dataset first, then the per-leg one: the writer flushes them in the
        // opposite order, so every control row seen here has its legs.
        ds.refresh().map_err(e("refresh"))?;
        let mut len = ds.shape().first().copied().unwrap_or(0);
        len = len.min(usize::try_from(counted).unwrap_or(usize::MAX));
        let mut legs = 0;
        let extra = match self.extra {
            Some(name) => {
                let x = file
                    .dataset(name)
                    .map_err(e(&format!("open dataset {name}")))?;
                x.refresh().map_err(e("refresh"))?;
                let sh = x.shape();
                if sh.len() != 2 {
                    return Err(bad(
                        path,
                        name,
                        format!("shape {sh:?}, expected (rows, legs)"),
                    ));
                }
                len = len.min(sh[0]);
                legs = sh[1];
                Some(x)
            }
            None => None,
        };
        Ok(OpenSeg {
            path: path.to_path_buf(),
            _file: file,
            ds,
            extra,
            len,
            at: 0,
            legs,
        })
    }

    /// The next range of rows, opening the next segment when one is used up.
    fn advance(&mut self) -> Option<Result<(usize, usize), RecordError>> {
        loop {
            if let Some(o) = &mut self.open {
                if o.at < o.len {
                    let a = o.at;
                    let b = o.len.min(a + self.chunk_rows);
                    o.at = b;
                    return Some(Ok((a, b)));
                }
                self.open = None;
            }
            let path = self.segs.get(self.next)?.clone();
            self.next += 1;
            match self.open_seg(&path) {
                Ok(o) => self.open = Some(o),
                Err(e) => return Some(Err(e)),
            }
        }
    }

    fn read<W: H5Type>(&self, a: usize, b: usize) -> Result<Vec<W>, RecordError> {
        let o = self
            .open
            .as_ref()
            .ok_or_else(|| RecordError::BadData("no segment open".into()))?;
        o.ds.read_slice_1d::<W, _>(a..b)
            .map(|v| v.into_raw_vec_and_offset().0)
            .map_err(|source| RecordError::Hdf5 {
                path: o.path.clone(),
                what: format!("read rows {a}..{b} of {}", self.ds),
                source,
            })
    }

    fn read_legs(&self, a: usize, b: usize) -> Result<(Vec<LegWire>, usize), RecordError> {
        let o = self
            .open
            .as_ref()
            .ok_or_else(|| RecordError::BadData("no segment open".into()))?;
        let Some(x) = &o.extra else {
            return Ok((Vec::new(), 0));
        };
        x.read_slice_2d::<LegWire, _>((a..b, ..))
            .map(|v| (v.into_raw_vec_and_offset().0, o.legs))
            .map_err(|source| RecordError::Hdf5 {
                path: o.path.clone(),
                what: format!("read rows {a}..{b} of {DS_CONTROL_LEGS}"),
                source,
            })
    }
}

/// A stored row that becomes one domain row by itself (tilt samples, events; control rows
/// also need their legs' rows, see [`ControlRows`]).
pub trait FlatWire: H5Type + Sized {
    /// The domain row.
    type Row;
    /// UTC of the row, ns since the Unix epoch.
    fn utc_ns(&self) -> i64;
    /// The domain row, or why the stored row is not valid.
    fn decode(&self) -> Result<Self::Row, RecordError>;
}

impl FlatWire for TiltWire {
    type Row = TiltSample;
    fn utc_ns(&self) -> i64 {
        self.t_utc_ns
    }
    fn decode(&self) -> Result<TiltSample, RecordError> {
        self.to_sample()
    }
}

impl FlatWire for EventWire {
    type Row = EventRow;
    fn utc_ns(&self) -> i64 {
        self.t_utc_ns
    }
    fn decode(&self) -> Result<EventRow, RecordError> {
        self.to_event()
    }
}

/// Rows of one flat dataset of a [`SegmentSet`], read a chunk at a time. Stops after the
/// first error.
#[derive(Debug)]
pub struct FlatRows<W> {
    cur: Cursor,
    window: TimeWindow,
    buf: std::vec::IntoIter<W>,
    done: bool,
}

/// Tilt rows of a [`SegmentSet`]; see [`SegmentSet::tilt`].
pub type TiltRows = FlatRows<TiltWire>;
/// Events of a [`SegmentSet`]; see [`SegmentSet::events`].
pub type EventRows = FlatRows<EventWire>;

impl<W> FlatRows<W> {
    fn new(cur: Cursor, window: TimeWindow) -> Self {
        FlatRows {
            cur,
            window,
            buf: Vec::new().into_iter(),
            done: false,
        }
    }
}

impl<W: FlatWire> Iterator for FlatRows<W> {
    type Item = Result<W::Row, RecordError>;
    fn next(&mut self) -> Option<Self::Item> {
        loop {
            for w in self.buf.by_ref() {
                if self.window.contains(w.utc_ns()) {
                    let r = w.decode();
                    self.done |= r.is_err();
                    return Some(r);
                }
            }
            if self.done {
                return None;
            }
            match self.cur.advance() {
                None => {
                    self.done = true;
                    return None;
                }
                Some(Err(e)) => {
                    self.done = true;
                    return Some(Err(e));
                }
                Some(Ok((a, b))) => match self.cur.read::<W>(a, b) {
                    Ok(v) => self.buf = v.into_iter(),
                    Err(e) => {
                        self.done = true;
                        return Some(Err(e));
                    }
                },
            }
        }
    }
}

/// Control rows of a [`SegmentSet`]; see [`SegmentSet::control`]. Stops after the first error.
#[derive(Debug)]
pub struct ControlRows {
    cur: Cursor,
    window: TimeWindow,
    buf: std::vec::IntoIter<ControlWire>,
    legs: Vec<LegWire>,
    nlegs: usize,
    at: usize,
    done: bool,
}

impl Iterator for ControlRows {
    type Item = Result<ControlRow, RecordError>;
    fn next(&mut self) -> Option<Self::Item> {
        loop {
            for w in self.buf.by_ref() {
                let i = self.at;
                self.at += 1;
                if self.window.contains(w.t_utc_ns) {
                    let legs = self
                        .legs
                        .get(i * self.nlegs..(i + 1) * self.nlegs)
                        .unwrap_or(&[]);
                    let r = w.to_row(legs);
                    self.done |= r.is_err();
                    return Some(r);
                }
            }
            if self.done {
                return None;
            }
            let step = match self.cur.advance() {
                None => {
                    self.done = true;
                    return None;
                }
                Some(r) => r.and_then(|(a, b)| {
                    let rows = self.cur.read::<ControlWire>(a, b)?;
                    let (legs, n) = self.cur.read_legs(a, b)?;
                    Ok((rows, legs, n))
                }),
            };
            match step {
                Ok((rows, legs, n)) => {
                    self.buf = rows.into_iter();
                    self.legs = legs;
                    self.nlegs = n;
                    self.at = 0;
                }
                Err(e) => {
                    self.done = true;
                    return Some(Err(e));
                }
            }
        }
    }
}

/// A CSV field (RFC 4180): quoted when it holds a comma, quote or line break.
fn csv_text(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_owned()
    }
}

/// A number for CSV: shortest text that reads back to the same f64 (`NaN`, `inf` as such).
fn num(x: f64) -> String {
    format!("{x:?}")
}

/// Writes one stream of `segments` (sorted by time first) within `window` as CSV to
/// `out`, one header line then one line per row; returns the number of rows written.
///
/// Columns: `t_utc` (ISO 8601), `t_utc_ns`, `t_mono_s`, then the dataset's fields as in
/// `docs/recording.md`; codes are written as their names (`ok`, `level`, `rotation` …);
/// control rows get nine columns per leg, prefixed with the leg's name (`A_temp_c` …).
/// All segments of a control export must have the same legs.
pub fn export_csv(
    segments: &[PathBuf],
    window: &TimeWindow,
    stream: StreamKind,
    out: &mut dyn Write,
) -> Result<u64, RecordError> {
    let set = SegmentSet::open(segments)?;
    let io = |source| RecordError::Io {
        path: PathBuf::from("<csv output>"),
        what: "write CSV".into(),
        source,
    };
    let mut n = 0u64;
    let mut line = String::with_capacity(512);
    match stream {
        StreamKind::Tilt => {
            writeln!(
                out,
                "t_utc,t_utc_ns,t_mono_s,raw_x,raw_y,tilt_x_urad,tilt_y_urad,quality"
            )
            .map_err(io)?;
            for r in set.tilt(*window) {
                let r = r?;
                line.clear();
                line.push_str(&format!(
                    "{},{},{},{},{},{},{},{}\n",
                    iso8601_utc(r.stamp.t_utc_ns, true),
                    r.stamp.t_utc_ns,
                    num(r.stamp.t_mono_s),
                    num(r.raw[0]),
                    num(r.raw[1]),
                    num(r.tilt_urad[0]),
                    num(r.tilt_urad[1]),
                    r.quality.as_str()
                ));
                out.write_all(line.as_bytes()).map_err(io)?;
                n += 1;
            }
        }
        StreamKind::Control => {
            let legs = control_legs(&set)?;
            let mut head = String::from("t_utc,t_utc_ns,t_mono_s");
            for (f, _, _) in CONTROL_FIELDS
                .iter()
                .filter(|(f, _, _)| !f.starts_with("t_"))
            {
                head.push(',');
                head.push_str(f);
            }
            for l in &legs {
                for (f, _, _) in LEG_FIELDS {
                    head.push(',');
                    head.push_str(&csv_text(&format!("{l}_{f}")));
                }
            }
            writeln!(out, "{head}").map_err(io)?;
            for r in set.control(*window) {
                let r = r?;
                line.clear();
                let [x, y] = r.axis_terms;
                line.push_str(&format!(
                    "{},{},{},{},{},{},{}",
                    iso8601_utc(r.stamp.t_utc_ns, true),
                    r.stamp.t_utc_ns,
                    num(r.stamp.t_mono_s),
                    r.tick,
                    r.mode.as_str(),
                    r.tilt_quality.as_str(),
                    r.tilt_count
                ));
                for v in [
                    r.tilt_raw[0],
                    r.tilt_raw[1],
                    r.tilt_urad[0],
                    r.tilt_urad[1],
                    r.tilt_setpoint_urad[0],
                    r.tilt_setpoint_urad[1],
                    r.tilt_target_urad[0],
                    r.tilt_target_urad[1],
                    x.p,
                    x.i,
                    x.d,
                    x.out,
                    y.p,
                    y.i,
                    y.d,
                    y.out,
                ] {
                    line.push(',');
                    line.push_str(&num(v));
                }
                for l in &r.legs {
                    for v in [
                        l.temp_c,
                        l.setpoint_c,
                        l.power_w,
                        l.drive_v,
                        l.terms.p,
                        l.terms.i,
                        l.terms.d,
                        l.terms.out,
                    ] {
                        line.push(',');
                        line.push_str(&num(v));
                    }
                    line.push(',');
                    line.push_str(l.temp_quality.as_str());
                }
                line.push('\n');
                out.write_all(line.as_bytes()).map_err(io)?;
                n += 1;
            }
        }
        StreamKind::Events => {
            writeln!(out, "t_utc,t_utc_ns,t_mono_s,kind,source,detail").map_err(io)?;
            for e in set.events(*window) {
                let e = e?;
                line.clear();
                line.push_str(&format!(
                    "{},{},{},{},{},{}\n",
                    iso8601_utc(e.stamp.t_utc_ns, true),
                    e.stamp.t_utc_ns,
                    num(e.stamp.t_mono_s),
                    e.kind.as_str(),
                    csv_text(&e.source),
                    csv_text(&e.detail)
                ));
                out.write_all(line.as_bytes()).map_err(io)?;
                n += 1;
            }
        }
    }
    out.flush().map_err(io)?;
    Ok(n)
}

/// The legs shared by every segment of a control export.
fn control_legs(set: &SegmentSet) -> Result<Vec<String>, RecordError> {
    let mut it = set.segments().iter();
    let Some(first) = it.next() else {
        return Ok(Vec::new());
    };
    for s in it {
        if s.leg_names != first.leg_names {
            return Err(RecordError::BadData(format!(
                "{} has legs {:?} but {} has {:?}: export segments with different legs separately",
                s.path.display(),
                s.leg_names,
                first.path.display(),
                first.leg_names
            )));
        }
    }
    Ok(first.leg_names.clone())
}
