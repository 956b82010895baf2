"""Reference scoring server for the service comparison: a small grpcio server
answering plumbline.v1.Scoring/Score over the reference pipeline of
pipeline.py, the way a modeller would wrap scikit-learn in gRPC.

The stubs are generated at start-up with grpcio-tools from the project's
own proto/plumbline/v1/*.proto into a temporary folder (never committed), so
both servers speak the same contract and one client drives both.

Reads what `benches/compare.rs` wrote into DIR: score_train.csv and
service_model.json (the fold assignments, the fixed ridge setting, the
number of PCA components plumbline kept and the domain settings). Per
request it does the work plumbline's Score does:
- the scoring of pipeline.ScoringPipeline (imported, not copied): the
  standardiser, the full and K fold ridge models, the CV+ interval, PCA,
  the mean distance to the k nearest training points, leverage and the PCA
  residual Q;
- the applicability-domain verdict with plumbline's rules (DESIGN.md), from
  thresholds this server calibrates itself on the training rows: the
  conformal typicality of the k-NN distance against the training
  leave-one-out distances (Vovk, Gammerman & Shafer 2005), the Z-rule
  threshold mean + Z sd (Tropsha 2010), h* = 3(c + 1)/n (Gramatica 2007),
  the 0.95 / 0.99 quantiles of the training Q, the training ranges;
- plumbline's default policy: outside candidates refused (no prediction),
  the rest ranked by prediction, best (highest) first;
- a durable audit record before answering: sqlite3 from the standard
  library, WAL, synchronous=FULL (plumbline's default), ONE transaction per
  request committed before the response is sent. It records a request row
  and, per candidate, its record id, position, id, status, prediction,
  interval, confidence, verdict, k-NN distance, typicality, Z-rule flag,
  leverage, PCA residual, rank, reason, the SHA-256 of its descriptor
  values and, for refused candidates, the values themselves (plumbline's
  default `store_descriptors = flagged-only`). Unlike plumbline it writes
  no verdict notes or out-of-range details (plumbline writes both as text),
  and commits each request on its own where plumbline's writer groups the
  requests waiting at the same moment into one transaction.

Concurrency: `grpc.server` with a ThreadPoolExecutor of --threads workers
(default 4, the client concurrency of the driver), each request's
neighbour search on its own thread (n_jobs=1); numpy's BLAS keeps its own
threads. The audit connection is shared under a lock, as SQLite has one
writer at a time anyway.

Prints `PORT <n>` on stdout once it listens on 127.0.0.1 (port 0 = chosen
by the OS; --port-file also writes it to a file) and stops when stdin
closes.

Usage: python3 benches/reference/serve.py DIR [--port N] [--threads N]
       [--audit PATH] [--port-file PATH]
"""

import argparse
import hashlib
import importlib
import importlib.resources
import itertools
import json
import pathlib
import sqlite3
import sys
import tempfile
import threading
import time
from concurrent import futures

import grpc
import numpy as np
from grpc_tools import protoc

HERE = pathlib.Path(__file__).resolve().parent
PROTO_ROOT = HERE.parents[1] / "proto"
sys.path.insert(0, str(HERE))
import pipeline  # noqa: E402  (the reference pipeline, by import)

MODEL_ID = "bench"


def load_stubs(tmp):
    """Compiles our protos into `tmp` and imports the scoring messages and
    service base class."""
    files = sorted(str(p.relative_to(PROTO_ROOT)) for p in (PROTO_ROOT / "plumbline" / "v1").glob("*.proto"))
    well_known = importlib.resources.files("grpc_tools") / "_proto"
    rc = protoc.main([
        "grpc_tools.protoc",
        f"-I{PROTO_ROOT}",
        f"-I{well_known}",
        f"--python_out={tmp}",
        f"--grpc_python_out={tmp}",
        *files,
    ])
    if rc != 0:
        raise SystemExit(f"protoc failed on {files} (exit {rc}): check grpcio-tools is installed")
    sys.path.insert(0, str(tmp))
    pb = importlib.import_module("plumbline.v1.scoring_pb2")
    rpc = importlib.import_module("plumbline.v1.scoring_pb2_grpc")
    return pb, rpc


