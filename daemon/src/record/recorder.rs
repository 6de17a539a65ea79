//! The recorder: a [`RecorderSink`] on the control loop's side, a writer thread that
//! owns every HDF5 handle, and a bounded queue between them.
//!
//! Main types: [`Recorder`] (the constructor), [`RecorderOptions`], [`RecorderSink`],
//! [`RecorderHandle`] and its [`HealthSnapshot`].
//!
//! The sink batches rows and hands batches over a `sync_channel`. In the default mode it
//! never blocks: when the queue is full it keeps rows in a backlog of at most
//! `queue_capacity_rows`, counts every row beyond that as dropped, and sends one
//! `dropped` event as soon as the queue has room again. In blocking mode (virtual-time
//! runs) it waits for the writer instead, so nothing is dropped.
//!
//! The writer thread appends in batches, flushes and fsyncs every `flush_interval`,
//! rotates segments by run-clock duration and by size, and on an I/O error (a full disk)
//! raises an alarm, keeps at most `queue_capacity_rows` rows, counts the rest as dropped,
//! and retries every `retry_interval` by opening a *new* segment.

use std::collections::VecDeque;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError, SyncSender, TryRecvError, TrySendError};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use stilt_config::Config;

use crate::rows::{
    ControlRow, EventKind, EventRow, RowSink, SinkError, SinkReport, Stamp, TiltSample,
};

use super::layout::{LayoutOptions, compact_utc};
use super::segment::{SegmentMeta, SegmentWriter, segment_file_name};
use super::{RecordError, host_name, now_utc_ns};

/// How a recorder runs. Build it with [`RecorderOptions::from_config`] and adjust.
#[derive(Debug, Clone, PartialEq)]
pub struct RecorderOptions {
    /// Folder for the segments (created if missing).
    pub dir: PathBuf,
    /// Run id (file name prefix; letters, digits, `.`, `_`, `-`). `None`: the start time
    /// as `YYYYMMDDThhmmssZ`, with `-2`, `-3` … added if that name is taken.
    pub run_id: Option<String>,
    /// Back-pressure instead of dropping: the sink waits for the writer (virtual time).
    pub blocking: bool,
    /// UTC of the run's start, ns since the Unix epoch; `None`: now.
    pub start_utc_ns: Option<i64>,
    /// Longest wall-clock time between flushes that reach the disk.
    pub flush_interval: Duration,
    /// A new segment starts after this much run-clock time (rows' `t_mono_s`), seconds.
    pub segment_duration_s: f64,
    /// A new segment starts when the current file reaches this size, bytes.
    pub segment_max_bytes: u64,
    /// Rows held back (in the sink when the queue is full, in the writer while the disk
    /// fails) before rows are dropped and counted.
    pub queue_capacity_rows: usize,
    /// While recording is stopped by an I/O error, how often a new segment is tried.
    pub retry_interval: Duration,
    /// Rows per batch handed from the sink to the writer (also sent at every control row).
    pub batch_rows: usize,
    /// Whether flushes fsync the file (true except in some benchmarks).
    pub fsync: bool,
    /// Chunking and compression.
    pub layout: LayoutOptions,
}

impl RecorderOptions {
    /// Options from the configuration's `[recording]` table, non-blocking.
    pub fn from_config(cfg: &Config) -> Self {
        let r = &cfg.recording;
        RecorderOptions {
            dir: r.dir.clone(),
            run_id: None,
            blocking: false,
            start_utc_ns: None,
            flush_interval: Duration::from_secs_f64(r.flush_interval_s),
            segment_duration_s: r.segment_duration_h * 3600.0,
            segment_max_bytes: (r.segment_max_mib * 1024.0 * 1024.0) as u64,
            queue_capacity_rows: r.queue_capacity_rows,
            retry_interval: Duration::from_secs(5),
            batch_rows: 256,
            fsync: true,
            layout: LayoutOptions::default(),
        }
    }

    fn check(&self) -> Result<(), RecordError> {
        let bad = |m: String| Err(RecordError::Options(m));
        if self.queue_capacity_rows == 0 {
            return bad("queue_capacity_rows is 0; allowed: 1 or more rows".into());
        }
        if self.batch_rows == 0 {
            return bad("batch_rows is 0; allowed: 1 or more rows".into());
        }
        if self.flush_interval.is_zero() {
            return bad("flush_interval is 0; allowed: more than 0 s".into());
        }
        if !(self.segment_duration_s.is_finite() && self.segment_duration_s > 0.0) {
            return bad(format!(
                "segment_duration_s is {}; allowed: a finite number of seconds above 0",
                self.segment_duration_s
            ));
        }
        if self.segment_max_bytes == 0 {
            return bad("segment_max_bytes is 0; allowed: 1 or more bytes".into());
        }
        if let Some(id) = &self.run_id {
            let ok = !id.is_empty()
                && id.len() <= 64
                && id
                    .chars()
                    .all(|c| c.is_ascii_alphanumeric() || "._-".contains(c))
                && !id.starts_with('.');
            if !ok {
                return bad(format!(
                    "run id {id:?} cannot name files; allowed: 1-64 of A-Z a-z 0-9 . _ - (not starting with .)"
                ));
            }
        }
        Ok(())
    }
}

