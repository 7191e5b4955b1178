"""Confirming a body fit with the 3D model (on request: one 3D solve per cutterhead angle).

The fitted moment ``q`` is turned into a sphere at the fitted centre: radius ``radius_m``
(default an eighth of the machine diameter, enlarged when the moment needs it) and the
resistivity ratio ``c`` with ``q = V 3 (1 - c) / (1 + 2 c)`` (the linearised fit cannot
separate size and contrast). The 3D model (pyGIMLi, steel and bore in) then gives every
reading at its own angle, with and without the sphere, and the readings are compared with a
common log scale refitted: ``chi2_body_3d`` against ``chi2_none_3d``. A 3D chi-squared well
above the linearised one says the linearisation (or the sphere's size) is off: the fit's
position is then a first guess only.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D
from tbminv.ground import Scenario, Sphere
from tbminv.inversion.bodyfit import AdvanceReadings, BodyFit
from tbminv.inversion.bodysens import cylindrical_to_machine


@dataclass(frozen=True)
class BodyConfirmation:
    """3D check of a body fit.

    Attributes
    ----------
    radius_m, resistivity_ratio : float
        The sphere used (m; ``rho_body / rho_ground``).
    chi2_body_3d, chi2_none_3d : float
        chi-squared of the readings against the 3D model with and without the sphere (common
        log scale refitted).
    n_readings : int
    r_body_ohm, r_none_ohm : numpy.ndarray
        3D transfer resistances of every reading, ohm.
    """

    radius_m: float
    resistivity_ratio: float
    chi2_body_3d: float
    chi2_none_3d: float
    n_readings: int
    r_body_ohm: np.ndarray
    r_none_ohm: np.ndarray


def sphere_for_moment(moment_m3: float, radius_m: float) -> tuple[float, float]:
    """(radius m, resistivity ratio) of a sphere with the moment; radius grown if needed."""
    a = float(radius_m)
    while True:
        f = moment_m3 / (4.0 / 3.0 * math.pi * a ** 3)  # 3 (1 - c) / (1 + 2 c)
        if -1.4 < f < 2.8:
            return a, (3.0 - f) / (3.0 + 2.0 * f)
        a *= 1.25


def _chi2_scale(y: np.ndarray, w: np.ndarray) -> float:
    yw = y * w
    c = float(np.sum(yw * w) / np.sum(w * w))
    return float(np.sum((yw - c * w) ** 2))


def confirm_with_3d(fit: BodyFit, readings: AdvanceReadings, layout: Any,
                    background_ohmm: float, radius_m: float | None = None,
                    settings: Fem3DSettings | None = None) -> BodyConfirmation:
    """Check a found body with the 3D model; see the module docstring.

    Parameters
    ----------
    fit : BodyFit
        A fit with a body (``fit.found``).
    readings : AdvanceReadings
        The readings that were fitted.
    layout : tbminv.layout.Layout
    background_ohmm : float
        Background resistivity, ohm-m.
    radius_m : float, optional
        Sphere radius, m (default D / 8).
    settings : Fem3DSettings, optional

    Returns
    -------
    BodyConfirmation
    """
    if not fit.found:
        raise ValueError("confirm_with_3d: the fit reports no body")
    diam = 2.0 * float(layout.machine.radius_m)
    a, ratio = sphere_for_moment(fit.body_moment_m3, radius_m or diam / 8.0)
    ctr = cylindrical_to_machine(np.array([[fit.body_ahead_m, fit.body_offset_m,
                                            fit.body_bearing_deg]]))[0]
    face = readings.face_chainage_m
    body = Scenario(background_ohmm, spheres=(Sphere(face + ctr[0], a, background_ohmm * ratio,
                                                     ctr[1], ctr[2]),))
    none = Scenario.homogeneous(background_ohmm)
    fw = Forward3D(layout, settings)
    quads = sorted(set(readings.measurements), key=lambda q: tuple(str(v) for v in q))
    qidx = {q: i for i, q in enumerate(quads)}
    qi = np.array([qidx[q] for q in readings.measurements])
    r_b = np.empty(qi.size)
    r_n = np.empty(qi.size)
    for ang in np.unique(readings.cutterhead_deg):
        rows = readings.cutterhead_deg == ang
        r_b[rows] = fw.run(body, face, float(ang), quads).r_ohm[qi[rows]]
        r_n[rows] = fw.run(none, face, float(ang), quads).r_ohm[qi[rows]]
    ok = (np.sign(r_n) == np.sign(readings.r_ohm)) & (np.sign(r_b) == np.sign(readings.r_ohm))
    w = 1.0 / readings.rel_error[ok]
    return BodyConfirmation(
        radius_m=a, resistivity_ratio=ratio,
        chi2_body_3d=_chi2_scale(np.log(readings.r_ohm[ok] / r_b[ok]), w),
        chi2_none_3d=_chi2_scale(np.log(readings.r_ohm[ok] / r_n[ok]), w),
        n_readings=int(ok.sum()), r_body_ohm=r_b, r_none_ohm=r_n)


__all__ = ["BodyConfirmation", "confirm_with_3d", "sphere_for_moment"]
