"""Closed-form potentials of point current sources, for checks and planning.

All in SI units: resistivity ohm-m, current A, distances m, potential V. These are the
textbook solutions the numerical models are tested against:

* point source in a full space, ``V = rho I / (4 pi R)``;
* point source under an insulating ground surface (half space), by one image source;
* point source near a plane contact, by the image method with reflection coefficient
  ``k = (rho2 - rho1) / (rho2 + rho1)`` (Telford, Geldart & Sheriff 1990, Applied Geophysics,
  2nd ed., sec. 8.3);
* point source outside a sphere in a full space, by its Legendre series (Van Nostrand & Cook
  1966, Interpretation of Resistivity Data, USGS Professional Paper 499; Telford, Geldart &
  Sheriff 1990, sec. 8.3);
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


def sphere_potential(rho1_ohmm: float, rho2_ohmm: float, centre: np.ndarray, radius_m: float,
                     src: np.ndarray, rec: np.ndarray, current_a: float = 1.0,
                     tol: float = 1e-12, max_terms: int = 100000) -> np.ndarray:
    """Potential of a point source outside a sphere in a full space, V.

    Host ``rho1_ohmm``, sphere ``rho2_ohmm`` of radius ``radius_m`` at ``centre``; source at
    distance ``s > a`` from the centre, receiver at distance ``r`` and angle ``gamma`` (from the
    centre, against the source direction). Legendre series of the boundary-value problem
    (Van Nostrand & Cook 1966, USGS Professional Paper 499; Telford, Geldart & Sheriff 1990,
    sec. 8.3), with ``C = rho1 I / (4 pi)``:

    * receiver outside (``r >= a``):
      ``V = C [1/R + sum_{n>=1} n (rho2 - rho1) / (n rho1 + (n+1) rho2)
      a^(2n+1) / (s r)^(n+1) P_n(cos gamma)]``;
    * receiver inside (``r < a``):
      ``V = C sum_{n>=0} (2n+1) rho2 / (n rho1 + (n+1) rho2) r^n / s^(n+1) P_n(cos gamma)``.

    A perfectly conducting sphere (``rho2 -> 0``) is the Kelvin image of a floating sphere;
    ``rho2 = rho1`` gives the full space.

    Parameters
    ----------
    rho1_ohmm, rho2_ohmm : float
        Host and sphere resistivity, ohm-m (``rho2`` may be ``inf``).
    centre : array (3,)
        Sphere centre, m.
    radius_m : float
        Sphere radius ``a``, m.
    src : array (3,)
        Source position, m (outside the sphere).
    rec : array (..., 3)
        Receiver positions, m.
    current_a : float
        Current, A.
    tol : float
        The series stops when its next term's bound ``(a^2 / (s r))^n`` (or ``(r/s)^n``
        inside) falls below ``tol``.
    max_terms : int
        Largest number of terms (a receiver next to the source on the surface needs many).

    Returns
    -------
    ndarray
        Potentials, V, shape of ``rec`` without its last axis.

    Raises
    ------
    ValueError
        If the source is not outside the sphere or the resistivities are not positive.
    """
    rho1, rho2, a = float(rho1_ohmm), float(rho2_ohmm), float(radius_m)
    if not (rho1 > 0 and rho2 > 0 and a > 0):
        raise ValueError("resistivities and radius must be positive")
    c0 = np.asarray(centre, float)
    ps = np.asarray(src, float) - c0
    pr = np.asarray(rec, float) - c0
    s = float(np.linalg.norm(ps))
    if not s > a:
        raise ValueError(f"source at {s:.4g} m from the centre is not outside the sphere "
                         f"(radius {a:.4g} m)")
    r = np.linalg.norm(pr, axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        cosg = np.clip(np.sum(pr * ps, axis=-1) / (r * s), -1.0, 1.0)
    cosg = np.where(r > 0, cosg, 1.0)
    inside = r < a
    q = np.where(inside, r / s, a * a / (s * np.maximum(r, a)))
    qmax = float(np.max(q)) if q.size else 0.0
    n_terms = max_terms if qmax >= 1.0 else int(min(max_terms, math.ceil(
        math.log(tol) / math.log(max(qmax, 1e-300))) + 2))
    n_terms = max(n_terms, 2)
    # P_n by the three-term recurrence (Bonnet), summed term by term
    p_prev, p_cur = np.ones_like(cosg), cosg.copy()
    total = np.zeros_like(cosg)
    if rho2 == math.inf:
        def coef_out(n: int) -> float:
            return n / (n + 1.0)

        def coef_in(n: int) -> float:
            return (2 * n + 1.0) / (n + 1.0)
    else:
        def coef_out(n: int) -> float:
            return n * (rho2 - rho1) / (n * rho1 + (n + 1) * rho2)

        def coef_in(n: int) -> float:
            return (2 * n + 1) * rho2 / (n * rho1 + (n + 1) * rho2)
    # inside: n = 0 term; outside: the direct 1/R
    total[inside] = coef_in(0) / s
    rr = np.maximum(r, 1e-300)
    fac_out = a ** 3 / (s * rr) ** 2   # a^(2n+1) / (s r)^(n+1) at n = 1
    fac_in = r / (s * s)               # r^n / s^(n+1) at n = 1
    for n in range(1, n_terms):
        total += np.where(inside, coef_in(n) * fac_in, coef_out(n) * fac_out) * p_cur
        fac_out = fac_out * a * a / (s * rr)
        fac_in = fac_in * r / s
        p_prev, p_cur = p_cur, ((2 * n + 1) * cosg * p_cur - n * p_prev) / (n + 1)
    direct = 1.0 / np.linalg.norm(np.asarray(rec, float) - np.asarray(src, float), axis=-1)
    total = np.where(inside, total, total + direct)
    return rho1 * current_a / FOUR_PI * total


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
    ground surface at the layout's cover (half space, homogeneous only), or one sphere in a
    full space (:func:`sphere_potential`; every electrode outside it). ``measurements``:
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
    if (scenario.ellipsoids or scenario.water_zones or len(scenario.contacts) > 1
            or len(scenario.spheres) > 1 or (scenario.spheres and scenario.contacts)):
        raise ValueError("closed forms support homogeneous ground, one square contact or one "
                         "sphere")
    pos = layout.positions_world(face_chainage_m, cutterhead_deg)
    rho1 = scenario.background_resistivity_ohmm
    cover = layout.tunnel.cover_m
    if scenario.spheres:
        if np.isfinite(cover):
            raise ValueError("closed forms support a sphere in a full space only")
        sph = scenario.spheres[0]
        centre = np.array([sph.chainage_m, sph.y_m, sph.z_m])

        def pot(s, r):  # noqa: ANN001, ANN202
            return sphere_potential(rho1, sph.resistivity_ohmm, centre, sph.radius_m, s, r)
    elif scenario.contacts:
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
           "sphere_potential",
           "transfer_resistances", "full_space_geometric_factor", "layout_response"]
