"""The drive's journal: each advance's image on disk as soon as it is inverted.

A drive inversion runs for hours and stores its section only at the end. The journal keeps
what is done: one small ``.npz`` per advance (no pickle), written atomically
(:func:`tbminv.cache.atomic_path`) the moment its image inversion ends, in a folder beside the
store::

    <store>.journal/<key>/advance-000017.npz
    <store>.journal/<key>/inputs.json          # what the key stands for (for people)

``key`` is a hash of everything the images depend on: the readings (file bytes and the
advance data made from them), the layout, the inversion and QC settings, the start mode
(warm or cold), the stored drive the run continues from (its last model and the readings of
the contact window) and the versions of tbminv, pyGIMLi and pgcore. A crash or a kill loses at most
the advance in progress; the same command again finds the journal of the same key, skips the
advances it holds and warm-starts from the last of them. Another key (other inputs or
settings) gets its own folder and never mixes in. The journal of a key is removed once its
shift is in the store.
"""

from __future__ import annotations

import json
import logging
import shutil
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from tbminv.cache import atomic_path, atomic_write_text, cache_key
from tbminv.inversion.image import ImageResult

_LOG = logging.getLogger(__name__)

JOURNAL_FORMAT = 1
_ARRAYS = ("model_ohmm", "coverage", "doi_index", "response_ohmm", "data_ohmm", "rel_error")
_SCALARS = ("chi2", "rrms_percent", "iterations", "lam", "stop_reason", "converged", "time_s",
            "chi2_history", "n_used", "postprocess_flag")


def journal_root(store_path: str | Path) -> Path:
    """The journal folder of a store: ``<store>.journal`` beside it."""
    store = Path(store_path)
    return store.with_name(store.name + ".journal")


class Journal:
    """Per-advance image results of one drive inversion, kept until the store has them.

    Parameters
    ----------
    store_path : path
        The section store the run appends to; the journal lives beside it.
    inputs : mapping
        Everything the images depend on (JSON-able; hashed into the key).
    """

    def __init__(self, store_path: str | Path, inputs: Mapping[str, Any]) -> None:
        self.key = cache_key({"journal_format": JOURNAL_FORMAT, **dict(inputs)})[:24]
        self.root = journal_root(store_path)
        self.folder = self.root / self.key
        self._inputs = dict(inputs)

    def _path(self, advance: int) -> Path:
        return self.folder / f"advance-{int(advance):06d}.npz"

    def others(self) -> list[Path]:
        """Journals of other keys beside the store (runs with other inputs or settings)."""
        if not self.root.is_dir():
            return []
        return sorted(p for p in self.root.iterdir() if p.is_dir() and p.name != self.key)

    def load(self) -> dict[int, ImageResult]:
        """The advances this key's journal holds (unreadable entries are ignored and logged)."""
        out: dict[int, ImageResult] = {}
        if not self.folder.is_dir():
            return out
        for path in sorted(self.folder.glob("advance-*.npz")):
            try:
                adv, img = _read_entry(path, self.key)
            except (OSError, ValueError, KeyError) as exc:
                _LOG.warning("journal %s: %s unreadable (%s); the advance is inverted again",
                             self.folder, path.name, exc)
                continue
            out[adv] = img
        return out

    def write(self, advance: int, img: ImageResult) -> Path:
        """Journal one advance's image (atomic: a kill leaves the old entry or none)."""
        self.folder.mkdir(parents=True, exist_ok=True)
        info = self.folder / "inputs.json"
        if not info.exists():
            atomic_write_text(info, json.dumps({"key": self.key, **self._inputs}, indent=1,
                                               sort_keys=True, default=str) + "\n")
        path = self._path(advance)
        meta = {"key": self.key, "advance": int(advance), "format": JOURNAL_FORMAT}
        meta.update({k: _plain(getattr(img, k)) for k in _SCALARS})
        arrays = {k: np.asarray(getattr(img, k), float) for k in _ARRAYS
                  if getattr(img, k) is not None}
        with atomic_path(path) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, meta=np.array(json.dumps(meta)), **arrays)
        return path

    def remove(self) -> None:
        """Delete this key's journal (and the journal folder when nothing else is in it)."""
        shutil.rmtree(self.folder, ignore_errors=True)
        try:
            self.root.rmdir()
        except OSError:
            pass  # other keys' journals (or a file of the user's) stay


def _plain(v: Any) -> Any:
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, list | tuple):
        return [float(x) for x in v]
    return v


def _read_entry(path: Path, key: str) -> tuple[int, ImageResult]:
    with np.load(path, allow_pickle=False) as z:
        meta = json.loads(str(z["meta"]))
        if meta.get("key") != key or meta.get("format") != JOURNAL_FORMAT:
            raise ValueError("written for other inputs or settings")
        arrays = {k: (np.array(z[k]) if k in z.files else None) for k in _ARRAYS}
    img = ImageResult(
        model_ohmm=arrays["model_ohmm"], chi2=float(meta["chi2"]),
        rrms_percent=float(meta["rrms_percent"]), iterations=int(meta["iterations"]),
        lam=float(meta["lam"]), stop_reason=str(meta["stop_reason"]),
        converged=bool(meta["converged"]), time_s=float(meta["time_s"]),
        chi2_history=[float(x) for x in meta["chi2_history"]], coverage=arrays["coverage"],
        doi_index=arrays["doi_index"], n_used=int(meta["n_used"]),
        response_ohmm=arrays["response_ohmm"], data_ohmm=arrays["data_ohmm"],
        rel_error=arrays["rel_error"], postprocess_flag=int(meta["postprocess_flag"]))
    return int(meta["advance"]), img


__all__ = ["JOURNAL_FORMAT", "Journal", "journal_root"]
