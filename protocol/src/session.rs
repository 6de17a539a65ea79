//! A generic sans-IO master session: one request in flight, reply timeout, bounded retries.
//!
//! The session never touches a port or a clock. The caller feeds it requests
//! ([`Session::handle_request`]), received bytes ([`Session::handle_input`]) and the passing of
//! time ([`Session::handle_timeout`]), and drains its outputs: bytes to transmit
//! ([`Session::poll_transmit`]), the next instant it wants to be woken
//! ([`Session::poll_timeout`]) and the outcome ([`Session::poll_event`]). Times are
//! `Duration`s since an arbitrary origin chosen by the caller (see the crate docs).
//!
//! Every protocol plugs in through [`Exchange`]: how to encode a request and how to decode
//! its reply from the start of a byte buffer. Implementations exist for
//! [`crate::scpi::heater::HeaterRequest`], [`crate::modbus::Transaction`] and
//! [`crate::line::LineQuery`].
//!
//! Rules: after the request leaves ([`Session::poll_transmit`]), a reply must be complete
//! within [`SessionConfig::reply_timeout`]. A timeout, an undecodable reply or a reply longer
//! than [`SessionConfig::max_reply_len`] costs one attempt; the request is sent again up to
//! [`SessionConfig::retries`] times, but only after the line has been quiet for
//! [`SessionConfig::turnaround`] (so the tail of a garbled reply is not read as the answer to
//! the retry). Bytes arriving with nothing outstanding are discarded and counted.

use std::time::Duration;

/// How a protocol's request is written and its reply read.
pub trait Exchange {
    /// The decoded reply.
    type Reply;
    /// The protocol's decode error.
    type Error: std::error::Error;

    /// Appends the bytes of the request.
    fn encode(&self, out: &mut Vec<u8>);

    /// False if the device sends nothing back (SCPI set commands, Modbus broadcasts).
    fn expects_reply(&self) -> bool {
        true
    }

    /// Decodes a reply from the start of `buf`: `Ok(Some((reply, consumed)))`, `Ok(None)` if
    /// more bytes are needed, or an error if the bytes can never be a valid reply.
    fn decode_reply(&self, buf: &[u8]) -> Result<Option<(Self::Reply, usize)>, Self::Error>;
}

/// Session settings.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SessionConfig {
    /// Longest wait for a complete reply after the request left.
    pub reply_timeout: Duration,
    /// How many times a failed request is sent again (0 = once only).
    pub retries: u8,
    /// Most reply bytes buffered before the reply counts as garbage.
    pub max_reply_len: usize,
    /// Quiet time on the line required before any transmission after the previous exchange
    /// (for Modbus RTU, at least the 3.5-character silence).
    pub turnaround: Duration,
}

impl Default for SessionConfig {
    /// 500 ms timeout, 2 retries, 512-byte replies, 5 ms turnaround (common practice values).
    fn default() -> Self {
        SessionConfig {
            reply_timeout: Duration::from_millis(500),
            retries: 2,
            max_reply_len: 512,
            turnaround: Duration::from_millis(5),
        }
    }
}

/// Why a request finally failed.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum Failure<E> {
    /// No complete reply before the deadline on the last attempt.
    #[error("no reply within the timeout")]
    Timeout,
    /// The last attempt's reply could not be decoded.
    #[error("undecodable reply: {0}")]
    Decode(E),
    /// The last attempt's reply grew past the buffer limit.
    #[error("reply longer than {max} bytes")]
    Overflow {
        /// The limit.
        max: usize,
    },
}

/// What happened to the request.
#[derive(Debug, Clone, PartialEq)]
pub enum Event<R, E> {
    /// A reply arrived.
    Reply {
        /// The decoded reply.
        reply: R,
        /// Attempts used, 1 for the first.
        attempts: u8,
        /// From the last transmission to the reply.
        latency: Duration,
    },
    /// The request expects no reply and has been handed to [`Session::poll_transmit`].
    Sent,
    /// The request failed after all attempts.
    Failed {
        /// The failure of the last attempt.
        failure: Failure<E>,
        /// Attempts used.
        attempts: u8,
    },
}