/// A point-in-time copy of the recorder's health, for status and metrics.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct HealthSnapshot {
    /// The segment being written (`None` while recording is stopped by an error, or after the end).
    pub segment: Option<PathBuf>,
    /// Every segment this run has written to so far, in order.
    pub segments: Vec<PathBuf>,
    /// Tilt rows written to files.
    pub tilt_rows: u64,
    /// Control rows written to files.
    pub control_rows: u64,
    /// Events written to files.
    pub event_rows: u64,
    /// Rows dropped in this run (queue overflow, or disk failure beyond the bound).
    pub dropped_rows: u64,
    /// Flushes that reached the disk.
    pub flushes: u64,
    /// Rows (tilt, control, events) of the run that had reached the disk at the last
    /// flush or segment close: what survives a crash or a power cut.
    pub flushed_rows: (u64, u64, u64),
    /// Wall-clock UTC of the last successful flush, ns.
    pub last_flush_utc_ns: Option<i64>,
    /// The last error seen (kept after recovery).
    pub last_error: Option<String>,
    /// An alarm a person should act on (set while recording is stopped; cleared on recovery).
    pub alarm: Option<String>,
    /// Whether the writer thread is running.
    pub running: bool,
}

#[derive(Debug, Default)]
struct HealthText {
    segment: Option<PathBuf>,
    segments: Vec<PathBuf>,
    last_flush_utc_ns: Option<i64>,
    last_error: Option<String>,
    alarm: Option<String>,
    running: bool,
}

#[derive(Debug, Default)]
struct Health {
    tilt_rows: AtomicU64,
    control_rows: AtomicU64,
    event_rows: AtomicU64,
    dropped_rows: AtomicU64,
    flushes: AtomicU64,
    flushed: [AtomicU64; 3],
    /// Rows sent by the sink and not yet taken by the writer (bounds the queue in rows).
    in_flight: AtomicUsize,
    text: Mutex<HealthText>,
}

impl Health {
    fn with<R>(&self, f: impl FnOnce(&mut HealthText) -> R) -> R {
        let mut g = self.text.lock().unwrap_or_else(|p| p.into_inner());
        f(&mut g)
    }

    /// After a flush or close: everything written so far is on disk.
    fn mark_flushed(&self) {
        let l = |a: &AtomicU64| a.load(Ordering::Relaxed);
        self.flushed[0].store(l(&self.tilt_rows), Ordering::Relaxed);
        self.flushed[1].store(l(&self.control_rows), Ordering::Relaxed);
        self.flushed[2].store(l(&self.event_rows), Ordering::Relaxed);
        self.flushes.fetch_add(1, Ordering::Relaxed);
        self.with(|t| t.last_flush_utc_ns = Some(now_utc_ns()));
    }

    fn snapshot(&self) -> HealthSnapshot {
        let l = |a: &AtomicU64| a.load(Ordering::Relaxed);
        self.with(|t| HealthSnapshot {
            segment: t.segment.clone(),
            segments: t.segments.clone(),
            tilt_rows: l(&self.tilt_rows),
            control_rows: l(&self.control_rows),
            event_rows: l(&self.event_rows),
            dropped_rows: l(&self.dropped_rows),
            flushes: l(&self.flushes),
            flushed_rows: (
                l(&self.flushed[0]),
                l(&self.flushed[1]),
                l(&self.flushed[2]),
            ),
            last_flush_utc_ns: t.last_flush_utc_ns,
            last_error: t.last_error.clone(),
            alarm: t.alarm.clone(),
            running: t.running,
        })
    }
}

/// Read access to a running (or finished) recorder's health. Cheap to clone.
#[derive(Debug, Clone)]
pub struct RecorderHandle {
    health: Arc<Health>,
    run_id: String,
    dir: PathBuf,
}

impl RecorderHandle {
    /// The current health.
    pub fn health(&self) -> HealthSnapshot {
        self.health.snapshot()
    }
    /// The run id (file name prefix).
    pub fn run_id(&self) -> &str {
        &self.run_id
    }
    /// The folder the segments go to.
    pub fn dir(&self) -> &Path {
        &self.dir
    }
}

