//! The live stream (`GET /v1/stream`) through the router without sockets: decimation,
//! the `lagged` notice when a client falls behind, the bound on open streams, and
//! shutdown ending every stream at once.

mod api_common;

use std::sync::Arc;
use std::time::Duration;

use api_common::*;
use axum::body::Body;
use axum::http::{Request, StatusCode};
use futures_util::StreamExt;
use tower::ServiceExt;

async fn open(app: &axum::Router, path: &str) -> axum::response::Response {
    let req = Request::get(path)
        .header("authorization", format!("Bearer {OBSERVER}"))
        .body(Body::empty())
        .unwrap();
    app.clone().oneshot(req).await.unwrap()
}

/// Reads events until `want` of them arrived (bounded in time).
async fn read_events(
    body: &mut (impl futures_util::Stream<Item = Result<axum::body::Bytes, axum::Error>> + Unpin),
    want: usize,
) -> Vec<Sse> {
    let mut buf = String::new();
    let mut got = Vec::new();
    tokio::time::timeout(Duration::from_secs(10), async {
        while got.len() < want {
            match body.next().await {
                Some(Ok(b)) => {
                    buf.push_str(&String::from_utf8_lossy(&b));
                    got.extend(take_events(&mut buf));
                }
                _ => break,
            }
        }
    })
    .await
    .expect("events in time");
    got
}

#[tokio::test]
async fn samples_arrive_decimated_after_a_start_event() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 64);
    let (app, st) = app_with(cfg, &fake, tokens());
    let resp = open(&app, "/v1/stream?every=3").await;
    assert_eq!(resp.status(), StatusCode::OK);
    assert!(
        resp.headers()["content-type"]
            .to_str()
            .unwrap()
            .starts_with("text/event-stream")
    );
    assert_eq!(
        st.counters()
            .stream_clients
            .load(std::sync::atomic::Ordering::Relaxed),
        1
    );
    let mut body = resp.into_body().into_data_stream();
    for t in 1..=10 {
        fake.rows.send(Arc::new(row(t))).unwrap();
    }
    let ev = read_events(&mut body, 4).await;
    assert_eq!(ev[0].event, "start");
    let start: serde_json::Value = serde_json::from_str(&ev[0].data).unwrap();
    assert_eq!(start["every"], 3);
    assert_eq!(start["legs"], serde_json::json!(["A", "B", "C"]));
    let ticks: Vec<u64> = ev[1..]
        .iter()
        .map(|e| {
            assert_eq!(e.event, "sample");
            serde_json::from_str::<serde_json::Value>(&e.data).unwrap()["tick"]
                .as_u64()
                .unwrap()
        })
        .collect();
    assert_eq!(ticks, vec![3, 6, 9]);
    let s: serde_json::Value = serde_json::from_str(&ev[1].data).unwrap();
    assert!((s["tilt_urad"][0].as_f64().unwrap() - 0.3).abs() < 1e-12);
    assert_eq!(
        s["tilt_urad"][1],
        serde_json::Value::Null,
        "NaN goes out as null"
    );
    assert_eq!(s["legs"].as_array().unwrap().len(), 3);
    drop(body);
    // The client went away: its slot is free again.
    tokio::time::sleep(Duration::from_millis(20)).await;
    assert_eq!(
        st.counters()
            .stream_clients
            .load(std::sync::atomic::Ordering::Relaxed),
        0
    );
}

#[tokio::test]
async fn a_client_that_falls_behind_is_told_how_many_rows_it_missed() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 4);
    let (app, _) = app_with(cfg, &fake, tokens());
    let resp = open(&app, "/v1/stream").await;
    let mut body = resp.into_body().into_data_stream();
    // 20 rows into a channel of 4 before the client reads anything: 16 are lost to it.
    for t in 0..20 {
        fake.rows.send(Arc::new(row(t))).unwrap();
    }
    let ev = read_events(&mut body, 6).await;
    assert_eq!(ev[0].event, "start");
    assert_eq!(ev[1].event, "lagged");
    let l: serde_json::Value = serde_json::from_str(&ev[1].data).unwrap();
    assert_eq!(l["missed"], 16);
    let ticks: Vec<u64> = ev[2..]
        .iter()
        .map(|e| {
            serde_json::from_str::<serde_json::Value>(&e.data).unwrap()["tick"]
                .as_u64()
                .unwrap()
        })
        .collect();
    assert_eq!(ticks, vec![16, 17, 18, 19]);
}

#[tokio::test]
async fn streams_are_bounded_and_end_on_shutdown() {
    let mut cfg = config();
    cfg.network.max_stream_clients = 2;
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, st) = app_with(cfg, &fake, tokens());
    let a = open(&app, "/v1/stream").await;
    let b = open(&app, "/v1/stream").await;
    let c = open(&app, "/v1/stream").await;
    assert_eq!(a.status(), StatusCode::OK);
    assert_eq!(b.status(), StatusCode::OK);
    assert_eq!(c.status(), StatusCode::SERVICE_UNAVAILABLE);
    let body = axum::body::to_bytes(c.into_body(), 4096).await.unwrap();
    assert!(String::from_utf8_lossy(&body).contains("too_many_streams"));

    let mut a = a.into_body().into_data_stream();
    let mut b = b.into_body().into_data_stream();
    st.shutdown_token().cancel();
    // Both streams end promptly: the start event, then the end of the body.
    for s in [&mut a, &mut b] {
        let end = tokio::time::timeout(Duration::from_secs(5), async {
            let mut n = 0;
            while let Some(Ok(_)) = s.next().await {
                n += 1;
            }
            n
        })
        .await
        .expect("stream ended after shutdown");
        assert!(end <= 1, "{end} frames");
    }
}

#[tokio::test]
async fn a_stream_ends_when_the_loop_stops() {
    let cfg = config();
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let (app, _) = app_with(cfg, &fake, tokens());
    let resp = open(&app, "/v1/stream").await;
    let mut body = resp.into_body().into_data_stream();
    let Fake {
        handles,
        rows,
        status,
        task,
        ..
    } = fake;
    rows.send(Arc::new(row(0))).unwrap();
    // The loop stops: its task and its end of the status watch go away.
    task.abort();
    let _ = task.await;
    drop((rows, handles, status));
    let ev = read_events(&mut body, 10).await;
    assert_eq!(ev.len(), 2, "{ev:?}");
    assert_eq!(ev[1].event, "sample");
}
