"""A layout on the axisymmetric model: electrodes in (x, r, angle), protocol quadrupoles."""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from tbminv.forward.axisym.fields import AxElectrode, AxisymSettings, _warn_once
from tbminv.forward.axisym.mesh import CylGeometry, CylMesh
from tbminv.forward.axisym.solver import AxisymSolver

_LOG = logging.getLogger(__name__)
_WARNED: set[tuple] = set()



# --------------------------------------------------------------------------- quadrupoles
def quadrupole_terms(measurements: Sequence[Any], infinity: set[str]) -> list[list[tuple]]:
    """Signed (source, receiver) pairs of every quadrupole ``R = (V_M - V_N) / I``.

    Parameters
    ----------
    measurements : sequence of objects with ``a, b, m, n`` labels (b / n may be None)
    infinity : set of str
        Labels at infinity (their terms vanish).

    Returns
    -------
    list of list of (sign, source, receiver)
    """
    out = []
    for q in measurements:
        terms = []
        for cur, sc in ((q.a, 1.0), (q.b, -1.0)):
            if cur is None or cur in infinity:
                continue
            for pot, sp_ in ((q.m, 1.0), (q.n, -1.0)):
                if pot is None or pot in infinity:
                    continue
                terms.append((sc * sp_, cur, pot))
        out.append(terms)
    return out


def _as_measurements(items: Sequence[Any]) -> list[Any]:
    from tbminv.layout import Measurement

    out = []
    for q in items:
        if isinstance(q, Measurement):
            out.append(q)
        else:
            a, b, m, n = (None if (x is None or x == "") else str(x) for x in tuple(q)[:4])
            out.append(Measurement(a=a, b=b, m=m, n=n))
    return out


