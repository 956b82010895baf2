//! Access control end to end: TLS with a throwaway CA made at test time,
//! mutual TLS with the certificate subject as the recorded identity, bearer
//! tokens with roles per service, the crate's clients with `--token` and
//! `--ca-cert`, and the refusal to serve an open server off loopback.

use std::path::{Path, PathBuf};
use std::time::Duration;

use plumbline::pb;
use plumbline::pb::review_client::ReviewClient;
use plumbline::pb::scoring_client::ScoringClient;
use plumbline::service::access::token_sha256;
use plumbline::service::client::{AuthedChannel, Connect, connect};
use plumbline::service::{self, Settings};
use rcgen::{
    BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair,
    KeyUsagePurpose,
};
use tonic::Code;
use tonic_health::pb::HealthCheckRequest;
use tonic_health::pb::health_client::HealthClient;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;

// As OpenSSL renders it (checked in `client_subject_matches_openssl_rfc2253_rendering`).
const CLIENT_SUBJECT: &str = "O=Screening Unit,CN=lab-robot";

/// A CA, a server certificate for localhost and 127.0.0.1, a client
/// certificate, and a second CA that signed nothing we use; PEM files in
/// `dir`.
struct Pki {
    dir: tempfile::TempDir,
}

impl Pki {
    fn new() -> Pki {
        let dir = tempfile::tempdir().expect("temporary directory");
        let (ca_pem, ca) = new_ca("plumbline test CA");
        write(dir.path(), "ca.pem", &ca_pem);
        let (other_pem, _) = new_ca("some other CA");
        write(dir.path(), "other-ca.pem", &other_pem);

        let mut server = CertificateParams::new(vec!["localhost".into(), "127.0.0.1".into()])
            .expect("server names");
        server
            .distinguished_name
            .push(DnType::CommonName, "localhost");
        server
            .extended_key_usages
            .push(ExtendedKeyUsagePurpose::ServerAuth);
        let key = KeyPair::generate().expect("server key");
        let cert = server.signed_by(&key, &ca).expect("sign server");
        write(dir.path(), "server.pem", &cert.pem());
        write(dir.path(), "server.key", &key.serialize_pem());

        let mut client = CertificateParams::new(Vec::<String>::new()).expect("client params");
        client
            .distinguished_name
            .push(DnType::OrganizationName, "Screening Unit");
        client
            .distinguished_name
            .push(DnType::CommonName, "lab-robot");
        client
            .extended_key_usages
            .push(ExtendedKeyUsagePurpose::ClientAuth);
        let key = KeyPair::generate().expect("client key");
        let cert = client.signed_by(&key, &ca).expect("sign client");
        write(dir.path(), "client.pem", &cert.pem());
        write(dir.path(), "client.key", &key.serialize_pem());
        Pki { dir }
    }

    fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    fn server_tls(&self, s: &mut Settings, mutual: bool) {
        s.tls.cert = Some(self.path("server.pem"));
        s.tls.key = Some(self.path("server.key"));
        if mutual {
            s.tls.client_ca = Some(self.path("ca.pem"));
        }
    }

    fn trusting(&self) -> Connect {
        Connect {
            ca_cert: Some(self.path("ca.pem")),
            server_name: Some("localhost".into()),
            ..Connect::default()
        }
    }

    fn with_client_cert(&self) -> Connect {
        Connect {
            client_cert: Some(self.path("client.pem")),
            client_key: Some(self.path("client.key")),
            ..self.trusting()
        }
    }
}

fn new_ca(name: &str) -> (String, Issuer<'static, KeyPair>) {
    let mut params = CertificateParams::new(Vec::<String>::new()).expect("CA params");
    params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    params.distinguished_name.push(DnType::CommonName, name);
    params.key_usages.push(KeyUsagePurpose::KeyCertSign);
    params.key_usages.push(KeyUsagePurpose::DigitalSignature);
    let key = KeyPair::generate().expect("CA key");
    let cert = params.self_signed(&key).expect("self-sign CA");
    (cert.pem(), Issuer::new(params, key))
}

