"""The report's tables as data: per advance (fit, QC, contact, body) and candidate materials.

:func:`advance_table` is the one per-advance table: the report typesets parts of it and writes
all of it as CSV beside the PDF (columns :data:`ADVANCE_COLUMNS`, SI units in the names; empty
cell: not stored or not found). Where the store has no per-advance QC (stores of older
versions), the QC columns come from the check's summary (its error models per advance) or
stay empty.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from tbminv.materials import MaterialTable, classify_values

BODY_VARIABLES: tuple[str, ...] = (
    "body_ahead_m", "body_ahead_lo_m", "body_ahead_hi_m", "body_bearing_deg",
    "body_bearing_lo_deg", "body_bearing_hi_deg", "body_offset_m", "body_p_none")
"""Per-advance variables of the off-axis body analysis (NaN where none found)."""

ADVANCE_COLUMNS: tuple[str, ...] = (
    "advance", "shift", "face_chainage_m", "qc_readings", "qc_valid", "qc_flagged",
    "qc_flagged_by_reason", "error_model_a_ohm", "error_model_b", "reciprocal_error_median",
    "reciprocal_error_p90", "qc_rel_error_median", "chi2", "rrms_percent", "iterations",
    "lambda", "fit_flag", "contact_ahead_m", "contact_ahead_lo_m", "contact_ahead_hi_m",
    "contact_chainage_m", "contact_contrast", "contact_contrast_lo", "contact_contrast_hi",
    "contact_p_none", *BODY_VARIABLES, "synthetic")
"""Columns of the per-advance CSV, in order."""

FIT_FLAG_WORDS = {1: "not converged", 2: "misfit high", 4: "misfit low"}


def _col(ds: xr.Dataset, name: str) -> np.ndarray:
    if name in ds and ds[name].dims == ("advance",):
        return ds[name].values
    return np.full(ds.sizes["advance"], np.nan)


def fit_flag_words(flag: int) -> str:
    """The fit flag's bits in words (``ok`` for 0)."""
    words = [w for bit, w in FIT_FLAG_WORDS.items() if int(flag) & bit]
    return ", ".join(words) or "ok"


def _by_reason(ds: xr.Dataset) -> list[str]:
    if "qc_flag_count" not in ds:
        return [""] * ds.sizes["advance"]
    names = [str(x) for x in ds["qc_flag"].values]
    out = []
    for row in ds["qc_flag_count"].values:
        parts = [f"{n} {int(v)}" for n, v in zip(names, row) if np.isfinite(v) and v > 0]
        out.append("; ".join(parts))
    return out


def _qc_from_summary(table: pd.DataFrame, qc_summary: Mapping[str, Any] | None) -> None:
    """Fill the error model of advances from a check summary (group per advance)."""
    if not qc_summary or qc_summary.get("error_model_group") != "advance":
        return
    models = qc_summary.get("error_models") or {}
    for i, adv in enumerate(table["advance"]):
        m = models.get(str(int(adv)))
        if not m or not math.isnan(float(table.at[i, "error_model_b"])):
            continue
        for col, key in (("error_model_a_ohm", "a_ohm"), ("error_model_b", "b")):
            v = m.get(key)
            table.at[i, col] = float(v) if v is not None else math.nan


def advance_table(ds: xr.Dataset, qc_summary: Mapping[str, Any] | None = None) -> pd.DataFrame:
    """One row per advance of a section: QC, fit, contact fit and off-axis body.

    Parameters
    ----------
    ds : xarray.Dataset
        Section (the advances to tabulate).
    qc_summary : mapping, optional
        The readings check's summary (``qc_summary.json``'s ``qc``), used where the store
        holds no per-advance QC.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`ADVANCE_COLUMNS`.
    """
    t = pd.DataFrame({"advance": ds["advance"].values.astype(int)})
    t["shift"] = ds["shift"].values.astype(str) if "shift" in ds else ""
    for name in ("face_chainage_m", "qc_readings", "qc_valid", "qc_flagged"):
        t[name] = _col(ds, name)
    t["qc_flagged_by_reason"] = _by_reason(ds)
    for name in ("error_model_a_ohm", "error_model_b", "reciprocal_error_median",
                 "reciprocal_error_p90", "qc_rel_error_median", "chi2"):
        t[name] = _col(ds, name).astype(float)
    t["rrms_percent"] = _col(ds, "rrms")
    for name in ("iterations", "lambda", "fit_flag", "contact_ahead_m", "contact_ahead_lo_m",
                 "contact_ahead_hi_m", "contact_chainage_m", "contact_contrast",
                 "contact_contrast_lo", "contact_contrast_hi", "contact_p_none",
                 *BODY_VARIABLES):
        t[name] = _col(ds, name)
    syn = _col(ds, "qc_synthetic")
    t["synthetic"] = np.where(np.isfinite(syn.astype(float)), syn, np.nan)
    _qc_from_summary(t, qc_summary)
    return t[list(ADVANCE_COLUMNS)]


