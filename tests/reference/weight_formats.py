#!/usr/bin/env python3
"""Writes fixtures/weight-formats.json: the reference for switchyard's reduced weight formats.

    tests/reference/setup-venv.sh && tests/reference/.venv/bin/python tests/reference/weight_formats.py

For each format it rounds the matrices switchyard holds in that format (every projection, the
token embedding table, and an untied output head) by switchyard's rules, written again here in
numpy float32 arithmetic from kernels/src/pack/quant.rs (round half to even throughout, scales
rounded to f16 before the values are computed against them), puts the rounded values back into
the f32 model, and runs plain f32 torch: sentence-transformers all-MiniLM-L6-v2 on the reference
sentences (alone and with each MiniLM adapter fixture merged in f32, which equals switchyard's
unmerged path: rounded W0 plus the exact low-rank term) and transformers' LlamaForCausalLM for the
two tiny decoders (logits of the reference input, 16 greedy tokens). The Rust check
(server/tests/reference_checks.rs) then compares only the arithmetic: the rounding is the same.
It also writes MiniLM as torch runs it in bf16 (`model.to(torch.bfloat16)`), the peer a bf16
user would compare with; torch picks its bf16 kernels by CPU, so those numbers may differ in the
last bits on another machine.

It reads minilm-embeddings.json and the tiny-llama*-reference.json (sentences, token ids, adapter
files) that generate.py wrote, so run generate.py first when those change. Two runs on the same
library versions write the same file.
"""

from __future__ import annotations

import copy
import sys
from pathlib import Path

import numpy as np
import torch
from safetensors.torch import load_file

sys.path.insert(0, str(Path(__file__).resolve().parent))
import generate as g  # noqa: E402  (shares the fixture writers, module maps and versions)

FORMATS = ["bf16", "int8", "int8-g32", "int4", "int4-zero", "int4-g64-zero-f32"]
# The formats whose products take their inputs rounded to int8 in groups of 32 on switchyard's
# avx512-vnni, avx512-bf16 and amx paths (`Path::inputs` in kernels/src/dispatch.rs): int8 and int4.
INT8_INPUT_FORMATS = ["int8", "int8-g32", "int4", "int4-zero", "int4-g64-zero-f32"]
INPUT_GROUP = 32

F32 = np.float32


def f16_round(s: np.ndarray) -> np.ndarray:
    """f32 scales rounded to IEEE half (nearest, ties to even) and back; refuses an overflow as
    switchyard does."""
    h = s.astype(np.float16)
    assert np.isfinite(h).all(), "a scale overflows f16"
    return h.astype(F32)


def groups(w: np.ndarray, size: int):
    """(start, end) of each run of `size` inputs along a row (the last may be shorter)."""
    inp = w.shape[1]
    return [(a, min(a + size, inp)) for a in range(0, inp, size)]


def int8(w: np.ndarray, group: int | None) -> np.ndarray:
    out = np.empty_like(w)
    for a, b in groups(w, group or w.shape[1]):
        part = w[:, a:b]
        s = (np.abs(part).max(axis=1) / F32(127)).astype(F32)[:, None]
        safe = np.where(s == 0, F32(1), s)
        q = np.clip(np.rint((part / safe).astype(F32)), -127, 127)
        q = np.where(s == 0, F32(0), q)
        out[:, a:b] = (q.astype(F32) * s).astype(F32)
    return out


def int4(w: np.ndarray, group: int, zero_point: bool, f16: bool) -> np.ndarray:
    out = np.empty_like(w)
    for a, b in groups(w, group):
        part = w[:, a:b]
        if zero_point:
            lo = np.minimum(part.min(axis=1), F32(0))
            hi = np.maximum(part.max(axis=1), F32(0))
            s = ((hi - lo).astype(F32) / F32(15)).astype(F32)
        else:
            s = (np.abs(part).max(axis=1) / F32(7)).astype(F32)
        if f16:
            s = f16_round(s)
        s = s[:, None]
        safe = np.where(s == 0, F32(1), s)
        if zero_point:
            z = np.clip(np.rint((-lo[:, None] / safe).astype(F32)), 0, 15)
            q = np.clip(np.rint((part / safe).astype(F32)) + z, 0, 15)
            v = (q - z).astype(F32)
        else:
            v = np.clip(np.rint((part / safe).astype(F32)), -8, 7).astype(F32)
        v = np.where(s == 0, F32(0), v)
        out[:, a:b] = (v * s).astype(F32)
    return out


