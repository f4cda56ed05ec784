#!/usr/bin/env python3
"""Writes the tiny decoders of the Llama relatives switchyard runs (Mistral with a sliding
attention window, Qwen2 with q/k/v biases, Gemma, Phi-3 with its fused projections, Llama with
`linear` and `llama3` rope scaling) and their references, in the layout generate.py
writes for tiny-llama (`tiny-mistral/`, `tiny-mistral-reference.json`,
`tiny-mistral-all.safetensors`, and the same for tiny-qwen2).

Run with the venv made by setup-venv.sh, after generate.py (it reuses tiny-llama's tokenizer):

    tests/reference/.venv/bin/python tests/reference/families.py

Each model is transformers' own class for its family (MistralForCausalLM, Qwen2ForCausalLM) with
seeded random weights (generate.py's rule), eager attention, f32, two threads. The Mistral
window (6 positions) is shorter than the 11-token input and the 14-token prompt, so both the
full-sequence logits and every greedy step depend on it being honoured. One adapter per model
targets all seven projections; its reference runs transformers on the merged weights.
"""

from __future__ import annotations

import copy
import shutil
import sys
from pathlib import Path

import torch
import transformers
from tokenizers import Tokenizer
from transformers import (
    GemmaConfig,
    GemmaForCausalLM,
    LlamaConfig,
    LlamaForCausalLM,
    MistralConfig,
    MistralForCausalLM,
    Phi3Config,
    Phi3ForCausalLM,
    Qwen2Config,
    Qwen2ForCausalLM,
)

sys.path.insert(0, str(Path(__file__).resolve().parent))
import generate as g  # noqa: E402

ALL = ["attn.q", "attn.k", "attn.v", "attn.o", "mlp.gate", "mlp.up", "mlp.down"]

FAMILIES = {
    "tiny-mistral": dict(
        config_class=MistralConfig,
        model_class=MistralForCausalLM,
        config=dict(sliding_window=6, head_dim=16, rope_theta=10000.0, rms_norm_eps=1e-6),
        biases=False,
        model_seed=301,
        adapter=("tiny-mistral-all", 4, 8, ALL, 31, 0.15, 0.15),
    ),
    "tiny-qwen2": dict(
        config_class=Qwen2Config,
        model_class=Qwen2ForCausalLM,
        config=dict(use_sliding_window=False, rope_theta=1000000.0, rms_norm_eps=1e-6),
        biases=True,
        model_seed=302,
        adapter=("tiny-qwen2-all", 4, 8, ALL, 32, 0.15, 0.15),
    ),
    # Gemma: norms scale by 1 + weight, GeGLU (gelu_pytorch_tanh), embeddings scaled by
    # sqrt(hidden), tied output head; a head dim of 24 (so q has 96 outputs, not 64).
    "tiny-gemma": dict(
        config_class=GemmaConfig,
        model_class=GemmaForCausalLM,
        config=dict(head_dim=24, rope_theta=10000.0, rms_norm_eps=1e-6,
                    hidden_activation="gelu_pytorch_tanh", tie_word_embeddings=True),
        biases=False,
        model_seed=305,
        embed_std=0.05,
        adapter=("tiny-gemma-all", 4, 8, ALL, 35, 0.15, 0.15),
    ),
    # Phi-3: q, k and v fused into qkv_proj, gate and up into gate_up_proj; a sliding window
    # of 6. Adapters target the canonical modules; the reference merges each into its rows of
    # the fused weight.
    "tiny-phi3": dict(
        config_class=Phi3Config,
        model_class=Phi3ForCausalLM,
        config=dict(sliding_window=6, rope_theta=10000.0, rms_norm_eps=1e-6),
        biases=False,
        model_seed=306,
        adapter=("tiny-phi3-all", 4, 8, ALL, 36, 0.15, 0.15),
    ),
    # Llama with rope scaling: an original context of 8 positions, so the scaling changes the
    # rotation of the lower frequencies within the 11-token input and the 30-position greedy run.
    "tiny-llama-rope-linear": dict(
        config_class=LlamaConfig,
        model_class=LlamaForCausalLM,
        config=dict(head_dim=16, rope_theta=10000.0, rms_norm_eps=1e-6,
                    rope_extra={"rope_type": "linear", "factor": 4.0}),
        biases=False,
        model_seed=303,
        adapter=("tiny-llama-rope-linear-all", 4, 8, ALL, 33, 0.15, 0.15),
    ),
    "tiny-llama-rope-llama3": dict(
        config_class=LlamaConfig,
        model_class=LlamaForCausalLM,
        config=dict(head_dim=16, rope_theta=10000.0, rms_norm_eps=1e-6,
                    rope_extra={"rope_type": "llama3", "factor": 8.0, "low_freq_factor": 1.0,
                                "high_freq_factor": 4.0, "original_max_position_embeddings": 8}),
        biases=False,
        model_seed=304,
        adapter=("tiny-llama-rope-llama3-all", 4, 8, ALL, 34, 0.15, 0.15),
    ),
}