/// Rows handed to the writer in one message.
#[derive(Debug, Default)]
struct Batch {
    tilt: Vec<TiltSample>,
    control: Vec<ControlRow>,
    events: Vec<EventRow>,
}

impl Batch {
    fn len(&self) -> usize {
        self.tilt.len() + self.control.len() + self.events.len()
    }
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    fn counts(&self) -> Drops {
        Drops {
            tilt: self.tilt.len() as u64,
            control: self.control.len() as u64,
            events: self.events.len() as u64,
        }
    }
    /// (smallest, largest) run-clock time in the batch, with the stamp of the largest.
    fn span(&self) -> Option<(Stamp, Stamp)> {
        let stamps = self
            .tilt
            .iter()
            .map(|r| r.stamp)
            .chain(self.control.iter().map(|r| r.stamp))
            .chain(self.events.iter().map(|r| r.stamp));
        stamps.fold(None, |acc: Option<(Stamp, Stamp)>, s| match acc {
            None => Some((s, s)),
            Some((lo, hi)) => Some((
                if s.t_mono_s < lo.t_mono_s { s } else { lo },
                if s.t_mono_s > hi.t_mono_s { s } else { hi },
            )),
        })
    }
}

enum Msg {
    Rows(Batch),
    /// Rows the sink dropped; the writer records the event (or, while it cannot write,
    /// adds them to its own report, so that the report itself is never dropped).
    Dropped(Drops, Stamp),
    Finish,
}

/// Rows dropped per stream, not yet reported in an event.
#[derive(Debug, Default, Clone, Copy, PartialEq)]
struct Drops {
    tilt: u64,
    control: u64,
    events: u64,
}

impl Drops {
    fn total(&self) -> u64 {
        self.tilt + self.control + self.events
    }
    fn add(&mut self, o: Drops) {
        self.tilt += o.tilt;
        self.control += o.control;
        self.events += o.events;
    }
    fn event(&self, stamp: Stamp, why: &str) -> EventRow {
        EventRow {
            stamp,
            kind: EventKind::Dropped,
            source: "recorder".into(),
            detail: format!(
                "dropped {} rows (tilt {}, control {}, events {}): {why}",
                self.total(),
                self.tilt,
                self.control,
                self.events
            ),
        }
    }
}

struct Outcome {
    files: Vec<PathBuf>,
    error: Option<String>,
}

/// Starts recorders.
#[derive(Debug)]
pub struct Recorder;

