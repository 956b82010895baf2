//! Server settings: compiled-in defaults, then an optional TOML file, then
//! `PLUMBLINE_*` environment variables (`__` separates nesting levels, so
//! `PLUMBLINE_SERVER__LISTEN` sets `server.listen`), then explicit overrides
//! from the command line.
//!
//! The environment is passed in as a map so tests need no real environment
//! variables. Unknown keys are rejected and every bad value is a start-up
//! error that names its key: a typo in a deployment must not silently fall
//! back to a default.
//!
//! | key | default | meaning |
//! | --- | --- | --- |
//! | `server.listen` | `127.0.0.1:7420` | address to listen on |
//! | `server.workers` | cgroup CPU limit, else available parallelism | runtime worker threads, also the number of batches scored at once |
//! | `server.max_message_bytes` | 64 MiB | largest request or response message |
//! | `server.max_candidates` | 10,000 | most candidates in one request (one stream chunk) |
//! | `server.request_timeout_ms` | 30,000 | deadline of one unary call |
//! | `server.concurrency_limit` | 256 | calls processed at once; more wait |
//! | `server.shutdown_grace_ms` | 10,000 | how long shutdown waits for in-flight calls |
//! | `server.json_logs` | false | JSON log lines (for containers) |
//! | `server.allow_unauthenticated_remote` | false | with no tokens and no client CA, allow listening on a non-loopback address (anyone who reaches it may call) |
//! | `tls.cert` | none | server certificate chain (PEM); with `tls.key`, the server speaks TLS only |
//! | `tls.key` | none | the server certificate's private key (PEM, PKCS#8, PKCS#1 or SEC1) |
//! | `tls.client_ca` | none | CA certificates (PEM) for client certificates: when set, every client must present one it signed (mutual TLS) and the certificate subject is the caller's identity |
//! | `auth.tokens_file` | none | file of bearer tokens, one `NAME ROLE SHA256-HEX` a line (`#` comments); see `plumbline token new`; re-read when it changes and on SIGHUP |
//! | `auth.tokens` | empty | the same inline: `[[auth.tokens]]` tables with `name`, `role`, `sha256` |
//! | `models.dir` | `bundles` | directory of `*.plumb` bundles |
//! | `models.default` | empty | default model id; empty: the only model, or the first id in sort order |
//! | `models.reload_poll_ms` | 2,000 | how often the directory is checked for changes; 0 = only on SIGHUP |
//! | `policy.outside` | `refuse` | `refuse` or `flag` candidates outside the domain |
//! | `policy.rank_border` | true | whether border candidates are ranked |
//! | `policy.rank_key` | `prediction` | `prediction` or `conservative-bound` |
//! | `policy.default_confidence` | 0 | interval confidence when a request sends 0; 0 = the bundle's |
//! | `audit.path` | `plumbline-audit.db` | SQLite audit database |
//! | `audit.store_descriptors` | `flagged-only` | store descriptor values of `flagged-only` (FLAGGED and REFUSED) or `all` candidates |
//! | `audit.synchronous` | `full` | SQLite `synchronous` in WAL mode, see [`Synchronous`] |
//! | `audit.batch_max` | 64 | most requests committed in one transaction |
//! | `audit.queue_depth` | 1,024 | requests waiting for the audit writer before callers wait |
//! | `audit.checkpoint_interval_ms` | 1,000 | how often a background thread checkpoints the WAL (PASSIVE); commits never do |
//! | `metrics.listen` | empty | address of the Prometheus endpoint (`GET /metrics`, plain HTTP), e.g. `0.0.0.0:9464`; empty = off |
//! | `audit.max_bytes` | 0 | cap on the audit database's size, 0 = none; past it scoring fails with UNAVAILABLE as on a full disk |

use std::collections::HashMap;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::Deserialize;

pub use super::access::Role;
pub use crate::audit::Synchronous;
use crate::scoring::{OutsidePolicy, Policy, RankKey};

