"""The inversion parameter grid: the ground as a tensor grid in (ahead, radius)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp

from tbminv.forward.grading import graded_nodes
from tbminv.gimli import pg
from tbminv.inversion.settings import InversionError, InversionSettings
from tbminv.layout import Layout


# ------------------------------------------------------------------------ parameter grid
def _graded(lo: float, hi: float, fine_lo: float, fine_hi: float, h: float,
            growth: float) -> np.ndarray:
    """Nodes from lo to hi: spacing h in [fine_lo, fine_hi], growing by ``growth`` outside."""
    inner = np.arange(fine_lo, fine_hi + 0.5 * h, h)
    inner[-1] = fine_hi
    right = graded_nodes(fine_hi, hi, h * growth, growth, end="cut")
    left = graded_nodes(fine_lo, lo, h * growth, growth, end="cut")
    nodes = np.concatenate([left[::-1], inner[1:-1], right])
    return np.unique(np.round(nodes, 9))


@dataclass
class ParameterGrid:
    """The ground as a tensor grid in (ahead, radius), with machine and bore cells removed.

    Attributes
    ----------
    x_nodes, r_nodes : ndarray
        Grid lines, m (machine frame).
    keep : ndarray of bool (n_cells of the full grid)
        True for ground cells (the parameters), in pyGIMLi cell order (x fastest).
    mesh : pygimli.Mesh
        The parameter mesh (ground cells only) for the regularisation.
    centers : ndarray (n_param, 2)
        (ahead, radius) of each parameter cell, m.
    volume_m3 : ndarray (n_param,)
        Volume of each cell's ring (2 pi r dA), m^3.
    """

    x_nodes: np.ndarray
    r_nodes: np.ndarray
    keep: np.ndarray
    mesh: Any
    centers: np.ndarray
    volume_m3: np.ndarray

    @property
    def n_param(self) -> int:
        """Number of parameters."""
        return int(self.keep.sum())

    def locate(self, x: np.ndarray, r: np.ndarray) -> np.ndarray:
        """Parameter index of points (-1 outside the ground grid)."""
        ix = np.clip(np.searchsorted(self.x_nodes, x, side="right") - 1, 0,
                     self.x_nodes.size - 2)
        ir = np.clip(np.searchsorted(self.r_nodes, r, side="right") - 1, 0,
                     self.r_nodes.size - 2)
        full = ir * (self.x_nodes.size - 1) + ix
        index = np.full(self.keep.size, -1)
        index[self.keep] = np.arange(self.n_param)
        out = index[full]
        outside = (x < self.x_nodes[0]) | (x > self.x_nodes[-1]) | (r > self.r_nodes[-1])
        out[outside] = -1
        return out

    def forward_mapping(self, centers: np.ndarray) -> sp.csr_matrix:
        """0/1 matrix taking parameters to forward cells: ``rho_forward = P @ rho_param``.

        Parameters
        ----------
        centers : ndarray (n_forward_ground_cells, 2)
            (ahead, radius) of the forward model's ground cells, m (machine frame).

        Returns
        -------
        scipy.sparse.csr_matrix
            Shape (n_forward_ground_cells, n_param); each forward cell takes the value of the
            parameter cell that contains its centre.

        Raises
        ------
        InversionError
            A forward cell lies outside the parameter grid, or a parameter cell holds no
            forward cell (the forward mesh must carry the parameter grid lines).
        """
        c = np.asarray(centers, float)
        p = self.locate(c[:, 0], c[:, 1])
        if np.any(p < 0):
            raise InversionError(f"{int((p < 0).sum())} forward ground cells lie outside the "
                                 "parameter grid: enlarge the parameter domain")
        mapping = sp.csr_matrix((np.ones(p.size), (np.arange(p.size), p)),
                                shape=(p.size, self.n_param))
        empty = np.asarray(mapping.sum(axis=0)).ravel() == 0
        if empty.any():
            raise InversionError(f"{int(empty.sum())} parameter cells hold no forward cell; "
                                 "the forward mesh must follow the parameter grid")
        return mapping


def build_parameter_grid(layout: Layout, settings: InversionSettings,
                         domain_m: float = 1500.0) -> ParameterGrid:
    """The parameter grid of a layout (see :class:`ParameterGrid`)."""
    d = layout.machine.diameter_m
    big_r = layout.machine.radius_m
    shield = layout.machine.shield_length_m
    h = settings.cell_m or d / 8.0
    ahead = settings.ahead_m or 5.0 * d
    behind = settings.behind_m or (shield + d)
    rmax = settings.radius_m or 2.5 * d
    x = _graded(-domain_m, domain_m, -behind, ahead, h, settings.growth)
    r = _graded(0.0, domain_m, 0.0, rmax, h, settings.growth)
    # follow the machine and bore edges exactly
    extra_x = [0.0]
    if layout.machine.model_body:
        extra_x.append(-shield)
    tl = layout.tunnel.length_m
    if layout.tunnel.model_cavity and math.isfinite(tl):
        extra_x.append(-shield - tl)
    x = np.unique(np.round(np.concatenate([x, extra_x]), 9))
    r = np.unique(np.round(np.concatenate([r, [big_r]]), 9))
    x = _merge_close(x, 0.3 * h, keep=extra_x)
    r = _merge_close(r, 0.3 * h, keep=[0.0, big_r])
    # keep grid lines off the electrodes that travel with the machine: the singularity removal
    # of the forward model needs one resistivity around each source
    cyl = [v for e, v in zip(layout.electrodes, _machine_positions(layout)) if v is not None]
    x = _avoid(x, [c[0] for c in cyl], 0.25 * h, required=extra_x)
    r = _avoid(r, [c[1] for c in cyl], 0.25 * h, required=[0.0, big_r])
    grid = pg.createGrid(x, r)
    xc = 0.5 * (x[:-1] + x[1:])
    rc = 0.5 * (r[:-1] + r[1:])
    cx, cr = np.meshgrid(xc, rc)          # (nr, nx): pyGIMLi cell order is x fastest
    cx, cr = cx.ravel(), cr.ravel()
    solid = np.zeros(cx.size, bool)
    if layout.machine.model_body:
        solid |= (cx > -shield) & (cx < 0.0) & (cr < big_r)
    if layout.tunnel.model_cavity:
        tail = -shield if layout.machine.model_body else 0.0
        end = tail - tl if math.isfinite(tl) else -np.inf
        solid |= (cx < tail) & (cx > end) & (cr < big_r)
    keep = ~solid
    idx = np.nonzero(keep)[0]
    mesh = grid.createSubMesh(grid.cells([int(i) for i in idx]))
    centers = np.column_stack([cx[keep], cr[keep]])
    dx = np.diff(x)[np.arange(cx.size) % xc.size]
    dr = np.diff(r)[np.arange(cx.size) // xc.size]
    vol = (2.0 * np.pi * cr * dx * dr)[keep]
    got = np.array(mesh.cellCenters())[:, :2]
    if not np.allclose(got, centers):
        raise RuntimeError("parameter mesh cell order differs from the grid order")
    return ParameterGrid(x, r, keep, mesh, centers, vol)


def _machine_positions(layout: Layout) -> list[tuple[float, float, float] | None]:
    out: list[tuple[float, float, float] | None] = []
    for e in layout.electrodes:
        if e.fixed_in_ground or e.at_infinity or e.kind == "machine" or e.on_steel:
            out.append(None)
        else:
            out.append(layout.positions_cylindrical(0.0, 0.0)[e.label])  # face 0 m, angle 0
    return out


def _avoid(nodes: np.ndarray, coords: Sequence[float], tol: float,
           required: Sequence[float]) -> np.ndarray:
    """Move grid lines that lie within ``tol`` of a coordinate to ``tol`` away from it."""
    req = set(np.round(required, 9))
    out = np.array(nodes, float)
    for c in coords:
        for i, v in enumerate(out):
            if abs(v - c) < tol and round(v, 9) not in req:
                out[i] = c - tol if v <= c else c + tol
    out = np.unique(np.round(out, 9))
    return out


def _merge_close(nodes: np.ndarray, tol: float, keep: Sequence[float]) -> np.ndarray:
    out: list[float] = []
    kept = set(np.round(keep, 9))
    for v in np.sort(nodes):
        if out and v - out[-1] < tol:
            if round(v, 9) in kept:
                out[-1] = v
            continue
        out.append(v)
    return np.array(out)


__all__ = ["ParameterGrid", "build_parameter_grid"]
