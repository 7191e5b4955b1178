"""The axisymmetric model as a :class:`pygimli.Modelling` on a coarse parameter grid.

Parameters are the resistivities (ohm-m) of the cells of the parameter grid
(:class:`tbminv.inversion.grid.ParameterGrid`: the ground in the (ahead, radius) half-plane,
machine and bore cells removed); every forward ground cell takes the value of the parameter cell
containing it (:meth:`ParameterGrid.forward_mapping`). The response is the protocol's transfer
resistances (optionally scaled per reading, e.g. by geometric factors to apparent
resistivities), each reading at its own cutterhead angle (all angles from one solve per
harmonic), the Jacobian is the adjoint Jacobian of :mod:`tbminv.forward.axisym.solver`
summed over the forward cells of each parameter. pyGIMLi's :class:`pygimli.Inversion` applies
its log transforms on top.
"""


from __future__ import annotations

import logging
from typing import Any

import numpy as np
import scipy.sparse as sp

from tbminv.forward.axisym.layout import AxisymLayoutSolver
from tbminv.gimli import pg
from tbminv.inversion.grid import ParameterGrid
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)


class ImageModelling(pg.Modelling):
    """pyGIMLi forward operator of the axisymmetric model on a parameter grid.

    Parameters
    ----------
    model : AxisymLayoutSolver
        The layout model (mesh and protocol); its forward mesh should carry the grid lines
        (as :class:`DriveOperator` builds it), so that each parameter cell is a union of
        forward cells.
    grid : ParameterGrid
        Parameter cells.
    cutterhead_deg : float, optional
        Cutterhead angle of the readings, degrees (default: the model's); ignored with
        ``angles_deg``.
    scale : numpy.ndarray, optional
        Factor per reading (e.g. geometric factors in m: apparent resistivity); default 1.
    select : numpy.ndarray of int, optional
        Protocol quadrupole of each reading used (default: all, once).
    mapping : scipy.sparse.csr_matrix, optional
        Forward ground cells x parameters (default: ``grid.forward_mapping`` of the model's
        ground cells).
    angles_deg : sequence of float, optional
        Distinct cutterhead angles of the readings, degrees: one solve per harmonic serves
        them all (:meth:`AxisymLayoutSolver.responses`).
    angle_index : numpy.ndarray of int, optional
        Index into ``angles_deg`` of each reading (default: all at the first).

    Notes
    -----
    ``response(model)`` returns ``scale * R`` in ohm (or ohm-m with geometric factors);
    ``createJacobian(model)`` fills d response / d rho (pyGIMLi's log transforms apply on top).
    The Jacobian matrix is allocated once and filled in place.
    """

    def __init__(self, model: AxisymLayoutSolver, grid: ParameterGrid,
                 cutterhead_deg: float | None = None, scale: np.ndarray | None = None,
                 select: np.ndarray | None = None, mapping: sp.csr_matrix | None = None,
                 angles_deg: Any = None, angle_index: np.ndarray | None = None) -> None:
        super().__init__()
        self.model = model
        self.grid = grid
        self.mapping = (grid.forward_mapping(model.forward.ground_centers()) if mapping is None
                        else mapping)
        self.cutterhead_deg = cutterhead_deg
        n = len(model.measurements)
        self.select = np.arange(n) if select is None else np.asarray(select, int)
        self.scale = np.ones(self.select.size) if scale is None else np.asarray(scale, float)
        if self.scale.shape != self.select.shape:
            raise ValueError("scale must have one value per selected reading")
        self.angles_deg = None if angles_deg is None else [float(a) for a in angles_deg]
        self.angle_index = (np.zeros(self.select.size, int) if angle_index is None
                            else np.asarray(angle_index, int))
        if self.angle_index.shape != self.select.shape:
            raise ValueError("angle_index must have one value per selected reading")
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
        return self.mapping @ m

    def response(self, model: Any) -> Any:
        """Scaled transfer resistances of the selected readings."""
        self.n_response += 1
        rho = self.forward_resistivity(model)
        if self.angles_deg is None or len(self.angles_deg) == 1:
            ang = self.cutterhead_deg if self.angles_deg is None else self.angles_deg[0]
            r = self.model.response(rho, ang)
            return pg.Vector(self.scale * r[self.select])
        r = self.model.responses(rho, self.angles_deg)
        return pg.Vector(self.scale * r[self.angle_index, self.select])

    def createJacobian(self, model: Any) -> None:  # noqa: N802 - pyGIMLi's name
        """Fill the Jacobian d(scale R)/d rho of the parameters."""
        self.n_jacobian += 1
        m = np.asarray(model, float)
        rho = self.forward_resistivity(m)
        if self.angles_deg is None or len(self.angles_deg) == 1:
            ang = self.cutterhead_deg if self.angles_deg is None else self.angles_deg[0]
            _, jc = self.model.jacobian(rho, ang)
            jrows = jc[self.select]
        else:
            _, jcs = self.model.jacobians(rho, self.angles_deg)
            jrows = jcs[self.angle_index, self.select]
        jp = np.asarray(jrows @ self.mapping)  # d R / d ln rho_param
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
        # an instance of our own: filling a scenario moves grid lines of a shared model
        # the forward mesh carries every parameter-grid line (with the parameter cell size as
        # its local spacing), so that each parameter cell is a union of forward cells
        self.fwd = AxisymLayoutSolver(layout, cutterhead_deg, face_chainage_m,
                                getattr(model, "settings", None),
                                extra_x=_keypoints(grid.x_nodes),
                                extra_r=_keypoints(grid.r_nodes)[1:])
        self.P = grid.forward_mapping(self.fwd.forward.ground_centers())
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


    def responses(self, rho_param: np.ndarray, angles_deg: Any) -> np.ndarray:
        """Transfer resistances at several cutterhead angles (one solve), (n_angles, nq), ohm."""
        self.n_calls += 1
        return self.fwd.responses(self.P @ np.asarray(rho_param, float), list(angles_deg))

    def jacobians(self, rho_param: np.ndarray, angles_deg: Any
                  ) -> tuple[np.ndarray, np.ndarray]:
        """R (n_angles, nq), ohm, and dR/d ln(rho_param) (n_angles, nq, n_param)."""
        r, j = self.fwd.jacobians(self.P @ np.asarray(rho_param, float), list(angles_deg))
        jp = np.stack([np.asarray(sp.csr_matrix(ja).dot(self.P).toarray()
                                  if sp.issparse(ja) else ja @ self.P) for ja in j])
        return r, jp


