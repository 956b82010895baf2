//! Who may call what: bearer tokens with roles, client certificates, and the
//! rule that an open server listens only on loopback.
//!
//! Tokens are configured only as SHA-256 hashes, so the settings file and
//! the tokens file give nothing away if read. A call presents
//! `authorization: Bearer <token>`; the gate hashes it and compares with
//! every stored hash in constant time. Each gRPC service is wrapped in a
//! [`Gate`] that names the role it needs (health and reflection are not
//! wrapped: load balancers and tools must reach them). The caller's identity
//! (token name and/or client-certificate subject) is put in the request's
//! extensions as [`CallerIdentity`] for the audit record.
//!
//! | role | may call |
//! | --- | --- |
//! | `score` | Scoring (Score, ScoreStream, DescribeModel, ListModels) |
//! | `review` | Review and Outcomes |
//! | `admin` | everything (there is no admin-only RPC yet; reload is SIGHUP) |
//!
//! With mutual TLS and no tokens, every certificate the client CA signed
//! grants every role: the CA is then the whole gate. Configure tokens too
//! to separate roles.
//!
//! Tokens rotate without a restart: [`AccessControl`] re-reads
//! `auth.tokens_file` when it changes (checked with the bundle directory,
//! every `models.reload_poll_ms`) and on SIGHUP, and swaps the whole table
//! at once. A file that no longer parses, or that would leave a server with
//! tokens configured with none, is refused and the tokens in force stay.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, PoisonError, RwLock};
use std::time::SystemTime;

use rand::RngCore;
use serde::Deserialize;
use sha2::{Digest, Sha256};
use tonic::service::Interceptor;
use tonic::{Request, Status};

use super::settings::{self, Settings, TokenSetting};

/// What a token allows.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Role {
    Score,
    Review,
    Admin,
}

impl Role {
    pub fn name(self) -> &'static str {
        match self {
            Role::Score => "score",
            Role::Review => "review",
            Role::Admin => "admin",
        }
    }

    pub fn parse(s: &str) -> Option<Role> {
        match s {
            "score" => Some(Role::Score),
            "review" => Some(Role::Review),
            "admin" => Some(Role::Admin),
            _ => None,
        }
    }

    /// Whether a holder of `self` may do what needs `needed`.
    pub fn grants(self, needed: Role) -> bool {
        self == Role::Admin || self == needed
    }
}

/// The authenticated caller, as written in the audit record:
/// `token:NAME`, `cert:SUBJECT`, or both joined by `; `.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct CallerIdentity(pub String);

/// The identity the gate attached to a request, if any.
pub fn identity_of<T>(req: &Request<T>) -> Option<String> {
    req.extensions()
        .get::<CallerIdentity>()
        .map(|c| c.0.clone())
}

/// Who made a call: the peer address and the identity the gate attached.
pub fn caller_of<T>(req: &Request<T>) -> crate::audit::Caller {
    crate::audit::Caller {
        peer: req.remote_addr().map(|a| a.to_string()),
        identity: identity_of(req),
    }
}

/// Why a call was not admitted; becomes UNAUTHENTICATED or
/// PERMISSION_DENIED.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Refusal {
    /// No credentials, or ones the server does not know.
    Unauthenticated(String),
    /// Known caller, role too small.
    PermissionDenied(String),
}

impl From<Refusal> for Status {
    fn from(r: Refusal) -> Status {
        match r {
            Refusal::Unauthenticated(m) => Status::unauthenticated(m),
            Refusal::PermissionDenied(m) => Status::permission_denied(m),
        }
    }
}

fn unauthenticated(message: &str) -> Refusal {
    Refusal::Unauthenticated(message.to_string())
}

/// A configured token: its holder, role and the SHA-256 of the token.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct StoredToken {
    pub name: String,
    pub role: Role,
    pub digest: [u8; 32],
}

/// The access rules of a running server.
#[derive(Clone, Debug, Default)]
pub struct Access {
    pub tokens: Vec<StoredToken>,
    /// Clients were verified against `tls.client_ca` during the handshake.
    pub client_certs: bool,
}

impl Access {
    /// The tokens of `auth.tokens` and `auth.tokens_file`, and whether
    /// client certificates are required.
    pub fn from_settings(s: &Settings) -> Result<Access, settings::Error> {
        Access::load(
            &s.auth.tokens,
            s.auth.tokens_file.as_deref(),
            s.tls.client_ca.is_some(),
        )
    }

