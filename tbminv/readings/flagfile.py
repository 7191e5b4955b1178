"""The per-reading QC flags file ``qc_flags.csv``, written beside ``quarantine.csv``.

One row per reading that passed the reader (quarantined rows are in the quarantine file), in
log order, with its identifying columns, the error components and the flags. Columns
(:data:`FLAGS_COLUMNS`; format in DEVELOPERS.md, "File formats"):

``file, line, advance, face_chainage_m, a, b, m, n``
    where the reading is and what it is (labels; empty for a pole);
``current_a, voltage_v, r_ohm``
    as logged, and ``voltage_v / current_a``, ohm;
``partner_line, reciprocal_diff_ohm, reciprocal_error``
    line of the reciprocal partner (-1: none), signed ``Rn - Rr`` in the normal's orientation,
    ohm, and ``|Rn - Rr| / ((|Rn| + |Rr|) / 2)``;
``stack_error_v``
    error of the stacked voltage (``voltage_std_v``), V;
``err_ohm``
    the QC error of the table (error model of a normal-reciprocal difference, or the stacking
    error in ohm if larger), ohm;
``err_reading_rel``
    the relative error of one reading the inversion uses, ``err_ohm / sqrt(2) / |r_ohm|``;
``model_error_floor, err_total_rel``
    the relative modelling-error floor and ``sqrt(err_reading_rel^2 + floor^2)``;
``negative_rhoa``
    1 if the apparent resistivity is negative (sign against a homogeneous ground), else 0;
``qc_flags, flags, valid``
    the bit mask, the flag names joined by ``;`` and whether the reading is inverted.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np
import pandas as pd

from tbminv.cache import atomic_path
from tbminv.readings.errorfloor import check_floor, floored_error
from tbminv.readings.qc import Flag, flag_names

FLAGS_FILE = "qc_flags.csv"
"""Name of the flags file in the output folder."""

FLAGS_COLUMNS: tuple[str, ...] = (
    "file", "line", "advance", "face_chainage_m", "a", "b", "m", "n", "current_a", "voltage_v",
    "r_ohm", "partner_line", "reciprocal_diff_ohm", "reciprocal_error", "stack_error_v",
    "err_ohm", "err_reading_rel", "model_error_floor", "err_total_rel", "negative_rhoa",
    "qc_flags", "flags", "valid")
"""Columns of ``qc_flags.csv`` (a contract)."""


def flags_table(qc_table: pd.DataFrame, *, source: str = "",
                model_error_floor: float = 0.0) -> pd.DataFrame:
    """The flags file's table of a QC'd readings table.

    Parameters
    ----------
    qc_table : pandas.DataFrame
        :attr:`tbminv.readings.qc.QCResult.table`.
    source : str
        The readings log's name (column ``file``).
    model_error_floor : float
        Relative modelling-error floor the inversion adds (:mod:`tbminv.readings.errorfloor`).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`FLAGS_COLUMNS`.
    """
    floor = check_floor(model_error_floor)
    t = qc_table
    out = pd.DataFrame({"file": source, "line": t["line"].to_numpy()})
    for c in ("advance", "face_chainage_m"):
        out[c] = t[c].to_numpy()
    for c in "abmn":
        out[c] = t[c].astype(object).where(t[c].notna(), "").to_numpy(object)
    for c in ("current_a", "voltage_v", "r_ohm", "partner_line", "reciprocal_diff_ohm",
              "reciprocal_error", "stack_error_v", "err_ohm"):
        out[c] = t[c].to_numpy() if c in t else np.nan
    with np.errstate(invalid="ignore", divide="ignore"):
        one = t["err_ohm"].to_numpy(float) / math.sqrt(2.0) / np.abs(t["r_ohm"].to_numpy(float))
    out["err_reading_rel"] = one
    out["model_error_floor"] = floor
    out["err_total_rel"] = floored_error(one, floor)
    mask = t["qc_flags"].to_numpy(np.int64)
    out["negative_rhoa"] = ((mask & int(Flag.NEGATIVE_RHOA)) != 0).astype(int)
    out["qc_flags"] = mask
    out["flags"] = [";".join(flag_names(int(x))) for x in mask]
    out["valid"] = t["valid"].to_numpy(bool)
    return out.reindex(columns=list(FLAGS_COLUMNS))


def write_qc_flags(qc_table: pd.DataFrame, out_dir: str | os.PathLike[str], *,
                   source: str = "", model_error_floor: float = 0.0,
                   name: str = FLAGS_FILE) -> Path:
    """Write ``qc_flags.csv`` atomically into ``out_dir``; return its path.

    See :func:`flags_table` for the parameters.
    """
    path = Path(out_dir) / name
    table = flags_table(qc_table, source=source, model_error_floor=model_error_floor)
    with atomic_path(path) as tmp:
        table.to_csv(tmp, index=False, lineterminator="\n", float_format="%.10g")
    return path


__all__ = ["FLAGS_FILE", "FLAGS_COLUMNS", "flags_table", "write_qc_flags"]
