"""One advance's checked readings, grouped by protocol quadrupole, ready for inversion.

:func:`prepare_advances` is the one path from a readings log (file or DataFrame) to them: read
and quarantine (:mod:`tbminv.readings.reader`), QC and error model (:mod:`tbminv.readings.qc`),
then per advance (:func:`advance_data`). Where the caller knows the sign of each protocol
quadrupole's response in a homogeneous ground (from a forward model), readings of the opposite
sign -- a negative apparent resistivity -- are flagged ``negative_rhoa`` and counted
(:func:`flag_negative_apparent`); ``quarantine.csv`` and ``qc_flags.csv``
(:mod:`tbminv.readings.flagfile`) go to the output folder.
"""

from __future__ import annotations

import logging
import math
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tbminv.layout import Layout, Measurement
from tbminv.readings.errorfloor import check_floor
from tbminv.readings.flagfile import write_qc_flags
from tbminv.readings.qc import Flag, QCResult, QCSettings, run_qc
from tbminv.readings.reader import FRAME_LABEL, Readings, read_readings

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ advance data
ANGLE_RESOLUTION_DEG = 1.0
"""Readings of a quadrupole with a turning electrode whose logged cutterhead angles round to
the same multiple of this (degrees) are merged and modelled at their mean angle."""


@dataclass
class AngleRows:
    """One advance's readings per (protocol quadrupole, cutterhead angle), as modelled.

    A quadrupole with an electrode that turns with the cutterhead (kind ``cutterhead``,
    insulated) has one row per angle it was read at (angles within
    :data:`ANGLE_RESOLUTION_DEG` merged, at their circular mean); any other quadrupole has
    one row, its readings stacked over all angles (its geometry does not turn).

    Attributes
    ----------
    quad : ndarray of int (n,)
        Protocol index of each row.
    angle_deg : ndarray (n,)
        Cutterhead angle the row is modelled at, degrees (for rows that do not turn: the
        advance's ``cutterhead_deg``).
    turns : ndarray of bool (n,)
        The row's geometry turns with the cutterhead.
    r_ohm : ndarray (n,)
        Weighted mean transfer resistance, ohm.
    rel_error : ndarray (n,)
        Relative standard error of ``r_ohm``.
    n_readings : ndarray of int (n,)
        Readings merged into the row.
    """

    quad: np.ndarray
    angle_deg: np.ndarray
    turns: np.ndarray
    r_ohm: np.ndarray
    rel_error: np.ndarray
    n_readings: np.ndarray

    @property
    def size(self) -> int:
        """Number of rows."""
        return int(self.quad.size)

    def take(self, idx: np.ndarray) -> AngleRows:
        """The rows ``idx`` (index or mask)."""
        return AngleRows(self.quad[idx], self.angle_deg[idx], self.turns[idx], self.r_ohm[idx],
                         self.rel_error[idx], self.n_readings[idx])


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
    rows : AngleRows or None
        The readings per (quadrupole, cutterhead angle), as the image inversion models them
        (None: one row per quadrupole at ``cutterhead_deg``, see :meth:`angle_rows`).

    Notes
    -----
    ``cutterhead_deg`` is the median logged angle of the advance; ``r_ohm`` stacks every
    quadrupole over all angles, ``rows`` keeps the angles (the drive inversion models each
    row at its angle, and restacks ``r_ohm`` at the contact table's angle from the rows).
    """

    advance: int
    face_chainage_m: float
    cutterhead_deg: float
    r_ohm: np.ndarray
    rel_error: np.ndarray
    n_readings: int
    n_valid: int
    time: str | None = None
    rows: AngleRows | None = None

    def angle_rows(self) -> AngleRows:
        """:attr:`rows`, or one row per quadrupole at ``cutterhead_deg`` when not set."""
        if self.rows is not None:
            return self.rows
        nq = self.r_ohm.size
        return AngleRows(np.arange(nq), np.full(nq, float(self.cutterhead_deg)),
                         np.zeros(nq, bool), self.r_ohm, self.rel_error,
                         np.isfinite(self.r_ohm).astype(np.int64))

    @property
    def n_angles(self) -> int:
        """Distinct cutterhead angles of the rows that turn (0: none turns)."""
        rows = self.angle_rows()
        return int(np.unique(rows.angle_deg[rows.turns]).size)


def stack_rows(rows: AngleRows, n_quadrupoles: int, factor: np.ndarray | None = None
               ) -> tuple[np.ndarray, np.ndarray]:
    """Rows stacked per quadrupole: weighted mean of ``factor * r_ohm`` and its relative error.

    Weights are ``1 / e^2`` with ``e = rel_error |factor r_ohm|`` (as the readings of one
    quadrupole are stacked in :func:`advance_data`).

    Parameters
    ----------
    rows : AngleRows
    n_quadrupoles : int
        Protocol length.
    factor : ndarray (n,), optional
        Factor per row (e.g. a homogeneous ratio bringing a reading to another cutterhead
        angle); default 1. Rows with a non-finite factor are left out.

    Returns
    -------
    (ndarray, ndarray)
        ``r_ohm`` (nq,), ohm, and ``rel_error`` (nq,); NaN where no row is usable.
    """
    f = np.ones(rows.size) if factor is None else np.asarray(factor, float)
    r = f * rows.r_ohm
    with np.errstate(invalid="ignore", divide="ignore"):
        w = 1.0 / (rows.rel_error * np.abs(r)) ** 2
    ok = np.isfinite(r) & np.isfinite(w) & (w > 0)
    sw = np.bincount(rows.quad[ok], weights=w[ok], minlength=n_quadrupoles)
    swr = np.bincount(rows.quad[ok], weights=(w * r)[ok], minlength=n_quadrupoles)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(sw > 0, swr / sw, np.nan)
        rel = np.where(sw > 0, 1.0 / np.sqrt(sw) / np.abs(mean), np.nan)
    return mean, rel


def turning_quadrupoles(layout: Layout) -> np.ndarray:
    """Protocol quadrupoles with an electrode that turns with the cutterhead (bool per one).

    A cutterhead electrode turns unless it is bare on the steel (it then reads the machine's
    potential wherever it is).
    """
    turning = {e.label for e in layout.electrodes if e.kind == "cutterhead" and not e.on_steel}
    return np.array([any(x in turning for x in q.labels() if x is not None)
                     for q in layout.measurements], bool)


def advance_data(qc_table: pd.DataFrame, layout: Layout,
                 angle_resolution_deg: float = ANGLE_RESOLUTION_DEG) -> list[AdvanceData]:
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
    angle_resolution_deg : float
        Readings of a turning quadrupole (:func:`turning_quadrupoles`) whose logged
        ``cutterhead_deg`` round to the same multiple of this are one row of
        :attr:`AdvanceData.rows`, at their circular mean angle.

    Returns
    -------
    list of AdvanceData
        One per advance in the table, in increasing advance order.
    """
    if not angle_resolution_deg > 0:
        raise ValueError(f"angle_resolution_deg = {angle_resolution_deg!r}: expected > 0")
    quads = layout.measurements
    n = len(qc_table)
    if n == 0:
        return []
    quad = protocol_index(qc_table, layout)
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
    logged = (qc_table["cutterhead_deg"].to_numpy(float) if "cutterhead_deg" in qc_table
              else np.full(n, np.nan))
    logged = np.where(np.isfinite(logged), logged, angle.reindex(adv).to_numpy(float))
    rows = _angle_rows(adv[use], quad[use].astype(np.int64), logged[use], r[use], wt,
                       turning_quadrupoles(layout), angle, angle_resolution_deg)
    out = []
    for i, a in enumerate(size.index):
        t = None
        if first_time is not None and pd.notna(first_time[a]):
            t = pd.Timestamp(first_time[a]).isoformat()
        out.append(AdvanceData(int(a), float(face[a]), float(angle[a]), mean[i].copy(),
                               rel[i].copy(), int(size[a]), int(cnt[i].sum()), t,
                               rows.get(a)))
    if unknown:
        _LOG.info("%d valid readings are not in the layout's protocol and were not inverted",
                  unknown)
    return out


def _angle_rows(adv: np.ndarray, quad: np.ndarray, angle_deg: np.ndarray, r: np.ndarray,
                wt: np.ndarray, turning: np.ndarray, advance_angle: pd.Series,
                resolution_deg: float) -> dict[Any, AngleRows]:
    """Rows per (advance, quadrupole, angle bin) of the valid readings (weights ``1/e^2``)."""
    turns = turning[quad] if quad.size else np.zeros(0, bool)
    bins = np.where(turns, np.round(np.mod(angle_deg, 360.0) / resolution_deg) %
                    round(360.0 / resolution_deg), -1).astype(np.int64)
    z = np.exp(1j * np.radians(angle_deg))
    df = pd.DataFrame({"adv": adv, "q": quad, "bin": bins, "w": wt, "wr": wt * r,
                       "zr": z.real, "zi": z.imag, "turns": turns})
    out: dict[Any, AngleRows] = {}
    if df.empty:
        return out
    # the angle of a bin: circular mean of its readings over all quadrupoles of the advance
    ang = df[df.turns].groupby(["adv", "bin"]).agg(zr=("zr", "mean"), zi=("zi", "mean"))
    bin_angle = {k: float(np.degrees(np.arctan2(v.zi, v.zr)) % 360.0)
                 for k, v in ang.iterrows()}
    g = df.groupby(["adv", "q", "bin"], sort=True).agg(w=("w", "sum"), wr=("wr", "sum"),
                                                       n=("w", "size"), turns=("turns", "first"))
    for a, part in g.groupby(level="adv", sort=True):
        q = part.index.get_level_values("q").to_numpy(np.int64)
        b = part.index.get_level_values("bin").to_numpy(np.int64)
        tr = part["turns"].to_numpy(bool)
        w = part["w"].to_numpy(float)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(w > 0, part["wr"].to_numpy(float) / w, np.nan)
            rel = np.where(w > 0, 1.0 / np.sqrt(w) / np.abs(mean), np.nan)
        angs = np.array([bin_angle[(a, bb)] if t else float(advance_angle[a])
                         for bb, t in zip(b, tr)], float)
        out[a] = AngleRows(q, angs, tr, mean, rel, part["n"].to_numpy(np.int64))
    return out


def protocol_index(qc_table: pd.DataFrame, layout: Layout) -> np.ndarray:
    """Index of each reading's quadrupole in the layout's protocol (NaN: not in it).

    A reciprocal (current and potential pairs swapped, as :meth:`Measurement.reciprocal`)
    maps to the index of its normal; a dipole logged the other way round does not match.
    """
    index: dict[tuple, int] = {}
    for i, q in enumerate(layout.measurements):
        index[_fix_key(q, layout)] = i
        index.setdefault(_fix_key(q.reciprocal(), layout), i)
    if len(qc_table) == 0:
        return np.zeros(0)
    pole = {e.label for e in layout.electrodes if e.at_infinity}
    keys = pd.DataFrame({c: _key_column(qc_table[c], pole) for c in "abmn"})
    table = pd.DataFrame([tuple("" if x is None else x for x in k) for k in index],
                         columns=list("abmn"))
    table["q"] = list(index.values())
    return keys.merge(table, on=list("abmn"), how="left")["q"].to_numpy(float)


ExpectedSign = Callable[[float, float], np.ndarray]
"""``(face_chainage_m, cutterhead_deg) -> sign`` of each protocol quadrupole's response in a
homogeneous ground (+1, -1; 0 or NaN: unknown), e.g. from a forward model's homogeneous run."""


def flag_negative_apparent(qc: QCResult, layout: Layout, expected_sign: ExpectedSign) -> int:
    """Flag readings whose apparent resistivity is negative; return how many.

    A reading's apparent resistivity ``k R`` is negative when ``R`` has the sign opposite to
    the same quadrupole's response in a homogeneous ground (the sign of its geometric factor
    ``k``). By reciprocity a reciprocal reading has the sign of its normal. Such readings get
    :attr:`Flag.NEGATIVE_RHOA` and ``valid = False`` in ``qc.table`` (changed in place): kept,
    counted and written to the flags file, left out of the image inversion and the contact
    fit, which fit log apparent resistivity.

    Parameters
    ----------
    qc : QCResult
    layout : Layout
    expected_sign : callable
        See :data:`ExpectedSign`; called once per advance with its median face and angle.

    Returns
    -------
    int
        Readings flagged.
    """
    t = qc.table
    qc.sign_checked = True
    if len(t) == 0:
        return 0
    quad = protocol_index(t, layout)
    r = t["r_ohm"].to_numpy(float)
    neg = np.zeros(len(t), bool)
    per = t.groupby("advance", sort=True)
    face = per["face_chainage_m"].median()
    angle = (per["cutterhead_deg"].median().fillna(0.0) if "cutterhead_deg" in t
             else pd.Series(0.0, index=face.index))
    for adv, rows in per.indices.items():
        sign = np.asarray(expected_sign(float(face[adv]), float(angle[adv])), float)
        q = quad[rows]
        inp = np.isfinite(q)
        s = np.full(len(rows), np.nan)
        s[inp] = sign[q[inp].astype(np.int64)]
        with np.errstate(invalid="ignore"):
            neg[rows] = np.isfinite(s) & (s != 0) & (np.sign(r[rows]) * s < 0)
    flags = t["qc_flags"].to_numpy(np.int64).copy()
    flags[neg] |= int(Flag.NEGATIVE_RHOA)
    t["qc_flags"] = flags
    t["valid"] = flags == 0
    count = int(neg.sum())
    if count:
        _LOG.warning("%d readings have a negative apparent resistivity (sign against a "
                     "homogeneous ground); flagged negative_rhoa, left out of the image and "
                     "the contact fit", count)
    return count


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
    flags_path : Path or None
        Where the per-reading flags file ``qc_flags.csv`` was written (None: not written).
    n_negative_rhoa : int or None
        Readings with a negative apparent resistivity (None: not checked, no sign given).
    """

    readings: Readings
    qc: QCResult
    advances: list[AdvanceData]
    source: str
    quarantine_path: Path | None = None
    flags_path: Path | None = None
    n_negative_rhoa: int | None = None


def prepare_advances(source: str | os.PathLike[str] | pd.DataFrame, layout: Layout,
                     qc_settings: QCSettings | None = None, *,
                     out_dir: str | os.PathLike[str] | None = None,
                     label: str = FRAME_LABEL, expected_sign: ExpectedSign | None = None,
                     model_error_floor: float = 0.0) -> PreparedReadings:
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
        Folder for ``quarantine.csv`` and ``qc_flags.csv`` (created if missing; written
        atomically).
    label : str
        Name of a DataFrame source in the quarantine and the summary.
    expected_sign : callable, optional
        Sign of each protocol quadrupole's homogeneous response (:data:`ExpectedSign`):
        readings of the other sign are flagged ``negative_rhoa``
        (:func:`flag_negative_apparent`). None: not checked.
    model_error_floor : float
        Relative modelling-error floor shown in ``qc_flags.csv`` (the inversion adds it to the
        advance data, :func:`tbminv.readings.errorfloor.with_error_floor`; not added here).

    Returns
    -------
    PreparedReadings
        ``advances`` may be empty when no advance has a usable reading.

    Raises
    ------
    tbminv.readings.reader.ReadingsError
        When the log cannot be read at all (nothing is written then).
    """
    floor = check_floor(model_error_floor)
    readings = read_readings(source, layout, label=label)
    qpath = fpath = None
    if out_dir is not None:
        Path(out_dir).mkdir(parents=True, exist_ok=True)
        qpath = readings.write_quarantine(out_dir)
    if readings.summary.rows_quarantined:
        _LOG.warning("%s: %d of %d rows quarantined", readings.source,
                     readings.summary.rows_quarantined, readings.summary.rows_read)
    qc = run_qc(readings, qc_settings or QCSettings())
    n_neg = None
    if expected_sign is not None:
        n_neg = flag_negative_apparent(qc, layout, expected_sign)
    if out_dir is not None:
        fpath = write_qc_flags(qc.table, out_dir, source=readings.source,
                               model_error_floor=floor)
    advances = [d for d in advance_data(qc.table, layout) if np.isfinite(d.r_ohm).any()]
    return PreparedReadings(readings=readings, qc=qc, advances=advances,
                            source=readings.source, quarantine_path=qpath, flags_path=fpath,
                            n_negative_rhoa=n_neg)


__all__ = ["ANGLE_RESOLUTION_DEG", "AdvanceData", "AngleRows", "ExpectedSign",
           "PreparedReadings", "advance_data", "flag_negative_apparent", "prepare_advances",
           "protocol_index", "stack_rows", "turning_quadrupoles"]