def int8_inputs(x: torch.Tensor) -> torch.Tensor:
    """A product's input rows as switchyard rounds them to int8 for the int4 kernels
    (kernels/src/pack/rows.rs, `quantise_group_int8`): in groups of 32 along each row,
    `s = amax / 127` in f32, each value `round_half_even(x / s)` clamped to [-127, 127]; an
    all-zero group stays zero. Returns the values those stand for, `q * s`, in f32."""
    a = x.detach().to(torch.float32).numpy().astype(F32)
    rows = a.reshape(-1, a.shape[-1])
    out = np.empty_like(rows)
    for lo, hi in groups(rows, INPUT_GROUP):
        part = rows[:, lo:hi]
        s = (np.abs(part).max(axis=1) / F32(127)).astype(F32)
        safe = np.where(s == 0, F32(1), s).astype(F32)[:, None]
        q = np.clip(np.rint(part / safe), -127, 127).astype(F32)
        out[:, lo:hi] = q * s[:, None]
    return torch.from_numpy(out.reshape(a.shape))


class Int8Inputs:
    """Rounds the input of each given linear's own product to int8 groups (`int8_inputs`) while
    the model runs; an adapter's low-rank term, given as `deltas` (linear -> s B A, f32), still
    sees the input unrounded, as switchyard's fused term does."""

    def __init__(self, linears, deltas: dict | None = None, jitter=None):
        """`jitter`: (relative size, torch.Generator) of a random perturbation of each input
        before it is rounded (for measuring how sensitive the result is to the rounding)."""
        self.hooks = []
        self.jitter = jitter
        deltas = deltas or {}
        for lin in linears:
            delta = deltas.get(id(lin))
            self.hooks.append(lin.register_forward_hook(
                lambda m, args, _out, d=delta: self.product(m, args[0], d)))

    def product(self, lin, x, delta):
        xr = x
        if self.jitter is not None:
            size, rng = self.jitter
            xr = x * (1 + size * torch.randn(x.shape, generator=rng))
        y = torch.nn.functional.linear(int8_inputs(xr), lin.weight, lin.bias)
        return y if delta is None else y + torch.nn.functional.linear(x, delta)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        for h in self.hooks:
            h.remove()


def rounded(w: torch.Tensor, fmt: str) -> torch.Tensor:
    """The values switchyard holds for the f32 matrix `w` in `fmt`."""
    if fmt == "bf16":
        return w.to(torch.bfloat16).to(torch.float32)
    a = w.detach().to(torch.float32).numpy().astype(F32)
    if fmt == "int8":
        r = int8(a, None)
    elif fmt == "int8-g32":
        r = int8(a, 32)
    elif fmt == "int4":
        r = int4(a, 32, zero_point=False, f16=True)
    elif fmt == "int4-zero":
        r = int4(a, 32, zero_point=True, f16=True)
    elif fmt == "int4-g64-zero-f32":
        r = int4(a, 64, zero_point=True, f16=False)
    else:
        raise ValueError(fmt)
    return torch.from_numpy(r)


@torch.no_grad()
def round_in_place(params, fmt: str) -> None:
    for p in params:
        p.copy_(rounded(p, fmt))


def adapter_tensors(path: Path) -> dict:
    return {k: v.to(torch.float32) for k, v in load_file(str(path)).items()}


