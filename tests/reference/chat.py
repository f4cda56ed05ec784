#!/usr/bin/env python3
"""Writes tests/reference/fixtures/tiny-llama-chat.json: how transformers renders and continues
conversations through a chat template kept in tokenizer_config.json, for switchyard's chat
check (tests/tests/server_inference.rs, `generate_with_messages_...`).

Run with the venv made by setup-venv.sh, after generate.py has written the tiny-llama fixture:

    tests/reference/.venv/bin/python tests/reference/chat.py

The chat template and the conversations are invented for this fixture (the Ridgeline Cycle Works
scenario of generate.py). The template is written in the style transformers documents for chat
templates (a loop over `messages`, Python string methods, `raise_exception`, `bos_token`,
`eos_token`, `add_generation_prompt`). transformers reads it from a copy of the tiny-llama folder
with that tokenizer_config.json added (the same file the Rust test writes beside the same
model), renders each conversation with `apply_chat_template(..., add_generation_prompt=True)`,
tokenises it the same way, and continues it greedily for 8 tokens with LlamaForCausalLM in f32.
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
import transformers  # noqa: E402
from transformers import AutoTokenizer, LlamaForCausalLM  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import generate as g  # noqa: E402

HERE = Path(__file__).resolve().parent
FIXTURES = HERE / "fixtures"
MODEL = FIXTURES / "tiny-llama"
OUT = FIXTURES / "tiny-llama-chat.json"
STEPS = 8
MIN_MARGIN = 1e-3

TEMPLATE = (
    "{{ bos_token }}"
    "{% for message in messages %}"
    "{% if message['role'] == 'system' %}{{ '## desk notes\\n' + message['content'].strip() + '\\n' }}"
    "{% elif message['role'] == 'user' %}{{ '## rider\\n' + message['content'].strip() + '\\n' }}"
    "{% elif message['role'] == 'assistant' %}"
    "{{ '## mechanic\\n' + message['content'].strip() + eos_token + '\\n' }}"
    "{% else %}{{ raise_exception('roles are system, user and assistant; got ' + message['role']) }}"
    "{% endif %}"
    "{% endfor %}"
    "{% if add_generation_prompt %}{{ '## mechanic\\n' }}{% endif %}"
)

TOKENIZER_CONFIG = {
    "tokenizer_class": "PreTrainedTokenizerFast",
    "bos_token": "<s>",
    "eos_token": "</s>",
    "pad_token": "<pad>",
    "chat_template": TEMPLATE,
}

CONVERSATIONS = [
    [
        {"role": "user", "content": "  My rear brake squeals on every descent. "},
    ],
    [
        {"role": "system", "content": "Foundry Street shop, Saturday rota."},
        {"role": "user", "content": "Can you true a wheel today?"},
        {"role": "assistant", "content": "Yes, drop it off before noon."},
        {"role": "user", "content": "And the chain?"},
    ],
]


def ids_of(encoded) -> list:
    """apply_chat_template(tokenize=True) gives a list, or a mapping with input_ids."""
    if hasattr(encoded, "keys"):
        encoded = encoded["input_ids"]
    return [int(i) for i in encoded]


def main() -> None:
    torch.set_num_threads(2)
    if not (MODEL / "model.safetensors").exists():
        sys.exit(f"{MODEL} is missing: run generate.py first")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "tiny-llama-chat"
        shutil.copytree(MODEL, folder)
        (folder / "tokenizer_config.json").write_text(json.dumps(TOKENIZER_CONFIG, indent=2))
        tok = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
        model = LlamaForCausalLM.from_pretrained(str(folder), attn_implementation="eager",
                                                 local_files_only=True).eval()
        cases = []
        for messages in CONVERSATIONS:
            rendered = tok.apply_chat_template(messages, tokenize=False, add_generation_prompt=True)
            ids = ids_of(tok.apply_chat_template(messages, tokenize=True, add_generation_prompt=True))
            assert ids == tok(rendered, add_special_tokens=False)["input_ids"], "tokenising differs"
            out, margins = g.greedy(model, ids, steps=STEPS)
            assert min(margins) >= MIN_MARGIN, f"greedy margin {min(margins)} too small"
            print(f"{rendered!r} -> {len(ids)} ids, greedy {out} {tok.decode(out)!r}, "
                  f"least margin {min(margins):.4f}")
            cases.append({
                "messages": messages,
                "rendered": rendered,
                "prompt_ids": ids,
                "greedy": out,
                "greedy_min_margin": min(margins),
            })
        try:
            tok.apply_chat_template([{"role": "tool", "content": "x"}], tokenize=False,
                                    add_generation_prompt=True)
            sys.exit("the template took a role it should refuse")
        except Exception as e:  # transformers raises its TemplateError
            refusal = str(e)
    OUT.write_text(json.dumps({
        "made_by": f"tests/reference/chat.py, transformers {transformers.__version__}, torch {torch.__version__}",
        "tokenizer_config": TOKENIZER_CONFIG,
        "cases": cases,
        "refusal_of_role_tool": refusal,
    }, indent=1, ensure_ascii=False) + "\n")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
