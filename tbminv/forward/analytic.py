"""Closed-form potentials of point current sources, for checks and planning.

All in SI units: resistivity ohm-m, current A, distances m, potential V. These are the
textbook solutions the numerical models are tested against:

* point source in a full space, ``V = rho I / (4 pi R)``;
* point source under an insulating ground surface (half space), by one image source;
* point source near a plane contact, by the image method with reflection coefficient
  ``k = (rho2 - rho1) / (rho2 + rho1)`` (Telford, Geldart & Sheriff 1990, Applied Geophysics,
  2nd ed., sec. 8.3).

They know nothing of the machine or the tunnel: use them with ``model_body = false`` and
``model_cavity = false``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

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
        None marks an electrode at infinity (its terms vanish).
    measurements : sequence of Measurement
    """
    out = np.empty(len(measurements))
    for i, q in enumerate(measurements):
        total = 0.0
        for cur, sign_c in ((q.a, 1.0), (q.b, -1.0)):
            pc = positions.get(cur) if cur is not None else None
            if pc is None:
                continue
            for pot, sign_p in ((q.m, 1.0), (q.n, -1.0)):
                pp = positions.get(pot) if pot is not None else None
                if pp is None:
                    continue
                total += sign_c * sign_p * float(potential_per_amp(pc, pp))
        out[i] = total
    return out


def layout_response(layout: Layout, scenario: Scenario, face_chainage_m: float,
                    cutterhead_deg: float = 0.0) -> np.ndarray:
    """Closed-form transfer resistances of a layout's protocol, ohm (no machine, no tunnel).

    Supports a homogeneous ground, or one contact square to the axis, in a full space or under a
    ground surface at the layout's cover (half space, homogeneous only).

    Raises
    ------
    ValueError
        If the layout models the machine or the tunnel, or the scenario is not one of the above.
    """
    if layout.machine.model_body or layout.tunnel.model_cavity:
        raise ValueError("closed forms know no machine or tunnel: set model_body = false and "
                         "model_cavity = false in the layout")
    if any(e.kind == "machine" for e in layout.electrodes):
        used = {lab for q in layout.measurements for lab in q.labels()}
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
    return transfer_resistances(pot, pos, layout.measurements)


class AnalyticModel:
    """Closed-form model (see :func:`tbminv.analytic.layout_response`)."""

    def __init__(self, layout: Layout, **_: Any) -> None:
        self.layout = layout

    def response(self, scenario: Scenario, face_chainage_m: float,
                 cutterhead_deg: float = 0.0) -> np.ndarray:
        """Transfer resistances, ohm."""
        return layout_response(self.layout, scenario, face_chainage_m, cutterhead_deg)


__all__ = ["AnalyticModel", "full_space_potential", "half_space_potential", "contact_potential",
           "transfer_resistances", "layout_response"]