/// Errors loading settings; each names the key or the file involved.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    #[error(
        "settings could not be loaded ({origin}): {source}; check the key and value named here \
         (keys are listed in the documentation of `service::settings`)"
    )]
    Load {
        origin: String,
        #[source]
        source: Box<config::ConfigError>,
    },
    #[error("setting `{key}` = {value} is invalid: {why}")]
    Invalid {
        key: &'static str,
        value: String,
        why: String,
    },
    #[error("setting `{key}`: file {path}: {why}")]
    File {
        key: &'static str,
        path: PathBuf,
        why: String,
    },
}

/// All settings of `plumbline serve`.
#[derive(Clone, Debug, Default, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Settings {
    pub server: ServerSettings,
    pub models: ModelSettings,
    pub policy: PolicySettings,
    pub audit: AuditSettings,
    pub metrics: MetricsSettings,
    pub tls: TlsSettings,
    pub auth: AuthSettings,
}

/// TLS for the server; all paths are PEM files read at start-up.
#[derive(Clone, Debug, Default, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct TlsSettings {
    pub cert: Option<PathBuf>,
    pub key: Option<PathBuf>,
    /// When set, clients must present a certificate this CA signed.
    pub client_ca: Option<PathBuf>,
}

impl TlsSettings {
    pub fn enabled(&self) -> bool {
        self.cert.is_some()
    }
}

/// Bearer tokens, kept only as SHA-256 hashes.
#[derive(Clone, Debug, Default, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct AuthSettings {
    pub tokens_file: Option<PathBuf>,
    pub tokens: Vec<TokenSetting>,
}

/// One token as configured: who holds it, what it may do, and the SHA-256
/// (hex) of the token itself.
#[derive(Clone, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TokenSetting {
    pub name: String,
    pub role: Role,
    pub sha256: String,
}

#[derive(Clone, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ServerSettings {
    pub listen: SocketAddr,
    pub workers: usize,
    pub max_message_bytes: usize,
    pub max_candidates: usize,
    pub request_timeout_ms: u64,
    pub concurrency_limit: usize,
    pub shutdown_grace_ms: u64,
    pub json_logs: bool,
    pub allow_unauthenticated_remote: bool,
}

impl Default for ServerSettings {
    fn default() -> Self {
        ServerSettings {
            listen: SocketAddr::from(([127, 0, 0, 1], 7420)),
            workers: default_workers(),
            // A batch of 1,000 candidates × 2,000 descriptors is 16 MB of
            // doubles; 64 MiB leaves room for that with a margin.
            max_message_bytes: 64 * 1024 * 1024,
            max_candidates: 10_000,
            request_timeout_ms: 30_000,
            concurrency_limit: 256,
            shutdown_grace_ms: 10_000,
            json_logs: false,
            allow_unauthenticated_remote: false,
        }
    }
}

#[derive(Clone, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ModelSettings {
    pub dir: PathBuf,
    pub default: String,
    pub reload_poll_ms: u64,
}

impl Default for ModelSettings {
    fn default() -> Self {
        ModelSettings {
            dir: PathBuf::from("bundles"),
            default: String::new(),
            reload_poll_ms: 2_000,
        }
    }
}

#[derive(Clone, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct PolicySettings {
    pub outside: OutsidePolicy,
    pub rank_border: bool,
    pub rank_key: RankKey,
    pub default_confidence: f64,
}

impl Default for PolicySettings {
    fn default() -> Self {
        let p = Policy::default();
        PolicySettings {
            outside: p.outside,
            rank_border: p.rank_border,
            rank_key: p.key,
            default_confidence: 0.0,
        }
    }
}

impl PolicySettings {
    pub fn policy(&self) -> Policy {
        Policy {
            outside: self.outside,
            rank_border: self.rank_border,
            key: self.rank_key,
        }
    }
}