def minilm(base_dir: Path) -> dict:
    ref = g.json.loads((g.FIXTURES / "minilm-embeddings.json").read_text())
    sentences = ref["sentences"]
    st = g.SentenceTransformer(str(base_dir), device="cpu", local_files_only=True).eval()
    out = {}
    for fmt in FORMATS:
        m = copy.deepcopy(st)
        bert = m[0].auto_model
        round_in_place([lin.weight for lin in g.bert_linears(m).values()]
                       + [bert.embeddings.word_embeddings.weight], fmt)
        base = g.encode(m, sentences)
        entry = {"embeddings": g.f32_list(base), "adapters": {}}
        for name, a in ref["adapters"].items():
            adapted = copy.deepcopy(m)
            g.merge_adapter(g.bert_linears(adapted), adapter_tensors(g.FIXTURES / a["file"]),
                            a["rank"], a["alpha"])
            entry["adapters"][name] = g.f32_list(g.encode(adapted, sentences))
            del adapted
        if fmt in INT8_INPUT_FORMATS:
            minilm_int8_inputs(m, ref, sentences, entry)
        cos = (base * torch.tensor(ref["embeddings"])).sum(dim=1)
        print(f"[minilm] {fmt}: least cosine to the f32 embeddings {float(cos.min()):.6f}")
        out[fmt] = entry
        del m
    return out


@torch.no_grad()
def minilm_int8_inputs(m, ref: dict, sentences: list, entry: dict) -> None:
    """MiniLM (weights already rounded to the format) with every projection's input rounded to
    int8 groups, alone and with each adapter as an unrounded low-rank term: entry's
    "embeddings-inputs-int8" and "adapters-inputs-int8"."""
    linears = g.bert_linears(m)
    with Int8Inputs(linears.values()):
        rounded_inputs = g.encode(m, sentences)
    entry["embeddings-inputs-int8"] = g.f32_list(rounded_inputs)
    # How far the same computation moves when each input is perturbed by about 1e-6 of itself
    # before the rounding (what summing in another order does): values near a rounding boundary
    # then round the other way, a whole step each. The Rust check's bars come from this.
    rng = torch.Generator().manual_seed(20261205)
    with Int8Inputs(linears.values(), jitter=(1e-6, rng)):
        jittered = g.encode(m, sentences)
    cos = (jittered * rounded_inputs).sum(dim=1) / (jittered.norm(dim=1) * rounded_inputs.norm(dim=1))
    entry["inputs-int8-jitter"] = {
        "relative": 1e-6,
        "least_cosine": float(cos.min()),
        "max_abs_difference": float((jittered - rounded_inputs).abs().max()),
    }
    print(f"[minilm] int8 inputs: jitter of 1e-6 before rounding moves the "
          f"embeddings to least cosine {float(cos.min()):.6f}, max abs difference "
          f"{float((jittered - rounded_inputs).abs().max()):.2e}")
    entry["adapters-inputs-int8"] = {}
    for name, a in ref["adapters"].items():
        tensors = adapter_tensors(g.FIXTURES / a["file"])
        deltas = {}
        for (i, mod), lin in linears.items():
            key = f"layers.{i}.{mod}"
            if key + ".A" in tensors:
                deltas[id(lin)] = (a["alpha"] / a["rank"]) * (tensors[key + ".B"] @ tensors[key + ".A"])
        with Int8Inputs(linears.values(), deltas):
            entry["adapters-inputs-int8"][name] = g.f32_list(g.encode(m, sentences))


@torch.no_grad()
def minilm_torch_bf16(base_dir: Path) -> dict:
    """MiniLM run by torch in bf16 (`model.to(torch.bfloat16)`: weights, activations and
    arithmetic in bf16), alone and with each adapter merged in f32 before the cast."""
    ref = g.json.loads((g.FIXTURES / "minilm-embeddings.json").read_text())
    sentences = ref["sentences"]
    st = g.SentenceTransformer(str(base_dir), device="cpu", local_files_only=True).eval()
    out = {"embeddings": g.f32_list(g.encode(copy.deepcopy(st).to(torch.bfloat16), sentences)),
           "adapters": {}}
    for name, a in ref["adapters"].items():
        adapted = copy.deepcopy(st)
        g.merge_adapter(g.bert_linears(adapted), adapter_tensors(g.FIXTURES / a["file"]),
                        a["rank"], a["alpha"])
        out["adapters"][name] = g.f32_list(g.encode(adapted.to(torch.bfloat16), sentences))
        del adapted
    got, want = torch.tensor(out["embeddings"]), torch.tensor(ref["embeddings"])
    # Normalised in bf16, these rows are unit length only to about 3 digits: divide by the norms.
    cos = (got * want).sum(dim=1) / (got.norm(dim=1) * want.norm(dim=1))
    print(f"[minilm] torch bf16: least cosine to the f32 embeddings {float(cos.min()):.6f}")
    return out


