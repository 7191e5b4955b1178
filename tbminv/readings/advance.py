"""One advance's checked readings, grouped by protocol quadrupole, ready for inversion."""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from tbminv.layout import Layout, Measurement

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ advance data
@dataclass
class AdvanceData:
    """Readings of one advance ready for inversion (protocol order).

    Attributes
    ----------
    advance : int
    face_chainage_m : float
    cutterhead_deg : float
    r_ohm : ndarray (nq,)
        Mean transfer resistance per protocol quadrupole, ohm (NaN: not measured/invalid).
    rel_error : ndarray (nq,)
        Relative standard error of ``r_ohm`` (fraction).
    n_readings : int
        Readings of the advance in the log (valid or not).
    n_valid : int
        Valid readings that went into ``r_ohm``.
    time : str or None
    """

    advance: int
    face_chainage_m: float
    cutterhead_deg: float
    r_ohm: np.ndarray
    rel_error: np.ndarray
    n_readings: int
    n_valid: int
    time: str | None = None


def advance_data(qc_table: pd.DataFrame, layout: Layout) -> list[AdvanceData]:
    """Group QC'd readings by advance and protocol quadrupole (normal and reciprocal merged).

    Readings that are not in the layout's protocol (in either direction) are ignored with a
    log message; flagged readings and readings without an error model are left out.
    """
    quads = layout.measurements
    index: dict[tuple, tuple[int, bool]] = {}
    for i, q in enumerate(quads):
        index[_fix_key(q, layout)] = (i, False)
        index.setdefault(_fix_key(q.reciprocal(), layout), (i, True))
    out = []
    unknown = 0
    for adv, grp in qc_table.groupby("advance", sort=True):
        nq = len(quads)
        s = np.zeros(nq)
        w = np.zeros(nq)
        cnt = np.zeros(nq, int)
        valid = grp["valid"].to_numpy(bool) & np.isfinite(grp["err_ohm"].to_numpy(float))
        labels = [grp[c].astype(object).where(grp[c].notna(), None).to_numpy()
                  for c in "abmn"]
        r = grp["r_ohm"].to_numpy(float)
        err = grp["err_ohm"].to_numpy(float) / math.sqrt(2.0)   # one reading (see module doc)
        for j in range(len(grp)):
            if not valid[j]:
                continue
            key = tuple(_norm(labels[c][j], layout) for c in range(4))
            hit = index.get(key)
            if hit is None:
                unknown += 1
                continue
            i, _ = hit
            wt = 1.0 / err[j] ** 2
            s[i] += wt * r[j]
            w[i] += wt
            cnt[i] += 1
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(w > 0, s / w, np.nan)
            rel = np.where(w > 0, 1.0 / np.sqrt(w) / np.abs(mean), np.nan)
        face = float(np.median(grp["face_chainage_m"]))
        ch = grp["cutterhead_deg"].to_numpy(float) if "cutterhead_deg" in grp else np.zeros(1)
        ch = float(np.nanmedian(ch)) if np.isfinite(ch).any() else 0.0
        tcol = grp["time"] if "time" in grp else None
        t = None
        if tcol is not None and tcol.notna().any():
            t = pd.Timestamp(tcol.dropna().iloc[0]).isoformat()
        out.append(AdvanceData(int(adv), face, ch, mean, rel, len(grp), int(cnt.sum()), t))
    if unknown:
        _LOG.info("%d valid readings are not in the layout's protocol and were not inverted",
                  unknown)
    return out


def _norm(label: Any, layout: Layout) -> str | None:
    if label is None or (isinstance(label, float) and math.isnan(label)):
        return None
    lab = str(label)
    return None if lab == "" or layout.electrode(lab).at_infinity else lab


# ------------------------------------------------------------------------ operator
def _fix_key(q: Measurement, layout: Layout) -> tuple:
    return tuple(None if (x is None or layout.electrode(x).at_infinity) else x
                 for x in q.labels())


__all__ = ["AdvanceData", "advance_data"]