/// Which candidates have their descriptor values stored in the audit store
/// (every candidate has its descriptor hash stored).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum StoreDescriptors {
    /// FLAGGED and REFUSED candidates: the ones a reviewer looks at.
    FlaggedOnly,
    All,
}

#[derive(Clone, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct AuditSettings {
    pub path: PathBuf,
    pub store_descriptors: StoreDescriptors,
    pub synchronous: Synchronous,
    pub batch_max: usize,
    pub queue_depth: usize,
    pub checkpoint_interval_ms: u64,
    pub max_bytes: u64,
}

impl Default for AuditSettings {
    fn default() -> Self {
        AuditSettings {
            path: PathBuf::from("plumbline-audit.db"),
            store_descriptors: StoreDescriptors::FlaggedOnly,
            synchronous: Synchronous::Full,
            batch_max: 64,
            queue_depth: 1024,
            checkpoint_interval_ms: 1_000,
            max_bytes: 0,
        }
    }
}

/// The Prometheus endpoint. A string rather than an address so that empty
/// (the default, also `PLUMBLINE_METRICS__LISTEN=`) can mean off.
#[derive(Clone, Debug, Default, PartialEq, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MetricsSettings {
    pub listen: String,
}

impl MetricsSettings {
    /// The address to serve metrics on; None when the endpoint is off.
    pub fn listen_addr(&self) -> Result<Option<SocketAddr>, Error> {
        let text = self.listen.trim();
        if text.is_empty() {
            return Ok(None);
        }
        text.parse().map(Some).map_err(|e| Error::Invalid {
            key: "metrics.listen",
            value: self.listen.clone(),
            why: format!("{e}; give an IP address and port such as 0.0.0.0:9464, or leave it empty to turn metrics off"),
        })
    }
}

/// The most candidates one request may be allowed: record ids number the
/// candidates with six digits so they sort as text.
pub const MAX_CANDIDATES_CEILING: usize = 999_999;

impl Settings {
    /// Loads settings from an optional TOML file, the `PLUMBLINE_*` entries
    /// of `env`, and `overrides` (dotted key, value; e.g. from command-line
    /// flags), each layer over the one before, then checks them.
    pub fn load(
        file: Option<&Path>,
        env: &HashMap<String, String>,
        overrides: &[(&str, String)],
    ) -> Result<Settings, Error> {
        let mut builder = config::Config::builder();
        let mut origin = String::from("defaults");
        if let Some(path) = file {
            origin = format!("file {}", path.display());
            builder = builder.add_source(
                config::File::from(path.to_path_buf())
                    .format(config::FileFormat::Toml)
                    .required(true),
            );
        }
        let prefixed: config::Map<String, String> = env
            .iter()
            .filter(|(k, _)| k.starts_with("PLUMBLINE_"))
            .map(|(k, v)| (k.clone(), v.clone()))
            .collect();
        if !prefixed.is_empty() {
            let mut names: Vec<&String> = prefixed.keys().collect();
            names.sort();
            let names: Vec<&str> = names.iter().map(|s| s.as_str()).collect();
            origin = format!("{origin}, environment {}", names.join(", "));
        }
        builder = builder.add_source(
            config::Environment::with_prefix("PLUMBLINE")
                .prefix_separator("_")
                .separator("__")
                .try_parsing(true)
                .source(Some(prefixed)),
        );
        for (key, value) in overrides {
            builder = builder
                .set_override(*key, value.clone())
                .map_err(|source| Error::Load {
                    origin: format!("override {key}"),
                    source: Box::new(source),
                })?;
        }
        if !overrides.is_empty() {
            let keys: Vec<&str> = overrides.iter().map(|(k, _)| *k).collect();
            origin = format!("{origin}, overrides {}", keys.join(", "));
        }
        let settings: Settings =
            builder
                .build()
                .and_then(|c| c.try_deserialize())
                .map_err(|source| Error::Load {
                    origin: origin.clone(),
                    source: Box::new(source),
                })?;
        settings.check()?;
        Ok(settings)
    }

