//! Logging setup: the journal when running under systemd, stderr otherwise.
//!
//! Levels follow one rule: ERROR means a person must act (an interlock took the stage
//! to its safe state, recording stopped); WARN is trouble the daemon is handling (an
//! alarm that holds the outputs, a retry); INFO is what changed (mode, setpoints, gains,
//! with who asked); DEBUG is for developers. Fields come before the message, so the
//! journal can be filtered by them (`journalctl -u stiltd ALARM_ID=…`). Samples are
//! counted, never logged one by one. `RUST_LOG` overrides the default level (`info`).

use tracing_subscriber::EnvFilter;
use tracing_subscriber::layer::SubscriberExt;
use tracing_subscriber::util::SubscriberInitExt;

/// Installs the global subscriber. Safe to call once; later calls do nothing.
pub fn init() {
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    // systemd sets JOURNAL_STREAM for services whose output goes to the journal.
    if std::env::var_os("JOURNAL_STREAM").is_some() {
        if let Ok(journal) = tracing_journald::layer() {
            let _ = tracing_subscriber::registry()
                .with(filter)
                .with(journal.with_syslog_identifier("stiltd".into()))
                .try_init();
            return;
        }
    }
    let _ = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_target(false)
        .try_init();
}
