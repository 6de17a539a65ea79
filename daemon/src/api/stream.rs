//! `GET /v1/stream?every=N`: live control rows as Server-Sent Events.
//!
//! Events: one `start` ([`StreamStartWire`]: decimation, period, leg names), then a
//! `sample` ([`SampleWire`]) for every N-th control tick — ticks whose number is a
//! multiple of N, so every client asking the same N sees the same ticks, and a missed
//! tick never shifts the rest — and a `lagged` ([`LaggedWire`]) when the client fell so
//! far behind that the broadcast channel dropped rows for it. A comment line is sent
//! every few seconds while nothing else is, so a vanished client is noticed.
//!
//! The stream ends when the control loop stops (the broadcast closes) or when the server
//! shuts down: it is cut with `take_until` on the server's cancellation token, because
//! graceful shutdown otherwise waits forever for open streams. The number of streams is
//! bounded by `network.max_stream_clients` (a semaphore; 503 beyond it).

use std::convert::Infallible;
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Duration;

use axum::extract::{Query, State};
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::response::{IntoResponse, Response};
use futures_util::StreamExt;
use serde::Deserialize;
use tokio::sync::broadcast::error::RecvError;
use tokio::sync::{OwnedSemaphorePermit, broadcast};

use super::AppState;
use super::error::ApiError;
use super::wire::{LaggedWire, SampleWire, StreamStartWire};
use crate::rows::ControlRow;

/// Largest decimation a client may ask for.
pub const MAX_EVERY: u64 = 100_000;

/// Interval of the keep-alive comments.
pub const KEEP_ALIVE: Duration = Duration::from_secs(5);

/// Query of `GET /v1/stream`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StreamQuery {
    /// Send every N-th control row (1 = all). Default 1.
    pub every: Option<u64>,
}

struct Live {
    rx: broadcast::Receiver<Arc<ControlRow>>,
    /// Ends the stream when the control loop has gone (the watch's sender dropped); the
    /// rows broadcast cannot tell, because the API's own `Handles` keep a sender of it.
    status: tokio::sync::watch::Receiver<Arc<crate::status::Status>>,
    every: u64,
    state: AppState,
    _permit: OwnedSemaphorePermit,
}

impl Drop for Live {
    fn drop(&mut self) {
        self.state
            .inner
            .counters
            .stream_clients
            .fetch_sub(1, Ordering::Relaxed);
    }
}

fn json_event(name: &str, v: &impl serde::Serialize) -> Event {
    Event::default()
        .event(name)
        .json_data(v)
        .unwrap_or_else(|_| Event::default().comment("unserialisable event"))
}

/// The handler.
pub async fn stream(
    State(st): State<AppState>,
    q: Result<Query<StreamQuery>, axum::extract::rejection::QueryRejection>,
) -> Response {
    let every = match q {
        Ok(Query(q)) => q.every.unwrap_or(1),
        Err(e) => {
            return ApiError::bad_request(
                "invalid_query",
                format!(
                    "{}; allowed: every = a whole number from 1 to {MAX_EVERY}",
                    e.body_text()
                ),
            )
            .field("every")
            .into_response();
        }
    };
    if every == 0 || every > MAX_EVERY {
        return ApiError::invalid("every", format!("every must be from 1 to {MAX_EVERY}"))
            .into_response();
    }
    let Ok(permit) = st.inner.streams.clone().try_acquire_owned() else {
        return ApiError::unavailable(
            "too_many_streams",
            format!(
                "{} live streams are open, the most allowed (network.max_stream_clients); retry later",
                st.inner.config.network.max_stream_clients
            ),
        )
        .into_response();
    };
    st.inner
        .counters
        .stream_clients
        .fetch_add(1, Ordering::Relaxed);
    let start = StreamStartWire {
        every,
        period_s: st.inner.config.control.period_s(),
        legs: st
            .inner
            .config
            .legs
            .iter()
            .map(|l| l.name.clone())
            .collect(),
    };
    let live = Live {
        rx: st.inner.handles.rows.subscribe(),
        status: st.inner.handles.status.clone(),
        every,
        state: st.clone(),
        _permit: permit,
    };
    let first = futures_util::stream::once(async move { json_event("start", &start) });
    let rows = futures_util::stream::unfold(live, |mut live| async move {
        loop {
            let got = tokio::select! {
                // Rows first, so rows already sent are delivered before the end.
                biased;
                r = live.rx.recv() => r,
                c = live.status.changed() => match c {
                    Ok(()) => continue,
                    Err(_) => return None,
                },
            };
            match got {
                Ok(row) => {
                    if row.tick % live.every == 0 {
                        let ev = json_event("sample", &SampleWire::from(&*row));
                        return Some((ev, live));
                    }
                }
                Err(RecvError::Lagged(n)) => {
                    live.state
                        .inner
                        .counters
                        .stream_lagged_rows
                        .fetch_add(n, Ordering::Relaxed);
                    return Some((json_event("lagged", &LaggedWire { missed: n }), live));
                }
                Err(RecvError::Closed) => return None,
            }
        }
    });
    let events = first
        .chain(rows)
        .map(Ok::<_, Infallible>)
        .take_until(st.inner.shutdown.clone().cancelled_owned());
    Sse::new(events)
        .keep_alive(KeepAlive::new().interval(KEEP_ALIVE))
        .into_response()
}
