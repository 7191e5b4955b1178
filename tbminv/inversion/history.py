"""What a drive run continues from: the evidence of the advances inverted before it.

A drive is logged shift by shift. The run of a new shift continues the drive held in the
section store: its first advance warm-starts from the last stored model (shifted by the
advance, as between advances of one run), its reference resistivity is the drive's, and the
running contact fit sees the stored advances' readings in its window. :class:`DriveHistory`
carries exactly that, as plain numpy arrays; the results layer reads it from and writes it to
the store (:mod:`tbminv.results.drivestate`).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
from collections.abc import Sequence

import numpy as np


@dataclasses.dataclass(frozen=True)
class DriveHistory:
    """Per-advance evidence of a stretch of the drive (drive order).

    Attributes
    ----------
    advances : ndarray of int (n,)
        Advance numbers, increasing.
    faces_m : ndarray (n,)
        Face chainage of each advance, m.
    contact_labels : tuple of str (nq,)
        The machine-only readings the contact fit uses, as ``a/b/m/n`` labels (``-`` for a
        pole), in the order of the columns below.
    contact_r_ohm : ndarray (n, nq)
        Their transfer resistances as the contact fit sees them (surface-corrected where the
        run corrects), ohm; NaN where not measured or not valid.
    contact_rel_error : ndarray (n, nq)
        Their relative standard errors (fraction); NaN where missing.
    models_ohmm : ndarray (n, n_param) or None
        Each advance's image on the parameter grid, ohm-m (None: not kept).
    grid_sha256 : str
        Hash of the parameter grid the models are on (:func:`grid_signature`).
    reference_resistivity_ohmm : float
        The drive's reference resistivity (geometric factors, contact table), ohm-m; NaN if
        unknown.
    """

    advances: np.ndarray
    faces_m: np.ndarray
    contact_labels: tuple[str, ...]
    contact_r_ohm: np.ndarray
    contact_rel_error: np.ndarray
    models_ohmm: np.ndarray | None
    grid_sha256: str
    reference_resistivity_ohmm: float = math.nan

    @property
    def n_advances(self) -> int:
        """Number of advances held."""
        return int(np.asarray(self.advances).size)

    def last_model(self, grid_sha256: str, n_param: int) -> tuple[np.ndarray, float] | None:
        """The last advance's model and face chainage (m) if it is on the given grid, else None.

        A model is usable as a start when it was made on the same parameter grid (same hash and
        size) and is finite and positive everywhere.
        """
        if self.models_ohmm is None or not self.n_advances or self.grid_sha256 != grid_sha256:
            return None
        model = np.asarray(self.models_ohmm[-1], float)
        if model.size != n_param or not np.all(np.isfinite(model) & (model > 0)):
            return None
        return model, float(self.faces_m[-1])

    def contact_columns(self, labels: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """Readings and errors in the column order of ``labels`` (NaN where not held)."""
        index = {lab: i for i, lab in enumerate(self.contact_labels)}
        n = self.n_advances
        r = np.full((n, len(labels)), np.nan)
        e = np.full((n, len(labels)), np.nan)
        for j, lab in enumerate(labels):
            i = index.get(lab)
            if i is not None:
                r[:, j] = self.contact_r_ohm[:, i]
                e[:, j] = self.contact_rel_error[:, i]
        return r, e

    def tail(self, n: int) -> DriveHistory:
        """The last ``n`` advances (all of them if fewer; none for ``n <= 0``)."""
        start = max(0, self.n_advances - max(0, int(n)))
        models = None if self.models_ohmm is None else self.models_ohmm[start:]
        return dataclasses.replace(
            self, advances=self.advances[start:], faces_m=self.faces_m[start:],
            contact_r_ohm=self.contact_r_ohm[start:],
            contact_rel_error=self.contact_rel_error[start:], models_ohmm=models)

    def signature(self) -> str:
        """SHA-256 of what a continuing run depends on (for the journal's key)."""
        h = hashlib.sha256()
        for arr in (self.advances, self.faces_m, self.contact_r_ohm, self.contact_rel_error,
                    np.array([self.reference_resistivity_ohmm])):
            h.update(np.ascontiguousarray(arr, float).tobytes())
        if self.models_ohmm is not None and self.n_advances:
            h.update(np.ascontiguousarray(self.models_ohmm[-1], float).tobytes())
        h.update("\0".join(self.contact_labels).encode("utf-8"))
        h.update(self.grid_sha256.encode("ascii"))
        return h.hexdigest()


def grid_signature(x_nodes: np.ndarray, r_nodes: np.ndarray, keep: np.ndarray) -> str:
    """SHA-256 of a parameter grid (its lines in m, rounded to 1e-9 m, and its ground cells)."""
    h = hashlib.sha256()
    for arr in (np.round(np.asarray(x_nodes, float), 9), np.round(np.asarray(r_nodes, float), 9)):
        h.update(np.ascontiguousarray(arr).tobytes())
    h.update(np.ascontiguousarray(np.asarray(keep, bool)).tobytes())
    return h.hexdigest()


__all__ = ["DriveHistory", "grid_signature"]