/// The session was asked to take a request while another is outstanding or an event is undrained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
#[error("session busy: a request is outstanding or its event has not been polled")]
pub struct Busy;

/// Counters kept by the session (for metrics; they wrap never in practice, being `u64`).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct SessionStats {
    /// Requests started.
    pub requests: u64,
    /// Retransmissions.
    pub retries: u64,
    /// Attempts that timed out.
    pub timeouts: u64,
    /// Attempts whose reply did not decode or overflowed.
    pub bad_replies: u64,
    /// Bytes received with nothing outstanding, or left over after a reply.
    pub stray_bytes: u64,
}

#[derive(Debug)]
enum State<X> {
    Idle,
    /// Waiting to transmit (first attempt or retry) once `now >= ready_at`.
    ToSend {
        req: X,
        attempts: u8,
    },
    /// Sent; waiting for the reply until `deadline`.
    Awaiting {
        req: X,
        attempts: u8,
        sent_at: Duration,
        deadline: Duration,
    },
}

/// The master side of one request/reply line. See the module docs.
#[derive(Debug)]
pub struct Session<X: Exchange> {
    cfg: SessionConfig,
    state: State<X>,
    rx: Vec<u8>,
    ready_at: Duration,
    event: Option<Event<X::Reply, X::Error>>,
    stats: SessionStats,
}

impl<X: Exchange> Session<X> {
    /// An idle session.
    pub fn new(cfg: SessionConfig) -> Self {
        Session {
            cfg,
            state: State::Idle,
            rx: Vec::new(),
            ready_at: Duration::ZERO,
            event: None,
            stats: SessionStats::default(),
        }
    }

    /// The settings.
    pub fn config(&self) -> &SessionConfig {
        &self.cfg
    }

    /// Counters.
    pub fn stats(&self) -> SessionStats {
        self.stats
    }

    /// True when no request is outstanding and no event waits to be polled.
    pub fn is_idle(&self) -> bool {
        matches!(self.state, State::Idle) && self.event.is_none()
    }

    /// Queues `req` for transmission. Fails with [`Busy`] unless [`Self::is_idle`].
    pub fn handle_request(&mut self, now: Duration, req: X) -> Result<(), Busy> {
        if !self.is_idle() {
            return Err(Busy);
        }
        let _ = now;
        self.stats.requests += 1;
        self.rx.clear();
        self.state = State::ToSend { req, attempts: 0 };
        Ok(())
    }

    /// The bytes to write now, if a transmission is due. Starts the reply deadline.
    pub fn poll_transmit(&mut self, now: Duration) -> Option<Vec<u8>> {
        if now < self.ready_at {
            return None;
        }
        let State::ToSend { .. } = self.state else {
            return None;
        };
        let State::ToSend { req, attempts } = std::mem::replace(&mut self.state, State::Idle)
        else {
            return None;
        };
        let mut out = Vec::new();
        req.encode(&mut out);
        let attempts = attempts.saturating_add(1);
        if attempts > 1 {
            self.stats.retries += 1;
        }
        self.rx.clear();
        if req.expects_reply() {
            self.state = State::Awaiting {
                req,
                attempts,
                sent_at: now,
                deadline: now.saturating_add(self.cfg.reply_timeout),
            };
        } else {
            self.ready_at = now.saturating_add(self.cfg.turnaround);
            self.event = Some(Event::Sent);
        }
        Some(out)
    }

