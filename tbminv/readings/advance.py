"""One advance's checked readings, grouped by protocol quadrupole, ready for inversion.

:func:`prepare_advances` is the one path from a readings log (file or DataFrame) to them: read
and quarantine (:mod:`tbminv.readings.reader`), QC and error model (:mod:`tbminv.readings.qc`),
then per advance (:func:`advance_data`).
"""

from __future__ import annotations

import logging
import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from tbminv.layout import Layout, Measurement
from tbminv.readings.qc import QCResult, QCSettings, run_qc
from tbminv.readings.reader import FRAME_LABEL, Readings, read_readings

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
    log message; flagged readings and readings without an error model are left out. The
    readings of one quadrupole are averaged with weights ``1 / e^2``, where ``e`` is the
    error of one reading: the error model describes the spread of normal-minus-reciprocal
    differences, which is ``sqrt(2)`` times that of one reading (two independent errors).

    Parameters
    ----------
    qc_table : pandas.DataFrame
        :attr:`tbminv.readings.qc.QCResult.table`.
    layout : Layout
        Its protocol orders the quadrupoles; remotes at infinity are poles.

    Returns
    -------
    list of AdvanceData
        One per advance in the table, in increasing advance order.
    """
    quads = layout.measurements
    index: dict[tuple, int] = {}
    for i, q in enumerate(quads):
        index[_fix_key(q, layout)] = i
        index.setdefault(_fix_key(q.reciprocal(), layout), i)
    n = len(qc_table)
    if n == 0:
        return []
    pole = {e.label for e in layout.electrodes if e.at_infinity}
    keys = pd.DataFrame({c: _key_column(qc_table[c], pole) for c in "abmn"})
    table = pd.DataFrame([tuple("" if x is None else x for x in k) for k in index],
                         columns=list("abmn"))
    table["q"] = list(index.values())
    quad = keys.merge(table, on=list("abmn"), how="left")["q"].to_numpy(float)
    err = qc_table["err_ohm"].to_numpy(float) / math.sqrt(2.0)
    valid = qc_table["valid"].to_numpy(bool) & np.isfinite(err)
    unknown = int((valid & np.isnan(quad)).sum())
    use = valid & ~np.isnan(quad)
    r = qc_table["r_ohm"].to_numpy(float)
    adv = qc_table["advance"].to_numpy()
    with np.errstate(divide="ignore"):
        wt = 1.0 / err[use] ** 2
    sums = (pd.DataFrame({"adv": adv[use], "q": quad[use].astype(np.int64), "w": wt,
                          "wr": wt * r[use]})
            .groupby(["adv", "q"], sort=True).agg(w=("w", "sum"), wr=("wr", "sum"),
                                                  n=("w", "size")))
    per = qc_table.groupby("advance", sort=True)
    face = per["face_chainage_m"].median()
    size = per.size()
    if "cutterhead_deg" in qc_table:
        angle = per["cutterhead_deg"].median().fillna(0.0)   # median of the logged ones
    else:
        angle = pd.Series(0.0, index=size.index)
    first_time = per["time"].first() if "time" in qc_table else None   # first logged one
    shape = (len(size), len(quads))
    w, wr, cnt = np.zeros(shape), np.zeros(shape), np.zeros(shape, np.int64)
    row = size.index.get_indexer(sums.index.get_level_values("adv"))
    col = sums.index.get_level_values("q").to_numpy(np.int64)
    w[row, col], wr[row, col], cnt[row, col] = sums["w"], sums["wr"], sums["n"]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(w > 0, wr / w, np.nan)
        rel = np.where(w > 0, 1.0 / np.sqrt(w) / np.abs(mean), np.nan)
    out = []
    for i, a in enumerate(size.index):
        t = None
        if first_time is not None and pd.notna(first_time[a]):
            t = pd.Timestamp(first_time[a]).isoformat()
        out.append(AdvanceData(int(a), float(face[a]), float(angle[a]), mean[i].copy(),
                               rel[i].copy(), int(size[a]), int(cnt[i].sum()), t))
    if unknown:
        _LOG.info("%d valid readings are not in the layout's protocol and were not inverted",
                  unknown)
    return out


def _key_column(col: pd.Series, poles: set[str]) -> np.ndarray:
    """Labels of one column as text, with "" for a pole (empty or a remote at infinity)."""
    text = col.astype(object).where(col.notna(), "").astype(str).to_numpy(object)
    if poles:
        text[np.isin(text, list(poles))] = ""
    return text


def _fix_key(q: Measurement, layout: Layout) -> tuple:
    return tuple(None if (x is None or layout.electrode(x).at_infinity) else x
                 for x in q.labels())


# ------------------------------------------------------------------------ the one path
@dataclass
class PreparedReadings:
    """A readings log read, quarantined, QC'd and grouped by advance.

    Attributes
    ----------
    readings : Readings
        The checked log (kept rows, quarantine, counts).
    qc : QCResult
        QC flags and error models.
    advances : list of AdvanceData
        Advances with at least one finite mean transfer resistance, in advance order.
    source : str
        The log's path, or the label of a DataFrame.
    quarantine_path : Path or None
        Where the quarantine table was written (None: not written).
    """

    readings: Readings
    qc: QCResult
    advances: list[AdvanceData]
    source: str
    quarantine_path: Path | None = None


def prepare_advances(source: str | os.PathLike[str] | pd.DataFrame, layout: Layout,
                     qc_settings: QCSettings | None = None, *,
                     out_dir: str | os.PathLike[str] | None = None,
                     label: str = FRAME_LABEL) -> PreparedReadings:
    """Read, quarantine, QC and group a readings log by advance.

    Parameters
    ----------
    source : path-like or pandas.DataFrame
        A readings log (CSV or Parquet file) or the same columns as a DataFrame (see
        :func:`tbminv.readings.reader.read_readings`).
    layout : Layout
        Electrode labels (checked) and the protocol the readings are grouped by.
    qc_settings : QCSettings, optional
        Defaults: :class:`QCSettings`.
    out_dir : path-like, optional
        Folder for ``quarantine.csv`` (created if missing; written atomically).
    label : str
        Name of a DataFrame source in the quarantine and the summary.

    Returns
    -------
    PreparedReadings
        ``advances`` may be empty when no advance has a usable reading.

    Raises
    ------
    tbminv.readings.reader.ReadingsError
        When the log cannot be read at all (nothing is written then).
    """
    readings = read_readings(source, layout, label=label)
    qpath = None
    if out_dir is not None:
        Path(out_dir).mkdir(parents=True, exist_ok=True)
        qpath = readings.write_quarantine(out_dir)
    if readings.summary.rows_quarantined:
        _LOG.warning("%s: %d of %d rows quarantined", readings.source,
                     readings.summary.rows_quarantined, readings.summary.rows_read)
    qc = run_qc(readings, qc_settings or QCSettings())
    advances = [d for d in advance_data(qc.table, layout) if np.isfinite(d.r_ohm).any()]
    return PreparedReadings(readings=readings, qc=qc, advances=advances,
                            source=readings.source, quarantine_path=qpath)


__all__ = ["AdvanceData", "PreparedReadings", "advance_data", "prepare_advances"]