def _keypoints(nodes: np.ndarray) -> list[tuple[float, float]]:
    """Grid lines as mesh key points (coordinate, local spacing = smaller adjacent cell)."""
    d = np.diff(nodes)
    h = np.minimum(np.r_[d[0], d], np.r_[d, d[-1]])
    return [(float(x), float(hh)) for x, hh in zip(nodes, h)]


def make_pg_modelling(op: DriveOperator, sel: np.ndarray, k: np.ndarray,
                      cutterhead_deg: float, angles_deg: Any = None,
                      angle_index: np.ndarray | None = None) -> Any:
    """A :class:`pygimli.Modelling` of apparent resistivities ``k R`` of readings ``sel``.

    ``sel`` holds each reading's protocol quadrupole; with ``angles_deg`` each reading is
    modelled at ``angles_deg[angle_index]`` (see :class:`ImageModelling`).
    """
    return ImageModelling(op.fwd, op.grid, cutterhead_deg=cutterhead_deg, scale=k, select=sel,
                          mapping=op.P, angles_deg=angles_deg, angle_index=angle_index)


class ReferencedModelling(pg.Modelling):
    """An image operator with reference values of some parameters appended as data.

    Prior information as data (Tarantola 2005, *Inverse Problem Theory*, SIAM, sec. 3.2): the
    response is the base operator's readings followed by the model values of the referenced
    parameters (ohm-m), whose Jacobian rows are unit rows; the inversion weighs them with
    their stated relative errors like readings.

    Parameters
    ----------
    base : ImageModelling
    index : numpy.ndarray of int
        Referenced parameters.
    """

    def __init__(self, base: ImageModelling, index: np.ndarray) -> None:
        super().__init__()
        self.base = base
        self.index = np.asarray(index, int)
        self.n_base = int(base.select.size)
        self.setMesh(base.grid.mesh)
        self._jac = pg.Matrix(self.n_base + self.index.size, base.grid.n_param)
        self.setJacobian(self._jac)

    def response(self, model: Any) -> Any:
        """Readings of the base operator, then the referenced model values."""
        r = np.asarray(self.base.response(model), float)
        return pg.Vector(np.concatenate([r, np.asarray(model, float)[self.index]]))

    def createJacobian(self, model: Any) -> None:  # noqa: N802 - pyGIMLi's name
        """The base Jacobian, then unit rows of the referenced parameters."""
        self.base.createJacobian(model)
        for i in range(self.n_base):
            self._jac[i] = self.base._jac[i]
        unit = np.zeros(self.base.grid.n_param)
        for j, p in enumerate(self.index):
            unit[:] = 0.0
            unit[p] = 1.0
            self._jac[self.n_base + j] = pg.Vector(unit)


__all__ = ["ImageModelling", "DriveOperator", "make_pg_modelling", "ReferencedModelling"]
