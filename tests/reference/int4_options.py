#!/usr/bin/env python3
"""What other int4 rounding would give on MiniLM: a measurement, not a fixture.

    tests/reference/.venv/bin/python tests/reference/int4_options.py     # about 1 min

Rounds MiniLM's matrices (every projection and the token table, as switchyard holds them) to int4
in several ways, in numpy float32, runs sentence-transformers in f32 torch, and prints the least
cosine over the 8 reference sentences to the f32 embeddings (minilm-embeddings.json). "rtn" is
switchyard's rule today (kernels/src/pack/quant.rs); "mse" tries the scale times each of a few
factors per group and keeps the one with the least squared error; g16 uses groups of 16 inputs,
which switchyard's int4 kernels do not offer. None of these is what switchyard does unless it is
"rtn" with groups of 32 or 64.
"""

from __future__ import annotations

import copy
import json
import sys
from pathlib import Path

import numpy as np
import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))
import generate as g  # noqa: E402
import weight_formats as wf  # noqa: E402

F32 = np.float32
FACTORS = [1.0] + [x / 100 for x in range(70, 100, 2)] + [1.05, 1.1]


def searched(w: np.ndarray, group: int, zero_point: bool) -> np.ndarray:
    """int4 with f16 scales, each group's scale chosen among FACTORS x the plain one by least
    squared error."""
    out = np.empty_like(w)
    for a, b in wf.groups(w, group):
        part = w[:, a:b]
        best, best_err = None, None
        for f in FACTORS:
            if zero_point:
                lo = np.minimum(part.min(axis=1), 0) * F32(f)
                hi = np.maximum(part.max(axis=1), 0) * F32(f)
                s = ((hi - lo) / F32(15)).astype(F32)
            else:
                s = (np.abs(part).max(axis=1) / F32(7) * F32(f)).astype(F32)
            s = wf.f16_round(s)[:, None]
            safe = np.where(s == 0, F32(1), s)
            if zero_point:
                z = np.clip(np.rint(-lo[:, None] / safe), 0, 15)
                v = np.clip(np.rint(part / safe) + z, 0, 15) - z
            else:
                v = np.clip(np.rint(part / safe), -8, 7)
            r = (v * s).astype(F32)
            err = ((r - part) ** 2).sum(axis=1)
            if best is None:
                best, best_err = r.copy(), err
            else:
                better = err < best_err
                best[better] = r[better]
                best_err = np.where(better, err, best_err)
        out[:, a:b] = best
    return out


def main() -> None:
    torch.set_num_threads(g.THREADS)
    torch.use_deterministic_algorithms(True)
    ref = json.loads((g.FIXTURES / "minilm-embeddings.json").read_text())
    want = torch.tensor(ref["embeddings"])
    st = g.SentenceTransformer(str(g.resolve_base_model_dir()), device="cpu", local_files_only=True).eval()
    options = [
        ("rtn g32 symmetric (switchyard int4)", lambda w: wf.int4(w, 32, False, True)),
        ("rtn g32 zero point (switchyard int4-zero)", lambda w: wf.int4(w, 32, True, True)),
        ("mse g32 symmetric", lambda w: searched(w, 32, False)),
        ("mse g32 zero point", lambda w: searched(w, 32, True)),
        ("rtn g16 symmetric", lambda w: wf.int4(w, 16, False, True)),
        ("rtn g16 zero point", lambda w: wf.int4(w, 16, True, True)),
        ("mse g16 zero point", lambda w: searched(w, 16, True)),
    ]
    for name, fn in options:
        m = copy.deepcopy(st)
        bert = m[0].auto_model
        with torch.no_grad():
            for p in [lin.weight for lin in g.bert_linears(m).values()] + [bert.embeddings.word_embeddings.weight]:
                p.copy_(torch.from_numpy(fn(p.detach().numpy().astype(F32))))
        e = g.encode(m, ref["sentences"])
        print(f"{name}: least cosine {float((e * want).sum(dim=1).min()):.4f}", flush=True)


if __name__ == "__main__":
    main()
