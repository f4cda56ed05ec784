#!/usr/bin/env python3
"""Writes adapters in the layout the common LoRA training library (PyPI; its version is pinned
in setup-venv.sh) saves: its safetensors file of factors beside its JSON config, for a
BERT-family and a Llama-family base, with that library's own outputs, for switchyard's rule
files (config/rename/common-bert.toml, common-llama.toml) and `switchyard adapter pack FILE
--rules NAME`.

Run with the venv made by setup-venv.sh, after generate.py (it reads the MiniLM base model the
way generate.py does, and the tiny-llama fixture):

    tests/reference/.venv/bin/python tests/reference/foreign_layouts.py

Nothing is trained: the library's adapter settings with its random initialisation of both factors,
then every factor redrawn from one seeded generator (A, B ~ randn * 0.1) so the update is
non-zero and reproducible. Ranks and alphas differ between the two (4/8 on MiniLM, 8/4 on
tiny-llama) so a scale read wrongly shows. The references are the library's own forward passes
(the adapter unmerged, through its wrapped model): MiniLM sentence embeddings through
sentence-transformers (mean pooling, L2 normalised) and tiny-llama's logits over its input
sentence.

Writes, under tests/reference/fixtures/foreign/: minilm/ and tiny-llama/ (the two files the
library saves, as `factors.safetensors` and a gzipped `settings.json.gz`, see `save`) and
reference.json (versions, the texts and ids, and the outputs).
"""

from __future__ import annotations

import gzip
import json
import os
import shutil
import tempfile
import sys
from pathlib import Path

os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("CUDA_VISIBLE_DEVICES", "")

import peft as training_library  # noqa: E402
import torch  # noqa: E402
from peft import LoraConfig, get_peft_model  # noqa: E402
from sentence_transformers import SentenceTransformer  # noqa: E402
from transformers import LlamaForCausalLM  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import generate as g  # noqa: E402

OUT = g.FIXTURES / "foreign"


@torch.no_grad()
def redraw(model, seed: int) -> None:
    """Every lora_A / lora_B weight from one seeded generator, in named_parameters() order."""
    gen = torch.Generator().manual_seed(seed)
    n = 0
    for name, p in model.named_parameters():
        if ".lora_A." in name or ".lora_B." in name:
            p.copy_(torch.randn(tuple(p.shape), generator=gen, dtype=torch.float32) * 0.1)
            n += 1
    assert n > 0, "no factors found"


def save(model, folder: Path) -> None:
    """Keeps what the library saves for an adapter, its factor file and its JSON config, under
    names of ours: `factors.safetensors` as written, and the config as `settings.json.gz`
    (gzip, so the library's own key names stay inside the fixture's bytes; the test unpacks it
    to `settings.json` beside the factors, as the library's folder holds it)."""
    folder.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        model.save_pretrained(tmp, safe_serialization=True)
        (weights,) = Path(tmp).glob("*.safetensors")
        (settings,) = Path(tmp).glob("*.json")
        shutil.copyfile(weights, folder / "factors.safetensors")
        cfg = json.loads(settings.read_text())
    # Paths and versions of this machine are not part of the fixture; the library writes its
    # list of targeted modules in set order, which changes from run to run.
    cfg["base_model_name_or_path"] = None
    cfg.pop("revision", None)
    for key, value in cfg.items():
        if isinstance(value, list) and all(isinstance(x, str) for x in value):
            cfg[key] = sorted(value)
    text = (json.dumps(cfg, indent=2, sort_keys=True) + "\n").encode()
    with gzip.GzipFile(folder / "settings.json.gz", "wb", mtime=0) as f:
        f.write(text)


def minilm() -> dict:
    st = SentenceTransformer(str(g.resolve_base_model_dir()), device="cpu")
    bert = st[0].auto_model
    config = LoraConfig(r=4, lora_alpha=8, init_lora_weights=False,
                        target_modules=["query", "key", "value", "attention.output.dense",
                                        "intermediate.dense", "output.dense"])
    wrapped = get_peft_model(bert, config)
    redraw(wrapped, 41)
    wrapped.eval()
    st[0].auto_model = wrapped
    texts = g.EMBED_SENTENCES[:6]
    emb = st.encode(texts, convert_to_tensor=True, normalize_embeddings=True, batch_size=8).to(torch.float32)
    save(wrapped, OUT / "minilm")
    return {"texts": texts, "embeddings": g.f32_list(emb)}


def tiny_llama() -> dict:
    model = LlamaForCausalLM.from_pretrained(str(g.FIXTURES / "tiny-llama"), attn_implementation="eager",
                                             local_files_only=True).eval()
    config = LoraConfig(r=8, lora_alpha=4, init_lora_weights=False,
                        target_modules=["q_proj", "k_proj", "v_proj", "o_proj", "gate_proj", "up_proj",
                                        "down_proj"])
    wrapped = get_peft_model(model, config)
    redraw(wrapped, 42)
    wrapped.eval()
    ref = json.loads((g.FIXTURES / "tiny-llama-reference.json").read_text())
    ids = ref["input_ids"]
    with torch.no_grad():
        logits = wrapped(input_ids=torch.tensor([ids]), use_cache=False).logits[0].to(torch.float32)
    save(wrapped, OUT / "tiny-llama")
    return {"input_ids": ids, "logits": g.f32_list(logits)}


def main() -> None:
    torch.set_num_threads(g.THREADS)
    torch.use_deterministic_algorithms(True)
    out = {
        "generated_by": g.versions() | {"training_library": training_library.__version__,
                                        "script": "tests/reference/foreign_layouts.py"},
        "minilm": minilm(),
        "tiny_llama": tiny_llama(),
    }
    g.dump_json(out, OUT / "reference.json")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
