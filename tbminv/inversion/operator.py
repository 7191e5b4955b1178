"""The axisymmetric model as a :class:`pygimli.Modelling` on a coarse parameter grid.

Parameters are the resistivities (ohm-m) of the cells of a tensor grid of the ground in the
(ahead, radius) half-plane, machine and bore cells removed; every forward ground cell takes the
value of the parameter cell containing it. The response is the protocol's transfer resistances
(optionally scaled per reading, e.g. by geometric factors to apparent resistivities), the
Jacobian is the adjoint Jacobian of :mod:`tbminv.axisym` summed over the forward cells of each
parameter. pyGIMLi's :class:`pygimli.Inversion` applies its log transforms on top.
"""


from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp

from tbminv.forward.axisym.layout import AxisymLayoutSolver
from tbminv.gimli import pg
from tbminv.inversion.grid import ParameterGrid
from tbminv.inversion.settings import InversionError
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)


@dataclass
class AxisymParameterGrid:
    """Parameter cells of the ground on a tensor grid in (ahead, radius).

    Attributes
    ----------
    x_edges, r_edges : numpy.ndarray
        Grid lines, m (machine frame); they follow forward-mesh lines.
    keep : numpy.ndarray of bool
        Full-grid cells that are ground (the parameters), pyGIMLi cell order.
    mesh : pygimli.Mesh
        Parameter mesh (ground cells only).
    mapping : scipy.sparse.csr_matrix
        (n_forward_ground_cells, n_param) 0/1 matrix: forward value = mapping @ parameters.
    """

    x_edges: np.ndarray
    r_edges: np.ndarray
    keep: np.ndarray
    mesh: Any
    mapping: sp.csr_matrix

    @property
    def n_param(self) -> int:
        """Number of parameters."""
        return int(self.mapping.shape[1])


def _snap(edges: Sequence[float], lines: np.ndarray, avoid: Sequence[float],
          required: Sequence[float]) -> np.ndarray:
    """Snap edges to forward lines, moving any that fall on an electrode line."""
    out = set()
    avoid_a = np.asarray(list(avoid), float)
    for e in list(edges) + list(required):
        i = int(np.argmin(np.abs(lines - e)))
        if e not in required and avoid_a.size and np.min(np.abs(avoid_a - lines[i])) < 1e-9:
            i = min(len(lines) - 1, i + 1)  # the next line outward
        out.add(float(lines[i]))
    for e in required:
        i = int(np.argmin(np.abs(lines - e)))
        out.add(float(lines[i]))
    return np.array(sorted(out))


def build_parameter_grid(model: AxisymLayoutSolver, x_edges: Sequence[float],
                         r_edges: Sequence[float]) -> AxisymParameterGrid:
    """Parameter grid of the ground for an axisymmetric layout model.

    Parameters
    ----------
    model : AxisymLayoutSolver
    x_edges, r_edges : sequence of float
        Wanted grid lines, m (machine frame). They are snapped to forward-mesh lines, the
        domain ends and the machine and bore edges are added, and lines through an electrode
        are moved to the next forward line (the singularity removal needs one resistivity
        around each electrode).

    Returns
    -------
    AxisymParameterGrid
    """
    fw = model.forward
    cm = fw.mesh
    geo = fw.geometry
    req_x = [cm.x[0], cm.x[-1], 0.0]
    req_r = [0.0, cm.r[-1]]
    if geo.has_machine:
        req_x.append(-geo.shield_length_m)
        req_r.append(float(geo.machine_radius_m))
    bore = geo.bore_radius_m
    if bore is not None:
        req_r.append(bore)
        end = -geo.shield_length_m - geo.tunnel_length_m
        if np.isfinite(end) and end > cm.x[0]:
            req_x.append(end)
    pts = [e for e in fw.electrodes.values() if e.is_point]
    xs = _snap(x_edges, cm.x, [e.x_m for e in pts], req_x)
    rs = _snap(r_edges, cm.r, [e.r_m for e in pts], req_r)
    grid = pg.createGrid(xs, rs)
    nxc = len(xs) - 1
    centers = fw.ground_centers()
    ix = np.clip(np.searchsorted(xs, centers[:, 0]) - 1, 0, nxc - 1)
    ir = np.clip(np.searchsorted(rs, centers[:, 1]) - 1, 0, len(rs) - 2)
    full = ir * nxc + ix
    keep = np.zeros(nxc * (len(rs) - 1), bool)
    keep[full] = True
    index = np.full(keep.size, -1)
    index[keep] = np.arange(int(keep.sum()))
    p = index[full]
    mapping = sp.csr_matrix((np.ones(p.size), (np.arange(p.size), p)),
                            shape=(p.size, int(keep.sum())))
    mesh = grid.createSubMesh(grid.cells([int(i) for i in np.nonzero(keep)[0]]))
    return AxisymParameterGrid(xs, rs, keep, mesh, mapping)