    fn load(
        inline: &[TokenSetting],
        file: Option<&Path>,
        client_certs: bool,
    ) -> Result<Access, settings::Error> {
        let mut tokens = Vec::new();
        for t in inline {
            tokens.push(StoredToken {
                name: t.name.clone(),
                role: t.role,
                digest: parse_digest(&t.sha256).ok_or_else(|| settings::Error::Invalid {
                    key: "auth.tokens",
                    value: t.name.clone(),
                    why: "sha256 must be 64 hex digits".into(),
                })?,
            });
        }
        if let Some(path) = file {
            let text = std::fs::read_to_string(path).map_err(|e| settings::Error::File {
                key: "auth.tokens_file",
                path: path.to_path_buf(),
                why: format!("cannot be read: {e}"),
            })?;
            tokens.extend(parse_tokens_file(&text, path)?);
        }
        for (i, t) in tokens.iter().enumerate() {
            if let Some(other) = tokens[..i].iter().find(|o| o.name == t.name) {
                return Err(settings::Error::Invalid {
                    key: "auth.tokens",
                    value: other.name.clone(),
                    why: "two tokens have this name; the audit record would not tell them apart"
                        .into(),
                });
            }
            if tokens[..i].iter().any(|o| o.digest == t.digest) {
                return Err(settings::Error::Invalid {
                    key: "auth.tokens",
                    value: t.name.clone(),
                    why: "this hash is configured twice; make a fresh token with `plumbline \
                          token new`"
                        .into(),
                });
            }
        }
        Ok(Access {
            tokens,
            client_certs,
        })
    }

    /// No tokens and no client certificates: anyone who reaches the port
    /// may call.
    pub fn is_open(&self) -> bool {
        self.tokens.is_empty() && !self.client_certs
    }

    /// Decides one call: the identity to record, or the status to answer.
    pub fn admit(
        &self,
        needs: Role,
        authorization: Option<&[u8]>,
        peer_cert: Option<&[u8]>,
    ) -> Result<Option<CallerIdentity>, Refusal> {
        let subject = match (self.client_certs, peer_cert) {
            (false, _) => None,
            (true, Some(der)) => Some(super::tls::subject_of(der).ok_or_else(|| {
                unauthenticated("the client certificate's subject could not be read")
            })?),
            // rustls refuses such clients in the handshake; kept for safety.
            (true, None) => {
                return Err(unauthenticated(
                    "a client certificate signed by the configured client CA is required",
                ));
            }
        };
        let cert = subject.map(|s| format!("cert:{s}"));
        if self.tokens.is_empty() {
            return Ok(cert.map(CallerIdentity));
        }
        let token = bearer(authorization)?;
        let found = self.find(token).ok_or_else(|| {
            unauthenticated(
                "the bearer token is not one this server knows; ask the operator for a valid \
                 token (tokens may have been rotated)",
            )
        })?;
        if !found.role.grants(needs) {
            return Err(Refusal::PermissionDenied(format!(
                "token '{}' has role '{}'; this call needs role '{}' (or 'admin')",
                found.name,
                found.role.name(),
                needs.name()
            )));
        }
        let mut identity = format!("token:{}", found.name);
        if let Some(c) = cert {
            identity.push_str("; ");
            identity.push_str(&c);
        }
        Ok(Some(CallerIdentity(identity)))
    }

    /// The stored token whose hash matches, looking at every entry so the
    /// time taken does not depend on which one (if any) matched.
    fn find(&self, token: &[u8]) -> Option<&StoredToken> {
        let digest: [u8; 32] = Sha256::digest(token).into();
        let mut found = None;
        for t in &self.tokens {
            if digests_equal(&digest, &t.digest) {
                found = Some(t);
            }
        }
        found
    }
}

/// The token of an `authorization: Bearer <token>` header.
fn bearer(authorization: Option<&[u8]>) -> Result<&[u8], Refusal> {
    let value = authorization.ok_or_else(|| {
        unauthenticated(
            "no bearer token: send `authorization: Bearer <token>` (plumbline clients: --token \
             or PLUMBLINE_TOKEN)",
        )
    })?;
    let token = value
        .strip_prefix(b"Bearer ")
        .or_else(|| value.strip_prefix(b"bearer "))
        .ok_or_else(|| unauthenticated("the authorization header must be `Bearer <token>`"))?;
    let token = token.trim_ascii();
    if token.is_empty() {
        return Err(unauthenticated("the bearer token is empty"));
    }
    Ok(token)
}

