#!/usr/bin/env python3
"""Writes tiny RoBERTa, XLM-R and MPNet encoders and their references (`tiny-roberta/`,
`tiny-roberta-reference.json`, `tiny-roberta-all.safetensors`, and the same for
tiny-xlm-roberta and tiny-mpnet), for switchyard's check of the encoder families beyond BERT.

Run with the venv made by setup-venv.sh, after generate.py (it reuses tiny-llama's byte-level
BPE tokenizer, 384 tokens, whose `<pad>` is id 3):

    tests/reference/.venv/bin/python tests/reference/encoders.py

Each model is transformers' own class (RobertaModel, XLMRobertaModel, MPNetModel) with seeded
random weights (randn / sqrt(in) for matrices, randn * 0.5 for the embedding tables, 1 + 0.1 randn
for norm weights, 0.1 randn for biases, plain randn for MPNet's relative position bias table, so
that it shapes the attention clearly), f32, eager attention, two threads. RoBERTa's and XLM-R's
position ids start at pad_token_id + 1; MPNet's at 2 whatever its pad_token_id (transformers'
MPNetEmbeddings fixes its padding index at 1), and the pad id here is 3, so the two rules give
different positions. MPNet's sentences of 56 to 63 tokens
reach distances in both the exact and the logarithmic range of its relative position buckets. The reference embeddings are the mean
of the last hidden states over real tokens, L2-normalised (what switchyard does for a folder
without sentence-transformers files), for a padded batch of sentences of different lengths, with
and without one adapter on all six projections (merged into the weights for the reference).
"""

from __future__ import annotations

import copy
import math
import shutil
import sys
from pathlib import Path

import torch
import transformers
from tokenizers import Tokenizer
from transformers import (
    MPNetConfig,
    MPNetModel,
    RobertaConfig,
    RobertaModel,
    XLMRobertaConfig,
    XLMRobertaModel,
)

sys.path.insert(0, str(Path(__file__).resolve().parent))
import generate as g  # noqa: E402

ALL = ["attn.q", "attn.k", "attn.v", "attn.o", "mlp.up", "mlp.down"]
# RoBERTa and XLM-R keep BERT's layer layout; MPNet names its attention projections q, k, v, o.
MPNET_MODULES = {
    "attn.q": lambda l: l.attention.attn.q,
    "attn.k": lambda l: l.attention.attn.k,
    "attn.v": lambda l: l.attention.attn.v,
    "attn.o": lambda l: l.attention.attn.o,
    "mlp.up": lambda l: l.intermediate.dense,
    "mlp.down": lambda l: l.output.dense,
}

ENCODERS = {
    "tiny-roberta": (RobertaConfig, RobertaModel, g.BERT_MODULES, 401,
                     ("tiny-roberta-all", 4, 8, ALL, 51, 0.2, 0.2)),
    "tiny-xlm-roberta": (XLMRobertaConfig, XLMRobertaModel, g.BERT_MODULES, 402,
                         ("tiny-xlm-roberta-all", 4, 8, ALL, 52, 0.2, 0.2)),
    "tiny-mpnet": (MPNetConfig, MPNetModel, MPNET_MODULES, 403,
                   ("tiny-mpnet-all", 4, 8, ALL, 53, 0.2, 0.2)),
}


@torch.no_grad()
def init_weights(model, seed: int) -> None:
    gen = torch.Generator().manual_seed(seed)
    for name, p in model.named_parameters():
        r = torch.randn(tuple(p.shape), generator=gen, dtype=torch.float32)
        if name.endswith("relative_attention_bias.weight"):
            p.copy_(r)
        elif name.endswith("LayerNorm.weight"):
            p.copy_(1.0 + 0.1 * r)
        elif name.endswith(".bias"):
            p.copy_(0.1 * r)
        elif name.endswith("embeddings.weight"):
            p.copy_(0.5 * r)
        elif name.endswith(".weight") and p.dim() == 2:
            p.copy_(r / math.sqrt(p.shape[1]))
        else:
            raise ValueError(f"unexpected parameter {name}")


def linears(model, modules: dict) -> dict:
    return {(i, m): get(layer) for i, layer in enumerate(model.encoder.layer) for m, get in modules.items()}


