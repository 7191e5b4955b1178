"""Closed-form potentials of point current sources, for checks and planning.

All in SI units: resistivity ohm-m, current A, distances m, potential V. These are the
textbook solutions the numerical models are tested against:

* point source in a full space, ``V = rho I / (4 pi R)``;
* point source under an insulating ground surface (half space), by one image source;
* point source near a plane contact, by the image method with reflection coefficient
  ``k = (rho2 - rho1) / (rho2 + rho1)`` (Telford, Geldart & Sheriff 1990, Applied Geophysics,
  2nd ed., sec. 8.3);
* the full-space geometric factor of point electrodes, ``k = 4 pi / (1/AM - 1/AN - 1/BM +
  1/BN)`` (numeric factors of the models with the machine in are in :mod:`tbminv.forward.ratio`).

They know nothing of the machine or the tunnel: use them with ``model_body = false`` and
``model_cavity = false``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from tbminv.forward.quadrupoles import Quadrupoles, as_measurements, quadrupole_terms
from tbminv.ground import Scenario
from tbminv.layout import Layout, Measurement

FOUR_PI = 4.0 * np.pi


def full_space_potential(rho_ohmm: float, src: np.ndarray, rec: np.ndarray,
                         current_a: float = 1.0) -> np.ndarray:
    """Potential of a point source in a full space, V.

    Parameters
    ----------
    rho_ohmm : float
        Resistivity, ohm-m.
    src : array (3,)
        Source position, m.
    rec : array (..., 3)
        Receiver positions, m.
    current_a : float
        Current, A.
    """
    r = np.linalg.norm(np.asarray(rec, float) - np.asarray(src, float), axis=-1)
    return rho_ohmm * current_a / (FOUR_PI * r)


def half_space_potential(rho_ohmm: float, src: np.ndarray, rec: np.ndarray, surface_z_m: float,
                         current_a: float = 1.0) -> np.ndarray:
    """Potential of a point source below an insulating plane ``z = surface_z_m``, V.

    One image source mirrored in the surface (Telford et al. 1990, sec. 8.3).
    """
    src = np.asarray(src, float)
    img = src.copy()
    img[2] = 2.0 * surface_z_m - src[2]
    return (full_space_potential(rho_ohmm, src, rec, current_a)
            + full_space_potential(rho_ohmm, img, rec, current_a))


def contact_potential(rho1_ohmm: float, rho2_ohmm: float, contact_x_m: float, src: np.ndarray,
                      rec: np.ndarray, current_a: float = 1.0) -> np.ndarray:
    """Potential of a point source near a plane contact ``x = contact_x_m``, V.

    ``rho1_ohmm`` for ``x < contact_x_m``, ``rho2_ohmm`` beyond. Image method with
    ``k = (rho2 - rho1) / (rho2 + rho1)`` (Telford, Geldart & Sheriff 1990, sec. 8.3):
    receiver on the source side ``V = rho_s I/(4 pi)(1/R + k_s/R')``, on the other side
    ``V = rho_s I (1 + k_s)/(4 pi R)``, with ``k_s`` the coefficient seen from the source side.
    """
    src = np.asarray(src, float)
    rec = np.asarray(rec, float)
    if src[0] < contact_x_m:
        rho_s, k = rho1_ohmm, (rho2_ohmm - rho1_ohmm) / (rho2_ohmm + rho1_ohmm)
        same = rec[..., 0] < contact_x_m
    else:
        rho_s, k = rho2_ohmm, (rho1_ohmm - rho2_ohmm) / (rho2_ohmm + rho1_ohmm)
        same = rec[..., 0] >= contact_x_m
    img = src.copy()
    img[0] = 2.0 * contact_x_m - src[0]
    direct = full_space_potential(rho_s, src, rec, current_a)
    image = full_space_potential(rho_s, img, rec, current_a)
    return np.where(same, direct + k * image, (1.0 + k) * direct)


def transfer_resistances(potential_per_amp, positions: Mapping[str, np.ndarray | None],
                         measurements: Sequence[Measurement]) -> np.ndarray:
    """Transfer resistances R = (V_M - V_N) / I of quadrupoles, ohm.

    Parameters
    ----------
    potential_per_amp : callable (src (3,), rec (3,)) -> float
        Potential at ``rec`` of a unit source at ``src``, V/A.
    positions : mapping label -> position (3,) or None
        None (or a label missing here) marks an electrode at infinity (its terms vanish).
    measurements : sequence of Measurement
    """
    used = {lab for q in measurements for lab in q.labels() if lab is not None}
    infinity = {lab for lab in used if positions.get(lab) is None}
    out = np.empty(len(measurements))
    for i, terms in enumerate(quadrupole_terms(measurements, infinity)):
        total = 0.0
        for sign, src, rec in terms:
            total += sign * float(potential_per_amp(positions[src], positions[rec]))
        out[i] = total
    return out


def full_space_geometric_factor(pos_a: np.ndarray, pos_b: np.ndarray, pos_m: np.ndarray,
                                pos_n: np.ndarray) -> np.ndarray:
    """Geometric factor of point electrodes in a full space, m.

    ``k = 4 pi / (1/AM - 1/AN - 1/BM + 1/BN)``; a row of NaN in ``pos_b`` or ``pos_n`` is a
    pole (its terms are left out). Then ``rho_a = k U / I``.

    Parameters
    ----------
    pos_a, pos_b, pos_m, pos_n : ndarray, shape (n, 3)
        Electrode positions, m (NaN rows: pole at infinity).

    Returns
    -------
    ndarray
        k, m (NaN where A or M has no position; inf where the four terms cancel).
    """
    def inv(p: np.ndarray, q: np.ndarray) -> np.ndarray:
        d = np.linalg.norm(np.asarray(p, float) - np.asarray(q, float), axis=-1)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(np.isnan(d), 0.0, 1.0 / d)

    pa, pm = np.asarray(pos_a, float), np.asarray(pos_m, float)
    g = inv(pa, pm) - inv(pa, pos_n) - inv(pos_b, pm) + inv(pos_b, pos_n)
    with np.errstate(divide="ignore", invalid="ignore"):
        k = 4.0 * math.pi / g
    k[np.isnan(pa).any(axis=-1) | np.isnan(pm).any(axis=-1)] = np.nan
    return k


def layout_response(layout: Layout, scenario: Scenario, face_chainage_m: float,
                    cutterhead_deg: float = 0.0, measurements: Quadrupoles | None = None
                    ) -> np.ndarray:
    """Closed-form transfer resistances of quadrupoles, ohm (no machine, no tunnel).

    Supports a homogeneous ground, or one contact square to the axis, in a full space or under a
    ground surface at the layout's cover (half space, homogeneous only). ``measurements``:
    Measurement objects or (a, b, m, n) labels; None for the layout's protocol.

    Raises
    ------
    ValueError
        If the layout models the machine or the tunnel, or the scenario is not one of the above.
    """
    if layout.machine.model_body or layout.tunnel.model_cavity:
        raise ValueError("closed forms know no machine or tunnel: set model_body = false and "
                         "model_cavity = false in the layout")
    quads = as_measurements(layout, measurements)
    if any(e.kind == "machine" for e in layout.electrodes):
        used = {lab for q in quads for lab in q.labels()}
        if any(layout.electrode(lab).kind == "machine" for lab in used if lab):
            raise ValueError("closed forms cannot model current into the steel body")
    if scenario.spheres or scenario.ellipsoids or scenario.water_zones or len(
            scenario.contacts) > 1:
        raise ValueError("closed forms support homogeneous ground or one square contact")
    pos = layout.positions_world(face_chainage_m, cutterhead_deg)
    rho1 = scenario.background_resistivity_ohmm
    cover = layout.tunnel.cover_m
    if scenario.contacts:
        c = scenario.contacts[0]
        if not c.square_to_axis or np.isfinite(cover):
            raise ValueError("closed forms support a square contact in a full space only")

        def pot(s, r):  # noqa: ANN001, ANN202
            return contact_potential(rho1, c.resistivity_ohmm, c.chainage_m, s, r)
    elif np.isfinite(cover):
        surface = layout.machine.radius_m + cover

        def pot(s, r):  # noqa: ANN001, ANN202
            return half_space_potential(rho1, s, r, surface)
    else:
        def pot(s, r):  # noqa: ANN001, ANN202
            return full_space_potential(rho1, s, r)
    return transfer_resistances(pot, pos, quads)


class AnalyticModel:
    """Forward model ``analytic`` of the registry (see :func:`layout_response`)."""

    def __init__(self, layout: Layout, **_: Any) -> None:
        self.layout = layout

    def response(self, scenario: Scenario, face_chainage_m: float, cutterhead_deg: float = 0.0,
                 measurements: Quadrupoles | None = None) -> np.ndarray:
        """Transfer resistances of ``measurements`` (default the protocol), ohm."""
        return layout_response(self.layout, scenario, face_chainage_m, cutterhead_deg,
                               measurements)


__all__ = ["AnalyticModel", "full_space_potential", "half_space_potential", "contact_potential",
           "transfer_resistances", "full_space_geometric_factor", "layout_response"]