/// Compares two digests in time independent of where they differ: OR-ing
/// the XOR of every byte pair never exits early, and `black_box` keeps the
/// optimiser from turning the loop back into an early-exit compare. (The
/// digests are of the tokens, so even a leak would reveal hash bytes, not
/// token bytes; the constant time is defence in depth.)
fn digests_equal(a: &[u8; 32], b: &[u8; 32]) -> bool {
    let mut diff = 0u8;
    for (x, y) in a.iter().zip(b) {
        diff |= std::hint::black_box(x ^ y);
    }
    std::hint::black_box(diff) == 0
}

/// What identifies a version of the tokens file without reading it.
#[derive(Clone, Debug, PartialEq, Eq)]
struct FileStamp {
    len: u64,
    modified: Option<SystemTime>,
    inode: u64,
}

fn stamp(path: &Path) -> Option<FileStamp> {
    use std::os::unix::fs::MetadataExt;
    // `metadata` follows symlinks, so a Kubernetes Secret volume (a
    // symlink swapped to a new directory on update) shows as a new inode.
    let m = std::fs::metadata(path).ok()?;
    Some(FileStamp {
        len: m.len(),
        modified: m.modified().ok(),
        inode: m.ino(),
    })
}

/// What a reload of the tokens did.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum TokensReload {
    /// No tokens file, or it has not changed.
    Unchanged,
    /// The new table is in force.
    Swapped { tokens: usize },
}

/// The access rules in force, replaceable while the server runs.
pub struct AccessControl {
    current: RwLock<Arc<Access>>,
    inline: Vec<TokenSetting>,
    file: Option<PathBuf>,
    seen: Mutex<Option<FileStamp>>,
}

impl AccessControl {
    pub fn from_settings(s: &Settings) -> Result<AccessControl, settings::Error> {
        let file = s.auth.tokens_file.clone();
        let seen = file.as_deref().and_then(stamp);
        Ok(AccessControl {
            current: RwLock::new(Arc::new(Access::from_settings(s)?)),
            inline: s.auth.tokens.clone(),
            file,
            seen: Mutex::new(seen),
        })
    }

    /// The rules for the next call.
    pub fn current(&self) -> Arc<Access> {
        self.current
            .read()
            .unwrap_or_else(PoisonError::into_inner)
            .clone()
    }

    /// Re-reads the tokens file when it changed (always when `force`) and
    /// swaps the table in; on an error the tokens in force stay.
    pub fn reload(&self, force: bool) -> Result<TokensReload, settings::Error> {
        let Some(path) = &self.file else {
            return Ok(TokensReload::Unchanged);
        };
        let mut seen = self.seen.lock().unwrap_or_else(PoisonError::into_inner);
        let now = stamp(path);
        if !force && now == *seen {
            return Ok(TokensReload::Unchanged);
        }
        // Remember the failed version too, so a broken file is reported
        // once rather than at every poll.
        *seen = now;
        let old = self.current();
        let new = Access::load(&self.inline, Some(path), old.client_certs)?;
        if new.tokens.is_empty() && !old.tokens.is_empty() {
            return Err(settings::Error::File {
                key: "auth.tokens_file",
                path: path.clone(),
                why: "now holds no tokens; the server would stop checking callers, so the \
                      tokens in force stay (restart without tokens to open it on purpose)"
                    .into(),
            });
        }
        let tokens = new.tokens.len();
        *self.current.write().unwrap_or_else(PoisonError::into_inner) = Arc::new(new);
        Ok(TokensReload::Swapped { tokens })
    }

    /// [`AccessControl::reload`] with the outcome logged.
    pub fn reload_logged(&self, force: bool) {
        match self.reload(force) {
            Ok(TokensReload::Swapped { tokens }) => {
                tracing::info!(tokens, "tokens file reloaded; the new tokens are in force")
            }
            Ok(TokensReload::Unchanged) => {}
            Err(e) => {
                tracing::error!(error = %e, "tokens file not reloaded; the tokens in force stay")
            }
        }
    }
}

/// A tonic interceptor admitting calls that hold `needs`.
#[derive(Clone)]
pub struct Gate {
    control: Arc<AccessControl>,
    needs: Role,
}

impl Gate {
    pub fn new(control: Arc<AccessControl>, needs: Role) -> Gate {
        Gate { control, needs }
    }
}

