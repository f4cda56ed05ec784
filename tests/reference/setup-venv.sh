#!/usr/bin/env bash
# Creates tests/reference/.venv with the pinned Python libraries that generate.py and time_embed.py
# use. Idempotent: an existing venv that already has exactly these versions is left alone.
# torch comes from PyPI (its default Linux wheel is the CUDA build; it runs on CPU here).
# confseq (for sequential.py) is built from source: it needs Boost's headers (Debian's
# libboost-dev) and a C++ compiler. Its own build requirements pin a pybind11 that does not
# compile against Python 3.11, so it is built without build isolation against the newer
# pybind11 pinned below.
set -euo pipefail

here=$(cd "$(dirname "$0")" && pwd)
venv=$here/.venv
pins=(
    "torch==2.15.0"
    "transformers==5.24.0"
    "sentence-transformers==6.2.0"
    "safetensors==0.8.0"
    "tokenizers==0.23.3"
    "numpy==2.4.6"
    "scipy==1.17.1"
    "peft==0.21.2"
    "confseq==0.0.11"
)
# What confseq is built with (see above).
build_pins=(
    "pybind11==2.13.6"
    "scikit-build==0.18.1"
    "cmake==3.31.6"
    "ninja==1.11.1.4"
)

if [ ! -x "$venv/bin/python" ]; then
    echo "setup-venv: creating $venv" >&2
    python3 -m venv "$venv"
fi

# Already satisfied? (pip check of exact pins without touching the network)
if "$venv/bin/python" - "${pins[@]}" <<'PY' 2>/dev/null; then
import sys
from importlib.metadata import version, PackageNotFoundError
for pin in sys.argv[1:]:
    name, want = pin.split("==")
    try:
        have = version(name)
    except PackageNotFoundError:
        sys.exit(1)
    if have.split("+")[0] != want:
        sys.exit(1)
PY
    echo "setup-venv: $venv already has the pinned versions" >&2
    exit 0
fi

if [ ! -d /usr/include/boost/math ]; then
    echo "setup-venv: confseq needs Boost's headers: apt-get install libboost-dev" >&2
    exit 1
fi
echo "setup-venv: installing ${pins[*]} (torch is large; this can take a few minutes)" >&2
"$venv/bin/python" -m pip install --disable-pip-version-check --quiet \
    "${build_pins[@]}" setuptools wheel
"$venv/bin/python" -m pip install --disable-pip-version-check --quiet --no-build-isolation "${pins[@]}"
echo "setup-venv: done" >&2