fn write(dir: &Path, name: &str, text: &str) {
    std::fs::write(dir.join(name), text).expect("write PEM");
}

async fn start(tweak: impl FnOnce(&mut Settings)) -> TestServer {
    TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "alpha.plumb", &ModelSpec::new("alpha", 7));
        },
        tweak,
    )
    .await
}

/// Connects, retrying while the server is still loading its bundles; the
/// last error when it never accepts.
async fn channel(endpoint: &str, how: &Connect) -> Result<AuthedChannel, String> {
    let mut last = String::new();
    for _ in 0..50 {
        match connect(endpoint, how).await {
            Ok(c) => return Ok(c),
            Err(e) => last = format!("{e:#}"),
        }
        tokio::time::sleep(Duration::from_millis(40)).await;
    }
    Err(last)
}

/// One Score call of in-domain rows; the status code when anything fails
/// (connecting counts as UNAVAILABLE, as a gRPC client would report it).
async fn score(endpoint: &str, how: &Connect) -> Result<pb::ScoreResponse, (Code, String)> {
    let ch = channel(endpoint, how)
        .await
        .map_err(|e| (Code::Unavailable, e))?;
    let rows = fixtures::in_domain_rows(3, 11);
    ScoringClient::new(ch)
        .score(crate::request("alpha", crate::candidates("c", &rows)))
        .await
        .map(|r| r.into_inner())
        .map_err(|s| (s.code(), s.message().to_string()))
}

async fn list_cases(endpoint: &str, how: &Connect) -> Result<(), (Code, String)> {
    let ch = channel(endpoint, how)
        .await
        .map_err(|e| (Code::Unavailable, e))?;
    ReviewClient::new(ch)
        .list_cases(pb::ListCasesRequest::default())
        .await
        .map(|_| ())
        .map_err(|s| (s.code(), s.message().to_string()))
}

/// A refusal by the TLS layer rather than by a gRPC handler.
fn transport_failure(code: Code) -> bool {
    matches!(code, Code::Unavailable | Code::Unknown | Code::Internal)
}

fn identity_of(server: &TestServer, request_id: &str) -> Option<String> {
    server
        .reader()
        .request(request_id)
        .expect("read the audit store")
        .expect("the request is recorded")
        .identity
}

#[tokio::test]
async fn tls_calls_succeed_with_the_ca_and_fail_without_it() {
    let pki = Pki::new();
    let server = start(|s| pki.server_tls(s, false)).await;
    let https = format!("https://127.0.0.1:{}", server.addr.port());

    let answer = score(&https, &pki.trusting()).await.expect("TLS call");
    assert_eq!(answer.results.len(), 3);

    // Plain text to the TLS port: no gRPC answer.
    let plain = format!("http://{}", server.addr);
    let err = score(&plain, &Connect::default()).await.unwrap_err();
    assert_ne!(err.0, Code::Ok, "{err:?}");
    // TLS trusting a CA that did not sign the server's certificate.
    let wrong = Connect {
        ca_cert: Some(pki.path("other-ca.pem")),
        ..pki.trusting()
    };
    let err = score(&https, &wrong).await.unwrap_err();
    assert!(transport_failure(err.0), "{err:?}");
    server.stop().await.expect("clean stop");
}

#[tokio::test]
async fn mutual_tls_refuses_a_client_without_a_certificate_and_records_the_subject() {
    let pki = Pki::new();
    let server = start(|s| pki.server_tls(s, true)).await;
    let https = format!("https://127.0.0.1:{}", server.addr.port());

    // TLS 1.3 clients learn of the refusal at the first call, not at connect.
    let err = score(&https, &pki.trusting()).await.unwrap_err();
    assert!(transport_failure(err.0), "{err:?}");

    let answer = score(&https, &pki.with_client_cert())
        .await
        .expect("mutual TLS call");
    assert_eq!(
        identity_of(&server, &answer.request_id).as_deref(),
        Some(format!("cert:{CLIENT_SUBJECT}").as_str())
    );
    server.stop().await.expect("clean stop");
}

