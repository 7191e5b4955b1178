"""Our own on-disk caches (meshes, geometric factors, response tables).

Entries are keyed by a SHA-256 hash of the canonical JSON of their inputs, written atomically
(temporary file in the same folder, then :func:`os.replace`), and stored in open formats (pyGIMLi
``.bms`` meshes, ``.npz`` arrays without pickled objects, JSON). The root folder is
``$TBMINV_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/tbminv`` or ``~/.cache/tbminv``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

CACHE_FORMAT = 1


def cache_root() -> Path:
    """Root folder of tbminv's caches (created if missing)."""
    env = os.environ.get("TBMINV_CACHE_DIR")
    if env:
        root = Path(env)
    else:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        root = Path(base) / "tbminv"
    root.mkdir(parents=True, exist_ok=True)
    return root


def cache_dir(kind: str) -> Path:
    """Folder for one kind of cached object, e.g. ``"mesh3d"``, created if missing."""
    path = cache_root() / kind
    path.mkdir(parents=True, exist_ok=True)
    return path


def _plain(obj: Any) -> Any:
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: _plain(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in sorted(obj.items(), key=lambda kv: str(kv[0]))}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_plain(v) for v in obj.tolist()]
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        if math.isnan(v):
            return "nan"
        return repr(v)
    if isinstance(obj, (np.integer, int, bool, str)) or obj is None:
        return obj.item() if isinstance(obj, np.generic) else obj
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot hash object of type {type(obj).__name__} for a cache key")


def cache_key(obj: Any) -> str:
    """SHA-256 hex digest of the canonical JSON of plain data (dataclasses, dicts, arrays...)."""
    text = json.dumps({"format": CACHE_FORMAT, "data": _plain(obj)}, sort_keys=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it into place if the block succeeds.

    A crash or exception inside the block leaves any existing ``path`` untouched.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp" + target.suffix,
                               dir=target.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        with open(tmp_path, "rb") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp_path, 0o644)  # mkstemp makes owner-only files
        os.replace(tmp_path, target)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically and return the path."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def atomic_write_text(path: str | os.PathLike[str], text: str) -> Path:
    """Write UTF-8 ``text`` to ``path`` atomically and return the path."""
    return atomic_write_bytes(path, text.encode("utf-8"))


__all__ = ["cache_root", "cache_dir", "cache_key", "atomic_path", "atomic_write_bytes",
           "atomic_write_text"]
