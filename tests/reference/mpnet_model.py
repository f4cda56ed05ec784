#!/usr/bin/env python3
"""Writes tests/reference/fixtures/mpnet-embeddings.json: sentence-transformers' embeddings of the
real all-mpnet-base-v2 for a handful of sentences of our own (a town's seed library), for
switchyard's check that its MPNet runtime embeds a real checkpoint as the reference library does.
The model itself is never committed: scripts/fetch-mpnet.sh fetches it into models/ (this script
runs it when the folder is not there).

Run with the venv made by setup-venv.sh:

    tests/reference/.venv/bin/python tests/reference/mpnet_model.py

SentenceTransformer(folder).encode runs the folder's own modules (Transformer with
max_seq_length 384, mean pooling, Normalize) on CPU in f32, two threads, one batch (padded to
the longest). The sentences run from 7 to 143 tokens, so the longest reaches MPNet's relative
positions beyond its farthest bucket edge (128). The token ids the model's tokenizer gives (as
sentence-transformers calls it) are stored too, so a tokenizer difference shows up as itself.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("CUDA_VISIBLE_DEVICES", "")

import torch  # noqa: E402
from sentence_transformers import SentenceTransformer  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import generate as g  # noqa: E402

SENTENCES = [
    "Seed swap on Saturday.",
    "Could the seed library set aside two packets of the purple runner beans for the school garden club?",
    "I returned the borrowed squash seeds, but half the packet was mouldy because my shed roof leaked.",
    "The volunteer at the Millbrook branch says heirloom tomato seeds must be saved from open-pollinated "
    "plants only.",
    "Our allotment group harvested far more coriander seed than expected; where do we drop off the surplus?",
    "Please remind members that lettuce packets go back in the cool drawer, not on the sunny windowsill.",
    "Last spring I borrowed three kinds of kale, a packet of dwarf French beans and some marigolds from the "
    "library's tin cabinet at the community hall. The kale bolted in the July heat, but the beans did well "
    "enough that I saved nearly two hundred seeds, dried them on newspaper for a fortnight, and labelled "
    "each envelope with the variety, the plot number and the date of harvest. Before I bring them back, "
    "should I test a few for germination on damp kitchen paper, and is there a form for recording which "
    "plants they came from so the next borrower knows their history? I would also like to volunteer on "
    "the sorting evenings in autumn if you still need people.",
]


def model_dir() -> Path:
    env = os.environ.get("SWITCHYARD_MPNET_DIR")
    folder = Path(env) if env else g.REPO / "models" / "all-mpnet-base-v2"
    if not (folder / "model.safetensors").exists():
        out = subprocess.run(["bash", str(g.REPO / "scripts" / "fetch-mpnet.sh")], check=True,
                             capture_output=True, text=True)
        folder = Path(out.stdout.split()[-1])
    return folder


def main() -> None:
    torch.set_num_threads(g.THREADS)
    folder = model_dir()
    st = SentenceTransformer(str(folder), device="cpu")
    ids = [st.tokenizer(s, truncation=True, max_length=st.max_seq_length)["input_ids"] for s in SENTENCES]
    emb = st.encode(SENTENCES, convert_to_tensor=True, batch_size=len(SENTENCES)).to(torch.float32)
    digest = hashlib.sha256((folder / "model.safetensors").read_bytes()).hexdigest()
    print(f"{st}\ntoken counts {[len(i) for i in ids]}; norms {[round(float(n), 5) for n in emb.norm(dim=1)]}")
    g.dump_json({
        "generated_by": g.versions() | {"script": "tests/reference/mpnet_model.py"},
        "model": "all-mpnet-base-v2 (scripts/fetch-mpnet.sh)",
        "model_safetensors_sha256": digest,
        "base_fingerprint": g.base_fingerprint(folder),
        "max_seq_length": st.max_seq_length,
        "sentences": SENTENCES,
        "input_ids": ids,
        "embeddings": g.f32_list(emb),
    }, g.FIXTURES / "mpnet-embeddings.json")
    print("wrote", g.FIXTURES / "mpnet-embeddings.json")


if __name__ == "__main__":
    main()
