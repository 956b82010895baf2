"""Checks that the fixtures the reference scripts just wrote match the
committed ones, then puts the committed ones back.

Text equality is too strict across machines: numpy and scipy call OpenBLAS,
which picks its kernels by CPU (AVX2 on one, AVX-512 on another), and an
ill-conditioned value such as a kernel ridge dual coefficient can then move
in its tenth significant digit, the last one the scripts keep. So numbers
must agree to a relative 1e-8 (absolute 1e-12 near zero), about a hundred
times the 10-digit rounding, and everything else (keys, lengths, strings,
CSV text) exactly. The committed files are restored so the Rust tests
always read the same values.

Run from the repository root after the scripts: python3 .ci/check-fixtures.py
"""

import json
import math
import pathlib
import subprocess
import sys

REL = 1e-8
ABS = 1e-12
FIXTURES = pathlib.Path("tests/fixtures")


def committed(path):
    return subprocess.run(
        ["git", "show", f"HEAD:{path.as_posix()}"],
        check=True,
        capture_output=True,
        text=True,
    ).stdout


def compare(old, new, where, out):
    if isinstance(old, bool) or isinstance(new, bool):
        if old is not new:
            out.append(f"{where}: {old!r} became {new!r}")
    elif isinstance(old, (int, float)) and isinstance(new, (int, float)):
        same = math.isclose(old, new, rel_tol=REL, abs_tol=ABS)
        if not (same or (math.isnan(old) and math.isnan(new))):
            out.append(f"{where}: {old!r} became {new!r}")
    elif isinstance(old, dict) and isinstance(new, dict):
        if old.keys() != new.keys():
            out.append(f"{where}: keys {sorted(old)} became {sorted(new)}")
            return
        for key in old:
            compare(old[key], new[key], f"{where}.{key}", out)
    elif isinstance(old, list) and isinstance(new, list):
        if len(old) != len(new):
            out.append(f"{where}: length {len(old)} became {len(new)}")
            return
        for i, (a, b) in enumerate(zip(old, new)):
            compare(a, b, f"{where}[{i}]", out)
    elif old != new:
        out.append(f"{where}: {old!r} became {new!r}")


def main():
    problems = []
    tracked = subprocess.run(
        ["git", "ls-files", "--", FIXTURES.as_posix()],
        check=True,
        capture_output=True,
        text=True,
    ).stdout.split()
    untracked = subprocess.run(
        ["git", "ls-files", "--others", "--exclude-standard", "--", FIXTURES.as_posix()],
        check=True,
        capture_output=True,
        text=True,
    ).stdout.split()
    for path in untracked:
        problems.append(f"{path}: written by a script but not committed")
    for name in tracked:
        path = pathlib.Path(name)
        old_text, new_text = committed(path), path.read_text()
        if old_text == new_text:
            continue
        if path.suffix != ".json":
            problems.append(f"{path}: text differs (only JSON numbers may move)")
            continue
        found = []
        compare(json.loads(old_text), json.loads(new_text), path.name, found)
        if found:
            problems.extend(found)
        else:
            print(f"{path}: numbers moved within {REL:g} relative (BLAS kernels of this CPU)")
    subprocess.run(["git", "checkout", "--", FIXTURES.as_posix()], check=True)
    if problems:
        print("reference fixtures differ from what the scripts produce:", file=sys.stderr)
        for p in problems[:40]:
            print(f"  {p}", file=sys.stderr)
        if len(problems) > 40:
            print(f"  ... and {len(problems) - 40} more", file=sys.stderr)
        sys.exit(1)


if __name__ == "__main__":
    main()
