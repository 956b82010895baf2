"""An independent client of the plumbline scoring service: the official gRPC
Python packages (grpcio), stubs generated from our proto at test time with
grpcio-tools, health checked with grpcio-health-checking, and the audit
database read with Python's own sqlite3 module.

Run by the Rust integration test `python::grpcio_client_agrees_with_the_server`,
which starts the server and passes, through the environment:
  PLUMBLINE_ADDR       host:port of the running server
  PLUMBLINE_PROTO_DIR  the proto/ directory
  PLUMBLINE_CASES      JSON: candidates and the in-process reference scores
  PLUMBLINE_AUDIT_DB   the server's audit database
"""

import json
import os
import sqlite3
import struct
import subprocess
import sys
import tempfile
import unittest

import grpc
from grpc_health.v1 import health_pb2, health_pb2_grpc

ADDR = os.environ["PLUMBLINE_ADDR"]
PROTO_DIR = os.environ["PLUMBLINE_PROTO_DIR"]
CASES = json.load(open(os.environ["PLUMBLINE_CASES"]))
AUDIT_DB = os.environ["PLUMBLINE_AUDIT_DB"]


def generate_stubs():
    out = tempfile.mkdtemp(prefix="plumbline-stubs-")
    proto = os.path.join(PROTO_DIR, "plumbline", "v1", "scoring.proto")
    subprocess.run(
        [sys.executable, "-m", "grpc_tools.protoc", "-I", PROTO_DIR,
         "--python_out", out, "--grpc_python_out", out, proto],
        check=True,
    )
    sys.path.insert(0, out)
    from plumbline.v1 import scoring_pb2, scoring_pb2_grpc  # noqa: E402
    return scoring_pb2, scoring_pb2_grpc


pb, pb_grpc = generate_stubs()


def bits(x):
    return struct.unpack("<Q", struct.pack("<d", x))[0]


class ScoringFromPython(unittest.TestCase):
    @classmethod
    def setUpClass(cls):
        cls.channel = grpc.insecure_channel(ADDR)
        grpc.channel_ready_future(cls.channel).result(timeout=10)
        cls.stub = pb_grpc.ScoringStub(cls.channel)

    @classmethod
    def tearDownClass(cls):
        cls.channel.close()

    def request(self, candidates, **kw):
        return pb.ScoreRequest(
            candidates=[pb.Candidate(id=c["id"], descriptors=c["descriptors"]) for c in candidates],
            batch_label="python client", **kw)

    def test_health_is_serving_overall_and_for_scoring(self):
        health = health_pb2_grpc.HealthStub(self.channel)
        for service in ["", "plumbline.v1.Scoring"]:
            r = health.Check(health_pb2.HealthCheckRequest(service=service))
            self.assertEqual(r.status, health_pb2.HealthCheckResponse.SERVING, service)

    def test_list_and_describe(self):
        models = self.stub.ListModels(pb.ListModelsRequest()).models
        self.assertEqual([m.model for m in models], [CASES["model"]])
        self.assertTrue(models[0].is_default)
        card = self.stub.DescribeModel(pb.DescribeModelRequest(model=""))
        self.assertEqual(list(card.descriptor_names), CASES["descriptor_names"])

    def test_scores_equal_in_process_scoring_bit_for_bit(self):
        r = self.stub.Score(self.request(CASES["candidates"]))
        self.assertEqual(r.model, CASES["model"])
        self.assertEqual(len(r.results), len(CASES["candidates"]))
        for got, want in zip(r.results, CASES["expected"]):
            self.assertEqual(got.id, want["id"])
            self.assertEqual(pb.Status.Name(got.status), want["status"])
            if want["prediction_bits"] is None:
                self.assertFalse(got.HasField("prediction"))
            else:
                self.assertEqual(bits(got.prediction), int(want["prediction_bits"]), got.id)
            self.assertTrue(got.record_id.startswith(r.request_id + "-"))
        # The audit database, read with Python's own sqlite3, holds the same.
        db = sqlite3.connect("file:%s?mode=ro" % AUDIT_DB, uri=True)
        rows = db.execute(
            "SELECT record_id, status, prediction FROM candidates WHERE request_id = ? "
            "ORDER BY position", (r.request_id,)).fetchall()
        db.close()
        self.assertEqual(len(rows), len(r.results))
        for (record_id, status, prediction), got in zip(rows, r.results):
            self.assertEqual(record_id, got.record_id)
            self.assertEqual(status.upper(), pb.Status.Name(got.status))
            if got.HasField("prediction"):
                self.assertEqual(bits(prediction), bits(got.prediction))
            else:
                self.assertIsNone(prediction)

    def test_bad_candidates_are_rejected_and_the_rest_scored(self):
        good = CASES["candidates"][0]
        bad = {"id": "nan", "descriptors": [float("nan")] * len(good["descriptors"])}
        short = {"id": "short", "descriptors": good["descriptors"][:-1]}
        r = self.stub.Score(self.request([good, bad, short]))
        statuses = [pb.Status.Name(c.status) for c in r.results]
        self.assertEqual(statuses[1:], ["REJECTED", "REJECTED"])
        self.assertNotEqual(statuses[0], "REJECTED")
        self.assertIn("NaN", r.results[1].reason)

    def test_request_errors_have_their_codes(self):
        with self.assertRaises(grpc.RpcError) as e:
            self.stub.Score(self.request(CASES["candidates"][:1], model="no-such-model"))
        self.assertEqual(e.exception.code(), grpc.StatusCode.NOT_FOUND)
        with self.assertRaises(grpc.RpcError) as e:
            self.stub.Score(self.request(CASES["candidates"][:1], confidence=0.2))
        self.assertEqual(e.exception.code(), grpc.StatusCode.INVALID_ARGUMENT)
        too_many = [{"id": "m%d" % i, "descriptors": CASES["candidates"][0]["descriptors"]}
                    for i in range(CASES["max_candidates"] + 1)]
        with self.assertRaises(grpc.RpcError) as e:
            self.stub.Score(self.request(too_many))
        self.assertEqual(e.exception.code(), grpc.StatusCode.RESOURCE_EXHAUSTED)
        self.assertIn("server.max_candidates", e.exception.details())

    def test_stream_answers_every_chunk(self):
        cands = CASES["candidates"]
        chunks = [cands[i:i + 5] for i in range(0, len(cands), 5)]

        def messages():
            for k, chunk in enumerate(chunks):
                renamed = [{"id": "s%d-%s" % (k, c["id"]), "descriptors": c["descriptors"]}
                           for c in chunk]
                yield self.request(renamed, final_ranking=(k == len(chunks) - 1))

        answers = list(self.stub.ScoreStream(messages()))
        self.assertEqual(len(answers), len(chunks))
        for a, chunk in zip(answers, chunks):
            self.assertEqual(len(a.results), len(chunk))
        scored = sum(1 for a in answers for c in a.results if c.status == pb.SCORED)
        self.assertEqual(len(answers[-1].overall_ranking), scored)
        self.assertEqual([e.rank for e in answers[-1].overall_ranking], list(range(1, scored + 1)))


if __name__ == "__main__":
    result = unittest.main(exit=False, verbosity=2).result
    failed = len(result.failures) + len(result.errors)
    print("%d passed, %d failed" % (result.testsRun - failed, failed))
    sys.exit(1 if failed else 0)
