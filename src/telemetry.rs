//! Tracing set-up for the command line: human-readable warnings on stderr,
//! `RUST_LOG` to change the level. The service sets up its own (JSON logs
//! in containers).

use tracing_subscriber::EnvFilter;

/// Logs `warn` and above to stderr unless `RUST_LOG` says otherwise.
pub fn init_cli() {
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("warn"));
    let _ = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .without_time()
        .try_init();
}