def _num(v: Any, fmt: str) -> str:
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    return "" if not math.isfinite(x) else format(x, fmt)


def qc_rows(t: pd.DataFrame) -> list[list[str]]:
    """Rows of the QC table (see :func:`advance_table`)."""
    return [[str(r.advance), _num(r.face_chainage_m, ".2f"), _num(r.qc_readings, ".0f"),
             _num(r.qc_valid, ".0f"), _num(r.qc_flagged, ".0f"), r.qc_flagged_by_reason or "-",
             _num(r.error_model_a_ohm, ".3g"), _num(r.error_model_b, ".3g"),
             _num(100 * r.reciprocal_error_median, ".2f"),
             _num(100 * r.reciprocal_error_p90, ".2f")] for r in t.itertuples()]


QC_HEADER = ("advance", "face (m)", "readings", "valid", "flagged", "flagged by reason",
             "a (ohm)", "b (-)", "rec. median (%)", "rec. p90 (%)")


def fit_rows(t: pd.DataFrame) -> list[list[str]]:
    """Rows of the fit table."""
    return [[str(r.advance), _num(r.face_chainage_m, ".2f"), _num(r.chi2, ".3f"),
             _num(r.rrms_percent, ".2f"), _num(r.iterations, ".0f"), _num(r.lam, ".3g"),
             fit_flag_words(int(r.fit_flag)) if np.isfinite(r.fit_flag) else "",
             _interval(r.contact_ahead_m, r.contact_ahead_lo_m, r.contact_ahead_hi_m),
             _num(r.contact_p_none, ".2g")]
            for r in t.rename(columns={"lambda": "lam"}).itertuples()]


FIT_HEADER = ("advance", "face (m)", "chi² (-)", "rrms (%)", "iterations", "λ (-)", "flag",
              "contact ahead (m)", "false-alarm rate")


def body_rows(t: pd.DataFrame) -> list[list[str]]:
    """Rows of the off-axis body table (advances where the analysis ran)."""
    return [[str(r.advance), _num(r.face_chainage_m, ".2f"),
             _interval(r.body_ahead_m, r.body_ahead_lo_m, r.body_ahead_hi_m) or "none found",
             _interval(r.body_bearing_deg, r.body_bearing_lo_deg, r.body_bearing_hi_deg, ".0f"),
             _num(r.body_offset_m, ".1f"), _num(r.body_p_none, ".2g")]
            for r in t.itertuples()]


BODY_HEADER = ("advance", "face (m)", "body ahead (m)", "bearing (°, clockwise from crown)",
               "offset from axis (m)", "false-alarm rate")


def _interval(v: float, lo: float, hi: float, fmt: str = ".1f") -> str:
    if not np.isfinite(v):
        return ""
    hi_s = _num(hi, fmt) or "open"
    lo_s = _num(lo, fmt) or "?"
    return f"{format(float(v), fmt)} ({lo_s} to {hi_s})"


def material_rows(values: list[tuple[str, float, float | None]],
                  table: MaterialTable) -> list[list[str]]:
    """Rows of the candidate materials table: zone, resistivity, candidate, its range.

    Parameters
    ----------
    values : list of (str, float, float or None)
        Zone label, resistivity or interval low, interval high (None: a single value), ohm-m.
    table : MaterialTable
        The material table.

    Returns
    -------
    list of list of str
        One row per candidate (zone and resistivity on its first row only).
    """
    rows: list[list[str]] = []
    for label, lo, hi, found in classify_values(values, table):
        val = f"{lo:.3g}" if hi is None else f"{lo:.3g} to {hi:.3g}"
        if not found:
            rows.append([label, val, "none in the table", "", ""])
        for i, c in enumerate(found):
            m = c.material
            rows.append([label if i == 0 else "", val if i == 0 else "", m.name,
                         f"{m.low_ohmm:.3g} to {m.high_ohmm:.3g}", m.note])
    return rows


MATERIAL_HEADER = ("zone", "resistivity (ohm·m)", "candidate", "table range (ohm·m)", "note")


__all__ = ["ADVANCE_COLUMNS", "BODY_VARIABLES", "advance_table", "fit_flag_words", "qc_rows",
           "QC_HEADER", "fit_rows", "FIT_HEADER", "body_rows", "BODY_HEADER", "material_rows",
           "MATERIAL_HEADER"]
