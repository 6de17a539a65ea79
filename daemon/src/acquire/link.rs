//! One serial line: opening (and reopening with back-off) a port, and driving a sans-IO
//! [`Session`] over it for one request at a time.
//!
//! Main types: [`Opener`] (how a port is obtained: [`SerialOpener`] for real devices and
//! pseudo-terminals, in the line's configured character format; anything else in tests),
//! [`Line`] (an instrument's connection with its counters and back-off; on a bus,
//! [`Line::request_counted`] also counts in the addressed unit's own channel) and
//! [`Backoff`].
//!
//! Failure rules (one line each, with the reason):
//! - an I/O error or EOF drops the port at once (a USB reset or a closed pty shows as EOF/EIO);
//! - [`REOPEN_AFTER_FAILURES`] failed requests in a row also drop it (some drivers never
//!   report a vanished device, so silence itself is the signal);
//! - reopening waits [`Backoff`] (100 ms doubling to 5 s, reset by the first good reply) so a
//!   missing device costs almost nothing;
//! - after a reopen the OS buffers are cleared and a fresh session starts (resync: stray
//!   bytes from before are never read as a reply).

use std::io;
use std::pin::Pin;
use std::time::Duration;

use stilt_protocol::modbus::timing::{CharFormat, Parity};
use stilt_protocol::session::{Event, Exchange, Session, SessionConfig};
use tokio::io::{AsyncRead, AsyncReadExt, AsyncWrite, AsyncWriteExt};
use tokio::time::Instant;

use super::Shared;

/// A byte stream to an instrument.
pub trait Port: AsyncRead + AsyncWrite + Send + Unpin {}
impl<T: AsyncRead + AsyncWrite + Send + Unpin> Port for T {}

/// A boxed [`Port`].
pub type BoxPort = Pin<Box<dyn Port>>;

/// How a line obtains its port (again, after a failure).
pub trait Opener: Send {
    /// Opens the port; called from inside the runtime.
    fn open(&mut self) -> io::Result<BoxPort>;
    /// The port's name for status and logs.
    fn name(&self) -> String;
}

/// Opens a serial device (or a pty's slave side) with tokio-serial, exclusively, in the
/// given character format (data bits, parity, stop bits), and clears its buffers. The path is resolved anew on every open (`resolve`), so a port map
/// rewritten by a restarted simulator, or a by-id link that moved, is followed.
pub struct SerialOpener {
    /// Gives the current path of the device.
    pub resolve: Box<dyn FnMut() -> String + Send>,
    /// Baud rate.
    pub baud: u32,
    /// Character format (`instruments.<name>.parity`, `data_bits`, `stop_bits`).
    pub framing: CharFormat,
    /// The last path resolved (for status).
    pub last: String,
}

impl SerialOpener {
    /// An opener for a fixed path, 8N1.
    pub fn fixed(path: String, baud: u32) -> Self {
        let p = path.clone();
        SerialOpener {
            resolve: Box::new(move || p.clone()),
            baud,
            framing: CharFormat::EIGHT_N_1,
            last: path,
        }
    }
}

/// tokio-serial's settings for a character format (data bits 5–8, stop bits 1–2; the
/// configuration allows 7–8 and 1–2).
pub fn serial_settings(
    f: CharFormat,
) -> (
    tokio_serial::DataBits,
    tokio_serial::Parity,
    tokio_serial::StopBits,
) {
    use tokio_serial::{DataBits, Parity as P, StopBits};
    let data = match f.data_bits {
        5 => DataBits::Five,
        6 => DataBits::Six,
        7 => DataBits::Seven,
        _ => DataBits::Eight,
    };
    let parity = match f.parity {
        Parity::None => P::None,
        Parity::Even => P::Even,
        Parity::Odd => P::Odd,
    };
    let stop = if f.stop_bits == 2 {
        StopBits::Two
    } else {
        StopBits::One
    };
    (data, parity, stop)
}

impl Opener for SerialOpener {
    fn open(&mut self) -> io::Result<BoxPort> {
        use tokio_serial::{SerialPort, SerialPortBuilderExt};
        self.last = (self.resolve)();
        let (data, parity, stop) = serial_settings(self.framing);
        let port = tokio_serial::new(&self.last, self.baud)
            .data_bits(data)
            .parity(parity)
            .stop_bits(stop)
            .flow_control(tokio_serial::FlowControl::None)
            .open_native_async()
            .map_err(io::Error::from)?;
        port.clear(tokio_serial::ClearBuffer::All)
            .map_err(io::Error::from)?;
        Ok(Box::pin(port))
    }

