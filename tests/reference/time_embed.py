#!/usr/bin/env python3
"""Peer timing for switchyard's embedding path: sentence-transformers all-MiniLM-L6-v2 on CPU with two
torch threads, encoding the 256 lines of fixtures/bench-inputs.txt with batch_size=32.

    tests/reference/.venv/bin/python tests/reference/time_embed.py [--repeats N]

Process start-up, imports and model loading are not timed; one full warm-up pass runs first. Each of
the timed passes encodes all 256 lines; rows_per_s is 256 / the median pass time. The last stdout line
is one JSON object: {"rows": 256, "rows_per_s": ..., "threads": 2, "torch": "...", ...}.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time

from local_setup import HERE, THREADS, base_model_dir  # before torch: it sets the CPU-only environment

import torch  # noqa: E402
from sentence_transformers import SentenceTransformer  # noqa: E402



def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=5, help="timed passes over all 256 lines")
    args = ap.parse_args()

    torch.set_num_threads(THREADS)
    model_dir = base_model_dir("time_embed")
    lines = (HERE / "fixtures" / "bench-inputs.txt").read_text().splitlines()
    assert len(lines) == 256, len(lines)

    model = SentenceTransformer(str(model_dir), device="cpu", local_files_only=True)
    model.eval()
    counts = [len(ids) for ids in model.tokenizer(lines)["input_ids"]]
    mean_tokens = sum(counts) / len(counts)
    print(f"time_embed: {len(lines)} lines, mean {mean_tokens:.2f} MiniLM tokens (with [CLS]/[SEP]), "
          f"max {max(counts)}", file=sys.stderr)

    def run() -> float:
        t0 = time.perf_counter()
        out = model.encode(lines, batch_size=32, show_progress_bar=False, convert_to_numpy=True)
        dt = time.perf_counter() - t0
        assert out.shape == (256, 384), out.shape
        return dt

    with torch.inference_mode():
        run()  # warm-up
        times = [run() for _ in range(args.repeats)]
    med = statistics.median(times)
    print(f"time_embed: pass seconds {[round(t, 3) for t in times]}", file=sys.stderr)
    print(json.dumps({
        "rows": len(lines),
        "rows_per_s": round(len(lines) / med, 2),
        "threads": torch.get_num_threads(),
        "torch": torch.__version__,
        "batch_size": 32,
        "repeats": args.repeats,
        "median_pass_s": round(med, 4),
        "best_rows_per_s": round(len(lines) / min(times), 2),
        "mean_tokens": round(mean_tokens, 2),
    }))


if __name__ == "__main__":
    main()