impl Interceptor for Gate {
    fn call(&mut self, mut req: Request<()>) -> Result<Request<()>, Status> {
        let access = self.control.current();
        if access.is_open() {
            return Ok(req);
        }
        let certs = req.peer_certs();
        let first: Option<&[u8]> = certs.as_ref().and_then(|c| c.first()).map(|c| &c[..]);
        let authorization = req.metadata().get("authorization").map(|v| v.as_bytes());
        let admitted = access.admit(self.needs, authorization, first);
        if let Some(identity) = admitted.map_err(Status::from)? {
            req.extensions_mut().insert(identity);
        }
        Ok(req)
    }
}

/// Checks one inline token entry; the reason when it is bad.
pub fn check_token_setting(t: &TokenSetting) -> Result<(), String> {
    check_name(&t.name)?;
    if parse_digest(&t.sha256).is_none() {
        return Err("sha256 must be 64 hex digits (see `plumbline token new`)".into());
    }
    Ok(())
}

fn check_name(name: &str) -> Result<(), String> {
    if name.is_empty() || name.chars().any(|c| c.is_whitespace() || c.is_control()) {
        return Err(format!(
            "token name '{name}' must be non-empty with no spaces or control characters"
        ));
    }
    Ok(())
}

/// Parses a tokens file: one `NAME ROLE SHA256-HEX` a line; blank lines and
/// lines starting with `#` are skipped.
pub fn parse_tokens_file(text: &str, path: &Path) -> Result<Vec<StoredToken>, settings::Error> {
    let mut out = Vec::new();
    for (i, line) in text.lines().enumerate() {
        let line = line.trim();
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        let bad = |why: String| settings::Error::File {
            key: "auth.tokens_file",
            path: path.to_path_buf(),
            why: format!("line {}: {why}", i + 1),
        };
        let fields: Vec<&str> = line.split_whitespace().collect();
        let &[name, role, hash] = &fields[..] else {
            return Err(bad(format!(
                "expected `NAME ROLE SHA256-HEX`, found {} fields",
                fields.len()
            )));
        };
        check_name(name).map_err(bad)?;
        let role = Role::parse(role)
            .ok_or_else(|| bad(format!("role '{role}' is not one of score, review, admin")))?;
        let digest = parse_digest(hash)
            .ok_or_else(|| bad("the hash must be 64 hex digits (SHA-256)".into()))?;
        out.push(StoredToken {
            name: name.to_string(),
            role,
            digest,
        });
    }
    Ok(out)
}

fn parse_digest(hex: &str) -> Option<[u8; 32]> {
    let bytes = hex.as_bytes();
    if bytes.len() != 64 {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, pair) in bytes.chunks_exact(2).enumerate() {
        let text = std::str::from_utf8(pair).ok()?;
        out[i] = u8::from_str_radix(text, 16).ok()?;
    }
    Some(out)
}

