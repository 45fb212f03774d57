"""A content-keyed cache of finished stages, in data formats only, safe to delete.

Keys are SHA-256 digests of everything a stage's result depends on (input hashes,
settings, seeds, the screener version and a fingerprint of its source code).  An entry is one ``.npz`` file: the arrays,
plus a JSON manifest that describes how they fit together (dicts, lists, tables, the
screener's own result dataclasses).  Entries are read with ``allow_pickle=False`` and
the manifest can only name dataclasses of the screener and a short list of fitted
scikit-learn transformers, which are rebuilt by setting their attributes: no code
from the cache folder ever runs, whoever wrote the file.  An unreadable or tampered
entry is ignored with a warning and the stage is recomputed.  Entries are written to
a temporary file and renamed into place, so an interrupted write leaves no entry.
"""

from __future__ import annotations

import dataclasses
import hashlib
import importlib
import io
import json
import logging
import os
import uuid
from pathlib import Path

import numpy as np

from screener import __version__

__all__ = ["StageCache", "digest", "encode", "decode", "CacheFormatError"]

log = logging.getLogger(__name__)

#: bumped whenever the layout of an entry changes; other versions are misses
FORMAT = 1

#: fitted scikit-learn objects a cached stage may hold (attributes only: arrays,
#: numbers and strings); nothing else outside the screener is ever rebuilt
_ESTIMATORS = {
    "sklearn.preprocessing:StandardScaler",
    "sklearn.decomposition:PCA",
}


class CacheFormatError(ValueError):
    """A value that cannot be stored, or an entry that does not decode."""


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


_CODE_FINGERPRINT: str | None = None


def code_fingerprint() -> str:
    """SHA-256 of the screener's own source files, computed once per process.

    Part of every cache key, so results cached by one build of the screener are never
    served by another, even where both carry the same version number (a development
    install, or a patched copy).
    """
    global _CODE_FINGERPRINT
    if _CODE_FINGERPRINT is None:
        root = Path(__file__).resolve().parent
        h = hashlib.sha256()
        for path in sorted(root.rglob("*.py")):
            h.update(path.relative_to(root).as_posix().encode())
            h.update(b"\0")
            h.update(path.read_bytes())
            h.update(b"\0")
        _CODE_FINGERPRINT = h.hexdigest()
    return _CODE_FINGERPRINT