/// Reference: OpenSSL's own rendering of the certificate's subject in RFC
/// 2253 form (`openssl x509 -subject -nameopt RFC2253`), which is what our
/// RFC 4514 rendering must agree with.
#[test]
fn client_subject_matches_openssl_rfc2253_rendering() {
    let pki = Pki::new();
    let out = std::process::Command::new("openssl")
        .args(["x509", "-noout", "-subject", "-nameopt", "RFC2253", "-in"])
        .arg(pki.path("client.pem"))
        .output()
        .expect("run openssl");
    assert!(out.status.success(), "{out:?}");
    let text = String::from_utf8(out.stdout).expect("utf-8");
    let openssl = text.trim().trim_start_matches("subject=").trim();
    let pem = std::fs::read(pki.path("client.pem")).expect("read");
    let der = pem_to_der(&pem);
    assert_eq!(
        plumbline::service::tls::subject_of(&der).as_deref(),
        Some(openssl)
    );
    assert_eq!(openssl, CLIENT_SUBJECT);
}

fn pem_to_der(pem: &[u8]) -> Vec<u8> {
    use rustls_pki_types::CertificateDer;
    use rustls_pki_types::pem::PemObject;
    CertificateDer::from_pem_slice(pem)
        .expect("PEM certificate")
        .to_vec()
}

/// A tokens file with a scoring robot and an analyst; their tokens.
fn tokens_file(dir: &Path) -> (PathBuf, String, String) {
    let robot = "plb_robot-token-for-tests".to_string();
    let analyst = "plb_analyst-token-for-tests".to_string();
    let path = dir.join("tokens.txt");
    std::fs::write(
        &path,
        format!(
            "# name role sha256\nrobot score {}\nana review {}\n",
            token_sha256(&robot),
            token_sha256(&analyst)
        ),
    )
    .expect("write tokens");
    (path, robot, analyst)
}

fn with_token(token: &str) -> Connect {
    Connect {
        token: Some(token.to_string()),
        ..Connect::default()
    }
}

#[tokio::test]
async fn tokens_admit_each_service_by_role_and_the_audit_record_names_the_holder() {
    let dir = tempfile::tempdir().expect("temporary directory");
    let (file, robot, analyst) = tokens_file(dir.path());
    let server = start(|s| s.auth.tokens_file = Some(file)).await;
    let ep = server.endpoint();

    let none = score(&ep, &Connect::default()).await.unwrap_err();
    assert_eq!(none.0, Code::Unauthenticated, "{none:?}");
    let wrong = score(&ep, &with_token("plb_not-a-token"))
        .await
        .unwrap_err();
    assert_eq!(wrong.0, Code::Unauthenticated, "{wrong:?}");

    let denied = list_cases(&ep, &with_token(&robot)).await.unwrap_err();
    assert_eq!(denied.0, Code::PermissionDenied, "{denied:?}");
    assert!(denied.1.contains("'review'"), "{denied:?}");
    let denied = score(&ep, &with_token(&analyst)).await.unwrap_err();
    assert_eq!(denied.0, Code::PermissionDenied, "{denied:?}");
    assert!(denied.1.contains("'score'"), "{denied:?}");

    let answer = score(&ep, &with_token(&robot)).await.expect("robot scores");
    assert_eq!(
        identity_of(&server, &answer.request_id).as_deref(),
        Some("token:robot")
    );
    list_cases(&ep, &with_token(&analyst))
        .await
        .expect("analyst lists cases");

    // Health stays open for load balancers.
    let ch = channel(&ep, &Connect::default()).await.expect("connect");
    HealthClient::new(ch)
        .check(HealthCheckRequest {
            service: String::new(),
        })
        .await
        .expect("health needs no token");
    server.stop().await.expect("clean stop");
}