class Domain:
    """plumbline's verdict rules over the reference pipeline's signals,
    with thresholds calibrated here on the training rows."""

    def __init__(self, pipe, x_raw, s):
        self.s = s
        xs = pipe.scaler.transform(x_raw)
        t = pipe.pca.transform(xs)
        # Leave-one-out: the nearest neighbour of a training point is itself.
        dist, _ = pipe.nn.kneighbors(t, n_neighbors=s["k"] + 1)
        self.loo = np.sort(dist[:, 1:].mean(axis=1))
        n = len(self.loo)
        self.z_threshold = float(self.loo.mean() + s["z"] * self.loo.std(ddof=1))
        self.leverage_warning = s["leverage_factor"] * (pipe.pca.n_components_ + 1) / n
        self.leverage_meaningful = self.leverage_warning < 1.0
        q = np.sum((xs - pipe.pca.mean_ - t @ pipe.pca.components_) ** 2, axis=1)
        # numpy's default quantile is Hyndman & Fan type 7, as plumbline's.
        self.border_limit = float(np.quantile(q, s["residual_border_quantile"]))
        self.outside_limit = float(np.quantile(q, s["residual_outside_quantile"]))
        self.residual_meaningful = 1.0 - pipe.pca.explained_variance_ratio_.sum() > 1e-9
        self.range_min = x_raw.min(axis=0)
        self.range_max = x_raw.max(axis=0)

    def judge(self, x_raw, out):
        """Verdicts (1 inside, 2 border, 3 outside, as the proto), typicality
        and the Z-rule flag of a batch."""
        s, n = self.s, len(self.loo)
        d = out["knn_distance"]
        typ = (1 + n - np.searchsorted(self.loo, d, side="left")) / (n + 1)
        q, lev = out["pca_residual"], out["leverage"]
        beyond_z = d > self.z_threshold
        outside = typ < s["typicality_outside"]
        border = (typ < s["typicality_border"]) | beyond_z
        if self.residual_meaningful:
            outside |= q > self.outside_limit
            border |= q > self.border_limit
        if self.leverage_meaningful:
            border |= lev > self.leverage_warning
        border |= np.any((x_raw < self.range_min) | (x_raw > self.range_max), axis=1)
        verdict = np.where(outside, 3, np.where(border, 2, 1))
        return verdict, typ, beyond_z


class Audit:
    """One request = one transaction, committed before the answer."""

    def __init__(self, path):
        self.db = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
        mode = self.db.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if mode != "wal":
            raise SystemExit(f"audit store {path}: journal mode is {mode}, not WAL; use a local file system")
        self.db.execute("PRAGMA synchronous = FULL")
        self.db.executescript("""
            CREATE TABLE IF NOT EXISTS requests (
                request_id TEXT PRIMARY KEY, time_us INTEGER NOT NULL, peer TEXT,
                model_id TEXT NOT NULL, batch_label TEXT NOT NULL, confidence REAL NOT NULL,
                n_candidates INTEGER NOT NULL, n_scored INTEGER NOT NULL,
                n_refused INTEGER NOT NULL, n_rejected INTEGER NOT NULL);
            CREATE TABLE IF NOT EXISTS candidates (
                record_id TEXT NOT NULL, request_id TEXT NOT NULL REFERENCES requests(request_id),
                position INTEGER NOT NULL, candidate_id TEXT NOT NULL, status TEXT NOT NULL,
                prediction REAL, lower REAL, upper REAL, confidence REAL NOT NULL,
                verdict TEXT, knn_distance REAL, typicality REAL, beyond_z_threshold INTEGER,
                leverage REAL, pca_residual REAL, rank INTEGER NOT NULL, reason TEXT NOT NULL,
                descriptor_sha256 TEXT NOT NULL, descriptors BLOB);
            CREATE INDEX IF NOT EXISTS candidates_by_record ON candidates(record_id);
        """)
        self.lock = threading.Lock()
        self.next_id = 0

    def new_request_id(self):
        with self.lock:
            self.next_id += 1
            return f"{self.next_id:016x}"

    def commit(self, request_row, candidate_rows):
        with self.lock:
            self.db.execute("BEGIN")
            try:
                self.db.execute("INSERT INTO requests VALUES (?,?,?,?,?,?,?,?,?,?)", request_row)
                self.db.executemany(
                    "INSERT INTO candidates VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
                    candidate_rows,
                )
                self.db.execute("COMMIT")
            except BaseException:
                self.db.execute("ROLLBACK")
                raise