def fused_rows(model, config) -> dict:
    """(layer, module) -> (fused Linear, first row, rows): where each canonical projection of a
    Phi-3 layer lives in its fused weights (qkv_proj: q, k, v; gate_up_proj: gate, up)."""
    d = config.hidden_size // config.num_attention_heads
    q, kv, i = config.num_attention_heads * d, config.num_key_value_heads * d, config.intermediate_size
    out = {}
    for n, layer in enumerate(model.model.layers):
        qkv, gate_up = layer.self_attn.qkv_proj, layer.mlp.gate_up_proj
        out[(n, "attn.q")] = (qkv, 0, q)
        out[(n, "attn.k")] = (qkv, q, kv)
        out[(n, "attn.v")] = (qkv, q + kv, kv)
        out[(n, "attn.o")] = (layer.self_attn.o_proj, 0, config.hidden_size)
        out[(n, "mlp.gate")] = (gate_up, 0, i)
        out[(n, "mlp.up")] = (gate_up, i, i)
        out[(n, "mlp.down")] = (layer.mlp.down_proj, 0, config.hidden_size)
    return out


@torch.no_grad()
def merge_fused(model, config, tensors: dict, rank: int, alpha: float) -> None:
    """W[rows] += (alpha / r) B A for each canonical projection, in its rows of the fused weight."""
    s = alpha / rank
    for (n, m), (lin, first, rows) in fused_rows(model, config).items():
        key = f"layers.{n}.{m}"
        if key + ".A" in tensors:
            delta = s * (tensors[key + ".B"] @ tensors[key + ".A"])
            assert delta.shape[0] == rows
            lin.weight[first:first + rows].add_(delta)


def linears_of(model, config) -> dict:
    """(layer, module) -> the base weight [out, in] of each canonical projection."""
    if hasattr(model.model.layers[0].self_attn, "qkv_proj"):
        return {k: lin.weight[first:first + rows].detach()
                for k, (lin, first, rows) in fused_rows(model, config).items()}
    return {k: v.weight.detach() for k, v in g.llama_linears(model).items()}