    /// Loads with the process environment.
    pub fn load_from_process_env(
        file: Option<&Path>,
        overrides: &[(&str, String)],
    ) -> Result<Settings, Error> {
        let env: HashMap<String, String> = std::env::vars().collect();
        Settings::load(file, &env, overrides)
    }

    /// Range checks serde cannot express.
    pub fn check(&self) -> Result<(), Error> {
        let s = &self.server;
        positive("server.workers", s.workers)?;
        positive("server.concurrency_limit", s.concurrency_limit)?;
        positive("server.request_timeout_ms", s.request_timeout_ms as usize)?;
        if s.max_message_bytes < 64 * 1024 || s.max_message_bytes > u32::MAX as usize {
            return Err(Error::Invalid {
                key: "server.max_message_bytes",
                value: s.max_message_bytes.to_string(),
                why: format!("must be between 65536 and {} bytes", u32::MAX),
            });
        }
        if s.max_candidates == 0 || s.max_candidates > MAX_CANDIDATES_CEILING {
            return Err(Error::Invalid {
                key: "server.max_candidates",
                value: s.max_candidates.to_string(),
                why: format!("must be between 1 and {MAX_CANDIDATES_CEILING}"),
            });
        }
        let c = self.policy.default_confidence;
        if !(c == 0.0 || (0.5..=0.99).contains(&c)) {
            return Err(Error::Invalid {
                key: "policy.default_confidence",
                value: c.to_string(),
                why: "must be 0 (the bundle's default) or in [0.5, 0.99]".into(),
            });
        }
        positive("audit.batch_max", self.audit.batch_max)?;
        positive("audit.queue_depth", self.audit.queue_depth)?;
        positive(
            "audit.checkpoint_interval_ms",
            self.audit.checkpoint_interval_ms as usize,
        )?;
        self.metrics.listen_addr()?;
        self.check_access()
    }

    /// The TLS paths come in the right combinations, and an open server is
    /// reachable only from this host unless that is asked for.
    fn check_access(&self) -> Result<(), Error> {
        let t = &self.tls;
        let shown = |p: &Option<PathBuf>| {
            p.as_ref()
                .map(|p| p.display().to_string())
                .unwrap_or_default()
        };
        if t.cert.is_some() != t.key.is_some() {
            return Err(Error::Invalid {
                key: if t.cert.is_some() {
                    "tls.key"
                } else {
                    "tls.cert"
                },
                value: String::from("(not set)"),
                why: "`tls.cert` and `tls.key` are set together or not at all".into(),
            });
        }
        if t.client_ca.is_some() && t.cert.is_none() {
            return Err(Error::Invalid {
                key: "tls.client_ca",
                value: shown(&t.client_ca),
                why: "client certificates need TLS: set `tls.cert` and `tls.key` too".into(),
            });
        }
        for (i, token) in self.auth.tokens.iter().enumerate() {
            super::access::check_token_setting(token).map_err(|why| Error::Invalid {
                key: "auth.tokens",
                value: format!("entry {} ('{}')", i + 1, token.name),
                why,
            })?;
        }
        super::access::check_exposure(
            self.server.listen,
            self.auth_configured(),
            self.server.allow_unauthenticated_remote,
        )
    }

    /// Whether callers must prove who they are (tokens or client
    /// certificates); TLS alone encrypts but lets anyone in.
    pub fn auth_configured(&self) -> bool {
        self.tls.client_ca.is_some()
            || self.auth.tokens_file.is_some()
            || !self.auth.tokens.is_empty()
    }
}

fn positive(key: &'static str, value: usize) -> Result<(), Error> {
    if value == 0 {
        return Err(Error::Invalid {
            key,
            value: "0".into(),
            why: "must be at least 1".into(),
        });
    }
    Ok(())
}

