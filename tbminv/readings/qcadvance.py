"""The readings check summed up per advance, for the section store and the shift report.

One row per advance of a QC'd log: readings checked, valid, flagged (and per flag), the error
model ``e = a + b|R|`` of the advance's error group, the reciprocal error's median and 90th
percentile over the advance's pairs, and the median relative error the inversion uses (one
reading's QC error with the modelling floor, ``err_total_rel`` of ``qc_flags.csv``) over its
valid readings. :func:`qc_per_advance` returns it as an xarray Dataset on the ``advance``
dimension with units, ready to merge into a section (variables :data:`QC_VARIABLES`).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import xarray as xr

from tbminv.readings.errorfloor import floored_error
from tbminv.readings.qc import FLAG_NAMES, QCResult

QC_VARIABLES: tuple[str, ...] = (
    "qc_readings", "qc_valid", "qc_flagged", "qc_flag_count", "error_model_a_ohm",
    "error_model_b", "reciprocal_error_median", "reciprocal_error_p90",
    "qc_rel_error_median", "qc_synthetic")
"""Variables :func:`qc_per_advance` writes (``qc_flag_count`` has the extra dimension
``qc_flag``)."""


def _quantile(values: np.ndarray, q: float) -> float:
    v = values[np.isfinite(values)]
    return float(np.percentile(v, q)) if v.size else math.nan


def qc_per_advance(qc: QCResult, *, model_error_floor: float = 0.0,
                   synthetic: bool = False) -> xr.Dataset:
    """The QC of a log per advance.

    Parameters
    ----------
    qc : QCResult
        The QC'd readings (:func:`tbminv.readings.qc.run_qc`).
    model_error_floor : float
        Relative modelling-error floor the inversion adds in quadrature (1).
    synthetic : bool
        The log says its readings were simulated (column ``synthetic``).

    Returns
    -------
    xarray.Dataset
        Dimension ``advance`` (and ``qc_flag`` for ``qc_flag_count``); variables
        :data:`QC_VARIABLES` with CF ``units`` and ``long_name``.
    """
    t = qc.table
    advances = np.unique(t["advance"].to_numpy(np.int64)) if len(t) else np.zeros(0, np.int64)
    names = list(FLAG_NAMES)
    n = advances.size
    readings = np.zeros(n, np.int64)
    valid = np.zeros(n, np.int64)
    flagged = np.zeros(n, np.int64)
    by_flag = np.zeros((n, len(names)), np.int64)
    a_ohm = np.full(n, np.nan)
    b = np.full(n, np.nan)
    rec_med = np.full(n, np.nan)
    rec_p90 = np.full(n, np.nan)
    rel_med = np.full(n, np.nan)
    pairs = qc.pairs
    for i, adv in enumerate(advances):
        sub = t[t["advance"].to_numpy() == adv]
        mask = sub["qc_flags"].to_numpy(np.int64)
        ok = sub["valid"].to_numpy(bool)
        readings[i], valid[i], flagged[i] = len(sub), int(ok.sum()), int((mask != 0).sum())
        by_flag[i] = [int(((mask & bit) != 0).sum()) for bit in FLAG_NAMES.values()]
        groups = pd.unique(sub["error_group"].astype(str)) if "error_group" in sub else []
        models = [qc.error_models[g] for g in groups if g in qc.error_models]
        if len(models) == 1:
            a_ohm[i], b[i] = models[0].a_ohm, models[0].b
        if len(pairs):
            rec = pairs.loc[pairs["advance"].to_numpy() == adv, "reciprocal_error"]
            vals = rec.to_numpy(float)
            rec_med[i], rec_p90[i] = _quantile(vals, 50), _quantile(vals, 90)
        with np.errstate(invalid="ignore", divide="ignore"):
            one = (sub["err_ohm"].to_numpy(float) / math.sqrt(2.0)
                   / np.abs(sub["r_ohm"].to_numpy(float)))
        rel_med[i] = _quantile(floored_error(one[ok], model_error_floor), 50)
    coords = {"advance": advances, "qc_flag": ("qc_flag", np.array(names, dtype=object),
                                               {"long_name": "QC flag name"})}

    def var(values: np.ndarray, units: str, long_name: str,
            dims: tuple[str, ...] = ("advance",)) -> tuple:
        return dims, values, {"units": units, "long_name": long_name}

    return xr.Dataset({
        "qc_readings": var(readings, "1", "readings of the advance checked by QC"),
        "qc_valid": var(valid, "1", "readings valid for inversion"),
        "qc_flagged": var(flagged, "1", "readings with at least one QC flag (kept, not "
                                        "inverted)"),
        "qc_flag_count": var(by_flag, "1", "readings carrying each QC flag",
                             ("advance", "qc_flag")),
        "error_model_a_ohm": var(a_ohm, "ohm", "error model e = a + b|R|: a (NaN: no model or "
                                               "several groups)"),
        "error_model_b": var(b, "1", "error model e = a + b|R|: b"),
        "reciprocal_error_median": var(rec_med, "1", "median reciprocal error of the "
                                                     "advance's pairs"),
        "reciprocal_error_p90": var(rec_p90, "1", "90th percentile of the reciprocal error"),
        "qc_rel_error_median": var(rel_med, "1", "median relative error of one valid reading "
                                                 "as inverted (modelling floor included)"),
        "qc_synthetic": var(np.full(n, int(bool(synthetic)), np.int8), "1",
                            "1: the readings log says its readings were simulated"),
    }, coords=coords)


__all__ = ["QC_VARIABLES", "qc_per_advance"]