class ImageModelling(pg.Modelling):
    """pyGIMLi forward operator of the axisymmetric model on a parameter grid.

    Parameters
    ----------
    model : AxisymLayoutSolver
        The layout model (mesh and protocol).
    grid : AxisymParameterGrid
        Parameter cells.
    cutterhead_deg : float, optional
        Cutterhead angle of the readings, degrees (default: the model's).
    scale : numpy.ndarray, optional
        Factor per reading (e.g. geometric factors in m: apparent resistivity); default 1.
    select : numpy.ndarray of int, optional
        Readings of the protocol used (default: all).

    Notes
    -----
    ``response(model)`` returns ``scale * R`` in ohm (or ohm-m with geometric factors);
    ``createJacobian(model)`` fills d response / d rho (pyGIMLi's log transforms apply on top).
    The Jacobian matrix is allocated once and filled in place.
    """

    def __init__(self, model: AxisymLayoutSolver, grid: AxisymParameterGrid,
                 cutterhead_deg: float | None = None, scale: np.ndarray | None = None,
                 select: np.ndarray | None = None) -> None:
        super().__init__()
        self.model = model
        self.grid = grid
        self.cutterhead_deg = cutterhead_deg
        n = len(model.measurements)
        self.select = np.arange(n) if select is None else np.asarray(select, int)
        self.scale = np.ones(self.select.size) if scale is None else np.asarray(scale, float)
        if self.scale.shape != self.select.shape:
            raise ValueError("scale must have one value per selected reading")
        self.setMesh(grid.mesh)
        self._jac = pg.Matrix(int(self.select.size), grid.n_param)
        self.setJacobian(self._jac)
        self.n_response = 0
        self.n_jacobian = 0

    def forward_resistivity(self, model: Any) -> np.ndarray:
        """Forward ground-cell resistivities of a parameter vector, ohm-m."""
        m = np.asarray(model, float)
        if m.shape != (self.grid.n_param,):
            raise ValueError(f"expected {self.grid.n_param} parameters, got {m.shape}")
        return self.grid.mapping @ m

    def response(self, model: Any) -> Any:
        """Scaled transfer resistances of the selected readings."""
        self.n_response += 1
        r = self.model.response(self.forward_resistivity(model), self.cutterhead_deg)
        return pg.Vector(self.scale * r[self.select])

    def createJacobian(self, model: Any) -> None:  # noqa: N802 - pyGIMLi's name
        """Fill the Jacobian d(scale R)/d rho of the parameters."""
        self.n_jacobian += 1
        m = np.asarray(model, float)
        _, jc = self.model.jacobian(self.forward_resistivity(m), self.cutterhead_deg)
        jp = np.asarray(jc[self.select] @ self.grid.mapping)  # d R / d ln rho_param
        jj = jp * self.scale[:, None] / m[None, :]
        for i in range(jj.shape[0]):
            self._jac[i] = pg.Vector(jj[i])