/// The SHA-256 (lower-case hex) of a token, as configured.
pub fn token_sha256(token: &str) -> String {
    Sha256::digest(token.as_bytes())
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

/// A fresh token: 32 bytes from the operating system's generator, in hex
/// behind a `plb_` prefix that makes leaked tokens easy to search for.
pub fn new_token() -> String {
    let mut bytes = [0u8; 32];
    rand::rngs::OsRng.fill_bytes(&mut bytes);
    let hex: String = bytes.iter().map(|b| format!("{b:02x}")).collect();
    format!("plb_{hex}")
}

/// Whether a server with these rules may listen on `addr`; an open server
/// listens on loopback only unless `server.allow_unauthenticated_remote`.
pub fn check_exposure(
    addr: SocketAddr,
    auth_configured: bool,
    allow_open_remote: bool,
) -> Result<(), settings::Error> {
    if auth_configured || allow_open_remote || addr.ip().is_loopback() {
        return Ok(());
    }
    Err(settings::Error::Invalid {
        key: "server.listen",
        value: addr.to_string(),
        why: "no authentication is configured, so anyone who can reach this address could \
              score and read the audit store; configure tokens (`auth.tokens_file`, see \
              `plumbline token new`) or client certificates (`tls.client_ca`), listen on a \
              loopback address such as 127.0.0.1, or set \
              `server.allow_unauthenticated_remote = true` if the network itself is trusted"
            .into(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn access(tokens: &[(&str, Role, &str)]) -> Access {
        Access {
            tokens: tokens
                .iter()
                .map(|(name, role, token)| StoredToken {
                    name: name.to_string(),
                    role: *role,
                    digest: parse_digest(&token_sha256(token)).unwrap(),
                })
                .collect(),
            client_certs: false,
        }
    }

    /// Reference: the SHA-256 of "abc" from FIPS 180-2, Appendix B.1.
    #[test]
    fn token_hash_is_sha256_of_the_token_text() {
        assert_eq!(
            token_sha256("abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn digest_compare_finds_any_difference() {
        let a = [7u8; 32];
        for i in 0..32 {
            let mut b = a;
            b[i] ^= 1;
            assert!(!digests_equal(&a, &b), "byte {i}");
        }
        assert!(digests_equal(&a, &a));
    }

    #[test]
    fn roles_admin_implies_the_others_and_the_others_are_separate() {
        assert!(Role::Admin.grants(Role::Score));
        assert!(Role::Admin.grants(Role::Review));
        assert!(!Role::Score.grants(Role::Review));
        assert!(!Role::Review.grants(Role::Score));
        assert!(!Role::Score.grants(Role::Admin));
    }

    #[test]
    fn admit_answers_each_case_with_its_code() {
        let a = access(&[
            ("robot", Role::Score, "s3cret"),
            ("boss", Role::Admin, "b0ss"),
        ]);
        let code = |auth: Option<&str>, needs| {
            a.admit(needs, auth.map(str::as_bytes), None)
                .map_err(|r| Status::from(r).code())
        };
        assert_eq!(code(None, Role::Score), Err(tonic::Code::Unauthenticated));
        assert_eq!(
            code(Some("Bearer nope"), Role::Score),
            Err(tonic::Code::Unauthenticated)
        );
        assert_eq!(
            code(Some("Basic s3cret"), Role::Score),
            Err(tonic::Code::Unauthenticated)
        );
        assert_eq!(
            code(Some("Bearer s3cret"), Role::Review),
            Err(tonic::Code::PermissionDenied)
        );
        assert_eq!(
            code(Some("Bearer s3cret"), Role::Score),
            Ok(Some(CallerIdentity("token:robot".into())))
        );
        assert_eq!(
            code(Some("Bearer b0ss"), Role::Review),
            Ok(Some(CallerIdentity("token:boss".into())))
        );
        let denied = a
            .admit(Role::Review, Some(b"Bearer s3cret"), None)
            .unwrap_err();
        assert!(
            matches!(&denied, Refusal::PermissionDenied(m) if m.contains("needs role 'review'")),
            "{denied:?}"
        );
    }

    #[test]
    fn tokens_file_lines_parse_and_errors_name_the_line() {
        let hash = token_sha256("t");
        let text = format!("# lab robots\n\nrobot-1 score {hash}\n");
        let got = parse_tokens_file(&text, Path::new("tokens.txt")).unwrap();
        assert_eq!(got.len(), 1);
        assert_eq!(got[0].name, "robot-1");
        assert_eq!(got[0].role, Role::Score);
        let bad = format!("robot-1 score {hash}\nanalyst superuser {hash}\n");
        let err = parse_tokens_file(&bad, Path::new("tokens.txt"))
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("tokens.txt") && err.contains("line 2"),
            "{err}"
        );
        assert!(err.contains("superuser"), "{err}");
        let short = parse_tokens_file("a score abc\n", Path::new("t"))
            .unwrap_err()
            .to_string();
        assert!(short.contains("64 hex"), "{short}");
    }

    #[test]
    fn fresh_tokens_differ_and_hash_to_64_hex_digits() {
        let (a, b) = (new_token(), new_token());
        assert_ne!(a, b);
        assert!(a.starts_with("plb_") && a.len() == 68);
        assert!(parse_digest(&token_sha256(&a)).is_some());
    }

    #[test]
    fn open_server_off_loopback_is_refused_with_what_to_do() {
        let remote: SocketAddr = "0.0.0.0:7420".parse().unwrap();
        let err = check_exposure(remote, false, false)
            .unwrap_err()
            .to_string();
        assert!(err.contains("server.allow_unauthenticated_remote"), "{err}");
        assert!(check_exposure(remote, true, false).is_ok());
        assert!(check_exposure(remote, false, true).is_ok());
        assert!(check_exposure("[::1]:7420".parse().unwrap(), false, false).is_ok());
        assert!(check_exposure("127.0.0.1:7420".parse().unwrap(), false, false).is_ok());
    }
}