class AxisymLayoutSolver:
    """The axisymmetric model of a layout: mesh, protocol and ground filling.

    Parameters
    ----------
    layout : tbminv.layout.Layout
    cutterhead_deg : float
        Default cutterhead angle, degrees.
    face_chainage_m : float, optional
        Face chainage (needed for electrodes fixed in the ground), m.
    settings : AxisymSettings, optional
    extra_x : sequence of float
        More mesh lines across the axis (machine frame), m.

    Notes
    -----
    Bare electrodes and kind ``machine`` read the machine's potential; current into them goes
    into the whole body. A finite tunnel cover (ground surface) cannot be axisymmetric: it is
    left out (full space) with a warning.
    """

    def __init__(self, layout: Any, cutterhead_deg: float = 0.0,
                 face_chainage_m: float | None = None, settings: AxisymSettings | None = None,
                 extra_x: Sequence[Any] = (), measurements: Sequence[Any] | None = None,
                 extra_r: Sequence[Any] = ()) -> None:
        self.layout = layout
        self.cutterhead_deg = float(cutterhead_deg)
        self.face_chainage_m = face_chainage_m
        mach, tun = layout.machine, layout.tunnel
        if math.isfinite(tun.cover_m):
            _warn_once(("cover", layout.source, tun.cover_m),
                       "%s: the ground surface (cover %.1f m) is not axisymmetric; the "
                       "axisymmetric model treats the ground as a full space (the drive "
                       "inversion divides readings by a 3D surface factor, tbminv.surface)",
                       layout.source, tun.cover_m)
        geo = CylGeometry(
            machine_radius_m=mach.radius_m if mach.model_body else None,
            shield_length_m=mach.shield_length_m if mach.model_body else 0.0,
            tunnel_length_m=(tun.length_m if tun.model_cavity else 0.0),
            tunnel_radius_m=mach.radius_m)
        if not mach.model_body and tun.model_cavity:
            geo = replace(geo, shield_length_m=0.0)
        self.measurements = list(layout.measurements if measurements is None
                                 else _as_measurements(measurements))
        used = {lab for q in self.measurements for lab in q.labels() if lab is not None}
        cyl = layout.positions_cylindrical(cutterhead_deg, face_chainage_m)
        els = []
        for lab in layout.labels:
            if lab not in used:
                continue
            e = layout.electrode(lab)
            if e.at_infinity:
                els.append(AxElectrode(lab, at_infinity=True))
            elif e.on_steel:
                if not mach.model_body:
                    raise ValueError(f"{layout.source}: electrode {lab!r} is on the steel but "
                                     "the layout leaves the machine out (model_body = false)")
                els.append(AxElectrode(lab, on_steel=True))
            else:
                x, r, th = cyl[lab]
                els.append(AxElectrode(lab, float(x), float(r), float(th)))
        infinity = {e.label for e in els if e.at_infinity}
        self.terms = quadrupole_terms(self.measurements, infinity)
        srcs = sorted({s for t in self.terms for _, s, _ in t})
        recs = sorted({k for t in self.terms for _, _, k in t})
        for t, q in zip(self.terms, self.measurements):
            for _, s_, k in t:
                if s_ == k:
                    raise ValueError(f"{layout.source}: measurement {q} uses {s_!r} for current "
                                     "and potential")
        self.settings = settings or AxisymSettings()
        self.forward = AxisymSolver(
            els, srcs, recs, geo, self.settings,
            steel_resistivity_ohmm=mach.body_resistivity_ohmm,
            tunnel_resistivity_ohmm=tun.lining_resistivity_ohmm, extra_x=extra_x,
            extra_r=extra_r)
        self.pairs = sorted({(s_, k) for t in self.terms for _, s_, k in t})
        self._pair_index = {p: i for i, p in enumerate(self.pairs)}

    @property
    def mesh(self) -> CylMesh:
        """The forward mesh."""
        return self.forward.mesh

    def _thetas(self, cutterhead_deg: float | None) -> dict[str, float] | None:
        if cutterhead_deg is None or cutterhead_deg == self.cutterhead_deg:
            return None
        cyl = self.layout.positions_cylindrical(cutterhead_deg, self.face_chainage_m)
        return {lab: v[2] for lab, v in cyl.items() if v is not None}

    def ground_resistivity(self, scenario: Any, face_chainage_m: float,
                           subsample: int | None = None, average: str | None = None
                           ) -> np.ndarray:
        """Ground-cell resistivities of a scenario for a face chainage, ohm-m.

        With ``fit_contacts`` (default) free mesh lines first move onto the contacts (the
        mesh changes state). Each cell is sampled at ``subsample`` x ``subsample`` points and
        averaged
        (``average``: ``'geometric'`` mean of resistivity, ``'resistivity'`` arithmetic
        mean (series), ``'conductivity'`` arithmetic mean of conductivity (parallel); with
        ``subsample = 1`` the cell centre). Defaults from the settings.

        Raises
        ------
        tbminv.ground.NotAxisymmetricError
            If the scenario is not symmetric about the tunnel axis.
        """
        n = self.settings.fill_subsample if subsample is None else int(subsample)
        avg = self.settings.fill_average if average is None else average
        fw = self.forward
        if self.settings.fit_contacts:
            if scenario.axisymmetric_problems():
                scenario.resistivity_axisym(0.0, 0.0)  # raises NotAxisymmetricError
            fw.fit_x_lines([c.chainage_m - face_chainage_m for c in scenario.contacts])
        cm = fw.mesh
        i, j = cm.cell_ij()
        i, j = i[fw.ground_cells], j[fw.ground_cells]
        t = (np.arange(n) + 0.5) / n
        xs = cm.x[i, None, None] + np.diff(cm.x)[i, None, None] * t[None, :, None]
        rs = cm.r[j, None, None] + np.diff(cm.r)[j, None, None] * t[None, None, :]
        xs, rs = np.broadcast_arrays(xs, rs)
        rho = np.asarray(scenario.resistivity_axisym(xs + face_chainage_m, rs), float)
        wgt = rs / np.sum(rs, axis=(1, 2), keepdims=True)  # ring volume weights
        if avg == "geometric":
            return np.exp(np.sum(wgt * np.log(rho), axis=(1, 2)))
        if avg == "resistivity":
            return np.sum(wgt * rho, axis=(1, 2))
        if avg == "conductivity":
            return 1.0 / np.sum(wgt / rho, axis=(1, 2))
        raise ValueError(f"average = {avg!r}: expected 'geometric', 'resistivity' or "
                         "'conductivity'")

    def transfer(self, pot: np.ndarray) -> np.ndarray:
        """Transfer resistances of the protocol from receiver x source potentials, ohm."""
        f = self.forward
        out = np.zeros(len(self.terms))
        for i, t in enumerate(self.terms):
            out[i] = sum(sg * pot[f.receiver_index[k], f.source_index[s_]] for sg, s_, k in t)
        return out

    def response(self, rho_ground: np.ndarray, cutterhead_deg: float | None = None
                 ) -> np.ndarray:
        """Transfer resistances of the protocol for ground-cell resistivities, ohm."""
        sol = self.forward.solve(rho_ground)
        return self.transfer(sol.potentials(self._thetas(cutterhead_deg)))

    def response_scenario(self, scenario: Any, face_chainage_m: float,
                          cutterhead_deg: float | None = None) -> np.ndarray:
        """Transfer resistances for a ground scenario at a face chainage, ohm."""
        return self.response(self.ground_resistivity(scenario, face_chainage_m), cutterhead_deg)

    def jacobian(self, rho_ground: np.ndarray, cutterhead_deg: float | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
        """Transfer resistances and their Jacobian w.r.t. ln(resistivity) of ground cells.

        Returns
        -------
        (numpy.ndarray, numpy.ndarray)
            R (n_meas,) in ohm and dR/d ln(rho) (n_meas, n_ground_cells) in ohm.
        """
        th = self._thetas(cutterhead_deg)
        jp, sol = self.forward.jacobian(rho_ground, self.pairs, th)
        jac = np.zeros((len(self.terms), jp.shape[1]))
        for i, t in enumerate(self.terms):
            for sg, s_, k in t:
                jac[i] += sg * jp[self._pair_index[(s_, k)]]
        return self.transfer(sol.potentials(th)), jac


class AxisymModel:
    """Forward model ``axisym`` for the model registry (:mod:`tbminv.models`).

    Builds one :class:`AxisymLayoutSolver` per set of electrode positions in the machine frame
    (the same for every advance unless electrodes are fixed in the ground) and caches it.
    """

    def __init__(self, layout: Any, settings: AxisymSettings | None = None, **_: Any) -> None:
        self.layout = layout
        self.settings = settings or AxisymSettings()
        self._cache: dict[tuple, AxisymLayoutSolver] = {}

    def model_for(self, face_chainage_m: float, cutterhead_deg: float = 0.0) -> AxisymLayoutSolver:
        """The (cached) axisymmetric model for a face chainage."""
        cyl = self.layout.positions_cylindrical(cutterhead_deg, face_chainage_m)
        key = tuple(sorted((k, round(v[0], 9), round(v[1], 9)) for k, v in cyl.items()
                           if v is not None))
        if key not in self._cache:
            if len(self._cache) > 8:
                self._cache.clear()
            self._cache[key] = AxisymLayoutSolver(self.layout, cutterhead_deg, face_chainage_m,
                                            self.settings)
        return self._cache[key]

    def response(self, scenario: Any, face_chainage_m: float,
                 cutterhead_deg: float = 0.0) -> np.ndarray:
        """Transfer resistances of the layout's protocol, ohm."""
        model = self.model_for(face_chainage_m, cutterhead_deg)
        return model.response_scenario(scenario, face_chainage_m, cutterhead_deg)


_SIM_CACHE: dict[tuple, AxisymLayoutSolver] = {}


def simulate_model(layout: Any, scenario: Any, face_chainage_m: float, cutterhead_deg: float,
                   measurements: Sequence[Any]) -> np.ndarray:
    """Transfer resistances (ohm) of quadrupoles ``(a, b, m, n)`` for one face chainage.

    The signature of :data:`tbminv.simulate.MODELS` entries; models are cached per layout,
    electrode positions and quadrupole list.
    """
    quads = _as_measurements(measurements)
    cyl = layout.positions_cylindrical(cutterhead_deg, face_chainage_m)
    key = (id(layout), tuple(sorted((k, round(v[0], 9), round(v[1], 9))
                                    for k, v in cyl.items() if v is not None)),
           tuple(q.labels() for q in quads))
    model = _SIM_CACHE.get(key)
    if model is None:
        if len(_SIM_CACHE) > 8:
            _SIM_CACHE.clear()
        model = _SIM_CACHE[key] = AxisymLayoutSolver(layout, cutterhead_deg, face_chainage_m,
                                               measurements=quads)
    return model.response_scenario(scenario, face_chainage_m, cutterhead_deg)


__all__ = ["quadrupole_terms", "AxisymLayoutSolver", "AxisymModel", "simulate_model"]
