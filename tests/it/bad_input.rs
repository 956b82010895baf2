//! Bad input through the real server: a corpus of malformed requests, each
//! with the status code (or per-candidate verdict) and the words of the
//! message it must get, and after every entry a good call that must still
//! succeed. Also malformed protobuf bytes, a stream abandoned half-way and a
//! client that never reads its answers.

use bytes::{Buf, BufMut};
use plumbline::pb;
use prost::Message;
use tokio_stream::StreamExt;
use tonic::Code;
use tonic::codec::{Codec, DecodeBuf, Decoder, EncodeBuf, Encoder};
use tonic::transport::Channel;

use crate::fixtures::{self, ModelSpec};
use crate::util::TestServer;
use crate::{candidates, request, status_of};

const MAX_CANDIDATES: usize = 40;
// The smallest limit the settings accept.
const MAX_MESSAGE_BYTES: usize = 64 * 1024;

async fn server() -> TestServer {
    TestServer::start(
        fixtures::loader(),
        |dir| {
            fixtures::write_bundle(dir, "model.plumb", &ModelSpec::new("potency", 71));
        },
        |s| {
            s.server.max_candidates = MAX_CANDIDATES;
            s.server.max_message_bytes = MAX_MESSAGE_BYTES;
        },
    )
    .await
}