/// Worker threads: the container's CPU limit when there is one, since tokio
/// would otherwise size its pool from the host's CPUs and oversubscribe a
/// limited container; else the parallelism the OS offers.
pub fn default_workers() -> usize {
    let from_cgroup = std::fs::read_to_string("/sys/fs/cgroup/cpu.max")
        .ok()
        .and_then(|text| cpu_limit_from_cgroup(&text));
    from_cgroup
        .or_else(|| std::thread::available_parallelism().ok().map(|n| n.get()))
        .unwrap_or(1)
}

/// Whole CPUs allowed by a cgroup v2 `cpu.max` file ("$MAX $PERIOD", `max`
/// meaning no limit; Linux `Documentation/admin-guide/cgroup-v2.rst`),
/// rounded up so a 1.5-CPU limit gets 2 workers.
pub fn cpu_limit_from_cgroup(text: &str) -> Option<usize> {
    let mut fields = text.split_whitespace();
    let quota = fields.next()?;
    let period: u64 = fields.next()?.parse().ok()?;
    if quota == "max" || period == 0 {
        return None;
    }
    let quota: u64 = quota.parse().ok()?;
    Some(quota.div_ceil(period).max(1) as usize)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Write;

    fn env(pairs: &[(&str, &str)]) -> HashMap<String, String> {
        pairs
            .iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect()
    }

    #[test]
    fn defaults_load_with_nothing_set() {
        let s = Settings::load(None, &HashMap::new(), &[]).unwrap();
        assert_eq!(s.server.listen.to_string(), "127.0.0.1:7420");
        assert_eq!(s.server.max_message_bytes, 64 << 20);
        assert_eq!(s.server.max_candidates, 10_000);
        assert_eq!(s.policy.policy(), Policy::default());
        assert_eq!(s.audit.synchronous, Synchronous::Full);
        assert!(s.server.workers >= 1);
    }

    #[test]
    fn file_then_env_then_overrides_layer_in_order() {
        let mut f = tempfile::NamedTempFile::new().unwrap();
        writeln!(
            f,
            "[server]\nlisten = \"127.0.0.1:9000\"\nmax_candidates = 50\n\
             [policy]\noutside = \"flag\"\nrank_key = \"conservative-bound\"\n\
             [audit]\nstore_descriptors = \"all\"\nsynchronous = \"normal\""
        )
        .unwrap();
        let e = env(&[
            ("PLUMBLINE_SERVER__MAX_CANDIDATES", "70"),
            ("PLUMBLINE_POLICY__RANK_BORDER", "false"),
            ("PLUMBLINE_MODELS__DIR", "/srv/bundles"),
            ("HOME", "/root"),
        ]);
        let s = Settings::load(
            Some(f.path()),
            &e,
            &[("server.listen", "127.0.0.1:9100".into())],
        )
        .unwrap();
        assert_eq!(s.server.listen.to_string(), "127.0.0.1:9100");
        assert_eq!(s.server.max_candidates, 70);
        assert_eq!(s.policy.outside, OutsidePolicy::Flag);
        assert_eq!(s.policy.rank_key, RankKey::ConservativeBound);
        assert!(!s.policy.rank_border);
        assert_eq!(s.models.dir, PathBuf::from("/srv/bundles"));
        assert_eq!(s.audit.store_descriptors, StoreDescriptors::All);
        assert_eq!(s.audit.synchronous, Synchronous::Normal);
    }

    #[test]
    fn unknown_key_is_rejected_by_name() {
        let e = env(&[("PLUMBLINE_SERVER__LISTN", "127.0.0.1:1")]);
        let err = Settings::load(None, &e, &[]).unwrap_err().to_string();
        assert!(err.contains("listn"), "{err}");
    }

    #[test]
    fn unknown_key_in_file_is_rejected_by_name() {
        let mut f = tempfile::NamedTempFile::new().unwrap();
        writeln!(f, "[audit]\npath = \"a.db\"\nsynchronus = \"full\"").unwrap();
        let err = Settings::load(Some(f.path()), &HashMap::new(), &[])
            .unwrap_err()
            .to_string();
        assert!(err.contains("synchronus"), "{err}");
    }

    #[test]
    fn bad_values_name_their_key() {
        let cases = [
            (
                "PLUMBLINE_SERVER__LISTEN",
                "not-an-address",
                "server.listen",
            ),
            ("PLUMBLINE_SERVER__MAX_CANDIDATES", "lots", "max_candidates"),
            ("PLUMBLINE_POLICY__OUTSIDE", "ignore", "outside"),
            (
                "PLUMBLINE_POLICY__DEFAULT_CONFIDENCE",
                "0.3",
                "policy.default_confidence",
            ),
            (
                "PLUMBLINE_SERVER__MAX_CANDIDATES",
                "0",
                "server.max_candidates",
            ),
            ("PLUMBLINE_AUDIT__BATCH_MAX", "0", "audit.batch_max"),
            (
                "PLUMBLINE_SERVER__MAX_MESSAGE_BYTES",
                "100",
                "server.max_message_bytes",
            ),
            ("PLUMBLINE_METRICS__LISTEN", "localhost", "metrics.listen"),
            (
                "PLUMBLINE_METRICS__LISTEN",
                "0.0.0.0:99999",
                "metrics.listen",
            ),
        ];
        for (var, value, key) in cases {
            let err = Settings::load(None, &env(&[(var, value)]), &[])
                .unwrap_err()
                .to_string();
            assert!(err.contains(key), "{var}={value}: {err}");
        }
    }

    #[test]
    fn metrics_are_off_unless_an_address_is_set() {
        let s = Settings::load(None, &HashMap::new(), &[]).unwrap();
        assert_eq!(s.metrics.listen_addr().unwrap(), None);
        let e = env(&[("PLUMBLINE_METRICS__LISTEN", "")]);
        let s = Settings::load(None, &e, &[]).unwrap();
        assert_eq!(s.metrics.listen_addr().unwrap(), None);
        let mut f = tempfile::NamedTempFile::new().unwrap();
        writeln!(f, "[metrics]\nlisten = \"0.0.0.0:9464\"").unwrap();
        let s = Settings::load(Some(f.path()), &HashMap::new(), &[]).unwrap();
        assert_eq!(
            s.metrics.listen_addr().unwrap(),
            Some(SocketAddr::from(([0, 0, 0, 0], 9464)))
        );
        let s = Settings::load(
            Some(f.path()),
            &HashMap::new(),
            &[("metrics.listen", "127.0.0.1:9100".into())],
        )
        .unwrap();
        assert_eq!(s.metrics.listen_addr().unwrap().unwrap().port(), 9100);
        let e = env(&[("PLUMBLINE_METRICS__PATH", "/m")]);
        let err = Settings::load(None, &e, &[]).unwrap_err().to_string();
        assert!(err.contains("path"), "{err}");
    }

    #[test]
    fn missing_settings_file_is_an_error_naming_it() {
        let err = Settings::load(
            Some(Path::new("/nonexistent/plumbline.toml")),
            &HashMap::new(),
            &[],
        )
        .unwrap_err()
        .to_string();
        assert!(err.contains("/nonexistent/plumbline.toml"), "{err}");
    }

    #[test]
    fn cgroup_cpu_max_is_rounded_up_to_whole_cpus() {
        // Format from Linux Documentation/admin-guide/cgroup-v2.rst,
        // "cpu.max: $MAX $PERIOD".
        assert_eq!(cpu_limit_from_cgroup("max 100000\n"), None);
        assert_eq!(cpu_limit_from_cgroup("200000 100000\n"), Some(2));
        assert_eq!(cpu_limit_from_cgroup("150000 100000"), Some(2));
        assert_eq!(cpu_limit_from_cgroup("50000 100000"), Some(1));
        assert_eq!(cpu_limit_from_cgroup("garbage"), None);
        assert_eq!(cpu_limit_from_cgroup(""), None);
    }
}
