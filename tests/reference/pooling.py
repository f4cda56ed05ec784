#!/usr/bin/env python3
"""Writes tests/reference/fixtures/pooling-reference.json: sentence-transformers' embeddings of
the MiniLM base model with its pooling files changed (CLS token without normalising, last token
normalised, mean without normalising), for switchyard's check that it reads the pooling from a
model folder's own sentence-transformers files.

Run with the venv made by setup-venv.sh (it reads the base model the way generate.py does):

    tests/reference/.venv/bin/python tests/reference/pooling.py

For each variant a copy of the model folder gets the variant's `modules.json` and
`1_Pooling/config.json` (both stored in the fixture, so the Rust test writes the same files),
and SentenceTransformer(folder).encode runs on the first six embed sentences of generate.py.
"""

from __future__ import annotations

import json
import os
import shutil
import sys
import tempfile
from pathlib import Path

os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("CUDA_VISIBLE_DEVICES", "")

import torch  # noqa: E402
from sentence_transformers import SentenceTransformer  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import generate as g  # noqa: E402

TRANSFORMER = {"idx": 0, "name": "0", "path": "", "type": "sentence_transformers.models.Transformer"}
POOLING = {"idx": 1, "name": "1", "path": "1_Pooling", "type": "sentence_transformers.models.Pooling"}
NORMALIZE = {"idx": 2, "name": "2", "path": "2_Normalize", "type": "sentence_transformers.models.Normalize"}


def pooling_config(mode: str) -> dict:
    return {
        "word_embedding_dimension": 384,
        "pooling_mode_cls_token": mode == "cls",
        "pooling_mode_mean_tokens": mode == "mean",
        "pooling_mode_max_tokens": False,
        "pooling_mode_mean_sqrt_len_tokens": False,
        "pooling_mode_weightedmean_tokens": False,
        "pooling_mode_lasttoken": mode == "lasttoken",
        "include_prompt": True,
    }


VARIANTS = {
    "cls-raw": ("cls", False),
    "last-token-normalised": ("lasttoken", True),
    "mean-raw": ("mean", False),
}


def main() -> None:
    torch.set_num_threads(g.THREADS)
    base = g.resolve_base_model_dir()
    texts = g.EMBED_SENTENCES[:6]
    out = {"generated_by": g.versions() | {"script": "tests/reference/pooling.py"}, "texts": texts,
           "variants": {}}
    with tempfile.TemporaryDirectory() as tmp:
        for name, (mode, normalise) in VARIANTS.items():
            folder = Path(tmp) / name
            shutil.copytree(base, folder)
            modules = [TRANSFORMER, POOLING] + ([NORMALIZE] if normalise else [])
            (folder / "modules.json").write_text(json.dumps(modules, indent=2))
            (folder / "1_Pooling" / "config.json").write_text(json.dumps(pooling_config(mode), indent=2))
            if not normalise:
                shutil.rmtree(folder / "2_Normalize", ignore_errors=True)
            st = SentenceTransformer(str(folder), device="cpu")
            emb = st.encode(texts, convert_to_tensor=True, batch_size=8).to(torch.float32)
            norms = emb.norm(dim=1)
            print(f"[{name}] {st}; norms {[round(float(n), 4) for n in norms]}")
            out["variants"][name] = {
                "modules": modules,
                "pooling_config": pooling_config(mode),
                "embeddings": g.f32_list(emb),
            }
    g.dump_json(out, g.FIXTURES / "pooling-reference.json")
    print("wrote", g.FIXTURES / "pooling-reference.json")


if __name__ == "__main__":
    main()