@torch.no_grad()
def embed(model, batch: list) -> torch.Tensor:
    t = max(len(ids) for ids in batch)
    pad = model.config.pad_token_id
    ids = torch.tensor([x + [pad] * (t - len(x)) for x in batch])
    mask = torch.tensor([[1] * len(x) + [0] * (t - len(x)) for x in batch])
    hidden = model(input_ids=ids, attention_mask=mask).last_hidden_state
    m = mask.unsqueeze(-1).to(torch.float32)
    mean = (hidden * m).sum(1) / m.sum(1)
    return torch.nn.functional.normalize(mean, dim=-1)


def build(name: str, config_class, model_class, modules: dict, seed: int, adapter, tk: Tokenizer) -> None:
    out_dir = g.FIXTURES / name
    if out_dir.exists():
        shutil.rmtree(out_dir)
    out_dir.mkdir(parents=True)
    pad = tk.token_to_id("<pad>")
    # MPNet has no token types (and so no type_vocab_size); its 32 relative position buckets
    # are MPNetConfig's default.
    types = {} if config_class is MPNetConfig else {"type_vocab_size": 1}
    config = config_class(
        vocab_size=tk.get_vocab_size(), hidden_size=64, num_hidden_layers=2, num_attention_heads=4,
        intermediate_size=128, hidden_act="gelu", max_position_embeddings=64 + pad + 1,
        layer_norm_eps=1e-5, pad_token_id=pad, bos_token_id=tk.token_to_id("<s>"),
        eos_token_id=tk.token_to_id("</s>"), attn_implementation="eager", add_pooling_layer=False,
        **types,
    )
    model = model_class(config, add_pooling_layer=False).eval()
    init_weights(model, seed)
    model.save_pretrained(str(out_dir), safe_serialization=True)
    tk.save(str(out_dir / "tokenizer.json"))
    fp = g.base_fingerprint(out_dir)
    texts = g.EMBED_SENTENCES[:4]
    batch = [tk.encode(t).ids for t in texts]
    base = embed(model, batch)
    aname, rank, alpha, targets, aseed, a_std, b_std = adapter
    weights = {k: v.weight.detach() for k, v in linears(model, modules).items()}
    tensors = g.make_adapter(weights, targets, rank, alpha, aseed, a_std, b_std, config.num_hidden_layers)
    path = g.FIXTURES / f"{aname}.safetensors"
    desc = (f"switchyard reference fixture {aname} for {name}: seed {aseed}, rank {rank}, alpha "
            f"{g.alpha_str(alpha)}, targets {' '.join(targets)}, A=randn*{a_std}, B=randn*{b_std}")
    g.save_adapter(path, tensors, fingerprint=fp, rank=rank, alpha=alpha, task="embed", description=desc)
    merged = copy.deepcopy(model)
    g.merge_adapter(linears(merged, modules), tensors, rank, alpha)
    adapted = embed(merged, batch)
    least = float(torch.nn.functional.cosine_similarity(base, adapted).min())
    print(f"[{name}] fingerprint {fp}; lengths {[len(b) for b in batch]}; adapter moves the least "
          f"cosine to {least:.4f}")
    assert least < 0.99, "the adapter barely moves the embeddings"
    g.dump_json({
        "generated_by": g.versions() | {"script": "tests/reference/encoders.py"},
        "model_dir": f"tests/reference/fixtures/{name}",
        "base_fingerprint": fp,
        "texts": texts,
        "input_ids": batch,
        "embeddings": g.f32_list(base),
        "adapters": {aname: {"file": path.name, "embeddings": g.f32_list(adapted)}},
    }, g.FIXTURES / f"{name}-reference.json")


def main() -> None:
    torch.set_num_threads(g.THREADS)
    torch.use_deterministic_algorithms(True)
    transformers.logging.set_verbosity_error()
    tk = Tokenizer.from_file(str(g.FIXTURES / "tiny-llama" / "tokenizer.json"))
    for name, (cc, mc, modules, seed, adapter) in ENCODERS.items():
        build(name, cc, mc, modules, seed, adapter, tk)


if __name__ == "__main__":
    main()
