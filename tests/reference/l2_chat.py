#!/usr/bin/env python3
"""Writes tests/reference/fixtures/l2-tokenizer-chat.json: how transformers renders and tokenises
conversations through an [INST]-style chat template set on the real 32,000-token Llama-2 vocabulary
tokenizer that scripts/fetch-tokenizer.sh fetches, for switchyard's check of its chat module and
tokenizer against it (server/tests/l2_tokenizer_chat.rs).

Run with the venv made by setup-venv.sh:

    tests/reference/.venv/bin/python tests/reference/l2_chat.py

The tokenizer file itself is fetched, never committed; the fixture records its sha256. The chat
template is written for this project in the style of Llama-2 chat models (each user turn opens
with the BOS token and is wrapped in [INST] ... [/INST], a system message is folded into the
first user turn between <<SYS>> markers, each answer ends with the EOS token). The same
tokenizer_config.json goes into the serving benchmark decoder (scripts/make-bench-decoder).
transformers loads it from a folder holding the fetched tokenizer.json and that config, renders
each conversation with `apply_chat_template(..., add_generation_prompt=True)`, once as text and
once as token ids, and checks that the ids are the text tokenised without added special tokens.
Conversations from the Ridgeline Cycle Works scenario of generate.py; some the template refuses.
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent
OUT = HERE / "fixtures" / "l2-tokenizer-chat.json"

TEMPLATE = (
    "{% set has_system = messages|length > 0 and messages[0]['role'] == 'system' %}"
    "{% set turns = messages[1:] if has_system else messages %}"
    "{% if turns|length == 0 %}"
    "{{ raise_exception('a conversation needs a user message after the system message') }}"
    "{% endif %}"
    "{% for message in turns %}"
    "{% set user_turn = loop.index0 % 2 == 0 %}"
    "{% if user_turn and message['role'] != 'user' or not user_turn and message['role'] != 'assistant' %}"
    "{{ raise_exception('after an optional system message, turns alternate user and assistant; turn '"
    " + loop.index|string + ' is ' + message['role']) }}"
    "{% endif %}"
    "{% if user_turn %}"
    "{{ bos_token + '[INST] ' + ('<<SYS>>\\n' + messages[0]['content'].strip() + '\\n<</SYS>>\\n\\n'"
    " if loop.first and has_system else '') + message['content'].strip() + ' [/INST]' }}"
    "{% else %}"
    "{{ ' ' + message['content'].strip() + ' ' + eos_token }}"
    "{% endif %}"
    "{% endfor %}"
    "{% if add_generation_prompt and turns[-1]['role'] != 'user' %}"
    "{{ raise_exception('the model answers a user turn: the last message must be the user\\'s') }}"
    "{% endif %}"
)

TOKENIZER_CONFIG = {
    "tokenizer_class": "PreTrainedTokenizerFast",
    "bos_token": "<s>",
    "eos_token": "</s>",
    "unk_token": "<unk>",
    "model_max_length": 4096,
    "chat_template": TEMPLATE,
}

CONVERSATIONS = [
    [
        {"role": "user", "content": "  My rear brake squeals on every descent. "},
    ],
    [
        {"role": "system", "content": "You answer for Ridgeline Cycle Works, Foundry Street shop."},
        {"role": "user", "content": "Can you true a wheel today?"},
    ],
    [
        {"role": "system", "content": "Saturday rota.\nBe brief; quote prices in euros."},
        {"role": "user", "content": "Can you true a wheel today?"},
        {"role": "assistant", "content": "Yes, drop it off before noon. It costs 18 €."},
        {"role": "user", "content": "And the chain?\n\nIt skips  in the two smallest cogs."},
    ],
    [
        {"role": "user", "content": "Können Sie die Schaltung einstellen? Größe 56, Ritzel 11–34."},
        {"role": "assistant", "content": "Ja, in ½ Stunde. 🚲"},
        {"role": "user", "content": "自転車のチェーンも交換できますか？ Tabs\tand [INST] in text </s> too."},
    ],
]

REFUSED = [
    [{"role": "assistant", "content": "Hello, how can I help?"}],
    [{"role": "user", "content": "Hi."}, {"role": "user", "content": "Anyone there?"}],
    [{"role": "system", "content": "Only a system message."}],
    [{"role": "user", "content": "Hi."}, {"role": "assistant", "content": "Hello."}],
]


def tokenizer_path() -> Path:
    """The fetched tokenizer.json, fetching it when absent (the script prints its path last)."""
    out = subprocess.run([str(ROOT / "scripts" / "fetch-tokenizer.sh")], check=True,
                         capture_output=True, text=True).stdout
    return Path(out.strip().splitlines()[-1])


def ids_of(encoded) -> list:
    """apply_chat_template(tokenize=True) gives a list, or a mapping with input_ids."""
    if hasattr(encoded, "keys"):
        encoded = encoded["input_ids"]
    return [int(i) for i in encoded]


def main() -> None:
    import tokenizers
    import transformers
    from transformers import AutoTokenizer

    source = tokenizer_path()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        (folder / "tokenizer.json").write_bytes(source.read_bytes())
        (folder / "tokenizer_config.json").write_text(json.dumps(TOKENIZER_CONFIG, indent=2))
        tok = AutoTokenizer.from_pretrained(str(folder), local_files_only=True)
        assert len(tok) == 32000, f"the tokenizer has {len(tok)} tokens, not 32,000"
        cases = []
        for messages in CONVERSATIONS:
            rendered = tok.apply_chat_template(messages, tokenize=False, add_generation_prompt=True)
            ids = ids_of(tok.apply_chat_template(messages, tokenize=True, add_generation_prompt=True))
            assert ids == tok(rendered, add_special_tokens=False)["input_ids"], "tokenising differs"
            assert 0 not in ids, f"an unknown token in {rendered!r}"
            print(f"{rendered!r} -> {len(ids)} ids")
            cases.append({"messages": messages, "rendered": rendered, "prompt_ids": ids})
        refusals = []
        for messages in REFUSED:
            try:
                tok.apply_chat_template(messages, tokenize=False, add_generation_prompt=True)
            except Exception as e:  # transformers raises its TemplateError
                refusals.append({"messages": messages, "message": str(e)})
                print(f"refused: {e}")
                continue
            sys.exit(f"the template took {messages}, which it should refuse")
    OUT.write_text(json.dumps({
        "made_by": f"tests/reference/l2_chat.py, transformers {transformers.__version__}, "
                   f"tokenizers {tokenizers.__version__}",
        "tokenizer_sha256": hashlib.sha256(source.read_bytes()).hexdigest(),
        "tokenizer_config": TOKENIZER_CONFIG,
        "cases": cases,
        "refusals": refusals,
    }, indent=1, ensure_ascii=False) + "\n")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
