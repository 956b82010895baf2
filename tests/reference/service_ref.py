"""Reference values for the service and its audit store, computed with
Python's standard library on fixed inputs.

Writes tests/fixtures/service_reference.json:
- descriptor_hashes: hashlib's SHA-256 of descriptor rows packed as
  little-endian IEEE-754 doubles (struct.pack('<Nd')), the audit store's
  descriptor hash;
- grpc_frames: gRPC length-prefixed message headers (1-byte compression
  flag, 4-byte big-endian length; gRPC over HTTP/2 protocol spec) for a few
  lengths, built with struct.pack('>BI').

Values are given as exact decimal strings or hex so the Rust side compares
bit patterns, and the output is deterministic, so rerunning this script
reproduces the fixture byte for byte.

Run from the repository root: python3 tests/reference/service_ref.py
"""

import hashlib
import json
import struct
from pathlib import Path

OUT = Path(__file__).resolve().parents[1] / "fixtures" / "service_reference.json"

ROWS = [
    [],
    [0.0],
    [-0.0],
    [1.0, -2.5, 3.14159, 1e-300],
    [6.02214076e23, -1.602176634e-19, 2.0 ** -1074, 1.7976931348623157e308],
    [float(i) / 7.0 for i in range(200)],
]


def main():
    hashes = []
    for row in ROWS:
        packed = struct.pack("<%dd" % len(row), *row)
        hashes.append({
            # repr() of a Python float is the shortest string that reads
            # back to the same double.
            "values": [repr(v) for v in row],
            "bits": ["%016x" % struct.unpack("<Q", struct.pack("<d", v))[0] for v in row],
            "sha256": hashlib.sha256(packed).hexdigest(),
        })
    frames = []
    for length in [0, 1, 255, 65536, 16 * 1024 * 1024, 2 ** 32 - 1]:
        frames.append({"length": length, "header": struct.pack(">BI", 0, length).hex()})
    out = {"descriptor_hashes": hashes, "grpc_frames": frames}
    OUT.write_text(json.dumps(out, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