STATUS_NAME = {1: "scored", 3: "refused", 4: "rejected"}
VERDICT_NAME = {1: "inside", 2: "border", 3: "outside"}


def make_servicer(pb, rpc, pipe, domain, audit, p, default_confidence):
    class Scoring(rpc.ScoringServicer):
        def Score(self, request, context):
            if request.model not in ("", MODEL_ID):
                context.abort(grpc.StatusCode.NOT_FOUND, f"unknown model {request.model!r}; this server has {MODEL_ID!r}")
            conf = request.confidence or default_confidence
            if not 0.5 <= conf <= 0.99:
                context.abort(grpc.StatusCode.INVALID_ARGUMENT, f"confidence {conf} is outside [0.5, 0.99]")
            if request.descriptor_names:
                context.abort(grpc.StatusCode.INVALID_ARGUMENT, "descriptor_names are not supported here: send values in training order")
            cands = request.candidates
            reasons = [""] * len(cands)
            seen = set()
            for i, c in enumerate(cands):
                if not c.id:
                    reasons[i] = "empty candidate id"
                elif c.id in seen:
                    reasons[i] = f"duplicate candidate id {c.id!r}"
                elif len(c.descriptors) != p:
                    reasons[i] = f"{len(c.descriptors)} descriptor values, the model needs {p}"
                seen.add(c.id)
            good = [i for i, r in enumerate(reasons) if not r]
            x = np.fromiter(
                itertools.chain.from_iterable(cands[i].descriptors for i in good),
                dtype=float,
                count=len(good) * p,
            ).reshape(len(good), p)
            finite = np.isfinite(x).all(axis=1)
            for j in np.flatnonzero(~finite):
                reasons[good[j]] = "a descriptor value is not a finite number"
            keep = np.flatnonzero(finite)
            good = [good[j] for j in keep]
            x = x[keep]
            out = pipe.score(x, conf) if len(good) else None
            rows = {}
            if out is not None:
                verdict, typ, beyond_z = domain.judge(x, out)
                status = np.where(verdict == 3, 3, 1)
                ranked = np.flatnonzero(status == 1)
                order = ranked[np.argsort(-out["prediction"][ranked], kind="stable")]
                rank = np.zeros(len(good), dtype=np.int64)
                rank[order] = np.arange(1, len(order) + 1)
                cols = [a.tolist() for a in (
                    out["prediction"], out["lower"], out["upper"], out["knn_distance"], typ,
                    out["leverage"], out["pca_residual"], verdict, status, rank, beyond_z,
                )]
                for j, i in enumerate(good):
                    rows[i] = (x[j], *(c[j] for c in cols))
            request_id = audit.new_request_id()
            results, records = [], []
            counts = {1: 0, 3: 0, 4: 0}
            for i, c in enumerate(cands):
                record_id = f"{request_id}-{i}"
                if i not in rows:
                    counts[4] += 1
                    values = np.asarray(c.descriptors, dtype=float).tobytes()
                    records.append((record_id, request_id, i, c.id, "rejected", None, None, None, conf,
                                    None, None, None, None, None, None, 0, reasons[i],
                                    hashlib.sha256(values).hexdigest(), values))
                    results.append(pb.ScoredCandidate(id=c.id, record_id=record_id, status=4, reason=reasons[i]))
                    continue
                xr, pred, lo, up, knn, ty, lev, q, v, st, rk, bz = rows[i]
                counts[st] += 1
                values = xr.tobytes()
                refused = st == 3
                lo_ok, up_ok = lo == lo, up == up  # NaN: that side is unbounded
                records.append((
                    record_id, request_id, i, c.id, STATUS_NAME[st],
                    None if refused else pred,
                    None if refused or not lo_ok else lo,
                    None if refused or not up_ok else up,
                    conf, VERDICT_NAME[v], knn, ty, int(bz), lev, q, rk, "",
                    hashlib.sha256(values).hexdigest(), values if refused else None,
                ))
                report = pb.DomainReport(
                    verdict=v, knn_distance=knn, typicality=ty, beyond_z_threshold=bz,
                    leverage=lev, leverage_warning=domain.leverage_warning,
                    pca_residual=q, pca_residual_limit=domain.outside_limit,
                    pca_residual_border_limit=domain.border_limit,
                )
                if refused:
                    results.append(pb.ScoredCandidate(id=c.id, record_id=record_id, status=3, domain=report))
                    continue
                sc = pb.ScoredCandidate(
                    id=c.id, record_id=record_id, status=1, prediction=pred, domain=report,
                    rank=rk, lower_unbounded=not lo_ok, upper_unbounded=not up_ok, calibration="pooled",
                )
                if lo_ok:
                    sc.lower = lo
                if up_ok:
                    sc.upper = up
                results.append(sc)
            audit.commit(
                (request_id, time.time_ns() // 1000, context.peer(), MODEL_ID, request.batch_label, conf,
                 len(cands), counts[1], counts[3], counts[4]),
                records,
            )
            return pb.ScoreResponse(model=MODEL_ID, request_id=request_id, results=results, confidence=conf)

    return Scoring()


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("dir", type=pathlib.Path)
    ap.add_argument("--port", type=int, default=0)
    ap.add_argument("--threads", type=int, default=4)
    ap.add_argument("--audit", type=pathlib.Path, default=None)
    ap.add_argument("--port-file", type=pathlib.Path, default=None)
    args = ap.parse_args()
    spec = json.loads((args.dir / "service_model.json").read_text())
    x, y = pipeline.read_table(args.dir / "score_train.csv")
    t = time.perf_counter()
    pipe = pipeline.ScoringPipeline(
        x, y, spec["fold_of"], spec["k"], spec["hyper"], spec["pca_components"], spec["domain"]["k"]
    )
    # The offline pipeline searches neighbours with n_jobs=2; per request
    # that dispatch costs about 19 ms for a single candidate (measured here:
    # 2 ms with n_jobs=1), so a server runs its searches on one thread each
    # and gets its parallelism from the worker pool. Same search, same
    # results.
    pipe.nn.set_params(n_jobs=1)
    domain = Domain(pipe, x, spec["domain"])
    print(f"reference server: fitted in {time.perf_counter() - t:.1f} s", file=sys.stderr)
    audit_path = args.audit or args.dir / "reference-audit.db"
    for suffix in ("", "-wal", "-shm"):
        pathlib.Path(f"{audit_path}{suffix}").unlink(missing_ok=True)
    audit = Audit(str(audit_path))
    with tempfile.TemporaryDirectory(prefix="plumbline-stubs-") as tmp:
        pb, rpc = load_stubs(tmp)
        limit = 64 << 20
        server = grpc.server(
            futures.ThreadPoolExecutor(max_workers=args.threads),
            options=[("grpc.max_receive_message_length", limit), ("grpc.max_send_message_length", limit)],
        )
        rpc.add_ScoringServicer_to_server(
            make_servicer(pb, rpc, pipe, domain, audit, x.shape[1], spec["confidence"]), server
        )
        port = server.add_insecure_port(f"127.0.0.1:{args.port}")
        if port == 0:
            raise SystemExit(f"cannot listen on 127.0.0.1:{args.port}: choose a free port or 0")
        server.start()
        if args.port_file:
            args.port_file.write_text(f"{port}\n")
        print(f"PORT {port}", flush=True)
        sys.stdin.read()
        server.stop(grace=2).wait()


if __name__ == "__main__":
    main()
