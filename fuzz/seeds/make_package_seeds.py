#!/usr/bin/env python3
"""Writes the small package seeds of the `package` fuzz target into fuzz/seeds/package/.

The packages are written here with the standard library only (struct, json), as the safetensors
format describes them, not with switchyard's writer, so the seeds also carry layouts our writer
does not produce: a header without padding, metadata keys out of order, a classify head, a rank-1
factor pair. The reference fixtures tests/reference/fixtures/tiny-llama-qv.safetensors and
tiny-llama-bias-tied-qv.safetensors are copied beside them (they were written by
tests/reference/generate.py). Run from anywhere: python3 fuzz/seeds/make_package_seeds.py
"""

import json
import shutil
import struct
from pathlib import Path

HERE = Path(__file__).resolve().parent
OUT = HERE / "package"
FIXTURES = HERE.parent.parent / "tests" / "reference" / "fixtures"
# The tiny reference decoder's fingerprint (tests/reference/fixtures/tiny-llama), so these
# seeds also pass the target's validation against it: hidden size 64, q and v are [64, 64] and
# [32, 64].
TINY_LLAMA = "5754de3c2ddde7e7"


def package(metadata, tensors, pad=True):
    """safetensors bytes: u64 header length, JSON header, f32 little-endian data in order."""
    header = {"__metadata__": metadata}
    data = b""
    for name, shape, values in tensors:
        n = 1
        for d in shape:
            n *= d
        assert len(values) == n, name
        begin = len(data)
        data += struct.pack(f"<{n}f", *values)
        header[name] = {"dtype": "F32", "shape": shape, "data_offsets": [begin, len(data)]}
    text = json.dumps(header, separators=(",", ":")).encode()
    if pad:
        text += b" " * (-(8 + len(text)) % 8)
    return struct.pack("<Q", len(text)) + text + data


def ramp(n, scale):
    return [scale * ((i % 7) - 3) for i in range(n)]


def main():
    OUT.mkdir(exist_ok=True)
    for name in ["tiny-llama-qv.safetensors", "tiny-llama-bias-tied-qv.safetensors"]:
        shutil.copyfile(FIXTURES / name, OUT / name)
    classify = package(
        {
            "task": "classify",
            "rank": "1",
            "alpha": "2",
            "format_version": "1",
            "base_fingerprint": TINY_LLAMA,
            "labels": '["no","yes"]',
            "description": "fuzz seed: rank-1 q and a two-label head",
        },
        [
            ("layers.0.attn.q.A", [1, 64], ramp(64, 0.125)),
            ("layers.0.attn.q.B", [64, 1], ramp(64, 0.25)),
            ("head.weight", [2, 64], ramp(128, 0.5)),
            ("head.bias", [2], [0.5, -0.5]),
        ],
    )
    (OUT / "classify-head.safetensors").write_bytes(classify)
    embed = package(
        {
            "format_version": " 1",
            "base_fingerprint": TINY_LLAMA,
            "rank": "2",
            "alpha": "0.5",
            "task": "embed",
            "description": "fuzz seed: rank-2 v on layer 1, \u00e9t\u00e9",
        },
        [
            ("layers.1.attn.v.B", [32, 2], ramp(64, 1.0)),
            ("layers.1.attn.v.A", [2, 64], ramp(128, -0.75)),
        ],
        pad=False,
    )
    (OUT / "embed-unpadded.safetensors").write_bytes(embed)


if __name__ == "__main__":
    main()
