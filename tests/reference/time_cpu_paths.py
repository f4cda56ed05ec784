#!/usr/bin/env python3
"""Torch's side of the CPU fast-path benchmark (server/benches/cpu_paths.rs), on the same inputs,
with torch.set_num_threads(2):

- the MiniLM encoder on one batch of 32 rows x exactly 64 tokens (the first 32 lines of
  fixtures/bench-inputs.txt, tokenised, then cut or padded to 64 tokens the way the Rust benchmark
  does: padding repeats the last token before [SEP]; every mask entry is 1), through the
  transformers BertModel that sentence-transformers wraps, then mean pooling and L2 normalisation;
- the same with the model in bfloat16 (`model.to(torch.bfloat16)`, pooling in f32): the row
  switchyard's bf16 weights are compared with;
- merging a rank-16 update into a 2048 x 2048 f32 matrix in place: W.addmm_(B, A, alpha=s).

    tests/reference/.venv/bin/python tests/reference/time_cpu_paths.py [--rounds N]

Model loading and one warm-up pass are not timed. The last stdout line is one JSON object with
medians: {"encoder_rows_per_s": ..., "encoder_bf16_rows_per_s": ..., "addmm_2048_r16_ms": ...}.
scripts/bench-cpu runs this and the Rust benchmark in turns and prints their ratios.
"""

from __future__ import annotations

import argparse
import copy
import json
import statistics
import sys
import time

from local_setup import HERE, THREADS, base_model_dir  # before torch: it sets the CPU-only environment

import torch  # noqa: E402
from sentence_transformers import SentenceTransformer  # noqa: E402

BATCH = 32
TOKENS = 64


def encoder_inputs(model: SentenceTransformer) -> tuple[torch.Tensor, torch.Tensor]:
    lines = (HERE / "fixtures" / "bench-inputs.txt").read_text().splitlines()[:BATCH]
    rows = []
    for ids in model.tokenizer(lines)["input_ids"]:
        ids = list(ids)
        if len(ids) >= TOKENS:
            ids = ids[:TOKENS]
        else:
            ids = ids + [ids[-2]] * (TOKENS - len(ids))
        rows.append(ids)
    ids = torch.tensor(rows, dtype=torch.long)
    return ids, torch.ones_like(ids)


def cpu_bf16() -> list[str]:
    """The CPU's bf16 features as /proc/cpuinfo names them (torch's bf16 speed depends on them)."""
    try:
        flags = next(l for l in open("/proc/cpuinfo") if l.startswith("flags")).split()
    except (OSError, StopIteration):
        return []
    return [f for f in flags if f in ("avx512_bf16", "amx_bf16", "amx_tile", "amx_int8", "avx512_vnni")]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rounds", type=int, default=5, help="timed encoder batches")
    args = ap.parse_args()

    torch.set_num_threads(THREADS)
    model_dir = base_model_dir("time_cpu_paths")
    st = SentenceTransformer(str(model_dir), device="cpu", local_files_only=True)
    st.eval()
    bert = st[0].auto_model
    ids, mask = encoder_inputs(st)

    def encode(model=bert) -> float:
        t0 = time.perf_counter()
        hidden = model(input_ids=ids, attention_mask=mask).last_hidden_state.float()
        m = mask.unsqueeze(-1).to(hidden.dtype)
        pooled = (hidden * m).sum(1) / m.sum(1).clamp(min=1e-9)
        out = torch.nn.functional.normalize(pooled, p=2, dim=1)
        dt = time.perf_counter() - t0
        assert out.shape == (BATCH, 384), out.shape
        return dt

    g = torch.Generator().manual_seed(5)
    w = torch.randn(2048, 2048, generator=g) * 0.02
    b = torch.randn(2048, 16, generator=g) * 0.05
    a = torch.randn(16, 2048, generator=g) * 0.05

    def addmm() -> float:
        t0 = time.perf_counter()
        w.addmm_(b, a, alpha=2.0)
        return time.perf_counter() - t0

    with torch.inference_mode():
        encode()  # warm-up
        addmm()
        enc = [encode() for _ in range(args.rounds)]
        mm = [addmm() for _ in range(max(args.rounds, 5) * 20)]
        # A bf16 copy after the f32 timings (the copy is not timed).
        bert_bf16 = copy.deepcopy(bert).to(torch.bfloat16)
        encode(bert_bf16)  # warm-up
        enc_bf16 = [encode(bert_bf16) for _ in range(args.rounds)]
    e, m = statistics.median(enc), statistics.median(mm)
    e16 = statistics.median(enc_bf16)
    print(f"time_cpu_paths: encoder batch seconds {[round(t, 4) for t in enc]}", file=sys.stderr)
    print(json.dumps({
        "encoder_rows_per_s": round(BATCH / e, 2),
        "encoder_batch_ms": round(e * 1e3, 3),
        "encoder_bf16_rows_per_s": round(BATCH / e16, 2),
        "encoder_bf16_batch_ms": round(e16 * 1e3, 3),
        "cpu_bf16": cpu_bf16(),
        "addmm_2048_r16_ms": round(m * 1e3, 4),
        "threads": torch.get_num_threads(),
        "torch": torch.__version__,
        "rounds": args.rounds,
    }))


if __name__ == "__main__":
    main()
