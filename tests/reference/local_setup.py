"""What every reference script here shares: CPU only, two threads, and the base model folder.

Import it before torch. Models are always read from local folders with `local_files_only=True`
at each load, so no script ever reaches out to a model hub.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
os.environ.setdefault("CUDA_VISIBLE_DEVICES", "")

HERE = Path(__file__).resolve().parent
REPO = HERE.parent.parent
THREADS = 2


def base_model_dir(script: str) -> Path:
    """The embedded default base model (`SWITCHYARD_BASE_MODEL_DIR` or models/all-minilm-l6-v2);
    exits naming `script` when it has not been fetched."""
    env = os.environ.get("SWITCHYARD_BASE_MODEL_DIR")
    model_dir = Path(env) if env else REPO / "models" / "all-minilm-l6-v2"
    if not (model_dir / "model.safetensors").exists():
        sys.exit(f"{script}: no model at {model_dir}; run scripts/fetch-base-model.sh first")
    return model_dir