    /// Feeds bytes received at `now`.
    ///
    /// Bytes are accepted until [`Self::handle_timeout`] declares the deadline passed, so a
    /// caller that reads late does not lose a reply that did arrive.
    pub fn handle_input(&mut self, now: Duration, bytes: &[u8]) {
        match &self.state {
            State::Awaiting { .. } => {}
            State::ToSend { .. } => {
                // The line is still talking (e.g. the tail of a garbled reply): wait for quiet.
                self.stats.stray_bytes += bytes.len() as u64;
                self.ready_at = self.ready_at.max(now.saturating_add(self.cfg.turnaround));
                return;
            }
            State::Idle => {
                self.stats.stray_bytes += bytes.len() as u64;
                return;
            }
        }
        let room = self.cfg.max_reply_len.saturating_sub(self.rx.len());
        let overflow = bytes.len() > room;
        self.rx.extend_from_slice(&bytes[..bytes.len().min(room)]);
        let State::Awaiting {
            req,
            attempts,
            sent_at,
            ..
        } = &self.state
        else {
            return;
        };
        let (attempts, sent_at) = (*attempts, *sent_at);
        match req.decode_reply(&self.rx) {
            Ok(Some((reply, consumed))) => {
                let extra = self.rx.len().saturating_sub(consumed) as u64;
                self.stats.stray_bytes += extra + (bytes.len().saturating_sub(room)) as u64;
                self.rx.clear();
                self.state = State::Idle;
                self.ready_at = now.saturating_add(self.cfg.turnaround);
                self.event = Some(Event::Reply {
                    reply,
                    attempts,
                    latency: now.saturating_sub(sent_at),
                });
            }
            Ok(None) if overflow || self.rx.len() >= self.cfg.max_reply_len => {
                let max = self.cfg.max_reply_len;
                self.fail_attempt(now, Failure::Overflow { max });
            }
            Ok(None) => {}
            Err(e) => self.fail_attempt(now, Failure::Decode(e)),
        }
    }

    /// Tells the session the time is `now`; declares a timeout if the deadline has passed.
    pub fn handle_timeout(&mut self, now: Duration) {
        if let State::Awaiting { deadline, .. } = self.state
            && now >= deadline
        {
            self.fail_attempt(now, Failure::Timeout);
        }
    }

    /// The next instant at which [`Self::handle_timeout`] or [`Self::poll_transmit`] has work.
    pub fn poll_timeout(&self) -> Option<Duration> {
        match self.state {
            State::Awaiting { deadline, .. } => Some(deadline),
            State::ToSend { .. } => Some(self.ready_at),
            State::Idle => None,
        }
    }

    /// The outcome of the current request, once known. Polling it frees the session.
    pub fn poll_event(&mut self) -> Option<Event<X::Reply, X::Error>> {
        self.event.take()
    }