impl Recorder {
    /// Creates the folder and the run's first segment, and starts the writer thread.
    ///
    /// `cfg` gives the stage name, the legs (columns of `control_legs`) and the
    /// configuration text recorded in every segment; `opts` everything else.
    pub fn start(
        cfg: &Config,
        opts: RecorderOptions,
    ) -> Result<(RecorderSink, RecorderHandle), RecordError> {
        opts.check()?;
        std::fs::create_dir_all(&opts.dir).map_err(|source| RecordError::Io {
            path: opts.dir.clone(),
            what: "create the recording folder".into(),
            source,
        })?;
        let start_utc = opts.start_utc_ns.unwrap_or_else(now_utc_ns);
        let run_id = match &opts.run_id {
            Some(id) => {
                if opts.dir.join(segment_file_name(id, 0)).exists() {
                    return Err(RecordError::Exists(opts.dir.join(segment_file_name(id, 0))));
                }
                id.clone()
            }
            None => {
                let base = compact_utc(start_utc);
                let mut id = base.clone();
                let mut n = 2;
                while opts.dir.join(segment_file_name(&id, 0)).exists() {
                    id = format!("{base}-{n}");
                    n += 1;
                }
                id
            }
        };
        let meta = SegmentMeta {
            run_id: run_id.clone(),
            segment_index: 0,
            run_start_utc_ns: start_utc,
            segment_start_utc_ns: start_utc,
            segment_start_mono_s: 0.0,
            host: host_name(),
            stage_name: cfg.stage_name.clone(),
            config_toml: cfg.source_text.clone(),
            leg_names: cfg.legs.iter().map(|l| l.name.clone()).collect(),
        };
        let health = Arc::new(Health::default());
        // Non-blocking: the queue is bounded in rows by `Health::in_flight`; the message
        // bound only needs to be large enough not to bind first. Blocking: the message
        // bound is the back-pressure.
        let cap_batches = if opts.blocking {
            (opts.queue_capacity_rows / opts.batch_rows).max(2)
        } else {
            opts.queue_capacity_rows.clamp(2, 4096)
        };
        let (tx, rx) = mpsc::sync_channel::<Msg>(cap_batches);
        let (ready_tx, ready_rx) = mpsc::sync_channel::<Result<(), RecordError>>(1);
        let h = health.clone();
        let wopts = opts.clone();
        let thread = std::thread::Builder::new()
            .name("stilt-recorder".into())
            .spawn(move || {
                let first = opts_path(&wopts.dir, &meta.run_id, 0);
                match SegmentWriter::create(&first, &meta, &wopts.layout) {
                    Ok(seg) => {
                        h.with(|t| {
                            t.segment = Some(first.clone());
                            t.segments.push(first.clone());
                            t.running = true;
                        });
                        let _ = ready_tx.send(Ok(()));
                        let w = Writer::new(wopts, meta, h.clone(), seg);
                        let out = w.run(rx);
                        h.with(|t| {
                            t.running = false;
                            t.segment = None;
                        });
                        out
                    }
                    Err(e) => {
                        let _ = ready_tx.send(Err(e));
                        Outcome {
                            files: vec![],
                            error: Some("could not create the first segment".into()),
                        }
                    }
                }
            })
            .map_err(|source| RecordError::Io {
                path: opts.dir.clone(),
                what: "start the recorder thread".into(),
                source,
            })?;
        match ready_rx.recv() {
            Ok(Ok(())) => {}
            Ok(Err(e)) => {
                let _ = thread.join();
                return Err(e);
            }
            Err(_) => {
                let _ = thread.join();
                return Err(RecordError::Options(
                    "the recorder thread stopped during start".into(),
                ));
            }
        }
        let handle = RecorderHandle {
            health: health.clone(),
            run_id,
            dir: opts.dir.clone(),
        };
        let sink = RecorderSink {
            tx: Some(tx),
            cur: Batch::default(),
            cur_started: None,
            backlog: VecDeque::new(),
            backlog_rows: 0,
            cap_rows: opts.queue_capacity_rows,
            batch_rows: opts.batch_rows,
            max_batch_age: Duration::from_millis(200).min(opts.flush_interval),
            blocking: opts.blocking,
            unreported: Drops::default(),
            last_stamp: Stamp {
                t_mono_s: 0.0,
                t_utc_ns: start_utc,
            },
            health,
            thread: Some(thread),
            report: None,
        };
        Ok((sink, handle))
    }
}

fn opts_path(dir: &Path, run_id: &str, index: u32) -> PathBuf {
    dir.join(segment_file_name(run_id, index))
}

/// The control loop's side of the recorder; see the module docs.
#[derive(Debug)]
pub struct RecorderSink {
    tx: Option<SyncSender<Msg>>,
    cur: Batch,
    cur_started: Option<Instant>,
    backlog: VecDeque<Batch>,
    backlog_rows: usize,
    cap_rows: usize,
    batch_rows: usize,
    max_batch_age: Duration,
    blocking: bool,
    unreported: Drops,
    last_stamp: Stamp,
    health: Arc<Health>,
    thread: Option<JoinHandle<Outcome>>,
    report: Option<SinkReport>,
}

impl RecorderSink {
    /// Current health (same as [`RecorderHandle::health`]).
    pub fn health(&self) -> HealthSnapshot {
        self.health.snapshot()
    }

    fn drop_rows(&mut self, d: Drops) {
        self.health
            .dropped_rows
            .fetch_add(d.total(), Ordering::Relaxed);
        self.unreported.add(d);
    }

    fn lost_writer(&mut self, d: Drops) {
        self.health
            .dropped_rows
            .fetch_add(d.total(), Ordering::Relaxed);
        self.health.with(|t| {
            if t.alarm.is_none() {
                t.alarm = Some("recorder thread has stopped: rows are not recorded".into());
            }
        });
    }

    fn after_push(&mut self) {
        if self.cur_started.is_none() {
            self.cur_started = Some(Instant::now());
        }
        let old = self
            .cur_started
            .is_some_and(|t| t.elapsed() >= self.max_batch_age);
        if self.cur.len() >= self.batch_rows || old {
            self.submit();
        }
    }

    /// Sends the current batch (or keeps or drops it) without blocking, unless in blocking mode.
    fn submit(&mut self) {
        self.cur_started = None;
        if self.cur.is_empty() {
            return;
        }
        let b = std::mem::take(&mut self.cur);
        if self.blocking {
            self.send_blocking(b);
            return;
        }
        self.drain_backlog();
        if self.backlog.is_empty() {
            if self.unreported.total() > 0 {
                let msg = Msg::Dropped(self.unreported, self.last_stamp);
                // Still full: keep counting and report with a later batch.
                if self.tx.as_ref().is_some_and(|tx| tx.try_send(msg).is_ok()) {
                    self.unreported = Drops::default();
                }
            }
            if let Err(b) = self.try_send(b) {
                self.keep_in_backlog(b);
            }
        } else {
            self.keep_in_backlog(b);
        }
    }

