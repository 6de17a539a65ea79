//! The `[network]` keys of the HTTP API: defaults, TLS files given together, bounds.
//! Every case is the demo scenario with an edited `[network]` table.

use stilt_config::{DEMO_SCENARIO, load_str};

fn with_network(extra: &str) -> String {
    DEMO_SCENARIO.replacen(
        "[network]\nbind = \"127.0.0.1:8040\"",
        &format!("[network]\nbind = \"127.0.0.1:8040\"\n{extra}"),
        1,
    )
}

#[test]
fn defaults_are_loopback_no_tls_no_tokens() {
    let c = load_str(DEMO_SCENARIO, "demo").unwrap();
    assert!(c.network.bind.ip().is_loopback());
    assert_eq!(c.network.tls, None);
    assert_eq!(c.network.token_file, None);
    assert_eq!(c.network.max_stream_clients, 16);
    assert_eq!(c.network.change_timeout_ms, 2000);
}

#[test]
fn every_key_is_read() {
    let t = with_network(
        "tls_cert_file = \"/etc/stiltd/cert.pem\"\ntls_key_file = \"/etc/stiltd/key.pem\"\n\
         token_file = \"/etc/stiltd/tokens.toml\"\nmax_stream_clients = 4\nchange_timeout_ms = 500",
    );
    let c = load_str(&t, "t").unwrap();
    let tls = c.network.tls.unwrap();
    assert_eq!(tls.cert_file.to_str(), Some("/etc/stiltd/cert.pem"));
    assert_eq!(tls.key_file.to_str(), Some("/etc/stiltd/key.pem"));
    assert_eq!(
        c.network.token_file.unwrap().to_str(),
        Some("/etc/stiltd/tokens.toml")
    );
    assert_eq!(c.network.max_stream_clients, 4);
    assert_eq!(c.network.change_timeout_ms, 500);
}

fn error_paths(text: &str) -> Vec<(String, String)> {
    match load_str(text, "t") {
        Ok(_) => panic!("expected errors"),
        Err(e) => e.0.into_iter().map(|e| (e.path, e.allowed)).collect(),
    }
}

#[test]
fn half_a_tls_pair_and_out_of_range_values_are_refused() {
    let e = error_paths(&with_network("tls_cert_file = \"c.pem\""));
    assert_eq!(e[0].0, "network.tls_cert_file");
    assert!(e[0].1.contains("both"), "{}", e[0].1);
    let e = error_paths(&with_network("tls_key_file = \"k.pem\""));
    assert_eq!(e[0].0, "network.tls_key_file");
    let e = error_paths(&with_network("token_file = \"  \""));
    assert_eq!(e[0].0, "network.token_file");
    let e = error_paths(&with_network(
        "max_stream_clients = 0\nchange_timeout_ms = 0",
    ));
    let paths: Vec<&str> = e.iter().map(|(p, _)| p.as_str()).collect();
    assert_eq!(
        paths,
        ["network.max_stream_clients", "network.change_timeout_ms"]
    );
    assert!(e[0].1.contains("1 to 1024"), "{}", e[0].1);
}