/// A scoring token scores one far candidate (a case) and one in-domain one;
/// the analyst token settles the case with no name typed and records an
/// outcome: the decision and the outcome rows both name the analyst token,
/// in the store and in the answers.
#[tokio::test]
async fn decisions_and_outcomes_record_the_authenticated_caller() {
    use plumbline::pb::outcomes_client::OutcomesClient;

    let dir = tempfile::tempdir().expect("temporary directory");
    let (file, robot, analyst) = tokens_file(dir.path());
    let server = start(|s| s.auth.tokens_file = Some(file)).await;
    let ep = server.endpoint();

    let mut rows = fixtures::in_domain_rows(1, 5);
    rows.extend(fixtures::far_rows(1));
    let robot_ch = channel(&ep, &with_token(&robot)).await.expect("connect");
    let answer = ScoringClient::new(robot_ch)
        .score(crate::request("alpha", crate::candidates("c", &rows)))
        .await
        .expect("robot scores")
        .into_inner();
    let (scored, case) = (&answer.results[0], &answer.results[1]);
    assert_eq!(crate::status_of(scored), pb::Status::Scored);
    assert_ne!(crate::status_of(case), pb::Status::Scored, "{case:?}");

    let ana_ch = channel(&ep, &with_token(&analyst)).await.expect("connect");
    let settled = ReviewClient::new(ana_ch.clone())
        .settle_case(pb::SettleCaseRequest {
            record_id: case.record_id.clone(),
            analyst: String::new(),
            decision: pb::Decision::Dismiss as i32,
            note: "far from the series".into(),
        })
        .await
        .expect("the analyst settles with no name typed")
        .into_inner();
    let last = settled.history.last().expect("one decision");
    assert_eq!(last.caller_identity, "token:ana");
    assert_eq!(
        last.analyst, "token:ana",
        "the name defaults to the identity"
    );
    assert!(last.caller_peer.starts_with("127.0.0.1:"), "{last:?}");

    OutcomesClient::new(ana_ch)
        .record_outcomes(pb::RecordOutcomesRequest {
            rows: vec![pb::OutcomeRow {
                target: Some(pb::outcome_row::Target::RecordId(scored.record_id.clone())),
                observed: 1.5,
            }],
            replace: false,
            source: "plate-1.csv".into(),
        })
        .await
        .expect("the analyst records an outcome");

    let conn = rusqlite::Connection::open(&server.audit_path).expect("open the store");
    let who = |sql: &str, id: &str| -> (Option<String>, Option<String>) {
        conn.query_row(sql, [id], |r| Ok((r.get(0)?, r.get(1)?)))
            .expect("the row is stored")
    };
    let (identity, peer) = who(
        "SELECT caller_identity, caller_peer FROM case_history WHERE record_id = ?1",
        &case.record_id,
    );
    assert_eq!(identity.as_deref(), Some("token:ana"));
    assert!(peer.is_some_and(|p| p.starts_with("127.0.0.1:")));
    let (identity, peer) = who(
        "SELECT caller_identity, caller_peer FROM outcomes WHERE record_id = ?1",
        &scored.record_id,
    );
    assert_eq!(identity.as_deref(), Some("token:ana"));
    assert!(peer.is_some_and(|p| p.starts_with("127.0.0.1:")));
    server.stop().await.expect("clean stop");
}

/// Replaces the tokens file the way an operator (or a Secret volume) does:
/// a new file renamed over the old one.
fn replace_tokens(path: &Path, text: &str) {
    let next = path.with_extension("next");
    std::fs::write(&next, text).expect("write tokens");
    std::fs::rename(&next, path).expect("replace tokens");
}