    /// `Err(batch)` when the queue is full; a lost writer counts the rows as dropped.
    fn try_send(&mut self, b: Batch) -> Result<(), Batch> {
        let Some(tx) = &self.tx else {
            self.lost_writer(b.counts());
            return Ok(());
        };
        // Counted before the send, so that the writer's decrement never comes first.
        let n = b.len();
        if self.health.in_flight.fetch_add(n, Ordering::AcqRel) + n > self.cap_rows {
            self.health.in_flight.fetch_sub(n, Ordering::AcqRel);
            return Err(b);
        }
        match tx.try_send(Msg::Rows(b)) {
            Ok(()) => Ok(()),
            Err(TrySendError::Full(Msg::Rows(b))) => {
                self.health.in_flight.fetch_sub(n, Ordering::AcqRel);
                Err(b)
            }
            Err(TrySendError::Full(_)) => Ok(()), // only row batches are sent here
            Err(TrySendError::Disconnected(m)) => {
                if let Msg::Rows(b) = m {
                    self.lost_writer(b.counts());
                }
                self.tx = None;
                Ok(())
            }
        }
    }

    fn send_blocking(&mut self, b: Batch) {
        let Some(tx) = &self.tx else {
            self.lost_writer(b.counts());
            return;
        };
        if !self.blocking {
            self.health.in_flight.fetch_add(b.len(), Ordering::AcqRel);
        }
        if let Err(mpsc::SendError(m)) = tx.send(Msg::Rows(b)) {
            if let Msg::Rows(b) = m {
                self.lost_writer(b.counts());
            }
            self.tx = None;
        }
    }

    fn drain_backlog(&mut self) {
        while let Some(b) = self.backlog.pop_front() {
            let n = b.len();
            match self.try_send(b) {
                Ok(()) => self.backlog_rows -= n,
                Err(b) => {
                    self.backlog.push_front(b);
                    break;
                }
            }
        }
    }

    fn keep_in_backlog(&mut self, b: Batch) {
        if self.backlog_rows + b.len() <= self.cap_rows {
            self.backlog_rows += b.len();
            self.backlog.push_back(b);
        } else {
            self.drop_rows(b.counts());
        }
    }

    fn finish_inner(&mut self) -> Result<SinkReport, SinkError> {
        if let Some(r) = &self.report {
            return Ok(r.clone());
        }
        // The run is over: waiting for the writer is fine now.
        let cur = std::mem::take(&mut self.cur);
        while let Some(b) = self.backlog.pop_front() {
            self.send_blocking(b);
        }
        self.backlog_rows = 0;
        if self.unreported.total() > 0 {
            if let Some(tx) = &self.tx {
                let _ = tx.send(Msg::Dropped(self.unreported, self.last_stamp));
            }
            self.unreported = Drops::default();
        }
        if !cur.is_empty() {
            self.send_blocking(cur);
        }
        if let Some(tx) = self.tx.take() {
            let _ = tx.send(Msg::Finish);
        }
        let outcome = match self.thread.take().map(JoinHandle::join) {
            Some(Ok(o)) => o,
            Some(Err(_)) => Outcome {
                files: vec![],
                error: Some("the recorder thread panicked".into()),
            },
            None => Outcome {
                files: vec![],
                error: None,
            },
        };
        let h = self.health.snapshot();
        let report = SinkReport {
            tilt_rows: h.tilt_rows,
            control_rows: h.control_rows,
            events: h.event_rows,
            dropped_rows: h.dropped_rows,
            files: if outcome.files.is_empty() {
                h.segments.clone()
            } else {
                outcome.files
            },
        };
        self.report = Some(report.clone());
        match outcome.error {
            Some(e) => Err(SinkError(format!(
                "recording ended with an error: {e} ({} rows dropped in total; files: {:?})",
                report.dropped_rows, report.files
            ))),
            None => Ok(report),
        }
    }
}

impl RowSink for RecorderSink {
    fn tilt(&mut self, s: &TiltSample) {
        self.last_stamp = s.stamp;
        self.cur.tilt.push(*s);
        self.after_push();
    }

    fn control(&mut self, r: &ControlRow) {
        self.last_stamp = r.stamp;
        self.cur.control.push(r.clone());
        if self.blocking {
            // Virtual time: latency does not matter, batch size does.
            self.after_push();
        } else {
            // One batch per control tick keeps the queue's latency at one tick.
            self.submit();
        }
    }

    fn event(&mut self, e: &EventRow) {
        self.last_stamp = e.stamp;
        self.cur.events.push(e.clone());
        self.after_push();
    }