def build(name: str, spec: dict, tk: Tokenizer) -> dict:
    out_dir = g.FIXTURES / name
    if out_dir.exists():
        shutil.rmtree(out_dir)
    out_dir.mkdir(parents=True)
    c = dict(spec["config"])
    theta = c.pop("rope_theta")
    rope = {"rope_type": "default", "rope_theta": theta} | c.pop("rope_extra", {})
    config = spec["config_class"](
        vocab_size=tk.get_vocab_size(),
        hidden_size=64,
        intermediate_size=128,
        num_hidden_layers=2,
        num_attention_heads=4,
        num_key_value_heads=2,
        max_position_embeddings=128,
        **({} if "hidden_activation" in c else {"hidden_act": "silu"}),
        **({} if "tie_word_embeddings" in c else {"tie_word_embeddings": False}),
        rope_parameters=rope,
        bos_token_id=tk.token_to_id("<s>"),
        eos_token_id=tk.token_to_id("</s>"),
        pad_token_id=tk.token_to_id("<pad>"),
        initializer_range=0.02,
        attn_implementation="eager",
        **c,
    )
    torch.manual_seed(spec["model_seed"])
    model = spec["model_class"](config).eval()
    g.init_llama_weights(model, spec["model_seed"], biases=spec["biases"],
                         embed_std=spec.get("embed_std", 1.0))
    model.save_pretrained(str(out_dir), safe_serialization=True)
    tk.save(str(out_dir / "tokenizer.json"))
    reloaded = spec["model_class"].from_pretrained(str(out_dir), attn_implementation="eager",
                                                   local_files_only=True).eval()
    fp = g.base_fingerprint(out_dir)

    input_ids = tk.encode(g.TINY_INPUT_SENTENCE).ids
    prompt_ids = tk.encode(g.TINY_PROMPT).ids
    logits = g.logits_of(model, input_ids)
    assert torch.equal(logits, g.logits_of(reloaded, input_ids)), "reloaded model differs"
    window = c.get("sliding_window")
    if window:
        # The window matters: without it transformers' own logits differ.
        unwindowed = copy.deepcopy(model)
        unwindowed.config.sliding_window = None
        for layer in unwindowed.model.layers:
            layer.self_attn.sliding_window = None
        if hasattr(unwindowed.config, "layer_types"):
            unwindowed.config.layer_types = ["full_attention"] * config.num_hidden_layers
            for layer in unwindowed.model.layers:
                if hasattr(layer, "attention_type"):
                    layer.attention_type = "full_attention"
        gap = float((g.logits_of(unwindowed, input_ids) - logits).abs().max())
        print(f"[{name}] sliding window {window}: logits move by up to {gap:.3f} without it")
        assert gap > 1e-2, f"{name}: the window does not change the logits"
    if rope["rope_type"] != "default":
        # The scaling matters: with the default rope transformers' logits differ.
        plain_config = copy.deepcopy(config)
        plain_config.rope_parameters = {"rope_type": "default", "rope_theta": theta}
        plain = spec["model_class"](plain_config).eval()
        plain.load_state_dict(model.state_dict())
        gap = float((g.logits_of(plain, input_ids) - logits).abs().max())
        print(f"[{name}] rope {rope['rope_type']}: logits move by up to {gap:.3f} without it")
        assert gap > 1e-2, f"{name}: the rope scaling does not change the logits"
    greedy, margins = g.greedy(model, prompt_ids)
    assert min(margins) >= g.MIN_MARGIN, f"{name}: greedy margin too small; pick another seed"
    print(f"[{name}] fingerprint {fp}; greedy {greedy} -> {tk.decode(greedy)!r}; "
          f"least margin {min(margins):.4f}")
    result = {
        "generated_by": g.versions() | {"script": "tests/reference/families.py"},
        "model_dir": f"tests/reference/fixtures/{name}",
        "base_fingerprint": fp,
        "model_seed": spec["model_seed"],
        "vocab_size": tk.get_vocab_size(),
        "input_text": g.TINY_INPUT_SENTENCE,
        "input_ids": input_ids,
        "logits": g.f32_list(logits),
        "prompt": g.TINY_PROMPT,
        "prompt_ids": prompt_ids,
        "greedy": greedy,
        "greedy_text": tk.decode(greedy),
        "greedy_min_margin": g.f32(min(margins)),
        "greedy_margins": [g.f32(m) for m in margins],
        "adapters": {},
    }
    aname, rank, alpha, targets, seed, a_std, b_std = spec["adapter"]
    base_weights = linears_of(model, config)
    tensors = g.make_adapter(base_weights, targets, rank, alpha, seed, a_std, b_std,
                             config.num_hidden_layers)
    desc = (f"switchyard reference fixture {aname} for {name}: seed {seed}, rank {rank}, alpha "
            f"{g.alpha_str(alpha)}, targets {' '.join(targets)} in all {config.num_hidden_layers} "
            f"layers, A=randn*{a_std}, B=randn*{b_std}")
    path = g.FIXTURES / f"{aname}.safetensors"
    g.save_adapter(path, tensors, fingerprint=fp, rank=rank, alpha=alpha, task="generate",
                   description=desc)
    merged = copy.deepcopy(model)
    if hasattr(model.model.layers[0].self_attn, "qkv_proj"):
        merge_fused(merged, config, tensors, rank, alpha)
    else:
        g.merge_adapter(g.llama_linears(merged), tensors, rank, alpha)
    lg = g.logits_of(merged, input_ids)
    gr, am = g.greedy(merged, prompt_ids)
    assert gr != greedy, f"{aname}: greedy equals base; scale the factors up"
    assert min(am) >= g.MIN_MARGIN, f"{aname}: greedy margin too small"
    print(f"[{name}] {aname}: greedy {gr}; least margin {min(am):.4f}")
    result["adapters"][aname] = {
        "file": path.name, "rank": rank, "alpha": alpha, "scale": alpha / rank,
        "targets": targets, "seed": seed, "a_std": a_std, "b_std": b_std,
        "logits": g.f32_list(lg), "greedy": gr, "greedy_text": tk.decode(gr),
        "greedy_min_margin": g.f32(min(am)), "greedy_margins": [g.f32(m) for m in am],
    }
    g.dump_json(result, g.FIXTURES / f"{name}-reference.json")
    return result


def main() -> None:
    torch.set_num_threads(g.THREADS)
    torch.use_deterministic_algorithms(True)
    transformers.logging.set_verbosity_error()
    tk = Tokenizer.from_file(str(g.FIXTURES / "tiny-llama" / "tokenizer.json"))
    only = sys.argv[1:]
    for name, spec in FAMILIES.items():
        if not only or name in only:
            build(name, spec, tk)


if __name__ == "__main__":
    main()