class DriveOperator:
    """Forward operator on the parameter grid for one set of electrode positions.

    Wraps the axisymmetric layout model: ``rho_fwd = P rho_param`` (each forward ground cell
    takes the value of the parameter cell that contains it), transfer resistances of the
    protocol, and their Jacobian mapped to the parameters.
    """

    def __init__(self, layout: Layout, grid: ParameterGrid, face_chainage_m: float,
                 cutterhead_deg: float, model: Any) -> None:
        self.layout = layout
        self.grid = grid
        self.face_chainage_m = face_chainage_m
        self.cutterhead_deg = cutterhead_deg
        from tbminv.forward.axisym.layout import AxisymLayoutSolver

        # an instance of our own: filling a scenario moves grid lines of a shared model
        # the forward mesh carries every parameter-grid line (with the parameter cell size as
        # its local spacing), so that each parameter cell is a union of forward cells
        self.fwd = AxisymLayoutSolver(layout, cutterhead_deg, face_chainage_m,
                                getattr(model, "settings", None),
                                extra_x=_keypoints(grid.x_nodes),
                                extra_r=_keypoints(grid.r_nodes)[1:])
        c = self.fwd.forward.ground_centers()
        p = grid.locate(c[:, 0], c[:, 1])
        if np.any(p < 0):
            raise InversionError(f"{int((p < 0).sum())} forward ground cells lie outside the "
                                 "parameter grid: enlarge the parameter domain")
        self.P = sp.csr_matrix((np.ones(p.size), (np.arange(p.size), p)),
                               shape=(p.size, grid.n_param))
        empty = np.asarray(self.P.sum(axis=0)).ravel() == 0
        if empty.any():
            raise InversionError(f"{int(empty.sum())} parameter cells hold no forward cell; "
                                 "the forward mesh must follow the parameter grid")
        self.n_calls = 0

    def response(self, rho_param: np.ndarray, cutterhead_deg: float | None = None) -> np.ndarray:
        """Transfer resistances of the protocol, ohm."""
        self.n_calls += 1
        return self.fwd.response(self.P @ np.asarray(rho_param, float),
                                 self.cutterhead_deg if cutterhead_deg is None
                                 else cutterhead_deg)

    def jacobian(self, rho_param: np.ndarray, cutterhead_deg: float | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
        """R (nq,) in ohm and dR/d ln(rho_param) (nq, n_param)."""
        r, j = self.fwd.jacobian(self.P @ np.asarray(rho_param, float),
                                 self.cutterhead_deg if cutterhead_deg is None
                                 else cutterhead_deg)
        return r, np.asarray(sp.csr_matrix(j).dot(self.P).toarray()
                             if sp.issparse(j) else j @ self.P)


def _keypoints(nodes: np.ndarray) -> list[tuple[float, float]]:
    """Grid lines as mesh key points (coordinate, local spacing = smaller adjacent cell)."""
    d = np.diff(nodes)
    h = np.minimum(np.r_[d[0], d], np.r_[d, d[-1]])
    return [(float(x), float(hh)) for x, hh in zip(nodes, h)]


def make_pg_modelling(op: DriveOperator, sel: np.ndarray, k: np.ndarray,
                      cutterhead_deg: float) -> Any:
    """A :class:`pygimli.Modelling` of apparent resistivities ``k R`` of readings ``sel``."""
    from tbminv.inversion.operator import AxisymParameterGrid, ImageModelling

    grid = AxisymParameterGrid(op.grid.x_nodes, op.grid.r_nodes, op.grid.keep, op.grid.mesh,
                               op.P)
    return ImageModelling(op.fwd, grid, cutterhead_deg=cutterhead_deg, scale=k, select=sel)


__all__ = ["AxisymParameterGrid", "build_parameter_grid", "ImageModelling", "DriveOperator",
           "make_pg_modelling"]