    fn name(&self) -> String {
        self.last.clone()
    }
}

/// Drop the port after this many failed requests in a row.
pub const REOPEN_AFTER_FAILURES: u32 = 10;

/// Exponential back-off between reopen attempts.
#[derive(Debug, Clone)]
pub struct Backoff {
    next: Duration,
    /// First delay.
    pub min: Duration,
    /// Longest delay.
    pub max: Duration,
}

impl Default for Backoff {
    /// 100 ms doubling to 5 s (common practice values).
    fn default() -> Self {
        Backoff {
            next: Duration::from_millis(100),
            min: Duration::from_millis(100),
            max: Duration::from_secs(5),
        }
    }
}

impl Backoff {
    /// The delay to wait now; doubles the next one.
    pub fn next_delay(&mut self) -> Duration {
        let d = self.next;
        self.next = (self.next * 2).min(self.max);
        d
    }

    /// Back to the first delay (after a success).
    pub fn reset(&mut self) {
        self.next = self.min;
    }
}

/// The outcome of one request on a [`Line`].
#[derive(Debug)]
pub enum Outcome<R> {
    /// A decoded reply.
    Reply(R),
    /// A set command went out.
    Sent,
    /// No usable reply after every attempt; `timeout` tells whether the last attempt timed out.
    Failed {
        /// The last attempt timed out (else: its reply was garbage).
        timeout: bool,
        /// The failure, for logs.
        detail: String,
    },
    /// The port failed or is closed; the line reopens it on the next request.
    Disconnected,
}

/// One instrument's connection: its port (when open), its counters in the shared store
/// (`channel` indexes [`Shared`]'s channel list), and its back-off.
pub struct Line {
    opener: Box<dyn Opener>,
    port: Option<BoxPort>,
    backoff: Backoff,
    shared: Shared,
    channel: usize,
    origin: Instant,
    failures_in_a_row: u32,
    buf: Vec<u8>,
    opened_once: bool,
}

impl Line {
    /// A closed line.
    pub fn new(opener: Box<dyn Opener>, shared: Shared, channel: usize, origin: Instant) -> Self {
        Line {
            opener,
            port: None,
            backoff: Backoff::default(),
            shared,
            channel,
            origin,
            failures_in_a_row: 0,
            buf: vec![0; 512],
            opened_once: false,
        }
    }

    /// Replaces the back-off (tests).
    pub fn set_backoff(&mut self, b: Backoff) {
        self.backoff = b;
    }

    fn now(&self) -> Duration {
        Instant::now().saturating_duration_since(self.origin)
    }

    /// Whether the port is open.
    pub fn is_open(&self) -> bool {
        self.port.is_some()
    }

    /// Opens the port if it is closed, waiting out the back-off between attempts.
    /// Returns true when a (re)connection happened, so the caller can resync its device.
    pub async fn ensure_open(&mut self) -> bool {
        if self.port.is_some() {
            return false;
        }
        // After a loss, wait before the first attempt too: a port that opens but fails at
        // once (a pty whose peer is gone) must not spin.
        let mut wait = self.opened_once;
        loop {
            if wait {
                let d = self.backoff.next_delay();
                tokio::time::sleep(d).await;
            }
            wait = true;
            match self.opener.open() {
                Ok(p) => {
                    let name = self.opener.name();
                    let reopened = self.opened_once;
                    self.opened_once = true;
                    self.port = Some(p);
                    self.failures_in_a_row = 0;
                    self.shared.with(|s| {
                        let c = &mut s.channels[self.channel];
                        c.connected = true;
                        c.port = name.clone();
                        if reopened {
                            c.reconnects += 1;
                        }
                    });
                    if reopened {
                        self.shared
                            .fault(self.channel, format!("reconnected to {name}"), false);
                    }
                    tracing::info!(port = %name, reopened, "serial port open");
                    return true;
                }
                Err(e) => {
                    tracing::debug!(port = %self.opener.name(), error = %e, "cannot open serial port");
                }
            }
        }
    }

    fn drop_port(&mut self, why: &str) {
        if self.port.take().is_some() {
            let name = self.opener.name();
            tracing::warn!(port = %name, why, "serial port lost; reopening with back-off");
            self.shared
                .with(|s| s.channels[self.channel].connected = false);
            self.shared
                .fault(self.channel, format!("port {name} lost: {why}"), true);
        }
    }

