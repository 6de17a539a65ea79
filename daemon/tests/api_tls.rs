//! HTTPS: with `network.tls_*` set, a client that trusts a certificate generated here
//! (rcgen) connects; a client that does not trust it, and a plain-HTTP client, do not.
//! A certificate file that is not PEM stops the server from starting, with the path.

mod api_common;

use std::time::Duration;

use api_common::*;
use stilt_config::Tls;
use stilt_daemon::api::Server;
use stilt_daemon::api::client::{Client, ClientError};
use stilt_daemon::api::wire::HealthWire;

fn scratch(name: &str) -> std::path::PathBuf {
    let d = std::env::temp_dir().join(format!("stilt-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_client_trusting_the_test_certificate_connects_and_plain_http_does_not() {
    let dir = scratch("api-tls");
    let ck = rcgen::generate_simple_self_signed(vec!["127.0.0.1".into(), "localhost".into()])
        .expect("certificate");
    let cert_pem = ck.cert.pem();
    std::fs::write(dir.join("cert.pem"), &cert_pem).unwrap();
    std::fs::write(dir.join("key.pem"), ck.signing_key.serialize_pem()).unwrap();

    let mut cfg = config();
    cfg.network.bind = "127.0.0.1:0".parse().unwrap();
    cfg.network.tls = Some(Tls {
        cert_file: dir.join("cert.pem"),
        key_file: dir.join("key.pem"),
    });
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let server = Server::bind(&cfg, fake.handles.clone())
        .await
        .expect("bind with TLS");
    assert!(server.is_tls());
    let port = server.local_addr().port();
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let served = tokio::spawn(server.run(async move {
        let _ = stop_rx.await;
    }));

    let results = tokio::task::spawn_blocking(move || {
        let t = Duration::from_secs(5);
        let https = format!("https://127.0.0.1:{port}");
        // Trusting the test certificate: works.
        let good = Client::new(&https, None, Some(cert_pem.as_bytes()), t).unwrap();
        let live: Result<HealthWire, _> = good.get("/v1/health/live");
        // Trusting only the public roots: the self-signed certificate is refused.
        let untrusting = Client::new(&https, None, None, t).unwrap();
        let refused: Result<HealthWire, _> = untrusting.get("/v1/health/live");
        // Plain HTTP to the TLS port: no HTTP answer.
        let plain = Client::new(&format!("http://127.0.0.1:{port}"), None, None, t).unwrap();
        let plain: Result<HealthWire, _> = plain.get("/v1/health/live");
        (live, refused, plain)
    })
    .await
    .unwrap();
    assert_eq!(results.0.expect("trusted HTTPS").status, "alive");
    match results.1 {
        Err(ClientError::Tls { detail, .. }) => {
            assert!(
                detail.to_lowercase().contains("certificate") || detail.contains("issuer"),
                "{detail}"
            )
        }
        other => panic!("an untrusted certificate was accepted: {other:?}"),
    }
    assert!(
        results.2.is_err(),
        "plain HTTP got an answer from the TLS port"
    );

    let _ = stop_tx.send(());
    tokio::time::timeout(Duration::from_secs(10), served)
        .await
        .expect("stopped")
        .unwrap()
        .unwrap();

    // A broken certificate file: the server does not start, and says which file.
    std::fs::write(dir.join("cert.pem"), "not a certificate").unwrap();
    let e = match Server::bind(&cfg, fake.handles.clone()).await {
        Ok(_) => panic!("started with a broken certificate"),
        Err(e) => e.to_string(),
    };
    assert!(e.contains("cert.pem") && e.contains("TLS"), "{e}");
    let _ = std::fs::remove_dir_all(&dir);
}

#[tokio::test]
async fn a_token_file_others_can_read_stops_the_server() {
    use std::os::unix::fs::PermissionsExt;
    let dir = scratch("api-perm");
    let p = dir.join("tokens.toml");
    std::fs::write(&p, token_file_text()).unwrap();
    std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o644)).unwrap();
    let mut cfg = config();
    cfg.network.bind = "127.0.0.1:0".parse().unwrap();
    cfg.network.token_file = Some(p.clone());
    let fake = fake_loop(&cfg, Behaviour::Answer, 16);
    let e = match Server::bind(&cfg, fake.handles.clone()).await {
        Ok(_) => panic!("started with a world-readable token file"),
        Err(e) => e.to_string(),
    };
    assert!(e.contains("tokens.toml") && e.contains("chmod 600"), "{e}");
    std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o600)).unwrap();
    assert!(Server::bind(&cfg, fake.handles.clone()).await.is_ok());
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn the_server_thread_serves_and_stops() {
    // A runtime only for the fake loop; the server brings its own.
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .enable_all()
        .build()
        .unwrap();
    let mut cfg = config();
    cfg.network.bind = "127.0.0.1:0".parse().unwrap();
    let fake = rt.block_on(async { fake_loop(&cfg, Behaviour::Answer, 16) });
    let server = stilt_daemon::api::spawn_thread(&cfg, fake.handles.clone(), 1).expect("thread");
    let base = format!("http://{}", server.local_addr());
    let c = Client::new(&base, None, None, Duration::from_secs(5)).unwrap();
    let reply = c
        .put("/v1/mode", &serde_json::json!({"mode": "off"}))
        .expect("a change through the server thread");
    assert_eq!(reply.by, "api:local");
    assert_eq!(fake.now().mode, stilt_config::Mode::Off);
    server.stop().expect("stopped");
    assert!(
        c.get::<HealthWire>("/v1/health/live").is_err(),
        "still answering"
    );
    // Binding an address in use fails with the address named.
    let taken = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    cfg.network.bind = taken.local_addr().unwrap();
    let e = match stilt_daemon::api::spawn_thread(&cfg, fake.handles.clone(), 1) {
        Ok(_) => panic!("bound a taken address"),
        Err(e) => e.to_string(),
    };
    assert!(e.contains(&cfg.network.bind.to_string()), "{e}");
}
