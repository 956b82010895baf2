//! The errors of the service: request-level problems (each becomes one gRPC
//! status in [`super::status`]) and start-up problems of the server.

use std::path::PathBuf;

use super::registry;

/// A request the service cannot answer.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error(transparent)]
    Model(#[from] registry::Error),
    #[error(
        "confidence {value} is out of range: send 0 for the model's default or a value in \
         [0.5, 0.99]"
    )]
    BadConfidence { value: f64 },
    #[error(
        "{count} candidates in one request exceed the limit of {limit} (setting \
         `server.max_candidates`); split the batch or use ScoreStream"
    )]
    TooManyCandidates { count: usize, limit: usize },
    #[error(
        "descriptor_names do not match model '{model}', which expects {expected} descriptors:{}{}{} \
         (see DescribeModel for the names in order)",
        list(" missing", missing),
        list(" unexpected", unexpected),
        list(" given twice", duplicated)
    )]
    DescriptorNames {
        model: String,
        expected: usize,
        missing: Vec<String>,
        unexpected: Vec<String>,
        duplicated: Vec<String>,
    },
    #[error(
        "ScoreStream: `{field}` changed from {first} in the first message to {now}; later \
         messages must repeat it or leave it empty"
    )]
    StreamChanged {
        field: &'static str,
        first: String,
        now: String,
    },
    #[error(
        "a message of {size} bytes exceeds the limit of {limit} bytes (setting \
         `server.max_message_bytes`); split the batch or raise the setting"
    )]
    MessageTooLarge { size: usize, limit: usize },
    #[error(
        "the answer could not be recorded in the audit store, so it is withheld: {0}; retry later"
    )]
    Audit(#[from] crate::audit::Error),
    #[error("the server is shutting down; retry against another instance")]
    ShuttingDown,
    #[error("internal error: {what}")]
    Internal { what: String },
}

fn list(label: &str, names: &[String]) -> String {
    if names.is_empty() {
        return String::new();
    }
    const SHOWN: usize = 20;
    let shown: Vec<String> = names.iter().take(SHOWN).map(|n| format!("'{n}'")).collect();
    let more = if names.len() > SHOWN {
        format!(" and {} more", names.len() - SHOWN)
    } else {
        String::new()
    };
    format!("{label} {}{more};", shown.join(", "))
}

/// Why the server could not start or stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum StartError {
    #[error(transparent)]
    Settings(#[from] super::settings::Error),
    #[error(transparent)]
    Audit(#[from] crate::audit::Error),
    #[error(transparent)]
    Models(#[from] registry::Error),
    #[error("cannot listen on {addr}: {source} (setting `server.listen`)")]
    Listen {
        addr: String,
        #[source]
        source: std::io::Error,
    },
    #[error("building the reflection service: {0}")]
    Reflection(String),
    #[error("the gRPC server failed: {0}")]
    Transport(#[from] tonic::transport::Error),
    #[error("installing the signal handler for {signal}: {source}")]
    Signal {
        signal: &'static str,
        #[source]
        source: std::io::Error,
    },
    #[error(
        "TLS could not be set up from `tls.cert`, `tls.key` and `tls.client_ca`: {0}; check \
         that the key belongs to the certificate"
    )]
    Tls(String),
    #[error("models directory {0}: no default model could be determined")]
    NoDefault(PathBuf),
}
