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
from tbminv.forward.quadrupoles import Quadrupoles, as_measurements, quadrupole_terms
from tbminv.ground import Scenario
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)


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
    measurements : sequence of Measurement or (a, b, m, n), optional
        Quadrupoles (default: the layout's protocol; reciprocals allowed).
    extra_r : sequence of float
        More mesh lines along the axis (radii), m.

    Notes
    -----
    Bare electrodes and kind ``machine`` read the machine's potential; current into them goes
    into the whole body. A finite tunnel cover (ground surface) cannot be axisymmetric: it is
    left out (full space) with a warning.
    """

    def __init__(self, layout: Any, cutterhead_deg: float = 0.0,
                 face_chainage_m: float | None = None, settings: AxisymSettings | None = None,
                 extra_x: Sequence[Any] = (), measurements: Quadrupoles | None = None,
                 extra_r: Sequence[Any] = ()) -> None:
        self.layout = layout
        self.cutterhead_deg = float(cutterhead_deg)
        self.face_chainage_m = face_chainage_m
        mach, tun = layout.machine, layout.tunnel
        if math.isfinite(tun.cover_m):
            _warn_once(("cover", layout.source, tun.cover_m),
                       "%s: the ground surface (cover %.1f m) is not axisymmetric; the "
                       "axisymmetric model treats the ground as a full space (the drive "
                       "inversion divides readings by a 3D surface factor, "
                       "tbminv.forward.ratio)",
                       layout.source, tun.cover_m)
        geo = CylGeometry(
            machine_radius_m=mach.radius_m if mach.model_body else None,
            shield_length_m=mach.shield_length_m if mach.model_body else 0.0,
            tunnel_length_m=(tun.length_m if tun.model_cavity else 0.0),
            tunnel_radius_m=mach.radius_m)
        if not mach.model_body and tun.model_cavity:
            geo = replace(geo, shield_length_m=0.0)
        self.measurements = as_measurements(layout, measurements)
        used = {lab for q in self.measurements for lab in q.labels() if lab is not None}
        cyl = layout.positions_cylindrical(face_chainage_m, cutterhead_deg)
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
        cyl = self.layout.positions_cylindrical(self.face_chainage_m, cutterhead_deg)
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


    def responses(self, rho_ground: np.ndarray, angles_deg: Sequence[float]) -> np.ndarray:
        """Transfer resistances at several cutterhead angles from one solve, ohm.

        The harmonic fields do not depend on the azimuths; each angle only re-sums them.

        Returns
        -------
        numpy.ndarray
            (n_angles, n_meas), ohm.
        """
        sol = self.forward.solve(rho_ground)
        return np.array([self.transfer(sol.potentials(self._thetas(float(a))))
                         for a in angles_deg]).reshape(len(angles_deg), len(self.terms))

    def jacobians(self, rho_ground: np.ndarray, angles_deg: Sequence[float]
                  ) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`jacobian` at several cutterhead angles from one solve per harmonic.

        Returns
        -------
        (numpy.ndarray, numpy.ndarray)
            R (n_angles, n_meas) in ohm and dR/d ln(rho) (n_angles, n_meas, n_ground_cells)
            in ohm.
        """
        ths = [self._thetas(float(a)) for a in angles_deg]
        jp, sol = self.forward.jacobian_sets(rho_ground, self.pairs, ths)
        jac = np.zeros((len(ths), len(self.terms), jp.shape[2]))
        for i, t in enumerate(self.terms):
            for sg, s_, k in t:
                jac[:, i] += sg * jp[:, self._pair_index[(s_, k)]]
        r = np.array([self.transfer(sol.potentials(th)) for th in ths]).reshape(
            len(ths), len(self.terms))
        return r, jac


class AxisymModel:
    """Forward model ``axisym`` of the registry (:mod:`tbminv.forward.registry`).

    Builds one :class:`AxisymLayoutSolver` per set of electrode positions in the machine frame
    (the same for every advance unless electrodes are fixed in the ground) and quadrupole list,
    and caches it.
    """

    def __init__(self, layout: Layout, settings: AxisymSettings | None = None, **_: Any) -> None:
        self.layout = layout
        self.settings = settings or AxisymSettings()
        self._cache: dict[tuple, AxisymLayoutSolver] = {}

    def model_for(self, face_chainage_m: float, cutterhead_deg: float = 0.0,
                  measurements: Quadrupoles | None = None) -> AxisymLayoutSolver:
        """The (cached) axisymmetric model of ``measurements`` (default the protocol)."""
        quads = as_measurements(self.layout, measurements)
        cyl = self.layout.positions_cylindrical(face_chainage_m, cutterhead_deg)
        key = (tuple(sorted((k, round(v[0], 9), round(v[1], 9)) for k, v in cyl.items()
                            if v is not None)),
               tuple(q.labels() for q in quads))
        if key not in self._cache:
            if len(self._cache) > 8:
                self._cache.clear()
            self._cache[key] = AxisymLayoutSolver(self.layout, cutterhead_deg, face_chainage_m,
                                                  self.settings, measurements=quads)
        return self._cache[key]

    def response(self, scenario: Scenario, face_chainage_m: float, cutterhead_deg: float = 0.0,
                 measurements: Quadrupoles | None = None) -> np.ndarray:
        """Transfer resistances of ``measurements`` (default the protocol), ohm."""
        model = self.model_for(face_chainage_m, cutterhead_deg, measurements)
        return model.response_scenario(scenario, face_chainage_m, cutterhead_deg)

    def response_angles(self, scenario: Scenario, face_chainage_m: float,
                        angles_deg: Sequence[float], measurements: Quadrupoles | None = None
                        ) -> np.ndarray:
        """Transfer resistances at several cutterhead angles (one solve), ohm.

        Returns
        -------
        numpy.ndarray
            (n_angles, n_measurements), ohm.
        """
        angles = [float(a) for a in angles_deg]
        model = self.model_for(face_chainage_m, angles[0], measurements)
        return model.responses(model.ground_resistivity(scenario, face_chainage_m), angles)


__all__ = ["AxisymLayoutSolver", "AxisymModel"]