    /// Sends what is left, waits for the writer to flush and close the segment, and joins it.
    fn finish(&mut self) -> Result<SinkReport, SinkError> {
        self.finish_inner()
    }
}

impl Drop for RecorderSink {
    fn drop(&mut self) {
        if self.report.is_none() {
            let _ = self.finish_inner();
        }
    }
}

/// The writer thread's state.
struct Writer {
    opts: RecorderOptions,
    meta: SegmentMeta,
    health: Arc<Health>,
    seg: Option<SegmentWriter>,
    seg_start_mono: f64,
    next_index: u32,
    pend: Batch,
    failed: Option<String>,
    retry_at: Instant,
    flush_due: Instant,
    unreported: Drops,
    last_stamp: Stamp,
    files: Vec<PathBuf>,
    /// Segments whose close failed, kept open (see `SegmentWriter::close`); closed once
    /// a flush succeeds again.
    graveyard: Vec<SegmentWriter>,
}

impl Writer {
    fn new(
        opts: RecorderOptions,
        meta: SegmentMeta,
        health: Arc<Health>,
        seg: SegmentWriter,
    ) -> Self {
        let now = Instant::now();
        let flush_due = now + opts.flush_interval;
        let last_stamp = Stamp {
            t_mono_s: 0.0,
            t_utc_ns: meta.run_start_utc_ns,
        };
        Writer {
            files: vec![seg.path().to_path_buf()],
            opts,
            meta,
            health,
            seg: Some(seg),
            seg_start_mono: 0.0,
            next_index: 1,
            pend: Batch::default(),
            failed: None,
            retry_at: now,
            flush_due,
            unreported: Drops::default(),
            last_stamp,
            graveyard: Vec::new(),
        }
    }

    fn run(mut self, rx: Receiver<Msg>) -> Outcome {
        loop {
            let now = Instant::now();
            let deadline = if self.failed.is_some() {
                self.retry_at.min(self.flush_due)
            } else {
                self.flush_due
            };
            let msg = rx.recv_timeout(deadline.saturating_duration_since(now));
            match msg {
                Ok(Msg::Dropped(d, at)) => self.sink_dropped(d, at),
                Ok(Msg::Rows(b)) => {
                    self.accept(b);
                    // Take whatever else is queued before looking at the clock again.
                    loop {
                        match rx.try_recv() {
                            Ok(Msg::Rows(b)) => self.accept(b),
                            Ok(Msg::Dropped(d, at)) => self.sink_dropped(d, at),
                            Ok(Msg::Finish) | Err(TryRecvError::Disconnected) => {
                                return self.finish();
                            }
                            Err(TryRecvError::Empty) => break,
                        }
                    }
                }
                Ok(Msg::Finish) | Err(RecvTimeoutError::Disconnected) => return self.finish(),
                Err(RecvTimeoutError::Timeout) => {}
            }
            self.on_time(Instant::now());
        }
    }

    fn dropped_run(&self) -> u64 {
        self.health.dropped_rows.load(Ordering::Relaxed)
    }

    fn writer_event(&self, kind: EventKind, detail: String) -> EventRow {
        EventRow {
            stamp: self.last_stamp,
            kind,
            source: "recorder".into(),
            detail,
        }
    }

    fn accept(&mut self, b: Batch) {
        if !self.opts.blocking {
            let n = b.len();
            self.health.in_flight.fetch_sub(n, Ordering::AcqRel);
        }
        let Some((lo, hi)) = b.span() else { return };
        if self.seg.is_some() && lo.t_mono_s - self.seg_start_mono >= self.opts.segment_duration_s {
            self.rotate(lo, "segment duration reached");
        }
        if hi.t_mono_s > self.last_stamp.t_mono_s {
            self.last_stamp = hi;
        }
        if self.failed.is_some() {
            self.hold_bounded(b);
            return;
        }
        self.pend.tilt.extend(b.tilt);
        self.pend.control.extend(b.control);
        self.pend.events.extend(b.events);
        let l = self.opts.layout;
        let full = self.pend.tilt.len() >= l.tilt_chunk_rows
            || self.pend.control.len() >= l.control_chunk_rows
            || self.pend.events.len() >= l.event_chunk_rows;
        if full {
            if let Err(e) = self.write_pending() {
                self.fail(e);
                return;
            }
            self.check_size();
        }
    }

    fn sink_dropped(&mut self, d: Drops, at: Stamp) {
        if self.failed.is_some() {
            self.unreported.add(d);
        } else {
            self.pend
                .events
                .push(d.event(at, "the recorder queue was full"));
        }
    }

