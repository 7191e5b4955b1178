"""Comparison method: pyGIMLi's Cartesian 2.5D ERT on the vertical plane through the tunnel axis.

The section is the plane ``y = 0`` of the machine frame (``ahead`` along the axis, ``z`` up). The
2.5D model makes every body infinite across the section: the steel machine becomes an earthed slab
and the tunnel a resistive slab. That is a known, large bias (potentials near the machine are
orders of magnitude off 3D); the ratio correction of Fox et al. (1980, Geophysics 45(1):75-93)
multiplies each reading by ``R_3D(homogeneous) / R_2.5D(homogeneous)`` computed with the true 3D
geometry, which removes the homogeneous part of the bias but not its effect on the sensitivity to
the ground ahead. Use it to compare methods, not for decisions. The ratio is computed and cached by
:func:`tbminv.forward.ratio.cartesian_ratio`.

Electrodes off the plane are projected on it at ``z = r cos(angle)``; a projection that falls inside
the steel slab is moved to the nearer slab face (crown or invert side) plus ``electrode_offset_m``.
The projected positions are reported by :meth:`Cartesian25DModel.projected_positions`.

pyGIMLi's mixed boundary condition assumes a ground surface at ``y = 0`` of its mesh: the surface is
put there (at the layout's cover above the crown), and a deep tunnel (``cover_m = inf``) is placed
``deep_cover_m`` below it.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from tbminv.forward.fem3d.model import Model3D
from tbminv.forward.quadrupoles import Quadrupoles, as_measurements
from tbminv.forward.ratio import cartesian_ratio
from tbminv.gimli import configure_operator, ert, ert_data_container, pg
from tbminv.ground import Scenario
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)

GROUND, MACHINE, TUNNEL = 1, 2, 3


@dataclass(frozen=True)
class Cartesian25DSettings:
    """Mesh and model settings of the Cartesian 2.5D section (m, ohm-m).

    Attributes
    ----------
    domain_m : float
        Half-width of the model box around the machine and electrodes, m.
    deep_cover_m : float
        Depth of the axis below the (far) surface for a deep tunnel, m.
    refine_m : float
        Distance of the refinement nodes around each electrode, m.
    area_m2 : float
        Largest triangle area, m^2.
    quality : float
        Smallest triangle angle for the mesher, degrees.
    electrode_offset_m : float
        Offset of electrodes moved off the steel slab, m.
    ratio_correction : bool
        Multiply by R_3D / R_2.5D of homogeneous ground (needs the 3D model).
    rho_ref_ohmm : float
        Homogeneous resistivity for the ratio correction, ohm-m.
    """

    domain_m: float = 300.0
    deep_cover_m: float = 500.0
    refine_m: float = 0.05
    area_m2: float = 50.0
    quality: float = 34.0
    electrode_offset_m: float = 0.05
    ratio_correction: bool = True
    rho_ref_ohmm: float = 100.0


class Cartesian25DModel:
    """Cartesian 2.5D forward model of a layout (see the module docstring).

    Parameters
    ----------
    layout : Layout
    settings : Cartesian25DSettings, optional
    reference : ForwardModel, optional
        The 3D model for the ratio correction (default: ``Model3D(layout)``, built on first
        use).
    """

    def __init__(self, layout: Layout, settings: Cartesian25DSettings | None = None,
                 reference: Any | None = None, **_: Any) -> None:
        self.layout = layout
        self.settings = settings or Cartesian25DSettings()
        self._reference = reference
        self._meshes: dict[tuple, tuple[Any, np.ndarray, dict[str, int]]] = {}

    @property
    def reference(self) -> Any:
        """The 3D model of the ratio correction (built on first use)."""
        if self._reference is None:
            self._reference = Model3D(self.layout)
        return self._reference

    def uncorrected(self) -> Cartesian25DModel:
        """The same section without the ratio correction (shares the meshes; a registry model)."""
        if not self.settings.ratio_correction:
            return self
        bare = Cartesian25DModel(self.layout, replace(self.settings, ratio_correction=False),
                                 self._reference)
        bare._meshes = self._meshes
        return bare

    # ------------------------------------------------------------------ geometry
    def axis_y_m(self) -> float:
        """Height of the tunnel axis in the pyGIMLi mesh (surface at y = 0), m."""
        cover = self.layout.tunnel.cover_m
        if math.isinf(cover):
            cover = self.settings.deep_cover_m
        return -(self.layout.machine.radius_m + cover)

    def projected_positions(self, face_chainage_m: float, cutterhead_deg: float = 0.0
                            ) -> dict[str, np.ndarray | None]:
        """Electrode positions on the section (ahead, z), m; None for poles at infinity."""
        R = self.layout.machine.radius_m
        L = self.layout.machine.shield_length_m
        off = self.settings.electrode_offset_m
        out: dict[str, np.ndarray | None] = {}
        pos = self.layout.positions_machine(face_chainage_m, cutterhead_deg)
        for e in self.layout.electrodes:
            p = pos[e.label]
            if e.kind == "machine":
                out[e.label] = np.array([-0.5 * L, 0.0])
                continue
            if p is None:
                out[e.label] = None
                continue
            x, z = float(p[0]), float(p[2])
            if -L - 1e-9 <= x <= 1e-9 and abs(z) < R and self.layout.machine.model_body:
                if e.on_steel:
                    z = math.copysign(R, z if z != 0 else 1.0)
                else:
                    z = math.copysign(R + off, z if z != 0 else 1.0)
            out[e.label] = np.array([x, z])
        return out

    def _mesh(self, face_chainage_m: float, cutterhead_deg: float):  # noqa: ANN202
        proj = self.projected_positions(face_chainage_m, cutterhead_deg)
        key = tuple(sorted((k, tuple(np.round(v, 6))) for k, v in proj.items() if v is not None))
        if key in self._meshes:
            return self._meshes[key]
        mt = pg.meshtools
        s = self.settings
        yc = self.axis_y_m()
        R = self.layout.machine.radius_m
        L = self.layout.machine.shield_length_m
        pts = np.array([v for v in proj.values() if v is not None])
        x0 = min(-L - 20.0, pts[:, 0].min() - 20.0) - s.domain_m
        x1 = max(20.0, pts[:, 0].max() + 20.0) + s.domain_m
        bottom = yc - s.domain_m
        world = mt.createWorld(start=[x0, bottom], end=[x1, 0.0], marker=GROUND,
                               worldMarker=True)
        plcs = [world]
        if self.layout.machine.model_body:
            plcs.append(mt.createRectangle(start=[-L, yc - R], end=[0.0, yc + R],
                                           marker=MACHINE, area=0.5))
        if self.layout.tunnel.model_cavity:
            tl = self.layout.tunnel.length_m
            tail = -L - (tl if math.isfinite(tl) else (-x0 - L - 1.0))
            tail = max(tail, x0 + 1.0)
            plcs.append(mt.createRectangle(start=[tail, yc - R], end=[-L, yc + R],
                                           marker=TUNNEL, area=2.0))
        plc = mt.mergePLC(plcs)
        index: dict[str, int] = {}
        sensors = []
        for label, v in proj.items():
            if v is None:
                continue
            xy = [float(v[0]), float(v[1] + yc)]
            if not (x0 < xy[0] < x1 and bottom < xy[1] < 0.0):
                raise ValueError(f"electrode {label!r} projects outside the section box")
            found = None
            for i, q in enumerate(sensors):
                if abs(q[0] - xy[0]) < 1e-6 and abs(q[1] - xy[1]) < 1e-6:
                    found = i
            if found is None:
                sensors.append(xy)
                found = len(sensors) - 1
                plc.createNode(xy, marker=-99)
                for dx, dy in ((s.refine_m, 0), (-s.refine_m, 0), (0, s.refine_m),
                               (0, -s.refine_m)):
                    plc.createNode([xy[0] + dx, min(xy[1] + dy, -1e-3)])
            index[label] = found
        mesh = mt.createMesh(plc, quality=s.quality, area=s.area_m2, smooth=[1, 10])
        out = (mesh, np.array(sensors), index)
        self._meshes[key] = out
        return out

    # ------------------------------------------------------------------ forward
    def _cell_resistivity(self, mesh: Any, scenario: Scenario, face: float) -> np.ndarray:
        yc = self.axis_y_m()
        c = np.array(mesh.cellCenters())
        marker = np.array(mesh.cellMarkers())
        rho = scenario.resistivity_machine(c[:, 0], 0.0, c[:, 1] - yc, face)
        rho = np.where(marker == MACHINE, self.layout.machine.body_resistivity_ohmm, rho)
        rho = np.where(marker == TUNNEL, self.layout.tunnel.lining_resistivity_ohmm, rho)
        return rho

    def response_uncorrected(self, scenario: Scenario, face_chainage_m: float,
                             cutterhead_deg: float = 0.0,
                             measurements: Quadrupoles | None = None) -> np.ndarray:
        """2.5D transfer resistances without the ratio correction, ohm."""
        mesh, sensors, index = self._mesh(face_chainage_m, cutterhead_deg)
        quads = as_measurements(self.layout, measurements)
        data = ert_data_container(
            sensors, [[index.get(lab, -1) if lab is not None else -1 for lab in q.labels()]
                      for q in quads])
        fop = ert.ERTModelling(sr=False, verbose=False)
        configure_operator(fop)
        fop.setData(data)
        fop.setMesh(mesh, ignoreRegionManager=True)
        rho = self._cell_resistivity(mesh, scenario, face_chainage_m)
        resp = fop.response(pg.Vector(rho))
        out = np.array(resp, dtype=float)
        if out.size != len(quads) or not np.any(out):
            raise RuntimeError("pyGIMLi 2.5D response is empty or all zero")
        return out

    def ratio(self, face_chainage_m: float, cutterhead_deg: float = 0.0,
              measurements: Quadrupoles | None = None) -> np.ndarray:
        """Ratio correction R_3D / R_2.5D of homogeneous ground for this face (1, cached)."""
        return cartesian_ratio(self, face_chainage_m, cutterhead_deg, measurements)

    def response(self, scenario: Scenario, face_chainage_m: float, cutterhead_deg: float = 0.0,
                 measurements: Quadrupoles | None = None) -> np.ndarray:
        """Transfer resistances of ``measurements`` (default the protocol), ratio-corrected, ohm.

        The ratio correction applies when ``settings.ratio_correction`` is set.
        """
        r = self.response_uncorrected(scenario, face_chainage_m, cutterhead_deg, measurements)
        if self.settings.ratio_correction:
            r = r * self.ratio(face_chainage_m, cutterhead_deg, measurements)
        return r


__all__ = ["Cartesian25DModel", "Cartesian25DSettings", "GROUND", "MACHINE", "TUNNEL"]
