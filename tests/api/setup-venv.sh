#!/usr/bin/env bash
# Creates tests/api/.venv with the pinned Python tools the API-description test runs: an OpenAPI
# validator (openapi-spec-validator), the property-based API fuzzer (schemathesis) and the JSON
# Schema validator check_answers.py uses (jsonschema).
# Idempotent: a venv that already has exactly these versions is left alone.
set -euo pipefail

here=$(cd "$(dirname "$0")" && pwd)
venv=$here/.venv
pins=(
    "schemathesis==4.32.5"
    "openapi-spec-validator==0.9.0"
    # check_answers.py validates answers with it (schemathesis uses it too).
    "jsonschema==4.26.0"
)

if [ ! -x "$venv/bin/python" ]; then
    echo "tests/api/setup-venv: creating $venv" >&2
    python3 -m venv "$venv"
fi
if "$venv/bin/python" - "${pins[@]}" <<'PY' 2>/dev/null; then
import sys
from importlib.metadata import version
for pin in sys.argv[1:]:
    name, want = pin.split("==")
    if version(name) != want:
        sys.exit(1)
PY
    exit 0
fi
"$venv/bin/pip" install --quiet --disable-pip-version-check "${pins[@]}"