/// What one corpus entry must get back.
enum Expect {
    /// The whole call fails with this code and a message containing these words.
    Refused(Code, &'static str),
    /// The call succeeds; candidate `i` gets this status and reason words.
    PerCandidate(Vec<(usize, pb::Status, &'static str)>),
}

fn one(id: &str, descriptors: Vec<f64>) -> pb::Candidate {
    pb::Candidate {
        id: id.to_string(),
        descriptors,
    }
}

fn good_row() -> Vec<f64> {
    fixtures::in_domain_rows(1, 72).remove(0)
}

fn with(mut row: Vec<f64>, j: usize, v: f64) -> Vec<f64> {
    row[j] = v;
    row
}

fn corpus() -> Vec<(&'static str, pb::ScoreRequest, Expect)> {
    use Expect::*;
    use pb::Status::{Refused as Out, Rejected, Scored};
    let g = good_row();
    let names = fixtures::descriptor_names();
    let mut v = Vec::new();
    v.push((
        "empty batch",
        request("", Vec::new()),
        PerCandidate(Vec::new()),
    ));
    v.push((
        "empty id",
        request("", vec![one("", g.clone()), one("a", g.clone())]),
        PerCandidate(vec![(0, Rejected, "empty id"), (1, Scored, "")]),
    ));
    v.push((
        "duplicate id",
        request("", vec![one("a", g.clone()), one("a", g.clone())]),
        PerCandidate(vec![(0, Scored, ""), (1, Rejected, "duplicate id 'a'")]),
    ));
    for (label, value, words) in [
        ("NaN", f64::NAN, "is NaN"),
        ("+Inf", f64::INFINITY, "is inf"),
        ("-Inf", f64::NEG_INFINITY, "is -inf"),
    ] {
        v.push((
            label,
            request(
                "",
                vec![one("x", with(g.clone(), 1, value)), one("ok", g.clone())],
            ),
            PerCandidate(vec![(0, Rejected, words), (1, Scored, "")]),
        ));
    }
    // The smallest subnormal is a finite number next to zero, well inside
    // the training range [-1, 1]: it is scored like any other value.
    v.push((
        "subnormal",
        request("", vec![one("x", with(g.clone(), 0, f64::from_bits(1)))]),
        PerCandidate(vec![(0, Scored, "")]),
    ));
    // Huge but finite values are far outside the domain: refused (the
    // default policy), never scored or ranked, and never a failed call.
    v.push((
        "huge",
        request(
            "",
            vec![one("x", with(g.clone(), 2, 1e300)), one("ok", g.clone())],
        ),
        PerCandidate(vec![
            (0, Out, "outside the applicability domain"),
            (1, Scored, ""),
        ]),
    ));
    // So huge that standardising overflows: rejected like NaN.
    for (label, value) in [("f64::MAX", f64::MAX), ("-f64::MAX", -f64::MAX)] {
        v.push((
            label,
            request(
                "",
                vec![one("x", with(g.clone(), 2, value)), one("ok", g.clone())],
            ),
            PerCandidate(vec![
                (0, Rejected, "descriptor 'd2' (position 2)"),
                (1, Scored, ""),
            ]),
        ));
    }
    v.push((
        "too few descriptors",
        request("", vec![one("x", g[..2].to_vec())]),
        PerCandidate(vec![(
            0,
            Rejected,
            "2 descriptor values given, the model expects 4",
        )]),
    ));
    let mut long = g.clone();
    long.extend([0.1, 0.2]);
    v.push((
        "too many descriptors",
        request("", vec![one("x", long)]),
        PerCandidate(vec![(
            0,
            Rejected,
            "6 descriptor values given, the model expects 4",
        )]),
    ));
    v.push((
        "no descriptors",
        request("", vec![one("x", Vec::new())]),
        PerCandidate(vec![(
            0,
            Rejected,
            "0 descriptor values given, the model expects 4",
        )]),
    ));
    let mut wrong = request("", vec![one("x", g.clone())]);
    wrong.descriptor_names = vec!["d0".into(), "d1".into(), "d2".into(), "logp".into()];
    v.push((
        "wrong descriptor name",
        wrong,
        Refused(Code::InvalidArgument, "unexpected 'logp'"),
    ));
    let mut twice = request("", vec![one("x", g.clone())]);
    twice.descriptor_names = vec![
        names[0].clone(),
        names[1].clone(),
        names[1].clone(),
        names[3].clone(),
    ];
    v.push((
        "duplicate descriptor name",
        twice,
        Refused(Code::InvalidArgument, "given twice 'd1'"),
    ));
    let mut short_names = request("", vec![one("x", g.clone())]);
    short_names.descriptor_names = names[..3].to_vec();
    v.push((
        "too few descriptor names",
        short_names,
        Refused(Code::InvalidArgument, "missing 'd3'"),
    ));
    for (label, c) in [
        ("confidence 0.3", 0.3),
        ("confidence 1.0", 1.0),
        ("confidence NaN", f64::NAN),
        ("confidence -0.9", -0.9),
    ] {
        let mut r = request("", vec![one("x", g.clone())]);
        r.confidence = c;
        v.push((label, r, Refused(Code::InvalidArgument, "[0.5, 0.99]")));
    }
    v.push((
        "unknown model",
        request("no-such-model", vec![one("x", g.clone())]),
        Refused(Code::NotFound, "potency"),
    ));
    let rows = fixtures::in_domain_rows(MAX_CANDIDATES + 1, 73);
    v.push((
        "batch over the limit",
        request("", candidates("c", &rows)),
        Refused(Code::ResourceExhausted, "server.max_candidates"),
    ));
    // 40 candidates of 300 values each encode to about 96 kB > 64 KiB.
    let wide: Vec<pb::Candidate> = (0..40)
        .map(|i| one(&format!("w{i}"), vec![0.25; 300]))
        .collect();
    v.push((
        "message over the size limit",
        request("", wide),
        Refused(Code::ResourceExhausted, "server.max_message_bytes"),
    ));
    v
}

/// A good call succeeds: the server is still serving.
async fn still_serving(client: &mut pb::scoring_client::ScoringClient<Channel>, after: &str) {
    let rows = fixtures::in_domain_rows(3, 74);
    let answer = client
        .score(request("", candidates("after", &rows)))
        .await
        .unwrap_or_else(|e| panic!("after '{after}' a good call failed: {e:?}"))
        .into_inner();
    assert_eq!(answer.results.len(), 3, "after '{after}'");
    assert!(
        answer
            .results
            .iter()
            .all(|c| status_of(c) == pb::Status::Scored),
        "after '{after}'"
    );
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_corpus_entry_gets_its_status_and_the_server_keeps_serving() {
    let server = server().await;
    let mut client = server.client().await;
    for (label, req, expect) in corpus() {
        let n = req.candidates.len();
        let got = client.score(req).await;
        match expect {
            Expect::Refused(code, words) => {
                let err = got.expect_err(label);
                assert_eq!(err.code(), code, "{label}: {err:?}");
                assert!(err.message().contains(words), "{label}: {}", err.message());
            }
            Expect::PerCandidate(want) => {
                let answer = got
                    .unwrap_or_else(|e| panic!("{label}: {e:?}"))
                    .into_inner();
                assert_eq!(answer.results.len(), n, "{label}: one result per candidate");
                assert_eq!(want.len(), n, "{label}: the corpus covers every candidate");
                for (i, status, words) in want {
                    let c = &answer.results[i];
                    assert_eq!(status_of(c), status, "{label}: candidate {i}: {}", c.reason);
                    assert!(c.reason.contains(words), "{label}: {}", c.reason);
                    match status {
                        pb::Status::Scored => {
                            let p = c
                                .prediction
                                .unwrap_or_else(|| panic!("{label}: prediction"));
                            assert!(p.is_finite(), "{label}: prediction {p}");
                            assert!(c.rank > 0, "{label}: scored candidates are ranked");
                        }
                        _ => {
                            assert_eq!(c.prediction, None, "{label}: prediction withheld");
                            assert_eq!(c.rank, 0, "{label}: not ranked");
                        }
                    }
                }
            }
        }
        still_serving(&mut client, label).await;
    }
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_same_corpus_through_score_stream_gets_the_same_answers() {
    let server = server().await;
    let mut client = server.client().await;
    for (label, req, expect) in corpus() {
        let got = client.score_stream(tokio_stream::iter(vec![req])).await;
        let first = match got {
            Ok(answers) => answers.into_inner().next().await,
            Err(e) => Some(Err(e)),
        };
        match expect {
            Expect::Refused(code, words) => {
                let err = first
                    .unwrap_or_else(|| panic!("{label}: no answer"))
                    .expect_err(label);
                assert_eq!(err.code(), code, "{label}: {err:?}");
                assert!(err.message().contains(words), "{label}: {}", err.message());
            }
            Expect::PerCandidate(want) => {
                let answer = first
                    .unwrap_or_else(|| panic!("{label}: no answer"))
                    .unwrap_or_else(|e| panic!("{label}: {e:?}"));
                for (i, status, words) in want {
                    let c = &answer.results[i];
                    assert_eq!(status_of(c), status, "{label}: candidate {i}: {}", c.reason);
                    assert!(c.reason.contains(words), "{label}: {}", c.reason);
                }
            }
        }
        still_serving(&mut client, label).await;
    }
    server.stop().await.expect("clean stop");
}

/// Sends bytes as they are, framed as one gRPC message, so the server's
/// protobuf decoder sees exactly what a broken client would send.
#[derive(Clone, Copy, Default)]
struct RawBytes;

impl Codec for RawBytes {
    type Encode = Vec<u8>;
    type Decode = Vec<u8>;
    type Encoder = RawBytes;
    type Decoder = RawBytes;
    fn encoder(&mut self) -> RawBytes {
        RawBytes
    }
    fn decoder(&mut self) -> RawBytes {
        RawBytes
    }
}

impl Encoder for RawBytes {
    type Item = Vec<u8>;
    type Error = tonic::Status;
    fn encode(&mut self, item: Vec<u8>, buf: &mut EncodeBuf<'_>) -> Result<(), tonic::Status> {
        buf.put_slice(&item);
        Ok(())
    }
}

impl Decoder for RawBytes {
    type Item = Vec<u8>;
    type Error = tonic::Status;
    fn decode(&mut self, buf: &mut DecodeBuf<'_>) -> Result<Option<Vec<u8>>, tonic::Status> {
        let v = buf.chunk().to_vec();
        buf.advance(v.len());
        Ok(Some(v))
    }
}

async fn raw_call(channel: Channel, method: &'static str, body: Vec<u8>) -> tonic::Status {
    let mut grpc = tonic::client::Grpc::new(channel);
    grpc.ready().await.expect("channel ready");
    let path = http::uri::PathAndQuery::from_static(method);
    match grpc.unary(tonic::Request::new(body), path, RawBytes).await {
        Ok(r) => panic!(
            "{method}: malformed bytes were answered: {:?}",
            r.into_inner()
        ),
        Err(status) => status,
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn malformed_protobuf_is_refused_and_the_server_keeps_serving() {
    let server = server().await;
    let mut client = server.client().await;
    let valid = request("", candidates("c", &fixtures::in_domain_rows(3, 75))).encode_to_vec();
    let truncated = valid[..valid.len() / 2].to_vec();
    // 0xff.. is a varint that never ends; 0x0f is field 1 with the reserved
    // wire type 7.
    let corpus: Vec<(&str, Vec<u8>)> = vec![
        ("garbage", vec![0xff; 64]),
        ("reserved wire type", vec![0x0f, 0x01, 0x02]),
        ("truncated message", truncated),
    ];
    for (label, body) in corpus {
        for method in [
            "/plumbline.v1.Scoring/Score",
            "/plumbline.v1.Scoring/ScoreStream",
        ] {
            let status = raw_call(server.channel().await, method, body.clone()).await;
            // tonic answers an undecodable message with INTERNAL and a
            // message saying the protobuf could not be decoded.
            assert_eq!(
                status.code(),
                Code::Internal,
                "{label} {method}: {status:?}"
            );
            assert!(
                status.message().to_lowercase().contains("decode"),
                "{label} {method}: {}",
                status.message()
            );
            still_serving(&mut client, label).await;
        }
    }
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_stream_abandoned_half_way_leaves_the_server_serving() {
    let server = server().await;
    let mut client = server.client().await;
    let (tx, rx) = tokio::sync::mpsc::channel::<pb::ScoreRequest>(4);
    let mut answers = client
        .clone()
        .score_stream(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .expect("stream opened")
        .into_inner();
    let rows = fixtures::in_domain_rows(5, 76);
    tx.send(request("", candidates("h", &rows)))
        .await
        .expect("send the first chunk");
    let first = answers
        .next()
        .await
        .expect("an answer")
        .expect("the first chunk is scored");
    assert_eq!(first.results.len(), 5);
    // The client goes away mid-stream: the request half is never closed
    // and the answers are never read again.
    drop(answers);
    drop(tx);
    still_serving(&mut client, "abandoned stream").await;
    server.stop().await.expect("clean stop");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_client_that_never_reads_does_not_block_other_callers() {
    let server = server().await;
    let mut reader = server.client().await;
    // A separate connection whose answers pile up unread until HTTP/2 flow
    // control stops the server from sending more.
    let mut sluggish = server.client().await;
    let rows = fixtures::in_domain_rows(MAX_CANDIDATES, 77);
    let chunks: Vec<pb::ScoreRequest> = (0..200)
        .map(|k| request("", candidates(&format!("s{k}-"), &rows)))
        .collect();
    let unread = sluggish
        .score_stream(tokio_stream::iter(chunks))
        .await
        .expect("stream opened")
        .into_inner();
    for round in 0..3 {
        still_serving(&mut reader, &format!("unread stream, round {round}")).await;
    }
    drop(unread);
    drop(sluggish);
    still_serving(&mut reader, "unread stream dropped").await;
    server.stop().await.expect("clean stop");
}