/// Waits (up to 5 s of polls) until scoring with `token` answers `want`
/// (true = admitted); the last outcome otherwise.
async fn settles_to(ep: &str, token: &str, want: bool) -> Result<(), String> {
    let mut last = String::new();
    for _ in 0..100 {
        match score(ep, &with_token(token)).await {
            Ok(_) if want => return Ok(()),
            Err((Code::Unauthenticated, _)) if !want => return Ok(()),
            other => last = format!("{other:?}"),
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    Err(last)
}

/// Token rotation without a restart: a replaced tokens file takes effect
/// at the next poll (the old token is refused, the new one admitted and
/// recorded); a broken file, or one with no tokens, is refused and the
/// tokens in force stay.
#[tokio::test]
async fn a_replaced_tokens_file_rotates_tokens_and_a_broken_one_changes_nothing() {
    let dir = tempfile::tempdir().expect("temporary directory");
    let (file, robot, _) = tokens_file(dir.path());
    let server = start(|s| s.auth.tokens_file = Some(file.clone())).await;
    let ep = server.endpoint();
    score(&ep, &with_token(&robot)).await.expect("robot scores");

    let fresh = "plb_robot-after-rotation".to_string();
    replace_tokens(&file, &format!("robot2 score {}\n", token_sha256(&fresh)));
    settles_to(&ep, &robot, false)
        .await
        .expect("the rotated-out token is refused");
    settles_to(&ep, &fresh, true)
        .await
        .expect("the new token is admitted");
    let answer = score(&ep, &with_token(&fresh)).await.expect("scores");
    assert_eq!(
        identity_of(&server, &answer.request_id).as_deref(),
        Some("token:robot2")
    );

    for broken in ["robot3 superuser 00\n", "# every token removed\n"] {
        replace_tokens(&file, broken);
        // Several poll intervals: had it been taken, the old token would fail.
        tokio::time::sleep(Duration::from_millis(300)).await;
        score(&ep, &with_token(&fresh))
            .await
            .unwrap_or_else(|e| panic!("after {broken:?} the tokens in force stay: {e:?}"));
    }
    server.stop().await.expect("clean stop");
}

#[tokio::test]
async fn admin_token_may_call_every_service() {
    let boss = "plb_admin-token-for-tests";
    let server = start(|s| {
        s.auth.tokens = vec![plumbline::service::settings::TokenSetting {
            name: "boss".into(),
            role: plumbline::service::access::Role::Admin,
            sha256: token_sha256(boss),
        }]
    })
    .await;
    let ep = server.endpoint();
    let answer = score(&ep, &with_token(boss)).await.expect("admin scores");
    assert_eq!(
        identity_of(&server, &answer.request_id).as_deref(),
        Some("token:boss")
    );
    list_cases(&ep, &with_token(boss))
        .await
        .expect("admin reviews");
    server.stop().await.expect("clean stop");
}

/// The command-line clients through TLS and a token: `plumbline cases list`
/// and `plumbline score` with `--ca-cert` and `--token`.
#[tokio::test]
async fn command_line_clients_reach_a_tls_server_with_a_token() {
    let pki = Pki::new();
    let (file, robot, analyst) = tokens_file(pki.dir.path());
    let server = start(|s| {
        pki.server_tls(s, false);
        s.auth.tokens_file = Some(file);
    })
    .await;
    let https = format!("https://127.0.0.1:{}", server.addr.port());
    channel(&https, &pki.trusting()).await.expect("server up");

    let ca = pki.path("ca.pem").display().to_string();
    let cases = |token: &str| {
        let args = [
            "plumbline",
            "cases",
            "list",
            "--endpoint",
            https.as_str(),
            "--json",
            "--ca-cert",
            ca.as_str(),
            "--server-name",
            "localhost",
            "--token",
            token,
        ]
        .map(String::from);
        <plumbline::cli::Cli as clap::Parser>::parse_from(args)
    };
    let run = |cli: plumbline::cli::Cli| async move {
        let plumbline::cli::Command::Cases(args) = cli.command else {
            panic!("parsed as cases")
        };
        let mut out = Vec::new();
        plumbline::cli::cases::run_to(&args, &mut out)
            .await
            .map(|()| String::from_utf8_lossy(&out).into_owned())
            .map_err(|e| format!("{e:#}"))
    };
    run(cases(&analyst)).await.expect("cases list as analyst");
    let err = run(cases(&robot)).await.unwrap_err();
    assert!(err.contains("PermissionDenied"), "{err}");

    let data = pki.path("candidates.csv");
    let rows = fixtures::in_domain_rows(4, 5);
    let mut csv = String::from("id,d0,d1,d2,d3\n");
    for (i, r) in rows.iter().enumerate() {
        let cells: Vec<String> = r.iter().map(|v| v.to_string()).collect();
        csv.push_str(&format!("m{i},{}\n", cells.join(",")));
    }
    std::fs::write(&data, csv).expect("write CSV");
    let out = pki.path("scored.csv");
    service::client::score_client_with(
        &https,
        &Connect {
            token: Some(robot.clone()),
            ..pki.trusting()
        },
        &data,
        &out,
        "alpha",
        None,
        "id",
    )
    .await
    .expect("plumbline score through TLS with a token");
    let written = std::fs::read_to_string(&out).expect("read output");
    assert_eq!(written.lines().count(), 5, "{written}");
    let err = service::client::score_client_with(
        &https,
        &pki.trusting(),
        &data,
        &out,
        "alpha",
        None,
        "id",
    )
    .await
    .unwrap_err();
    assert!(format!("{err:#}").contains("Unauthenticated"), "{err:#}");
    server.stop().await.expect("clean stop");
}

#[tokio::test]
async fn open_server_off_loopback_is_refused_at_start_up_unless_allowed() {
    let dir = tempfile::tempdir().expect("temporary directory");
    let settings = crate::util::test_settings(dir.path());
    std::fs::create_dir_all(&settings.models.dir).expect("bundle directory");
    fixtures::write_bundle(
        &settings.models.dir,
        "alpha.plumb",
        &ModelSpec::new("alpha", 7),
    );

    // Bound to every interface, but only loopback is ever called here.
    let listener = tokio::net::TcpListener::bind("0.0.0.0:0")
        .await
        .expect("bind");
    let refused = service::run_with_loader(
        settings.clone(),
        fixtures::loader(),
        listener,
        std::future::pending(),
    )
    .await
    .expect_err("an open server on 0.0.0.0 must not start");
    let text = refused.to_string();
    assert!(
        text.contains("server.allow_unauthenticated_remote") && text.contains("0.0.0.0"),
        "{text}"
    );

    let mut allowed = settings.clone();
    allowed.server.allow_unauthenticated_remote = true;
    let listener = tokio::net::TcpListener::bind("0.0.0.0:0")
        .await
        .expect("bind");
    let port = listener.local_addr().expect("address").port();
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    let task = tokio::spawn(service::run_with_loader(
        allowed,
        fixtures::loader(),
        listener,
        async move {
            let _ = stopped.await;
        },
    ));
    let ep = format!("http://127.0.0.1:{port}");
    score(&ep, &Connect::default())
        .await
        .expect("allowed open server answers");
    let _ = stop.send(());
    task.await.expect("task").expect("clean stop");

    // The same rule applies when the settings are loaded.
    let env = std::collections::HashMap::from([(
        "PLUMBLINE_SERVER__LISTEN".to_string(),
        "0.0.0.0:7420".to_string(),
    )]);
    let err = Settings::load(None, &env, &[]).unwrap_err().to_string();
    assert!(err.contains("server.allow_unauthenticated_remote"), "{err}");
}

#[tokio::test]
async fn a_bad_certificate_file_stops_start_up_naming_the_setting_and_file() {
    let pki = Pki::new();
    let garbage = pki.path("garbage.pem");
    std::fs::write(&garbage, "this is not PEM\n").expect("write");
    let server = start(|s| {
        pki.server_tls(s, false);
        s.tls.cert = Some(garbage.clone());
    })
    .await;
    let err = server.outcome().await.expect_err("bad PEM must not start");
    let text = err.to_string();
    assert!(
        text.contains("tls.cert") && text.contains(&garbage.display().to_string()),
        "{text}"
    );

    let missing = pki.path("missing.key");
    let server = start(|s| {
        pki.server_tls(s, false);
        s.tls.key = Some(missing.clone());
    })
    .await;
    let text = server.outcome().await.expect_err("missing key").to_string();
    assert!(
        text.contains("tls.key") && text.contains("missing.key"),
        "{text}"
    );
}
