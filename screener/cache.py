"""A content-keyed cache of finished stages, safe to delete at any time.

Keys are SHA-256 digests of everything a stage's result depends on (input hashes,
settings, seeds, the screener version).  Values are pickled to a temporary file and
renamed into place, so an interrupted write never leaves a corrupt entry.  The cache
holds the user's own results: only load caches you made yourself (pickle executes
code on load).
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import pickle
import uuid
from pathlib import Path

import numpy as np

from screener import __version__

__all__ = ["StageCache", "digest"]

log = logging.getLogger(__name__)


def _normalise(obj):
    if isinstance(obj, np.ndarray):
        return {"__nd__": hashlib.sha256(np.ascontiguousarray(obj).tobytes()).hexdigest(),
                "dtype": str(obj.dtype), "shape": list(obj.shape)}
    if isinstance(obj, dict):
        return {str(k): _normalise(v) for k, v in sorted(obj.items(), key=lambda kv: str(kv[0]))}
    if isinstance(obj, (list, tuple)):
        return [_normalise(v) for v in obj]
    if isinstance(obj, (np.integer, np.floating)):
        return obj.item()
    if isinstance(obj, Path):
        return str(obj)
    return obj


def digest(*parts) -> str:
    """Stable SHA-256 hex digest of JSON-able parts (arrays hashed by content)."""
    text = json.dumps([__version__, _normalise(list(parts))], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


class StageCache:
    """Pickle store under ``folder``; ``StageCache(None)`` caches nothing.

    Parameters
    ----------
    folder : path-like or None
    """

    def __init__(self, folder):
        self.folder = Path(folder) if folder is not None else None
        self.hits: list = []
        self.misses: list = []

    @property
    def enabled(self) -> bool:
        return self.folder is not None

    def _path(self, stage: str, key: str) -> Path:
        return self.folder / stage / f"{key}.pickle"

    def get(self, stage: str, key: str):
        """The cached value, or None."""
        if not self.enabled:
            return None
        p = self._path(stage, key)
        if not p.exists():
            self.misses.append(stage)
            return None
        try:
            with open(p, "rb") as f:
                value = pickle.load(f)
        except Exception:  # a damaged entry is a miss, never a crash
            log.warning("cache entry %s is unreadable; recomputing", p)
            self.misses.append(stage)
            return None
        self.hits.append(stage)
        return value

    def put(self, stage: str, key: str, value) -> None:
        """Store a value atomically (no-op when disabled; errors only logged)."""
        if not self.enabled:
            return
        p = self._path(stage, key)
        try:
            p.parent.mkdir(parents=True, exist_ok=True)
            tmp = p.with_suffix(f".tmp-{uuid.uuid4().hex[:8]}")
            with open(tmp, "wb") as f:
                pickle.dump(value, f, protocol=pickle.HIGHEST_PROTOCOL)
            os.replace(tmp, p)
        except OSError as exc:
            log.warning("could not write the cache (%s); continuing without it", exc)
