"""Planning for an off-axis body: response against the cutterhead angle, and bearing reach.

For a sphere (radius ``a``, resistivity ratio ``c = rho_1 / rho_0``) centred ``offset_m`` off
the axis at bearing ``B`` and a distance ahead of the face, each protocol reading's relative
response at cutterhead angle ``t`` is, to first order, ``q g(t) / R0(t)`` with the moment
``q = (4/3) pi a^3 3 (1 - c) / (1 + 2 c)`` and ``g`` the harmonic 3D sensitivity of the
homogeneous background (:mod:`tbminv.inversion.bodysens`).

The bearing can be told at a distance when the readings of every angle reject a body at any
bearing more than ``tolerance_deg`` away (same distance and offset, moment and common scale
refitted): the minimum chi-squared of that alternative on the noise-free data is the
noncentrality ``lambda(d)`` of the test (Asimov data, Cowan, Cranmer, Gross & Vitells 2011,
Eur. Phys. J. C 71:1554), and ``bearing_reach_m`` is the largest distance with
``lambda >= k^2`` (as ``reach_m`` of :mod:`tbminv.studies.reach` for a contact). Readings are
taken as independent at the stated noise ``sigma = noise_abs + noise_rel |R0|``; a planning
figure, not a guarantee: beyond it a body can be present and its side unknown.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import xarray as xr

from tbminv.inversion.bodyfit import bearing_difference_deg
from tbminv.inversion.bodysens import BodySensitivity


def sphere_moment_m3(radius_m: float, resistivity_ratio: float) -> float:
    """Moment of a sphere, m^3: volume x ``3 (1 - c) / (1 + 2 c)``, ``c = rho_1 / rho_0``.

    Positive for a conductive sphere; the factor tends to 3 (perfect conductor) and -1.5
    (insulator).
    """
    c = float(resistivity_ratio)
    return 4.0 / 3.0 * math.pi * radius_m ** 3 * 3.0 * (1.0 - c) / (1.0 + 2.0 * c)


def body_bearing_study(layout: Any, bearing_deg: float, offset_m: float,
                       distances_m: Sequence[float], radius_m: float = 1.0,
                       resistivity_ratio: float = 0.1,
                       angles_deg: Sequence[float] = tuple(range(0, 360, 15)),
                       noise_rel: float = 0.02, noise_abs: float = 0.0,
                       background_ohmm: float = 100.0, k: float = 3.0,
                       tolerance_deg: float = 30.0, face_chainage_m: float = 0.0,
                       bearing_step_deg: float = 5.0,
                       sensitivity_options: dict[str, Any] | None = None) -> xr.Dataset:
    """Response against the cutterhead angle of a body at a bearing, and the bearing reach.

    Parameters
    ----------
    layout : tbminv.layout.Layout
    bearing_deg, offset_m : float
        The body's bearing (degrees clockwise from the crown looking ahead) and offset from
        the axis (m).
    distances_m : sequence of float
        Distances of the body's centre ahead of the cutterhead face, m (increasing).
    radius_m, resistivity_ratio : float
        The sphere: radius (m) and ``rho_body / rho_ground``.
    angles_deg : sequence of float
        Cutterhead angles read, degrees.
    noise_rel, noise_abs : float
        Noise model ``sigma = noise_abs + noise_rel |R0|`` (1, ohm).
    background_ohmm : float
        Ground resistivity, ohm-m.
    k : float
        Threshold ``lambda >= k^2``.
    tolerance_deg : float
        Bearings nearer than this to the body's count as the same side.
    face_chainage_m : float
        Face chainage (for electrodes fixed in the ground), m.
    bearing_step_deg : float
        Step of the alternative bearings.
    sensitivity_options : dict, optional
        Options of :class:`BodySensitivity`.

    Returns
    -------
    xarray.Dataset
        ``relative_response`` (measurement, cutterhead_deg, distance_ahead), 1;
        ``angle_of_largest_response`` (measurement, distance_ahead), degrees (NaN for readings
        that do not change with the angle); ``bearing_noncentrality`` (distance_ahead);
        ``bearing_reach_m`` and ``bearing_reach_at_grid_end``; attributes: the body, noise,
        ``k``, ``tolerance_deg``, ``moment_m3``.
    """
    quads = [q.labels() for q in layout.measurements]
    dist = np.asarray(distances_m, float)
    ang = np.asarray(angles_deg, float)
    opts = dict(sensitivity_options or {})
    opts.setdefault("ahead_max_m", float(dist.max()) + 1.0)
    opts.setdefault("radius_max_m", float(offset_m) + 1.0)
    sens = BodySensitivity(layout, quads, face_chainage_m, background_ohmm, **opts)
    nq, na = len(quads), ang.size
    qi = np.tile(np.arange(nq), na)
    ai = np.repeat(ang, nq)
    r0 = np.concatenate([sens.background_response(a) for a in ang])
    sigma = (noise_abs + noise_rel * np.abs(r0)) / np.abs(r0)
    usable = np.abs(r0) > 1e-3 * np.median(np.abs(r0))
    q = sphere_moment_m3(radius_m, resistivity_ratio)
    alt_b = np.arange(0.0, 360.0, bearing_step_deg)
    alt_b = alt_b[[bearing_difference_deg(b, bearing_deg) > tolerance_deg for b in alt_b]]
    resp = np.zeros((nq, na, dist.size))
    lam = np.zeros(dist.size)
    w = np.where(usable, 1.0 / sigma, 0.0)
    for j, d in enumerate(dist):
        pts = np.array([[d, offset_m, bearing_deg]] + [[d, offset_m, b] for b in alt_b])
        h = sens.density(qi, ai, pts) / r0[:, None]  # relative response per unit moment
        y = q * h[:, 0]
        resp[:, :, j] = y.reshape(na, nq).T
        # alternative: common scale c and moment of a body at another bearing, refitted
        yw = y * w
        best = math.inf
        for col in range(1, pts.shape[0]):
            a = np.stack([w, h[:, col] * w], axis=1)
            coef, *_ = np.linalg.lstsq(a, yw, rcond=None)
            best = min(best, float(np.sum((yw - a @ coef) ** 2)))
        lam[j] = best
    spread = resp.max(axis=1) - resp.min(axis=1)
    turns = spread > 1e-9 * np.maximum(np.abs(resp).max(axis=1), 1e-300)
    peak = ang[np.argmax(np.abs(resp), axis=1)]
    peak = np.where(turns, peak, np.nan)
    seen = lam >= k * k
    reach, at_end = 0.0, False
    if np.any(seen):
        last = int(np.nonzero(seen)[0].max())
        if last == dist.size - 1:
            reach, at_end = float(dist[-1]), True
        else:  # log-log interpolation of the crossing
            x0, x1 = math.log(dist[last]), math.log(dist[last + 1])
            y0, y1 = math.log(lam[last]), math.log(max(lam[last + 1], 1e-300))
            t = (math.log(k * k) - y0) / (y1 - y0)
            reach = float(math.exp(x0 + t * (x1 - x0)))
    labels = ["/".join("-" if v is None else v for v in qd) for qd in quads]
    return xr.Dataset(
        {"relative_response": (("measurement", "cutterhead_deg", "distance_ahead"), resp,
                               {"units": "1", "long_name": "R / R0 - 1 (linearised)"}),
         "angle_of_largest_response": (("measurement", "distance_ahead"), peak,
                                       {"units": "degree", "long_name": "cutterhead angle of "
                                        "the largest |response| (NaN: no change with angle)"}),
         "bearing_noncentrality": (("distance_ahead",), lam,
                                   {"units": "1", "long_name": "chi2 of the best body on the "
                                    "wrong side (noise-free data)"}),
         "bearing_reach_m": ((), reach, {"units": "m"}),
         "bearing_reach_at_grid_end": ((), at_end)},
        coords={"measurement": labels,
                "cutterhead_deg": ("cutterhead_deg", ang, {"units": "degree"}),
                "distance_ahead": ("distance_ahead", dist,
                                   {"units": "m", "long_name": "distance of the body's centre "
                                    "ahead of the cutterhead face"})},
        attrs={"bearing_deg": float(bearing_deg), "offset_m": float(offset_m),
               "radius_m": float(radius_m), "resistivity_ratio": float(resistivity_ratio),
               "moment_m3": q, "noise_rel": float(noise_rel), "noise_abs": float(noise_abs),
               "background_resistivity_ohmm": float(background_ohmm), "k": float(k),
               "tolerance_deg": float(tolerance_deg),
               "caution": "planning figure at the stated noise, linearised; not a guarantee"})


__all__ = ["body_bearing_study", "sphere_moment_m3"]