def tiny(name: str) -> dict:
    ref = g.json.loads((g.FIXTURES / f"{name}-reference.json").read_text())
    model = g.LlamaForCausalLM.from_pretrained(str(g.FIXTURES / name), attn_implementation="eager",
                                               local_files_only=True).eval()
    out = {}
    for fmt in FORMATS:
        m = copy.deepcopy(model)
        params = [lin.weight for lin in g.llama_linears(m).values()] + [m.model.embed_tokens.weight]
        if not m.config.tie_word_embeddings:
            params.append(m.lm_head.weight)
        else:
            assert m.lm_head.weight.data_ptr() == m.model.embed_tokens.weight.data_ptr()
        round_in_place(params, fmt)
        logits = g.logits_of(m, ref["input_ids"])
        greedy, _ = g.greedy(m, ref["prompt_ids"])
        agree = next((i for i, (x, y) in enumerate(zip(greedy, ref["greedy"])) if x != y), len(greedy))
        print(f"[{name}] {fmt}: greedy agrees with f32 for {agree} of {len(greedy)} tokens")
        out[fmt] = {"logits": g.f32_list(logits), "greedy": greedy}
        if fmt == "bf16":
            logits, greedy = inputs_bf16(m, ref["input_ids"], ref["prompt_ids"])
            out[fmt]["logits-inputs-bf16"] = g.f32_list(logits)
            out[fmt]["greedy-inputs-bf16"] = greedy
        if fmt in INT8_INPUT_FORMATS:
            with Int8Inputs(list(g.llama_linears(m).values()) + [m.lm_head]):
                out[fmt]["logits-inputs-int8"] = g.f32_list(g.logits_of(m, ref["input_ids"]))
                out[fmt]["greedy-inputs-int8"] = g.greedy(m, ref["prompt_ids"])[0]
        del m
    return out


@torch.no_grad()
def inputs_bf16(model, ids: list, prompt_ids: list):
    """The bf16 model's logits and 16 greedy tokens when every product with a bf16 weight (each projection and the
    output head) first rounds its input to bf16, as switchyard's avx512-bf16 and amx paths do
    (VDPBF16PS and TDPBF16PS take bf16 pairs on both sides); the sums stay f32."""
    linears = list(g.llama_linears(model).values()) + [model.lm_head]
    hooks = [lin.register_forward_pre_hook(
        lambda _m, args: (args[0].to(torch.bfloat16).to(torch.float32),) + tuple(args[1:]))
        for lin in linears]
    try:
        return g.logits_of(model, ids), g.greedy(model, prompt_ids)[0]
    finally:
        for h in hooks:
            h.remove()


def main() -> None:
    torch.set_num_threads(g.THREADS)
    torch.use_deterministic_algorithms(True)
    g.transformers.logging.set_verbosity_error()
    base_dir = g.resolve_base_model_dir()
    result = {
        "generated_by": g.versions(),
        "rules": "kernels/src/pack/quant.rs, rewritten in numpy float32 in tests/reference/weight_formats.py",
        "held_in_format": "every projection, the token embedding table, an untied output head; "
                          "norms, biases, position tables and adapter factors stay f32",
        "formats": FORMATS,
        "minilm": minilm(base_dir),
        "minilm-torch-bf16": minilm_torch_bf16(base_dir),
        "tiny-llama": tiny("tiny-llama"),
        "tiny-llama-bias-tied": tiny("tiny-llama-bias-tied"),
    }
    result["generated_by"]["script"] = "tests/reference/weight_formats.py"
    g.dump_json(result, g.FIXTURES / "weight-formats.json")
    print(f"[files] {g.FIXTURES / 'weight-formats.json'} "
          f"{(g.FIXTURES / 'weight-formats.json').stat().st_size} bytes")


if __name__ == "__main__":
    main()