def digest(*parts) -> str:
    """Stable SHA-256 hex digest of JSON-able parts (arrays hashed by content).

    The key also holds the screener's version and :func:`code_fingerprint`.
    """
    text = json.dumps([__version__, code_fingerprint(), _normalise(list(parts))],
                      sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


# ----------------------------------------------------------------------- encoding
def _class_name(cls) -> str:
    return f"{cls.__module__}:{cls.__qualname__}"


def _public_estimator_name(obj) -> str | None:
    """``package.module:Class`` under its public import path, if allowed."""
    for name in _ESTIMATORS:
        module, qual = name.split(":")
        if type(obj).__qualname__ == qual and type(obj).__module__.startswith(module):
            return name
    return None


def encode(value, arrays: dict):
    """JSON-able description of ``value``; its arrays are added to ``arrays``.

    Raises
    ------
    CacheFormatError
        ``value`` holds something that has no data-only form.
    """
    import pandas as pd

    def arr(a):
        a = np.asarray(a)
        if a.dtype.hasobject:
            flat = a.ravel().tolist()
            if not all(v is None or isinstance(v, (str, bool, int, float)) for v in flat):
                raise CacheFormatError(f"object array of {type(flat[0]).__name__}")
            return {"__objects__": [enc(v) for v in flat], "shape": list(a.shape)}
        name = f"a{len(arrays)}"
        arrays[name] = a
        return {"__array__": name}

    def enc(v):
        if isinstance(v, (np.ndarray, np.generic)):  # before float: float64 is a float
            out = arr(v)
            if isinstance(v, np.generic):
                out = {"__scalar__": out}
            return out
        if v is None or isinstance(v, (bool, str)):
            return v
        if isinstance(v, int):
            return v
        if isinstance(v, float):
            return v if np.isfinite(v) else {"__float__": repr(v)}
        if isinstance(v, tuple):
            return {"__tuple__": [enc(x) for x in v]}
        if isinstance(v, list):
            return [enc(x) for x in v]
        if isinstance(v, dict):
            return {"__dict__": [[enc(k), enc(x)] for k, x in v.items()]}
        if isinstance(v, Path):
            return {"__path__": str(v)}
        if type(v) is pd.DataFrame:
            return {"__frame__": {
                "columns": [enc(c) for c in v.columns],
                "index": arr(v.index.to_numpy()),
                "data": [arr(v[c].to_numpy()) for c in v.columns],
            }}
        if dataclasses.is_dataclass(v) and type(v).__module__.startswith("screener."):
            return {"__dataclass__": _class_name(type(v)),
                    "fields": {f.name: enc(getattr(v, f.name))
                               for f in dataclasses.fields(v)}}
        name = _public_estimator_name(v)
        if name is not None:
            return {"__estimator__": name, "state": enc(dict(vars(v)))}
        raise CacheFormatError(f"a {type(v).__name__} has no data-only form")

    return enc(value)


def _allowed_class(name: str, estimator: bool):
    """The class ``name`` refers to, if the cache may rebuild it; else raise."""
    if not isinstance(name, str) or name.count(":") != 1:
        raise CacheFormatError(f"bad class name {name!r}")
    module, qual = name.split(":")
    if estimator:
        if name not in _ESTIMATORS:
            raise CacheFormatError(f"{name} is not an allowed estimator")
    elif not module.startswith("screener."):
        raise CacheFormatError(f"{name} is not a screener class")
    obj = importlib.import_module(module)
    for part in qual.split("."):
        obj = getattr(obj, part)
    if not isinstance(obj, type) or (not estimator and not dataclasses.is_dataclass(obj)):
        raise CacheFormatError(f"{name} is not a data class")
    return obj


def decode(node, arrays):
    """Rebuild a value from :func:`encode`'s description and its arrays.

    Only data is read: dataclasses of the screener and the allowed estimators are
    created without calling their constructors, and their attributes set.
    """
    import pandas as pd

    def arr(d):
        if "__objects__" in d:
            out = np.empty(len(d["__objects__"]), dtype=object)
            out[:] = [dec(v) for v in d["__objects__"]]
            return out.reshape(d["shape"])
        a = arrays[d["__array__"]]
        if a.dtype.hasobject:
            raise CacheFormatError("object array")
        return a

    def dec(v):
        if v is None or isinstance(v, (bool, str, int, float)):
            return v
        if isinstance(v, list):
            return [dec(x) for x in v]
        if not isinstance(v, dict) or len(v) == 0:
            raise CacheFormatError("unexpected node")
        tag = next(iter(v))
        if tag in ("__array__", "__objects__"):
            return arr(v)
        if tag == "__scalar__":
            return arr(v["__scalar__"])[()]
        if tag == "__float__":
            if v[tag] not in ("nan", "inf", "-inf"):
                raise CacheFormatError("bad float")
            return float(v[tag])
        if tag == "__tuple__":
            return tuple(dec(x) for x in v[tag])
        if tag == "__dict__":
            return {dec(k): dec(x) for k, x in v[tag]}
        if tag == "__path__":
            return Path(v[tag])
        if tag == "__frame__":
            f = v[tag]
            cols = [dec(c) for c in f["columns"]]
            data = {i: arr(d) for i, d in enumerate(f["data"])}
            df = pd.DataFrame(data, index=arr(f["index"]))
            df.columns = cols
            return df
        if tag in ("__dataclass__", "__estimator__"):
            cls = _allowed_class(v[tag], estimator=tag == "__estimator__")
            obj = cls.__new__(cls)
            if tag == "__dataclass__":
                names = {f.name for f in dataclasses.fields(cls)}
                fields = v["fields"]
                if set(fields) != names:
                    raise CacheFormatError(f"fields of {v[tag]} do not match")
                for k, x in fields.items():
                    object.__setattr__(obj, k, dec(x))
            else:
                state = dec(v["state"])
                if not isinstance(state, dict) or not all(isinstance(k, str) for k in state):
                    raise CacheFormatError("bad estimator state")
                obj.__dict__.update(state)
            return obj
        raise CacheFormatError(f"unknown tag {tag!r}")

    return dec(node)


# ----------------------------------------------------------------------- the store
class StageCache:
    """Store of finished stages under ``folder``; ``StageCache(None)`` caches nothing.

    Parameters
    ----------
    folder : path-like or None

    Attributes
    ----------
    hits, misses : list of str
        Stages taken from the cache and computed, in order.
    problems : list of str
        Plain-words notes on entries that were ignored (unreadable, tampered, pickles).
    """

    def __init__(self, folder):
        self.folder = Path(folder) if folder is not None else None
        self.hits: list = []
        self.misses: list = []
        self.problems: list = []

    @property
    def enabled(self) -> bool:
        return self.folder is not None

    def _path(self, stage: str, key: str) -> Path:
        return self.folder / stage / f"{key}.npz"

    def _problem(self, text: str) -> None:
        log.info("%s", text)  # reported with the run's warnings
        self.problems.append(text)

    def get(self, stage: str, key: str):
        """The cached value, or None (a miss)."""
        if not self.enabled:
            return None
        legacy = self.folder / stage / f"{key}.pickle"
        if legacy.exists():
            self._problem(
                f"Ignored the cache file {legacy}: pickled entries are never loaded (they "
                "can run code). Recomputing; the file can be deleted."
            )
        p = self._path(stage, key)
        if not p.exists():
            self.misses.append(stage)
            return None
        try:
            with np.load(p, allow_pickle=False) as z:
                arrays = {k: z[k] for k in z.files}
            manifest = json.loads(arrays.pop("__manifest__").tobytes().decode("utf-8"))
            if (manifest.get("format") != FORMAT or manifest.get("stage") != stage
                    or manifest.get("key") != key):
                raise CacheFormatError("manifest does not match the entry's name")
            value = decode(manifest["value"], arrays)
        except Exception as exc:  # a damaged or planted entry is a miss, never a crash
            self._problem(
                f"Ignored the cache entry {p}: it is unreadable or was changed "
                f"({type(exc).__name__}); recomputing the stage."
            )
            self.misses.append(stage)
            return None
        self.hits.append(stage)
        return value

    def put(self, stage: str, key: str, value) -> None:
        """Store a value atomically (no-op when disabled; problems only logged)."""
        if not self.enabled:
            return
        p = self._path(stage, key)
        arrays: dict = {}
        try:
            manifest = {"format": FORMAT, "stage": stage, "key": key,
                        "screener_version": __version__, "value": encode(value, arrays)}
        except CacheFormatError as exc:
            log.warning("stage %s not cached: %s", stage, exc)
            return
        arrays["__manifest__"] = np.frombuffer(
            json.dumps(manifest).encode("utf-8"), dtype=np.uint8)
        tmp = p.with_suffix(f".tmp-{uuid.uuid4().hex[:8]}")
        try:
            p.parent.mkdir(parents=True, exist_ok=True)
            buf = io.BytesIO()
            np.savez(buf, **arrays)
            tmp.write_bytes(buf.getvalue())
            os.replace(tmp, p)
        except OSError as exc:
            try:
                tmp.unlink(missing_ok=True)
            except OSError:  # e.g. the folder is a file: nothing was written
                pass
            log.warning("could not write the cache (%s); continuing without it", exc)
