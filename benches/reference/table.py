"""Prints the side-by-side table from DIR/plumbline.json and
DIR/reference.json: medians over the repetitions and the ratios, each
measured in the same run, with the targets of the performance issue.
The service rows come from plumbline.json alone: the compare bench drives
both servers (plumbline and benches/reference/serve.py) itself. Parts not
run are left out; reference.json may be absent when only the service part
ran.

Usage: python3 benches/reference/table.py DIR
"""

import json
import pathlib
import platform
import statistics
import sys


def cpu_model():
    try:
        for line in pathlib.Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown CPU"


def main():
    d = pathlib.Path(sys.argv[1])
    ours = json.loads((d / "plumbline.json").read_text())
    ref_path = d / "reference.json"
    ref = json.loads(ref_path.read_text()) if ref_path.exists() else {}
    med = statistics.median
    rows = []
    sc, rsc = ours.get("scoring"), ref.get("scoring")
    if sc and rsc:
        for name, target in [("ridge", 20.0), ("kernel_ridge", 3.0)]:
            a, b = sc["models"][name], rsc[name]
            ratio = a["candidates_per_s"] / b["candidates_per_s"]
            rows.append((
                f"offline scoring, {name.replace('_', ' ')} (candidates/s)",
                f"{a['candidates_per_s']:,.0f}", f"{b['candidates_per_s']:,.0f}",
                f"{ratio:.1f}×", f"≥ {target:g}×", "met" if ratio >= target else "missed",
            ))
    fit, rfit = ours.get("fit"), ref.get("fit")
    if fit and rfit:
        a, b = med(fit["seconds"]), med(rfit["seconds"])
        ratio = b / a
        rows.append((
            "fit: nested 5 × 5 kernel ridge search (s)",
            f"{a:.1f}", f"{b:.1f}", f"{ratio:.1f}×", "≥ 3×", "met" if ratio >= 3 else "missed",
        ))
    gemm = ours.get("gemm")
    peak = max(g["gflops_per_s"] for g in gemm) if gemm else None
    if gemm:
        for g in gemm:
            rows.append((
                f"f64 GEMM {g['m']}×{g['k']}·{g['k']}×{g['n']} (GFLOP/s)",
                f"{g['gflops_per_s']:.1f}", "", "", "", "",
            ))
    if sc and peak:
        kr = sc["models"]["kernel_ridge"]
        frac = kr["gflops_per_s"] / peak
        rows.append((
            "kernel ridge batch scoring (GFLOP/s, share of GEMM)",
            f"{kr['gflops_per_s']:.1f} ({frac:.0%})", "", "", "≥ 50%", "met" if frac >= 0.5 else "missed",
        ))
        pfrac = kr["predictor_gflops_per_s"] / peak
        rows.append((
            "  of which the predictor alone (GFLOP/s, share)",
            f"{kr['predictor_gflops_per_s']:.1f} ({pfrac:.0%})", "", "", "", "",
        ))
    svc = ours.get("service")
    if svc:
        a, b = svc["plumbline"], svc["python"]
        ratio = a["candidates_per_s"] / b["candidates_per_s"]
        rows.append((
            f"service, batches of {svc['batch']:,} from {svc['clients']} clients (candidates/s)",
            f"{a['candidates_per_s']:,.0f}", f"{b['candidates_per_s']:,.0f}",
            f"{ratio:.1f}×", "≥ 10×", "met" if ratio >= 10 else "missed",
        ))
        if "cpu_us_per_candidate" in a:
            # CPU time per candidate: the cost of the work, whatever share of
            # a loaded machine each server got.
            rows.append((
                "  server CPU per candidate in those batches (µs)",
                f"{a['cpu_us_per_candidate']:.0f}", f"{b['cpu_us_per_candidate']:.0f}",
                f"{b['cpu_us_per_candidate'] / a['cpu_us_per_candidate']:.1f}×", "", "",
            ))
        for q in ("p50", "p99"):
            target = "< 2 ms" if q == "p99" else ""
            verdict = ("met" if a["p99_ms"] < 2.0 else "missed") if q == "p99" else ""
            rows.append((
                f"service, single-candidate unary {q} (ms)",
                f"{a[q + '_ms']:.2f}", f"{b[q + '_ms']:.2f}",
                f"{b[q + '_ms'] / a[q + '_ms']:.1f}×", target, verdict,
            ))
    head = ("measure", "plumbline", "reference", "ratio", "target", "")
    widths = [max(len(r[i]) for r in rows + [head]) for i in range(6)]
    line = lambda r: "| " + " | ".join(c.ljust(w) for c, w in zip(r, widths)) + " |"
    print(f"machine: {cpu_model()}, {ours.get('threads')} threads; medians of {ours.get('reps')} runs")
    print("reference: scikit-learn + numpy + scipy; for the service, a Python grpcio server over the same pipeline")
    print(line(head))
    print("|" + "|".join("-" * (w + 2) for w in widths) + "|")
    for r in rows:
        print(line(r))
    if sc and rsc:
        worst = max(
            v["max_rel_diff"] for m in rsc.values() for v in m["agreement"].values()
        )
        print(f"agreement, offline scoring: largest relative difference {worst:.1e} (tolerance 1e-9)")
    if svc:
        outputs = svc["agreement"]["outputs"].values()
        worst = max(v["max_rel_diff"] for v in outputs)
        tol = max(v["tolerance"] for v in outputs)
        statuses = ", ".join(f"{n} {k.lower()}" for k, n in svc["agreement"]["statuses"].items())
        print(
            f"agreement, service: {svc['agreement']['candidates']:,} candidates ({statuses}) with equal "
            f"status, verdict and rank; outputs within {worst:.1e} (tolerance {tol:g}); "
            f"audit store on in both; Python server: {svc['python_threads']} worker threads"
        )
    if rfit:
        ag = rfit["agreement"]
        print(
            "agreement, fit: same chosen settings in every outer fold and the final selection; "
            f"outer-test predictions within {ag['outer_prediction_max_rel_diff']:.1e} (tolerance {ag['tolerance']:g})"
        )


if __name__ == "__main__":
    main()