    /// While recording is stopped: keep at most `queue_capacity_rows` rows, drop the rest.
    fn hold_bounded(&mut self, b: Batch) {
        let cap = self.opts.queue_capacity_rows;
        let mut d = Drops::default();
        for r in b.tilt {
            if self.pend.len() < cap {
                self.pend.tilt.push(r)
            } else {
                d.tilt += 1
            }
        }
        for r in b.control {
            if self.pend.len() < cap {
                self.pend.control.push(r)
            } else {
                d.control += 1
            }
        }
        for r in b.events {
            if self.pend.len() < cap {
                self.pend.events.push(r)
            } else {
                d.events += 1
            }
        }
        if d.total() > 0 {
            self.health
                .dropped_rows
                .fetch_add(d.total(), Ordering::Relaxed);
            self.unreported.add(d);
        }
    }

    fn write_pending(&mut self) -> Result<(), RecordError> {
        let Some(seg) = self.seg.as_mut() else {
            return Ok(());
        };
        if !self.pend.tilt.is_empty() {
            seg.append_tilt(&self.pend.tilt)?;
            self.health
                .tilt_rows
                .fetch_add(self.pend.tilt.len() as u64, Ordering::Relaxed);
            self.pend.tilt.clear();
        }
        if !self.pend.control.is_empty() {
            seg.append_control(&self.pend.control)?;
            self.health
                .control_rows
                .fetch_add(self.pend.control.len() as u64, Ordering::Relaxed);
            self.pend.control.clear();
            if let Some(note) = seg.take_leg_mismatch() {
                self.health.with(|t| t.last_error = Some(note.clone()));
                let ev = EventRow {
                    stamp: self.last_stamp,
                    kind: EventKind::Recording,
                    source: "recorder".into(),
                    detail: note,
                };
                self.pend.events.push(ev);
            }
        }
        if !self.pend.events.is_empty() {
            seg.append_events(&self.pend.events)?;
            self.health
                .event_rows
                .fetch_add(self.pend.events.len() as u64, Ordering::Relaxed);
            self.pend.events.clear();
        }
        Ok(())
    }

    fn flush(&mut self) -> Result<(), RecordError> {
        self.write_pending()?;
        let dropped = self.dropped_run();
        if let Some(seg) = self.seg.as_mut() {
            seg.flush(dropped, self.opts.fsync)?;
            self.health.mark_flushed();
        }
        Ok(())
    }

    fn on_time(&mut self, now: Instant) {
        if self.failed.is_some() && now >= self.retry_at {
            self.retry();
        }
        if now >= self.flush_due {
            self.flush_due = now + self.opts.flush_interval;
            if self.seg.is_some() {
                if let Err(e) = self.flush() {
                    self.fail(e);
                } else {
                    self.check_size();
                }
            }
        }
    }

    fn check_size(&mut self) {
        let big = self
            .seg
            .as_ref()
            .is_some_and(|s| s.size_bytes() >= self.opts.segment_max_bytes);
        if big {
            self.rotate(self.last_stamp, "segment size limit reached");
        }
    }

    fn open_next(&mut self, start: Stamp) -> Result<SegmentWriter, RecordError> {
        loop {
            let idx = self.next_index;
            self.next_index += 1;
            let meta = SegmentMeta {
                segment_index: idx,
                segment_start_utc_ns: start.t_utc_ns,
                segment_start_mono_s: start.t_mono_s,
                ..self.meta.clone()
            };
            let path = opts_path(&self.opts.dir, &meta.run_id, idx);
            match SegmentWriter::create(&path, &meta, &self.opts.layout) {
                Err(RecordError::Exists(_)) => continue,
                Err(e) => {
                    // Nothing is left of a failed create: the next try uses the same name.
                    self.next_index = idx;
                    return Err(e);
                }
                r => return r,
            }
        }
    }

    fn rotate(&mut self, start: Stamp, why: &str) {
        let next_name = segment_file_name(&self.meta.run_id, self.next_index);
        let ev = self.writer_event(
            EventKind::Rotation,
            format!("{why}: closing; continues in {next_name}"),
        );
        self.pend.events.push(ev);
        if let Err(e) = self.write_pending() {
            self.fail(e);
            return;
        }
        let dropped = self.dropped_run();
        let Some(old) = self.seg.take() else { return };
        let old_name = old
            .path()
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        if let Err(c) = old.close(dropped) {
            self.seg = c.segment.map(|b| *b);
            self.fail(c.error);
            return;
        }
        self.health.mark_flushed();
        match self.open_next(start) {
            Ok(seg) => {
                self.install(seg, start);
                let mut ev = self.writer_event(
                    EventKind::Rotation,
                    format!("{why}: continues from {old_name}"),
                );
                ev.stamp = start;
                self.pend.events.push(ev);
            }
            Err(e) => self.fail(e),
        }
    }

