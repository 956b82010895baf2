//! Tracing setup: human-readable lines by default, JSON lines for log
//! collectors in containers (`server.json_logs`). The filter comes from
//! `RUST_LOG`, else `info`.

use tracing_subscriber::EnvFilter;

/// Installs the global subscriber; a second call (tests, or a command line
/// that already set one up) leaves the first in place.
pub fn init(json: bool) {
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    let _ = if json {
        builder
            .json()
            .flatten_event(true)
            .with_current_span(true)
            .try_init()
    } else {
        builder.try_init()
    };
}
