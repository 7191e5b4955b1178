"""3D sensitivity of readings to a small body off the axis, from the axisymmetric background.

For a ground that is axisymmetric about the tunnel axis (the background), the field of a unit
current at electrode ``s`` is ``u = sum_m u_m(x, r) cos(m (phi - theta_s))`` and the adjoint
field of potential electrode ``k`` is ``v = sum_n v_n(x, r) cos(n (phi - theta_k))``
(:meth:`tbminv.forward.axisym.solver.AxisymSolver.harmonic_fields`; the adjoint is solved with
the same floating steel, so the steel constraint holds for both). The change of the potential
``V_sk`` for a change of conductivity ``d sigma`` anywhere in 3D is, to first order,

    dV_sk = - int d sigma  grad u . grad v  dV

(the adjoint / reciprocity sensitivity of resistivity methods; Geselowitz 1971, IEEE Trans.
Biomed. Eng. 18(1):38-41; McGillivray & Oldenburg 1990, Geophys. Prospecting 38:499-524),
with, in cylindrical coordinates,
``grad u . grad v = u_x v_x + u_r v_r + (1 / r^2) u_phi v_phi``. No 3D mesh is needed: the
harmonics are summed at the point's bearing. A transfer resistance is the signed sum of its
source-receiver terms; every reading is evaluated at its own cutterhead angle (the tools'
bearings turn with the head, shield and wall electrodes stay).

:class:`BodySensitivity` returns the **density** ``g = dR / d ln(sigma)`` per unit volume
(ohm / m^3) at points (ahead of the face, radius, bearing). A small body of volume ``V`` and
log-conductivity change ``dln sigma`` changes a reading by ``g V dln sigma``; a sphere of
conductivity ``sigma_1`` in ground ``sigma_0`` by ``g V 3 (sigma_1 - sigma_0) / (sigma_1 +
2 sigma_0)`` (the field inside a sphere in a uniform field, Telford, Geldart & Sheriff 1990,
*Applied Geophysics*, 2nd ed., sec. 8.3, from memory): that product is the body's **moment**
(m^3, positive for a conductive body).

Bearings are clockwise from the crown looking ahead (the layout's angle convention). Points must
lie ahead of the face and away from the electrodes (the fields are singular there); the
harmonic count ``m_max`` must grow as points approach ring electrodes (about
``3.5 r / s`` for a point at distance ``s`` in the (x, r) plane from an electrode at radius
``r``).
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

import numpy as np

from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.forward.axisym.layout import AxisymLayoutSolver
from tbminv.forward.axisym.mesh import CylMeshSettings

_LOG = logging.getLogger(__name__)

#: Model settings for the densities: the default mesh with spacing at most 0.1 x the distance
#: from the face centre (gradients within 1-5 % of the full-space closed form 1-6 m ahead,
#: ``tests/inversion/test_bodysens.py``).
BODY_SETTINGS = AxisymSettings(mesh=CylMeshSettings(h_max_fraction=0.1))

Quad = tuple[str | None, str | None, str | None, str | None]


class BodySensitivity:
    """Harmonic 3D sensitivity of a set of quadrupoles in an axisymmetric background.

    Parameters
    ----------
    layout : tbminv.layout.Layout
    measurements : sequence of (a, b, m, n) labels or Measurement
        The quadrupoles (each reading refers to one of them by index).
    face_chainage_m : float
        Face chainage of the advance, m (for electrodes fixed in the ground).
    background_ohmm : float or numpy.ndarray
        Homogeneous background resistivity, ohm-m, or the resistivity of every ground cell of
        the model's mesh (an axisymmetric image on this mesh).
    settings : AxisymSettings, optional
        Axisymmetric model settings (default :data:`BODY_SETTINGS`).
    m_max : int
        Highest azimuthal harmonic of the fields.
    ahead_max_m, radius_max_m : float, optional
        Extent of the region where densities can be asked for, m (default 4 and 2 diameters).
    """

    def __init__(self, layout: Any, measurements: Sequence[Any], face_chainage_m: float,
                 background_ohmm: float | np.ndarray, settings: AxisymSettings | None = None,
                 m_max: int = 24, ahead_max_m: float | None = None,
                 radius_max_m: float | None = None) -> None:
        self.layout = layout
        self.face_chainage_m = float(face_chainage_m)
        self.m_max = int(m_max)
        diam = 2.0 * float(layout.machine.radius_m)
        self.model = AxisymLayoutSolver(layout, 0.0, face_chainage_m,
                                        settings or BODY_SETTINGS,
                                        measurements=list(measurements))
        fw = self.model.forward
        n_g = len(fw.ground_cells)
        if np.ndim(background_ohmm) == 0:
            self.rho_ground = np.full(n_g, float(background_ohmm))
        else:
            self.rho_ground = np.asarray(background_ohmm, float)
        cm = fw.mesh
        self._x, self._r = cm.x.copy(), cm.r.copy()
        x_hi = ahead_max_m if ahead_max_m is not None else 4.0 * diam
        r_hi = radius_max_m if radius_max_m is not None else 2.0 * diam
        ix = np.nonzero((self._x >= 0.0) & (self._x <= x_hi))[0]
        ir = np.nonzero(self._r <= r_hi)[0]
        ix = np.arange(max(ix[0] - 1, 0), min(ix[-1] + 2, cm.nx))
        ir = np.arange(0, min(ir[-1] + 2, cm.nr))
        self._ix_lo, self._ix_hi = int(ix[0]), int(ix[-1])
        self._ir_hi = int(ir[-1])
        nodes = cm.node_id(ix[None, :], ir[:, None]).ravel()
        self._local = np.full(cm.n_nodes, -1)
        self._local[nodes] = np.arange(nodes.size)
        u, v = fw.harmonic_fields(self.rho_ground, self.m_max, nodes)
        # nodal gradients by second-order differences on the graded grid (np.gradient), then
        # interpolated like the values: far more accurate than the bilinear cells' own slopes
        xs, rs = self._x[ix], self._r[ir]
        self._fields = []
        for f in (u, v):
            g = f.reshape(f.shape[0], ir.size, ix.size, f.shape[2])
            self._fields.append((f, np.gradient(g, xs, axis=2).reshape(f.shape),
                                 np.gradient(g, rs, axis=1).reshape(f.shape)))
        sig = fw.cell_conductivity(self.rho_ground)
        self._sigma_cells = sig
        self._solution = fw.solve(self.rho_ground)
        self.terms = self.model.terms

    # ------------------------------------------------------------------ angles
    def _bearings(self, cutterhead_deg: float) -> tuple[np.ndarray, np.ndarray]:
        """Bearings (rad) of the sources and receivers at a cutterhead angle."""
        cyl = self.layout.positions_cylindrical(self.face_chainage_m, float(cutterhead_deg))
        fw = self.model.forward

        def ang(lab: str) -> float:
            c = cyl.get(lab)
            return 0.0 if c is None else float(np.radians(c[2]))

        return (np.array([ang(e.label) for e in fw.sources]),
                np.array([ang(e.label) for e in fw.receivers]))

    def background_response(self, cutterhead_deg: float) -> np.ndarray:
        """Transfer resistances of every quadrupole in the background at an angle, ohm."""
        cyl = self.layout.positions_cylindrical(self.face_chainage_m, float(cutterhead_deg))
        theta = {k: v[2] for k, v in cyl.items() if v is not None}
        return self.model.transfer(self._solution.potentials(theta))

    # ------------------------------------------------------------------ density
    def _point_harmonics(self, points: np.ndarray) -> tuple[np.ndarray, ...]:
        """Harmonic values and (x, r) gradients of all fields at points (bilinear cells)."""
        x, r = self._x, self._r
        px, pr = points[:, 0], points[:, 1]
        i = np.clip(np.searchsorted(x, px, side="right") - 1, 0, len(x) - 2)
        j = np.clip(np.searchsorted(r, pr, side="right") - 1, 0, len(r) - 2)
        if (np.any(i < self._ix_lo) or np.any(i + 1 > self._ix_hi) or np.any(j + 1 > self._ir_hi)
                or np.any(px < 0.0)):
            raise ValueError("a point lies outside the sensitivity region (ahead of the face, "
                             "within ahead_max_m and radius_max_m)")
        t = (px - x[i]) / (x[i + 1] - x[i])
        s = (pr - r[j]) / (r[j + 1] - r[j])
        nx = len(x)
        n00 = j * nx + i
        corners = np.stack([n00, n00 + 1, n00 + nx, n00 + nx + 1], axis=1)
        loc = self._local[corners]
        if np.any(loc < 0):
            raise ValueError("a point lies outside the sensitivity region")
        sh = np.stack([(1 - t) * (1 - s), t * (1 - s), (1 - t) * s, t * s], axis=1)
        out = []
        for f, fx, fr in self._fields:
            out.append(tuple(np.einsum("mpcn,pc->mpn", g[:, loc, :], sh) for g in (f, fx, fr)))
        cells = j * (nx - 1) + i
        return (*out[0], *out[1], self._sigma_cells[cells])

    def density(self, measurement_index: Sequence[int], cutterhead_deg: Sequence[float],
                points: np.ndarray) -> np.ndarray:
        """``dR / d ln(sigma)`` per unit volume of every reading at every point, ohm/m^3.

        Parameters
        ----------
        measurement_index : sequence of int
            Quadrupole of each reading (index into ``measurements``).
        cutterhead_deg : sequence of float
            Cutterhead angle of each reading, degrees.
        points : numpy.ndarray
            (P, 3): ahead of the cutterhead face (m), radius from the axis (m), bearing
            (degrees, clockwise from the crown looking ahead).

        Returns
        -------
        numpy.ndarray
            (n_readings, P), ohm/m^3.
        """
        pts = np.atleast_2d(np.asarray(points, float))
        qi = np.asarray(measurement_index, int)
        ang = np.asarray(cutterhead_deg, float)
        if qi.shape != ang.shape:
            raise ValueError("measurement_index and cutterhead_deg differ in length")
        us, usx, usr, vs, vsx, vsr, sig = self._point_harmonics(pts)
        phi = np.radians(pts[:, 2])
        rr = np.maximum(pts[:, 1], 1e-9)
        m = np.arange(self.m_max + 1)[:, None, None]
        fw = self.model.forward
        out = np.zeros((qi.size, pts.shape[0]))
        for a in np.unique(ang):
            th_s, th_k = self._bearings(a)
            cs = np.cos(m * (phi[None, :, None] - th_s[None, None, :]))  # (M+1, P, n_s)
            ss = -m * np.sin(m * (phi[None, :, None] - th_s[None, None, :]))
            ck = np.cos(m * (phi[None, :, None] - th_k[None, None, :]))
            sk = -m * np.sin(m * (phi[None, :, None] - th_k[None, None, :]))
            u = [np.sum(f * cs, axis=0) for f in (usx, usr)] + [np.sum(us * ss, axis=0)]
            v = [np.sum(f * ck, axis=0) for f in (vsx, vsr)] + [np.sum(vs * sk, axis=0)]
            rows = np.nonzero(ang == a)[0]
            cache: dict[tuple[int, int], np.ndarray] = {}
            for row in rows:
                acc = np.zeros(pts.shape[0])
                for sg, s_lab, k_lab in self.terms[qi[row]]:
                    key = (fw.source_index[s_lab], fw.receiver_index[k_lab])
                    if key not in cache:
                        js, jk = key
                        cache[key] = (u[0][:, js] * v[0][:, jk] + u[1][:, js] * v[1][:, jk]
                                      + u[2][:, js] * v[2][:, jk] / rr ** 2)
                    acc += sg * cache[key]
                out[row] = -sig * acc
        return out


def cylindrical_to_machine(points: np.ndarray) -> np.ndarray:
    """(ahead, radius, bearing deg) -> machine-frame (ahead, y, z), m (layout convention)."""
    p = np.atleast_2d(np.asarray(points, float))
    t = np.radians(p[:, 2])
    return np.stack([p[:, 0], -p[:, 1] * np.sin(t), p[:, 1] * np.cos(t)], axis=1)


def machine_to_cylindrical(points: np.ndarray) -> np.ndarray:
    """Machine-frame (ahead, y, z) -> (ahead, radius, bearing deg in [0, 360))."""
    p = np.atleast_2d(np.asarray(points, float))
    r = np.hypot(p[:, 1], p[:, 2])
    b = np.degrees(np.arctan2(-p[:, 1], p[:, 2])) % 360.0
    return np.stack([p[:, 0], r, b], axis=1)


__all__ = ["BODY_SETTINGS", "BodySensitivity", "cylindrical_to_machine", "machine_to_cylindrical"]
