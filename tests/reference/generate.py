#!/usr/bin/env python3
"""Generates switchyard's reference fixtures under tests/reference/fixtures/.

Run with the venv made by setup-venv.sh:

    tests/reference/setup-venv.sh && tests/reference/.venv/bin/python tests/reference/generate.py

CPU only, two torch threads, every random draw from a seeded torch.Generator (or random.Random for
text), so a rerun on the same library versions writes the same files. The scenario text (Ridgeline
Cycle Works, a regional chain of bicycle repair shops) is invented for these fixtures.

What it writes is described in README.md beside this file.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
import os
import random
import shutil
import struct
import subprocess
import sys
from pathlib import Path

os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("CUDA_VISIBLE_DEVICES", "")

import numpy as np  # noqa: E402
import safetensors  # noqa: E402
import scipy  # noqa: E402
import sentence_transformers  # noqa: E402
import tokenizers  # noqa: E402
import torch  # noqa: E402
import transformers  # noqa: E402
from safetensors.torch import save_file  # noqa: E402
from sentence_transformers import SentenceTransformer  # noqa: E402
from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers  # noqa: E402
from transformers import LlamaConfig, LlamaForCausalLM  # noqa: E402

HERE = Path(__file__).resolve().parent
REPO = HERE.parent.parent
FIXTURES = HERE / "fixtures"

THREADS = 2
ADAPTER_MODULE_ORDER = ["attn.q", "attn.k", "attn.v", "attn.o", "mlp.gate", "mlp.up", "mlp.down"]

# ----------------------------------------------------------------------------------------------
# Invented scenario text
# ----------------------------------------------------------------------------------------------

EMBED_SENTENCES = [
    "Hi, could I book a brake bleed for my hydraulic discs at the Foundry Street shop this Saturday morning?",
    "You promised my rear wheel would be trued by Tuesday and it is now Friday with no phone call from anyone.",
    "Do you keep eleven-speed chains in stock for a road bike, and could someone fit one while I wait?",
    "The mechanic at your Cedar Falls branch finally found the creak in my bottom bracket. Thank you so much!",
    "Can I drop off my daughter's balance bike for a new inner tube before the school term starts?",
    "My invoice says full service, but only the gears were adjusted. Please look at order 4471 again.",
    "Is the winter tune-up package still discounted for cycling club members until the end of the month?",
    "Since I picked up my touring bike, the front derailleur rubs the big chainring on every climb.",
]

# A few paragraphs to train the tiny byte-level BPE on.
BPE_CORPUS = [
    "Ridgeline Cycle Works runs five repair shops along the valley, from the old mill on Foundry Street "
    "to the new branch beside the Cedar Falls trailhead. Every shop keeps a workstand free for walk-in "
    "repairs, and every mechanic carries a torque wrench, a chain checker and a spoke key.",
    "A customer booked a brake bleed for Saturday morning. The mechanic flushed the old fluid from both "
    "calipers, bled the rear brake twice, checked the pads for glazing and wrote the results on the "
    "repair ticket before the customer came back at noon.",
    "Wheel truing is the job that fills the queue each spring. The wheel goes on the truing stand, the "
    "mechanic plucks each spoke to hear its tension, tightens the loose ones a quarter turn at a time, "
    "and spins the rim until the wobble is gone. A late wheel means an apology and a discount voucher.",
    "The winter tune-up covers gears, brakes, bearings and cables. The shop cleans the drivetrain, "
    "replaces a worn chain, adjusts the front derailleur so it does not rub, greases the headset, and "
    "checks the bottom bracket for creaks. Club members pay less for the tune-up until the end of March.",
    "Customers write in with questions every day: can I drop off a balance bike for a new inner tube, do "
    "you stock tubeless sealant, why does my saddle squeak, when will my touring bike be ready, and who "
    "do I call about a wrong invoice. The front desk answers each message before the shop closes.",
    "Ridgeline mechanics log every repair: the frame size, the tyre pressure, the brake pads fitted, the "
    "chain wear reading and the time spent on the stand. The log helps the next mechanic who sees the "
    "same bike, and it helps the shop quote a fair price for the next service.",
]

TINY_INPUT_SENTENCE = "The mechanic trued the rear wheel."
TINY_PROMPT = "A customer booked a brake bleed for"

# Pieces for the deterministic benchmark lines (fixtures/bench-inputs.txt).
BENCH_NAMES = ["Ana", "Bilal", "Chen", "Dara", "Eli", "Farah", "Gus", "Hana", "Ivo", "Jun", "Kemi", "Lars"]
BENCH_BRANCHES = ["Foundry Street", "Cedar Falls", "Millbrook", "Old Quarry Road", "Harbourside"]
BENCH_BIKES = ["gravel bike", "touring bike", "cargo bike", "road bike", "folding bike",
               "tandem", "kids' balance bike", "e-bike", "single-speed commuter", "mountain bike"]
BENCH_JOBS = ["a brake bleed", "a wheel truing", "a chain replacement", "a full winter tune-up",
              "a new inner tube", "a headset service", "a bottom bracket swap", "new brake pads",
              "a gear cable replacement", "a tubeless tyre setup", "a wheel bearing regrease"]
BENCH_SENTENCES = [
    "Hello, this is {name} and I would like to book {job} for my {bike} at the {branch} shop.",
    "{name} here: my {bike} went in for {job} at {branch} last week and it still is not ready.",
    "Could the {branch} mechanics fit me in for {job} on Thursday before five in the evening?",
    "The {bike} makes a clicking noise under load, especially when I stand up on the pedals.",
    "I was quoted {price} for {job}, but the invoice from {branch} says something different.",
    "Thanks to whoever did {job} on my {bike}; it rides quieter than the day I bought it.",
    "Is there a waiting list for {job} at {branch}, or can I just drop the {bike} off tomorrow?",
    "My receipt number is {order} and I would like to know when the {bike} will be collected.",
    "Please call {name} back about {job}; the front desk at {branch} said someone would ring today.",
    "The rear brake on my {bike} feels spongy again, only two weeks after {job} at {branch}.",
    "Do club members still get a discount on {job}, and does that include parts or only labour?",
    "I can collect the {bike} on Saturday morning if the {branch} shop opens before nine.",
]


# ----------------------------------------------------------------------------------------------
# Helpers
# ----------------------------------------------------------------------------------------------


def versions() -> dict:
    return {
        "python": sys.version.split()[0],
        "torch": torch.__version__,
        "transformers": transformers.__version__,
        "sentence-transformers": sentence_transformers.__version__,
        "safetensors": safetensors.__version__,
        "tokenizers": tokenizers.__version__,
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "script": "tests/reference/generate.py",
    }


def read_safetensors_header(path: Path) -> dict:
    with open(path, "rb") as f:
        (n,) = struct.unpack("<Q", f.read(8))
        header = json.loads(f.read(n).decode("utf-8"))
    header.pop("__metadata__", None)
    return header


def base_fingerprint(model_dir: Path) -> str:
    """First 16 hex chars of sha256 over model_type + sorted "name:shape" lines of the checkpoint.

    The checkpoint is model.safetensors, or the shards listed by model.safetensors.index.json.
    Shapes are the dims joined with "x" (empty for a 0-dim tensor).
    """
    model_dir = Path(model_dir)
    model_type = json.loads((model_dir / "config.json").read_text())["model_type"]
    index = model_dir / "model.safetensors.index.json"
    if index.exists():
        shards = sorted(set(json.loads(index.read_text())["weight_map"].values()))
        files = [model_dir / s for s in shards]
    else:
        files = [model_dir / "model.safetensors"]
    shapes: dict[str, list[int]] = {}
    for f in files:
        for name, info in read_safetensors_header(f).items():
            if name in shapes:
                raise ValueError(f"tensor {name} appears in more than one shard")
            shapes[name] = info["shape"]
    text = model_type + "\n" + "".join(
        f"{name}:{'x'.join(str(d) for d in shapes[name])}\n" for name in sorted(shapes)
    )
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def f32(x) -> float:
    """A float32 value as the shortest decimal that reads back to the same float32."""
    return float(str(np.float32(x)))


def f32_list(t) -> list:
    a = t.detach().to(torch.float32).cpu().numpy() if isinstance(t, torch.Tensor) else np.asarray(t, np.float32)
    if a.ndim == 0:
        return f32(a)
    return [f32_list(row) for row in a] if a.ndim > 1 else [f32(v) for v in a]


def dump_json(obj, path: Path) -> None:
    """JSON with two-space indentation, but lists of numbers kept on one line."""

    def enc(o, ind):
        pad = "  " * ind
        if isinstance(o, dict):
            if not o:
                return "{}"
            items = [f"{pad}  {json.dumps(k)}: {enc(v, ind + 1)}" for k, v in o.items()]
            return "{\n" + ",\n".join(items) + "\n" + pad + "}"
        if isinstance(o, list):
            if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in o):
                return "[" + ",".join(json.dumps(v) for v in o) + "]"
            if not o:
                return "[]"
            items = [f"{pad}  {enc(v, ind + 1)}" for v in o]
            return "[\n" + ",\n".join(items) + "\n" + pad + "]"
        if isinstance(o, float) and not math.isfinite(o):
            raise ValueError("non-finite float in fixture")
        return json.dumps(o)

    path.write_text(enc(obj, 0) + "\n")


def resolve_base_model_dir() -> Path:
    env = os.environ.get("SWITCHYARD_BASE_MODEL_DIR")
    default = Path(env) if env else REPO / "models" / "all-minilm-l6-v2"
    if (default / "model.safetensors").exists() and (default / "config.json").exists():
        return default
    fetch = REPO / "scripts" / "fetch-base-model.sh"
    out = subprocess.run(["bash", str(fetch)], check=True, capture_output=True, text=True)
    lines = [l for l in out.stdout.splitlines() if l.strip()]
    return Path(lines[-1].strip())


# ----------------------------------------------------------------------------------------------
# Adapters (our package format)
# ----------------------------------------------------------------------------------------------


def make_adapter(weights: dict, targets: list, rank: int, alpha: float, seed: int,
                 a_std: float, b_std: float, num_layers: int):
    """weights: (layer, module) -> base Linear weight [out, in]. Returns {tensor name: tensor}.

    Draw order from one torch.Generator(seed): layers 0.., modules in ADAPTER_MODULE_ORDER restricted
    to targets, A (randn [r, in] * a_std) then B (randn [out, r] * b_std).
    """
    g = torch.Generator().manual_seed(seed)
    tensors = {}
    for i in range(num_layers):
        for m in ADAPTER_MODULE_ORDER:
            if m not in targets:
                continue
            out_f, in_f = weights[(i, m)].shape
            a = torch.randn(rank, in_f, generator=g, dtype=torch.float32) * a_std
            b = torch.randn(out_f, rank, generator=g, dtype=torch.float32) * b_std
            tensors[f"layers.{i}.{m}.A"] = a.contiguous()
            tensors[f"layers.{i}.{m}.B"] = b.contiguous()
    return tensors


def alpha_str(alpha: float) -> str:
    return str(int(alpha)) if float(alpha).is_integer() else repr(float(alpha))


def save_adapter(path: Path, tensors: dict, *, fingerprint: str, rank: int, alpha: float,
                 task: str, description: str) -> None:
    meta = {
        "format_version": "1",
        "base_fingerprint": fingerprint,
        "rank": str(rank),
        "alpha": alpha_str(alpha),
        "task": task,
        "description": description,
    }
    save_file({k: v.to(torch.float32).contiguous() for k, v in tensors.items()}, str(path), metadata=meta)
    canonicalize_safetensors_header(path)
    # Read back: same tensors, same metadata.
    with safetensors.safe_open(str(path), framework="pt") as f:
        assert f.metadata() == meta, (f.metadata(), meta)
        assert sorted(f.keys()) == sorted(tensors)
        for k in f.keys():
            t = f.get_tensor(k)
            assert t.dtype == torch.float32 and torch.equal(t, tensors[k]), k


def canonicalize_safetensors_header(path: Path) -> None:
    """safetensors writes __metadata__ in hash-map order, which changes from run to run. Rewrite the
    header in place with sorted metadata keys (same bytes otherwise, same length, space padded), so a
    rerun writes byte-identical files."""
    raw = bytearray(path.read_bytes())
    (n,) = struct.unpack("<Q", raw[:8])
    header = json.loads(raw[8:8 + n].decode("utf-8"))
    meta = header.pop("__metadata__", None)
    ordered = {}
    if meta is not None:
        ordered["__metadata__"] = dict(sorted(meta.items()))
    for name, info in sorted(header.items(), key=lambda kv: kv[1]["data_offsets"][0]):
        ordered[name] = info
    text = json.dumps(ordered, separators=(",", ":"), ensure_ascii=False).encode("utf-8")
    assert len(text) <= n, "canonical header longer than the original"
    raw[8:8 + n] = text + b" " * (n - len(text))
    path.write_bytes(bytes(raw))


@torch.no_grad()
def merge_adapter(modules: dict, tensors: dict, rank: int, alpha: float) -> None:
    """modules: (layer, module) -> nn.Linear of the (copied) model. W = W0 + (alpha/r) * B @ A."""
    s = alpha / rank
    for (i, m), lin in modules.items():
        key = f"layers.{i}.{m}"
        if key + ".A" not in tensors:
            continue
        a, b = tensors[key + ".A"], tensors[key + ".B"]
        lin.weight.copy_(lin.weight + s * (b @ a))


# ----------------------------------------------------------------------------------------------
# MiniLM
# ----------------------------------------------------------------------------------------------

BERT_MODULES = {
    "attn.q": lambda l: l.attention.self.query,
    "attn.k": lambda l: l.attention.self.key,
    "attn.v": lambda l: l.attention.self.value,
    "attn.o": lambda l: l.attention.output.dense,
    "mlp.up": lambda l: l.intermediate.dense,
    "mlp.down": lambda l: l.output.dense,
}

MINILM_ADAPTERS = [
    # name, rank, alpha, targets, seed, a_std, b_std
    ("minilm-qv-a", 8, 16, ["attn.q", "attn.v"], 11, 0.06, 0.06),
    ("minilm-qv-b", 4, 8, ["attn.q", "attn.v"], 12, 0.06, 0.06),
    ("minilm-all", 8, 16, ["attn.q", "attn.k", "attn.v", "attn.o", "mlp.up", "mlp.down"], 13, 0.045, 0.045),
]


def bert_linears(st_model) -> dict:
    bert = st_model[0].auto_model
    out = {}
    for i, layer in enumerate(bert.encoder.layer):
        for m, get in BERT_MODULES.items():
            out[(i, m)] = get(layer)
    return out


def encode(st_model, sentences):
    emb = st_model.encode(sentences, batch_size=32, convert_to_tensor=True, show_progress_bar=False)
    return emb.to(torch.float32).cpu()


@torch.no_grad()
def manual_embed(st_model, sentences) -> torch.Tensor:
    """The same pipeline by hand, one unpadded sentence at a time: BertModel last_hidden_state,
    mean over the attention mask, L2 normalise."""
    bert, tok = st_model[0].auto_model, st_model.tokenizer
    rows = []
    for s in sentences:
        enc = tok(s, return_tensors="pt", truncation=True, max_length=st_model.max_seq_length)
        h = bert(**enc).last_hidden_state[0]
        m = enc["attention_mask"][0].to(h.dtype)[:, None]
        v = (h * m).sum(0) / m.sum()
        rows.append(v / v.norm().clamp_min(1e-12))
    return torch.stack(rows).to(torch.float32)


def generate_minilm(base_dir: Path) -> dict:
    fp = base_fingerprint(base_dir)
    print(f"[minilm] base model {base_dir}")
    print(f"[minilm] base_fingerprint {fp}")
    st = SentenceTransformer(str(base_dir), device="cpu", local_files_only=True)
    st.eval()
    mods = list(st._modules.values())
    names = [type(m).__name__ for m in mods]
    assert names == ["Transformer", "Pooling", "Normalize"], names
    tok = st.tokenizer
    token_ids = [tok(s)["input_ids"] for s in EMBED_SENTENCES]
    base = encode(st, EMBED_SENTENCES)
    norms = base.norm(dim=1)
    assert torch.allclose(norms, torch.ones_like(norms), atol=1e-5), norms
    manual_diff = float((manual_embed(st, EMBED_SENTENCES) - base).abs().max())
    print(f"[minilm] st.encode vs hand-written BertModel -> masked mean -> L2 (one sentence at a time): "
          f"max |diff| {manual_diff:.2e}")
    assert manual_diff < 1e-5, manual_diff
    num_layers = len(st[0].auto_model.encoder.layer)
    base_weights = {k: v.weight.detach() for k, v in bert_linears(st).items()}

    result = {
        "generated_by": versions(),
        "base_model": "all-MiniLM-L6-v2",
        "base_fingerprint": fp,
        "pipeline": "sentence-transformers: Transformer (BertModel, max_seq_length "
        f"{st.max_seq_length}) -> mean Pooling over attention mask -> Normalize (L2)",
        "sentences": EMBED_SENTENCES,
        "token_ids": token_ids,
        "embedding_dim": int(base.shape[1]),
        "embeddings": f32_list(base),
        "manual_pipeline_max_abs_diff": manual_diff,
        "adapters": {},
    }
    for name, rank, alpha, targets, seed, a_std, b_std in MINILM_ADAPTERS:
        tensors = make_adapter(base_weights, targets, rank, alpha, seed, a_std, b_std, num_layers)
        desc = (f"switchyard reference fixture {name}: seed {seed}, rank {rank}, alpha {alpha_str(alpha)}, "
                f"targets {' '.join(targets)} in all {num_layers} layers, A=randn*{a_std}, B=randn*{b_std}")
        path = FIXTURES / f"{name}.safetensors"
        save_adapter(path, tensors, fingerprint=fp, rank=rank, alpha=alpha, task="embed", description=desc)
        adapted_model = copy.deepcopy(st)
        merge_adapter(bert_linears(adapted_model), tensors, rank, alpha)
        emb = encode(adapted_model, EMBED_SENTENCES)
        cos = (emb * base).sum(dim=1) / (emb.norm(dim=1) * base.norm(dim=1))
        print(f"[minilm] {name}: cos(base, adapted) = " + " ".join(f"{c:.4f}" for c in cos.tolist())
              + f"  (min {cos.min():.4f}, max {cos.max():.4f})")
        result["adapters"][name] = {
            "file": path.name,
            "rank": rank,
            "alpha": alpha,
            "scale": alpha / rank,
            "targets": targets,
            "seed": seed,
            "a_std": a_std,
            "b_std": b_std,
            "embeddings": f32_list(emb),
            "cosine_to_base": [f32(c) for c in cos.tolist()],
        }
        del adapted_model
    dump_json(result, FIXTURES / "minilm-embeddings.json")
    return result


def write_bench_inputs(base_dir: Path) -> None:
    """256 lines of invented customer messages, each grown word by word to about 64 MiniLM tokens
    (counting [CLS] and [SEP])."""
    from transformers import AutoTokenizer

    tok = AutoTokenizer.from_pretrained(str(base_dir), local_files_only=True)
    rng = random.Random(4242)
    target = 64

    def sentence():
        return rng.choice(BENCH_SENTENCES).format(
            name=rng.choice(BENCH_NAMES), branch=rng.choice(BENCH_BRANCHES), bike=rng.choice(BENCH_BIKES),
            job=rng.choice(BENCH_JOBS), price=f"{rng.randint(12, 190)} dollars",
            order=f"RCW-{rng.randint(1000, 9999)}")

    lines, counts = [], []
    for _ in range(256):
        words: list[str] = []
        n = 2
        while True:
            done = False
            for w in sentence().split():
                m = len(tok(" ".join(words + [w]))["input_ids"])
                if m > target:
                    done = True
                    break
                words.append(w)
                n = m
            if done:
                break
        lines.append(" ".join(words))
        counts.append(n)
    (FIXTURES / "bench-inputs.txt").write_text("\n".join(lines) + "\n")
    print(f"[bench] wrote {len(lines)} lines, mean {sum(counts) / len(counts):.2f} MiniLM tokens "
          f"(min {min(counts)}, max {max(counts)}, counting [CLS]/[SEP])")


# ----------------------------------------------------------------------------------------------
# Tiny Llama
# ----------------------------------------------------------------------------------------------

SPECIAL_TOKENS = ["<s>", "</s>", "<unk>", "<pad>"]


def train_tokenizer() -> Tokenizer:
    tk = Tokenizer(models.BPE(unk_token="<unk>"))
    tk.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False, use_regex=True)
    tk.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=384,
        min_frequency=2,
        special_tokens=SPECIAL_TOKENS,
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    tk.train_from_iterator(BPE_CORPUS, trainer=trainer)
    for text in BPE_CORPUS + EMBED_SENTENCES + [TINY_PROMPT, TINY_INPUT_SENTENCE, "naïve café ✓ 42°"]:
        ids = tk.encode(text).ids
        assert tk.decode(ids, skip_special_tokens=False) == text, text
    return tk


LLAMA_MODULES = {
    "attn.q": lambda l: l.self_attn.q_proj,
    "attn.k": lambda l: l.self_attn.k_proj,
    "attn.v": lambda l: l.self_attn.v_proj,
    "attn.o": lambda l: l.self_attn.o_proj,
    "mlp.gate": lambda l: l.mlp.gate_proj,
    "mlp.up": lambda l: l.mlp.up_proj,
    "mlp.down": lambda l: l.mlp.down_proj,
}


def llama_linears(model) -> dict:
    out = {}
    for i, layer in enumerate(model.model.layers):
        for m, get in LLAMA_MODULES.items():
            out[(i, m)] = get(layer)
    return out


@torch.no_grad()
def init_llama_weights(model, seed: int, biases: bool, embed_std: float) -> None:
    """Overwrites every parameter from one seeded generator, in named_parameters() order:
    embeddings randn*embed_std, Linear weights randn/sqrt(in), lm_head (untied) randn*0.5,
    norm weights 1 + 0.1*randn, biases 0.1*randn."""
    g = torch.Generator().manual_seed(seed)
    for name, p in model.named_parameters():
        shape = tuple(p.shape)
        r = torch.randn(shape, generator=g, dtype=torch.float32)
        if name.endswith("norm.weight"):
            p.copy_(1.0 + 0.1 * r)
        elif name.endswith(".bias"):
            assert biases, name
            p.copy_(0.1 * r)
        elif name == "model.embed_tokens.weight":
            p.copy_(embed_std * r)
        elif name == "lm_head.weight":
            p.copy_(0.5 * r)
        elif name.endswith("_proj.weight"):
            p.copy_(r / math.sqrt(shape[1]))
        else:
            raise ValueError(f"unexpected parameter {name}")


@torch.no_grad()
def logits_of(model, ids: list) -> torch.Tensor:
    x = torch.tensor([ids], dtype=torch.long)
    return model(input_ids=x, use_cache=False).logits[0].to(torch.float32)


@torch.no_grad()
def greedy(model, prompt_ids: list, steps: int = 16):
    seq = list(prompt_ids)
    new, margins = [], []
    for _ in range(steps):
        last = logits_of(model, seq)[-1]
        top = torch.topk(last, 2)
        nxt = int(top.indices[0])
        margins.append(float(top.values[0] - top.values[1]))
        seq.append(nxt)
        new.append(nxt)
    return new, margins


TINY_VARIANTS = {
    "tiny-llama": dict(
        model_seed=109,
        embed_std=1.0,
        config=dict(head_dim=16, attention_bias=False, mlp_bias=False, tie_word_embeddings=False,
                    rope_theta=10000.0, rms_norm_eps=1e-6),
        adapters=[
            ("tiny-llama-qv", 4, 8, ["attn.q", "attn.v"], 21, 0.25, 0.25),
            ("tiny-llama-all", 4, 8, ["attn.q", "attn.k", "attn.v", "attn.o", "mlp.gate", "mlp.up", "mlp.down"],
             22, 0.15, 0.15),
        ],
    ),
    "tiny-llama-bias-tied": dict(
        model_seed=201,
        # Small embeddings: with tied weights a large embedding makes every position predict its own
        # token, and the greedy path collapses into one repeated token.
        embed_std=0.15,
        config=dict(head_dim=32, attention_bias=True, mlp_bias=True, tie_word_embeddings=True,
                    rope_theta=500000.0, rms_norm_eps=1e-5),
        adapters=[
            ("tiny-llama-bias-tied-qv", 4, 8, ["attn.q", "attn.v"], 23, 0.25, 0.25),
        ],
    ),
}

MIN_MARGIN = 1e-3


def rewrite_rope_style(config_path: Path, want_top_level: bool) -> str:
    """Makes config.json spell the rope theta either as a top-level "rope_theta" or inside a
    "rope_parameters" object. Returns the style now in the file."""
    cfg = json.loads(config_path.read_text())
    nested_key = next((k for k in ("rope_parameters", "rope_scaling") if isinstance(cfg.get(k), dict)
                       and "rope_theta" in cfg[k]), None)
    if want_top_level:
        if nested_key is not None:
            nested = cfg.pop(nested_key)
            theta = nested.pop("rope_theta")
            assert nested.get("rope_type", "default") == "default", nested
            cfg["rope_theta"] = theta
        assert "rope_theta" in cfg
        style = "top-level rope_theta"
    else:
        if nested_key is None:
            theta = cfg.pop("rope_theta")
            cfg["rope_parameters"] = {"rope_theta": theta, "rope_type": "default"}
            nested_key = "rope_parameters"
        assert "rope_theta" not in cfg
        style = f"nested {nested_key}.rope_theta"
    config_path.write_text(json.dumps(cfg, indent=2, sort_keys=True) + "\n")
    return style


def generate_tiny(name: str, spec: dict, tk: Tokenizer, native_style: dict) -> dict:
    out_dir = FIXTURES / name
    if out_dir.exists():
        shutil.rmtree(out_dir)
    out_dir.mkdir(parents=True)
    vocab = tk.get_vocab_size()
    c = spec["config"]
    config = LlamaConfig(
        vocab_size=vocab,
        hidden_size=64,
        intermediate_size=128,
        num_hidden_layers=2,
        num_attention_heads=4,
        num_key_value_heads=2,
        head_dim=c["head_dim"],
        max_position_embeddings=128,
        hidden_act="silu",
        rms_norm_eps=c["rms_norm_eps"],
        tie_word_embeddings=c["tie_word_embeddings"],
        attention_bias=c["attention_bias"],
        mlp_bias=c["mlp_bias"],
        rope_parameters={"rope_type": "default", "rope_theta": c["rope_theta"]},
        bos_token_id=tk.token_to_id("<s>"),
        eos_token_id=tk.token_to_id("</s>"),
        pad_token_id=tk.token_to_id("<pad>"),
        initializer_range=0.02,
        attn_implementation="eager",
    )
    torch.manual_seed(spec["model_seed"])
    model = LlamaForCausalLM(config).eval()
    init_llama_weights(model, spec["model_seed"], biases=c["attention_bias"], embed_std=spec["embed_std"])
    if c["tie_word_embeddings"]:
        assert model.lm_head.weight.data_ptr() == model.model.embed_tokens.weight.data_ptr()
    model.save_pretrained(str(out_dir), safe_serialization=True)
    tk.save(str(out_dir / "tokenizer.json"))

    # Rope spelling: variant c keeps what save_pretrained writes; the other variant gets the other one.
    cfg_path = out_dir / "config.json"
    written = json.loads(cfg_path.read_text())
    writes_top_level = "rope_theta" in written
    if "style" not in native_style:
        native_style["style"] = writes_top_level
        style = rewrite_rope_style(cfg_path, want_top_level=writes_top_level)
    else:
        style = rewrite_rope_style(cfg_path, want_top_level=not native_style["style"])
    print(f"[{name}] config.json rope style: {style} (save_pretrained wrote "
          f"{'top-level rope_theta' if writes_top_level else 'a nested object'})")

    # Reload from disk: proves the written config (including the hand-written rope spelling) and
    # checkpoint reproduce the in-memory model.
    reloaded = LlamaForCausalLM.from_pretrained(str(out_dir), attn_implementation="eager", local_files_only=True).eval()
    assert reloaded.config.rope_parameters["rope_theta"] == c["rope_theta"], reloaded.config.rope_parameters

    fp = base_fingerprint(out_dir)
    print(f"[{name}] base_fingerprint {fp}, vocab {vocab}, "
          f"{sum(p.numel() for p in model.parameters())} parameters, "
          f"model.safetensors {(out_dir / 'model.safetensors').stat().st_size} bytes")

    input_ids = tk.encode(TINY_INPUT_SENTENCE).ids
    prompt_ids = tk.encode(TINY_PROMPT).ids
    base_logits = logits_of(model, input_ids)
    assert torch.equal(base_logits, logits_of(reloaded, input_ids)), "reloaded model differs"
    base_greedy, base_margins = greedy(model, prompt_ids)
    print(f"[{name}] input_ids ({len(input_ids)}) {input_ids}")
    print(f"[{name}] prompt_ids ({len(prompt_ids)}) {prompt_ids}")
    print(f"[{name}] base greedy {base_greedy} -> {tk.decode(base_greedy)!r}; "
          f"min margin {min(base_margins):.4f}")
    assert min(base_margins) >= MIN_MARGIN, f"{name}: greedy margin too small; pick another model_seed"

    result = {
        "generated_by": versions(),
        "model_dir": f"tests/reference/fixtures/{name}",
        "base_fingerprint": fp,
        "model_seed": spec["model_seed"],
        "rope_style": style,
        "vocab_size": vocab,
        "input_text": TINY_INPUT_SENTENCE,
        "input_ids": input_ids,
        "logits": f32_list(base_logits),
        "prompt": TINY_PROMPT,
        "prompt_ids": prompt_ids,
        "greedy": base_greedy,
        "greedy_text": tk.decode(base_greedy),
        "greedy_min_margin": f32(min(base_margins)),
        "greedy_margins": [f32(m) for m in base_margins],
        "adapters": {},
    }
    base_weights = {k: v.weight.detach() for k, v in llama_linears(model).items()}
    for aname, rank, alpha, targets, seed, a_std, b_std in spec["adapters"]:
        tensors = make_adapter(base_weights, targets, rank, alpha, seed, a_std, b_std, config.num_hidden_layers)
        desc = (f"switchyard reference fixture {aname} for {name}: seed {seed}, rank {rank}, alpha "
                f"{alpha_str(alpha)}, targets {' '.join(targets)} in all {config.num_hidden_layers} layers, "
                f"A=randn*{a_std}, B=randn*{b_std}")
        path = FIXTURES / f"{aname}.safetensors"
        save_adapter(path, tensors, fingerprint=fp, rank=rank, alpha=alpha, task="generate", description=desc)
        merged = copy.deepcopy(model)
        merge_adapter(llama_linears(merged), tensors, rank, alpha)
        lg = logits_of(merged, input_ids)
        gr, margins = greedy(merged, prompt_ids)
        max_dev = float((lg - base_logits).abs().max())
        print(f"[{name}] {aname}: greedy {gr} -> {tk.decode(gr)!r}; min margin {min(margins):.4f}; "
              f"max |logit change| {max_dev:.3f}; differs from base: {gr != base_greedy}")
        assert gr != base_greedy, f"{aname}: greedy equals base; scale the factors up"
        assert min(margins) >= MIN_MARGIN, f"{aname}: greedy margin too small"
        result["adapters"][aname] = {
            "file": path.name,
            "rank": rank,
            "alpha": alpha,
            "scale": alpha / rank,
            "targets": targets,
            "seed": seed,
            "a_std": a_std,
            "b_std": b_std,
            "logits": f32_list(lg),
            "greedy": gr,
            "greedy_text": tk.decode(gr),
            "greedy_min_margin": f32(min(margins)),
            "greedy_margins": [f32(m) for m in margins],
        }
        del merged
    dump_json(result, FIXTURES / f"{name}-reference.json")
    return result


# ----------------------------------------------------------------------------------------------


def main() -> None:
    torch.set_num_threads(THREADS)
    torch.use_deterministic_algorithms(True)
    torch.manual_seed(0)
    random.seed(0)
    np.random.seed(0)
    transformers.logging.set_verbosity_error()
    try:
        transformers.utils.logging.disable_progress_bar()
    except Exception:
        pass

    v = versions()
    print("[versions] " + ", ".join(f"{k} {val}" for k, val in v.items() if k != "script"))
    FIXTURES.mkdir(parents=True, exist_ok=True)

    base_dir = resolve_base_model_dir()
    generate_minilm(base_dir)
    write_bench_inputs(base_dir)

    tk = train_tokenizer()
    print(f"[tokenizer] byte-level BPE, vocab {tk.get_vocab_size()}, specials "
          + ", ".join(f"{t}={tk.token_to_id(t)}" for t in SPECIAL_TOKENS))
    native_style: dict = {}
    for name, spec in TINY_VARIANTS.items():
        generate_tiny(name, spec, tk, native_style)

    total = 0
    print("[files]")
    for p in sorted(FIXTURES.rglob("*")):
        if p.is_file():
            total += p.stat().st_size
            print(f"  {p.relative_to(HERE)}  {p.stat().st_size}")
    print(f"[files] total {total} bytes")


if __name__ == "__main__":
    main()
