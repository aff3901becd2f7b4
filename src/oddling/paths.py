"""Where oddling keeps per-user files: the cache folder for weights, exports and embeddings."""
from __future__ import annotations

import os
from pathlib import Path

import platformdirs

CACHE_ENV_VAR = "ODDLING_CACHE_DIR"


def cache_dir(override: str | os.PathLike | None = None) -> Path:
    """The cache folder: `override` if given, else $ODDLING_CACHE_DIR, else the platform's user cache."""
    if override:
        return Path(override).expanduser()
    env = os.environ.get(CACHE_ENV_VAR)
    if env:
        return Path(env).expanduser()
    return Path(platformdirs.user_cache_dir("oddling", appauthor=False))