    fn fail_attempt(&mut self, now: Duration, failure: Failure<X::Error>) {
        let State::Awaiting { req, attempts, .. } = std::mem::replace(&mut self.state, State::Idle)
        else {
            return;
        };
        match failure {
            Failure::Timeout => self.stats.timeouts += 1,
            _ => self.stats.bad_replies += 1,
        }
        self.rx.clear();
        self.ready_at = now.saturating_add(self.cfg.turnaround);
        if attempts <= self.cfg.retries {
            self.state = State::ToSend { req, attempts };
        } else {
            self.event = Some(Event::Failed { failure, attempts });
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scpi::ScpiError;
    use crate::scpi::heater::{HeaterReply, HeaterRequest};
    use proptest::prelude::*;

    fn ms(v: u64) -> Duration {
        Duration::from_millis(v)
    }

    fn cfg() -> SessionConfig {
        SessionConfig {
            reply_timeout: ms(100),
            retries: 1,
            max_reply_len: 64,
            turnaround: ms(2),
        }
    }

    type S = Session<HeaterRequest>;

    #[test]
    fn query_then_reply() {
        let mut s = S::new(cfg());
        let q = HeaterRequest::MeasureCurrent { channel: 2 };
        s.handle_request(ms(0), q).unwrap();
        assert_eq!(s.poll_transmit(ms(0)).unwrap(), b":MEAS2:CURR?\n");
        assert_eq!(s.poll_timeout(), Some(ms(100)));
        s.handle_input(ms(10), b"+1.2500");
        assert!(s.poll_event().is_none());
        s.handle_input(ms(12), b"00E-01\n");
        match s.poll_event() {
            Some(Event::Reply {
                reply: HeaterReply::Amps(a),
                attempts: 1,
                latency,
            }) => {
                assert!((a - 0.125).abs() < 1e-12);
                assert_eq!(latency, ms(12));
            }
            other => panic!("{other:?}"),
        }
        assert!(s.is_idle());
    }

    #[test]
    fn timeout_retries_then_fails() {
        let mut s = S::new(cfg());
        s.handle_request(ms(0), HeaterRequest::Identify).unwrap();
        assert!(s.poll_transmit(ms(0)).is_some());
        s.handle_timeout(ms(99));
        assert!(s.poll_event().is_none());
        assert!(
            s.poll_transmit(ms(99)).is_none(),
            "still waiting for the reply"
        );
        s.handle_timeout(ms(100));
        // Retry only after the turnaround.
        assert_eq!(s.poll_timeout(), Some(ms(102)));
        assert!(s.poll_transmit(ms(101)).is_none());
        assert_eq!(s.poll_transmit(ms(102)).unwrap(), b"*IDN?\n");
        s.handle_timeout(ms(202));
        assert_eq!(
            s.poll_event(),
            Some(Event::Failed {
                failure: Failure::Timeout,
                attempts: 2
            })
        );
        assert_eq!(s.stats().timeouts, 2);
        assert_eq!(s.stats().retries, 1);
    }

    #[test]
    fn garbled_reply_waits_for_quiet_then_retries() {
        let mut s = S::new(cfg());
        s.handle_request(ms(0), HeaterRequest::QueryOutput { channel: 1 })
            .unwrap();
        s.poll_transmit(ms(0)).unwrap();
        s.handle_input(ms(5), b"7\n");
        assert!(s.poll_event().is_none(), "one retry left");
        // The line keeps talking: retransmission is pushed back.
        s.handle_input(ms(6), b"noise");
        assert!(s.poll_transmit(ms(7)).is_none());
        assert!(s.poll_transmit(ms(8)).is_some());
        s.handle_input(ms(9), b"1\n");
        assert!(matches!(
            s.poll_event(),
            Some(Event::Reply {
                reply: HeaterReply::Output(true),
                attempts: 2,
                ..
            })
        ));
        assert_eq!(s.stats().stray_bytes, 5);
    }

    #[test]
    fn decode_error_on_last_attempt_is_reported() {
        let mut s = S::new(SessionConfig {
            retries: 0,
            ..cfg()
        });
        s.handle_request(ms(0), HeaterRequest::OperationComplete)
            .unwrap();
        s.poll_transmit(ms(0)).unwrap();
        s.handle_input(ms(1), b"0\n");
        assert!(matches!(
            s.poll_event(),
            Some(Event::Failed {
                failure: Failure::Decode(ScpiError::BadResponse { .. }),
                attempts: 1
            })
        ));
    }

    #[test]
    fn overflow_is_bounded() {
        let mut s = S::new(SessionConfig {
            retries: 0,
            ..cfg()
        });
        s.handle_request(ms(0), HeaterRequest::Identify).unwrap();
        s.poll_transmit(ms(0)).unwrap();
        s.handle_input(ms(1), &[b'x'; 1000]);
        assert!(matches!(
            s.poll_event(),
            Some(Event::Failed {
                failure: Failure::Overflow { max: 64 },
                ..
            }) | Some(Event::Failed {
                failure: Failure::Decode(_),
                ..
            })
        ));
    }

    #[test]
    fn set_commands_complete_on_send_and_busy_is_reported() {
        let mut s = S::new(cfg());
        let set = HeaterRequest::SetOutput {
            channel: 3,
            on: true,
        };
        s.handle_request(ms(0), set).unwrap();
        assert_eq!(s.handle_request(ms(0), set), Err(Busy));
        assert_eq!(s.poll_transmit(ms(0)).unwrap(), b":OUTP3:STAT ON\n");
        assert_eq!(s.poll_event(), Some(Event::Sent));
        // The next request waits for the turnaround.
        s.handle_request(ms(1), HeaterRequest::Identify).unwrap();
        assert!(s.poll_transmit(ms(1)).is_none());
        assert!(s.poll_transmit(ms(2)).is_some());
    }

    #[test]
    fn modbus_transaction_with_a_split_reply() {
        use crate::modbus::{Response, Transaction, encode_response, rtd};
        let mut s = Session::<Transaction>::new(cfg());
        let t = Transaction::new(4, rtd::read_status(0, 2).unwrap()).unwrap();
        s.handle_request(ms(0), t).unwrap();
        let tx = s.poll_transmit(ms(0)).unwrap();
        assert_eq!(tx[..2], [4, 0x04]);
        let mut reply = Vec::new();
        encode_response(4, &Response::ReadInputRegisters(vec![0, 1]), &mut reply).unwrap();
        s.handle_input(ms(3), &reply[..4]);
        assert!(s.poll_event().is_none());
        s.handle_input(ms(4), &reply[4..]);
        match s.poll_event() {
            Some(Event::Reply { reply, .. }) => {
                let st = rtd::parse_status(&reply, 2).unwrap();
                assert!(st[0].is_ok() && st[1].open());
            }
            other => panic!("{other:?}"),
        }
        // A broadcast write completes on transmission.
        let b = Transaction::new(0, rtd::write_enable_mask(1)).unwrap();
        s.handle_request(ms(10), b).unwrap();
        assert!(s.poll_transmit(ms(10)).is_some());
        assert_eq!(s.poll_event(), Some(Event::Sent));
    }

    #[test]
    fn line_query_with_the_tilt_spec() {
        use crate::line::{LineQuery, tilt};
        let spec = std::sync::Arc::new(tilt::default_spec().unwrap());
        let mut s = Session::<LineQuery>::new(cfg());
        s.handle_request(ms(0), LineQuery(spec.clone())).unwrap();
        assert_eq!(s.poll_transmit(ms(0)).unwrap(), b"TLT?\r");
        s.handle_input(ms(20), b"T,+0001.0000,-0002.0000,20.00,2\r\n");
        match s.poll_event() {
            Some(Event::Reply { reply, .. }) => {
                let t = tilt::TiltSample::from_reading(&spec, &reply).unwrap();
                assert_eq!((t.x_urad, t.y_urad, t.status), (0.1, -0.2, 2));
            }
            other => panic!("{other:?}"),
        }
    }

    proptest! {
        #[test]
        fn any_input_sequence_keeps_the_session_sane(
            chunks in proptest::collection::vec(
                (0u64..50, proptest::collection::vec(any::<u8>(), 0..40)), 0..20),
        ) {
            let mut s = S::new(cfg());
            let mut now = ms(0);
            s.handle_request(now, HeaterRequest::MeasureVoltage { channel: 1 }).unwrap();
            let mut finished = false;
            for (dt, bytes) in chunks {
                now += ms(dt);
                let _ = s.poll_transmit(now);
                s.handle_input(now, &bytes);
                s.handle_timeout(now);
                prop_assert!(s.rx.len() <= 64);
                if s.poll_event().is_some() {
                    finished = true;
                    break;
                }
            }
            if !finished {
                // Time alone must end it.
                for _ in 0..10 {
                    now += ms(200);
                    let _ = s.poll_transmit(now);
                    s.handle_timeout(now);
                }
                prop_assert!(s.poll_event().is_some());
            }
            prop_assert!(s.is_idle());
        }
    }
}