    /// Runs one request through `session` on the open port (opening it first if needed).
    pub async fn request<X: Exchange>(
        &mut self,
        session: &mut Session<X>,
        req: X,
    ) -> Outcome<X::Reply> {
        self.request_counted(session, req, None).await
    }

    /// [`Self::request`], also counting the request, its timeouts and bad replies in channel
    /// `also` (a unit's own counters on a bus); the line's channel keeps the line's totals.
    pub async fn request_counted<X: Exchange>(
        &mut self,
        session: &mut Session<X>,
        req: X,
        also: Option<usize>,
    ) -> Outcome<X::Reply> {
        if self.ensure_open().await {
            // A new port: a fresh session, so nothing from before is taken as a reply.
            *session = Session::new(*session.config());
        }
        let before = session.stats();
        let result = self.drive(session, req).await;
        let after = session.stats();
        let (timeouts, bad) = (
            after.timeouts.saturating_sub(before.timeouts),
            after.bad_replies.saturating_sub(before.bad_replies),
        );
        self.shared.with(|s| {
            for ch in std::iter::once(self.channel).chain(also) {
                if let Some(c) = s.channels.get_mut(ch) {
                    c.requests += 1;
                    c.timeouts += timeouts;
                    c.bad_frames += bad;
                }
            }
        });
        let outcome = match result {
            Ok(Event::Reply { reply, .. }) => Outcome::Reply(reply),
            Ok(Event::Sent) => Outcome::Sent,
            Ok(Event::Failed { failure, .. }) => Outcome::Failed {
                timeout: matches!(failure, stilt_protocol::session::Failure::Timeout),
                detail: failure.to_string(),
            },
            Err(e) => {
                *session = Session::new(*session.config());
                self.drop_port(&e.to_string());
                return Outcome::Disconnected;
            }
        };
        match &outcome {
            Outcome::Failed { .. } => {
                self.failures_in_a_row += 1;
                if self.failures_in_a_row >= REOPEN_AFTER_FAILURES {
                    *session = Session::new(*session.config());
                    self.drop_port(&format!("{REOPEN_AFTER_FAILURES} failed requests in a row"));
                }
            }
            Outcome::Reply(_) => {
                self.failures_in_a_row = 0;
                self.backoff.reset();
            }
            _ => {}
        }
        outcome
    }

    async fn drive<X: Exchange>(
        &mut self,
        session: &mut Session<X>,
        req: X,
    ) -> io::Result<Event<X::Reply, X::Error>> {
        let now = self.now();
        if session.handle_request(now, req).is_err() {
            // Unreachable by construction (one request at a time); start afresh.
            *session = Session::new(*session.config());
            return Err(io::Error::other("session busy"));
        }
        let origin = self.origin;
        let Some(port) = self.port.as_mut() else {
            return Err(io::Error::from(io::ErrorKind::NotConnected));
        };
        loop {
            let now = Instant::now().saturating_duration_since(origin);
            if let Some(bytes) = session.poll_transmit(now) {
                // No flush: on a serial port it is tcdrain(3), a blocking wait for the UART
                // to send the bytes, which would stall this runtime's other lines and the
                // control loop (≈ 4.6 ms for an 8-byte Modbus frame at 19200 baud). The
                // reply timeout runs from here, so it also covers the transmission.
                port.write_all(&bytes).await?;
            }
            if let Some(ev) = session.poll_event() {
                return Ok(ev);
            }
            let wake = session
                .poll_timeout()
                .map(|t| origin + t)
                .unwrap_or_else(|| Instant::now() + Duration::from_secs(1));
            tokio::select! {
                r = port.read(&mut self.buf) => {
                    let n = r?;
                    if n == 0 {
                        return Err(io::Error::from(io::ErrorKind::UnexpectedEof));
                    }
                    let now = Instant::now().saturating_duration_since(origin);
                    session.handle_input(now, &self.buf[..n]);
                }
                _ = tokio::time::sleep_until(wake) => {
                    let now = Instant::now().saturating_duration_since(origin);
                    session.handle_timeout(now);
                }
            }
        }
    }
}

/// Session settings for a line.
pub fn session_config(
    timeout_ms: u64,
    retries: u8,
    max_reply_len: usize,
    turnaround: Duration,
) -> SessionConfig {
    SessionConfig {
        reply_timeout: Duration::from_millis(timeout_ms),
        retries,
        max_reply_len,
        turnaround,
    }
}
