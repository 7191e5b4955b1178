"""What a probe log does to the contact fit of a drive: free and constrained fits side by side.

:func:`probe_study` reads a drive's readings log, runs the running joint contact fit of
:class:`tbminv.inversion.drive.DriveInverter` (QC error model, then
:meth:`~tbminv.inversion.drive.DriveInverter.prepare`: reference resistivity, surface
correction, modelling-error floor, the layout's contact table; the images are not inverted)
once without probes and once per probe log given, and tabulates per advance the distance
interval, its width, whether it holds a known contact chainage, and the probe's
contradiction flag and added misfit. Used by the tests of :mod:`tbminv.inversion.probefit`
and by ``bench/bench_probes.py``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd

from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.probefit import advance_penalties
from tbminv.inversion.settings import InversionSettings
from tbminv.layout import Layout
from tbminv.readings.advance import prepare_advances
from tbminv.readings.probes import ProbeLog
from tbminv.readings.qc import QCSettings

COLUMNS = ("case", "advance", "face_chainage_m", "found", "ahead_m", "ahead_lo_m", "ahead_hi_m",
           "width_m", "holds_truth", "probe_constrained", "probe_misfit_added",
           "probe_contradicts", "true_ahead_m")
"""Columns of the table :func:`probe_study` returns."""


def probe_study(readings_path: str | Path, layout: Layout, probes: Mapping[str, ProbeLog], *,
                truth_chainage_m: float = math.nan,
                settings: InversionSettings | None = None,
                qc_settings: QCSettings | None = None,
                inverter: DriveInverter | None = None) -> pd.DataFrame:
    """Running contact fits of a drive without and with each probe log.

    Parameters
    ----------
    readings_path : path
        The drive's readings log.
    layout : Layout
    probes : mapping
        Case name -> probe log.
    truth_chainage_m : float
        The contact's true chainage, m, if known (simulated drives).
    settings, qc_settings : optional
        Inversion settings (default: the ``fast`` forward preset) and QC settings (default:
        one error model per log).
    inverter : DriveInverter, optional
        Use this inverter (its settings, forward model and contact table) instead of a new one
        built from ``settings``.

    Returns
    -------
    pandas.DataFrame
        One row per case (``free`` and each probe case) and advance: ``case``, ``advance``,
        ``face_chainage_m``, ``found``, ``ahead_m``, ``ahead_lo_m``, ``ahead_hi_m``,
        ``width_m`` (NaN: not found or open), ``holds_truth``, ``probe_constrained``,
        ``probe_misfit_added``, ``probe_contradicts``, ``true_ahead_m``.
    """
    settings = settings or InversionSettings(forward_settings="fast")
    qc = qc_settings or QCSettings(error_model_group="log")
    inv = inverter or DriveInverter(layout, settings)
    data = inv.prepare(prepare_advances(readings_path, layout, qc).advances)  # + error floor
    fitter = inv.contact_fitter(inv.rho_ref_ohmm or 100.0)
    r, e, faces_list = inv.contact_readings(data)
    faces = np.asarray(faces_list, float)
    times = [d.time for d in data]
    rows = []
    cases = {"free": None, **probes}
    for name, log in cases.items():
        pens = None if log is None else advance_penalties(log, times)
        for d, f, es in zip(data, faces, fitter.fit_drive(r, e, faces, skip_unusable=True,
                                                          penalties=pens)):
            if es is None:
                continue
            width = es.ahead_hi_m - es.ahead_lo_m if es.found else math.nan
            true = truth_chainage_m - f
            rows.append({"case": name, "advance": d.advance, "face_chainage_m": f,
                         "found": es.found, "ahead_m": es.ahead_m, "ahead_lo_m": es.ahead_lo_m,
                         "ahead_hi_m": es.ahead_hi_m, "width_m": width,
                         "holds_truth": bool(es.found and es.ahead_lo_m <= true
                                             <= (es.ahead_hi_m if math.isfinite(es.ahead_hi_m)
                                                 else math.inf)),
                         "probe_constrained": es.probe_constrained,
                         "probe_misfit_added": es.probe_misfit_added,
                         "probe_contradicts": es.probe_contradicts, "true_ahead_m": true})
    return pd.DataFrame(rows, columns=COLUMNS)


__all__ = ["COLUMNS", "probe_study"]
