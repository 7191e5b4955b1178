"""Method (a): the axisymmetric image inversion of a synthetic drive."""

from __future__ import annotations

import logging
import math
import time
from typing import Any

import numpy as np

from tbminv.forward.registry import ForwardModel
from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.settings import InversionSettings
from tbminv.layout import Layout
from tbminv.studies.methods.synthetic import (
    AdvanceRecord,
    SyntheticDrive,
    _record,
    equivalent_contact,
    with_error_floor,
)

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ (a) axisymmetric
def drive_inverter(layout: Layout, settings: InversionSettings | None = None,
                   model: ForwardModel | None = None) -> DriveInverter:
    """A :class:`tbminv.inversion.drive.DriveInverter` for a layout.

    Its contact table uses the sub-protocol of the electrodes that travel with the machine, on a
    model built for that sub-protocol.
    """
    return DriveInverter(layout, settings, model=model)


def image_contact(res: Any, layout: Layout, *, ahead_max_m: float | None = None,
                  min_contrast: float = 1.25) -> float:
    """Equivalent sharp contact of an axisymmetric image along the axis, m ahead of the face.

    ``res`` is a :class:`tbminv.inversion.outcome.AdvanceResult`; the profile is the image
    column nearest the axis from the face to ``ahead_max_m`` (default 5 D); the face-side value
    is the median of the ground beside the shield (one radius outside it).
    """
    a = np.asarray(res.ahead_m, float)
    rad = np.asarray(res.radius_m, float)
    rho = np.asarray(res.resistivity_ohmm, float)
    d = layout.machine.diameter_m
    big_r, shield = layout.machine.radius_m, layout.machine.shield_length_m
    amax = ahead_max_m or 5.0 * d
    sel = (a > 0) & (a <= amax)
    prof = np.log(rho[sel, int(np.argmin(rad))])
    beside = rho[np.ix_((a < 0) & (a > -shield), (rad > big_r) & (rad < 2 * big_r))]
    near = float(np.nanmedian(np.log(beside))) if np.isfinite(beside).any() else None
    return equivalent_contact(a[sel], prof, near_value=near, min_contrast=min_contrast)


def run_axisym(drive: SyntheticDrive, settings: InversionSettings | None = None, *,
               model: ForwardModel | None = None, label: str = "default",
               error_floor: float = 0.0, inverter: DriveInverter | None = None,
               distance: str = "contact") -> list[AdvanceRecord]:
    """Method ``axisym``: image inversion + contact fit along the drive.

    Parameters
    ----------
    drive : SyntheticDrive
    settings : InversionSettings, optional
    model : ForwardModel, optional
        An ``axisym`` model built for ``drive.layout`` (e.g. with coarse settings).
    label : str
        Settings label in the table.
    error_floor : float
        Relative modelling-error floor (:func:`with_error_floor`).
    inverter : DriveInverter, optional
        Reuse an inverter (its response table and operators) built for the same layout.
    distance : {"contact", "image", "both"}
        Distance from the parametric contact fit, from the image along the axis
        (:func:`image_contact`), or both (two records per advance, labels suffixed
        ``" / contact fit"`` and ``" / image"``).

    Returns
    -------
    list of AdvanceRecord
        ``time_s``: wall time of the whole run (images, contact fit, response table if not
        cached) divided by the advances.
    """
    data = with_error_floor(drive.data, error_floor)
    t0 = time.perf_counter()
    inv = inverter or drive_inverter(drive.layout, settings, model=model)
    results = inv.run(data, cold=not inv.settings.warm_start)
    per = (time.perf_counter() - t0) / max(len(data), 1)
    if distance not in ("contact", "image", "both"):
        raise ValueError(f"distance = {distance!r}: expected 'contact', 'image' or 'both'")
    kinds = ("contact", "image") if distance == "both" else (distance,)
    out = []
    for kind in kinds:
        suffix = " / contact fit" if kind == "contact" else " / image"
        lab = label + suffix if distance == "both" else label
        for adv, res in zip(data, results):
            if kind == "contact":
                ahead = res.contact.ahead_m if res.contact is not None else math.nan
            else:
                ahead = image_contact(res, drive.layout)
            out.append(_record("axisym", lab, drive, adv, ahead, res.chi2, res.rrms_percent,
                               res.iterations, res.n_used, per))
    return out


__all__ = ["drive_inverter", "image_contact", "run_axisym"]