    fn install(&mut self, seg: SegmentWriter, start: Stamp) {
        let p = seg.path().to_path_buf();
        self.files.push(p.clone());
        self.health.with(|t| {
            t.segment = Some(p.clone());
            t.segments.push(p);
        });
        self.seg = Some(seg);
        self.seg_start_mono = start.t_mono_s;
    }

    /// Recording stops: alarm, keep rows up to the bound, retry later with a new segment.
    fn fail(&mut self, e: RecordError) {
        let text = e.to_string().replace('\n', " ");
        if let Some(seg) = self.seg.take() {
            // Kept open, not closed: see `SegmentWriter::close`. `retry` closes it later.
            self.graveyard.push(seg);
        }
        let alarm = format!(
            "recording stopped: {text}; retrying every {:.1} s with a new segment; holding at most {} rows, dropping the rest",
            self.opts.retry_interval.as_secs_f64(),
            self.opts.queue_capacity_rows
        );
        self.health.with(|t| {
            t.segment = None;
            t.last_error = Some(text.clone());
            t.alarm = Some(alarm);
        });
        let ev = self.writer_event(EventKind::Alarm, format!("recording stopped: {text}"));
        let pend = std::mem::take(&mut self.pend);
        self.failed = Some(text);
        self.retry_at = Instant::now() + self.opts.retry_interval;
        self.pend.events.push(ev);
        self.hold_bounded(pend);
    }

    /// Tries to close the segments that failed earlier; keeps those that still fail.
    fn bury(&mut self) {
        let dropped = self.dropped_run();
        for seg in std::mem::take(&mut self.graveyard) {
            match seg.close(dropped) {
                Ok(_) => {}
                Err(c) => {
                    if let Some(s) = c.segment {
                        self.graveyard.push(*s);
                    }
                }
            }
        }
    }

    fn retry(&mut self) {
        let Some(err) = self.failed.clone() else {
            return;
        };
        self.bury();
        match self.open_next(self.last_stamp) {
            Ok(seg) => {
                let name = seg.path().display().to_string();
                self.install(seg, self.last_stamp);
                self.failed = None;
                self.health.with(|t| t.alarm = None);
                let ev = self.writer_event(
                    EventKind::Recording,
                    format!("recording resumed in {name} after: {err}"),
                );
                self.pend.events.push(ev);
                if self.unreported.total() > 0 {
                    let ev = self
                        .unreported
                        .event(self.last_stamp, "recording was stopped by an I/O error");
                    self.pend.events.push(ev);
                    self.unreported = Drops::default();
                }
                if let Err(e) = self.flush() {
                    self.fail(e);
                } else {
                    // The rows held during the outage are written: give their room back,
                    // so that an outage leaves the memory where it was.
                    let l = self.opts.layout;
                    self.pend.tilt.shrink_to(l.tilt_chunk_rows);
                    self.pend.control.shrink_to(l.control_chunk_rows);
                    self.pend.events.shrink_to(l.event_chunk_rows);
                }
            }
            Err(e) => {
                self.retry_at = Instant::now() + self.opts.retry_interval;
                self.health.with(|t| t.last_error = Some(e.to_string()));
            }
        }
    }

    fn finish(mut self) -> Outcome {
        if self.failed.is_some() {
            // One last try, so that the rows held back reach a file.
            self.retry();
        }
        let mut error = None;
        if self.failed.is_none() {
            if let Err(e) = self.write_pending() {
                error = Some(e.to_string());
            }
            if let Some(seg) = self.seg.take() {
                match seg.close(self.dropped_run()) {
                    Ok(_) => self.health.mark_flushed(),
                    Err(c) => {
                        error = Some(c.error.to_string());
                        self.graveyard.extend(c.segment.map(|b| *b));
                    }
                }
            }
        } else {
            let n = self.pend.counts();
            self.health
                .dropped_rows
                .fetch_add(n.total(), Ordering::Relaxed);
            error = self
                .failed
                .clone()
                .map(|f| format!("{f}; {} held rows could not be written", n.total()));
        }
        self.bury();
        // Still failing: leave those handles to the process's end rather than risk
        // dangling HDF5 ids (see `SegmentWriter::close`).
        for seg in std::mem::take(&mut self.graveyard) {
            std::mem::forget(seg);
        }
        if let Some(e) = &error {
            self.health.with(|t| {
                t.last_error = Some(e.clone());
                t.alarm = Some(format!("recording ended with an error: {e}"));
            });
        }
        Outcome {
            files: self.files,
            error,
        }
    }
}
