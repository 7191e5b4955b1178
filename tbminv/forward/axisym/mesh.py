"""Graded tensor-product mesh of the (axial, radius) half-plane for the axisymmetric model.

The mesh is a pyGIMLi grid (:func:`pygimli.createGrid`) of quadrilaterals in the machine frame:
first coordinate ``x`` = ahead (0 at the cutterhead face, negative behind it), second
coordinate ``r`` = distance from the tunnel axis (``r >= 0``). Grid lines pass through every
electrode (so electrodes are nodes) and along the machine and tunnel edges, with a fine spacing
there and a geometric growth away from them. Cells carry a region by name (``ground``,
``machine``, ``tunnel``; markers in :data:`REGION_MARKERS`). Outer boundaries (front, back,
outer radius) are marked for a mixed (Robin) far-field condition; the axis ``r = 0`` is a
symmetry line (natural condition for harmonic 0, zero potential for harmonics >= 1).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np

from tbminv.forward.grading import graded_nodes
from tbminv.gimli import pg

_LOG = logging.getLogger(__name__)

#: Cell markers of the regions.
REGION_MARKERS: dict[str, int] = {"ground": 1, "machine": 2, "tunnel": 3}
#: Boundary marker of the far-field (mixed / Robin) boundaries (pyGIMLi's convention).
FARFIELD_MARKER = -2
#: Boundary marker of the axis r = 0.
AXIS_MARKER = 0


@dataclass(frozen=True)
class CylMeshSettings:
    """How the (axial, radius) mesh is graded.

    Attributes
    ----------
    h_fine_m : float
        Node spacing at electrodes and at machine / tunnel edges, m.
    growth : float
        Growth of the spacing per cell away from those lines (about the ratio of neighbouring
        cells).
    domain_m : float
        Minimum distance from the machine face to the front, back and outer boundaries, m.
        The domain grows to at least twice the farthest electrode.
    h_max_fraction : float
        Spacing never exceeds this fraction of the distance to the face centre (keeps the far
        field resolved), m/m.
    """

    h_fine_m: float = 0.05
    growth: float = 1.2
    domain_m: float = 1500.0
    h_max_fraction: float = 0.25


@dataclass(frozen=True)
class CylGeometry:
    """Fixed structures of the axisymmetric model (machine frame, m).

    Attributes
    ----------
    machine_radius_m : float or None
        Radius of the steel cylinder (None: no machine).
    shield_length_m : float
        Steel from ``x = 0`` back to ``x = -shield_length_m``.
    tunnel_length_m : float
        Tunnel bore behind the shield tail, radius ``machine_radius_m`` (0: none; inf: to the
        model edge).
    tunnel_radius_m : float or None
        Radius of the bore (defaults to the machine radius).
    """

    machine_radius_m: float | None = None
    shield_length_m: float = 0.0
    tunnel_length_m: float = 0.0
    tunnel_radius_m: float | None = None

    @property
    def has_machine(self) -> bool:
        """True if a steel body is modelled."""
        return self.machine_radius_m is not None and self.shield_length_m > 0

    @property
    def bore_radius_m(self) -> float | None:
        """Radius of the tunnel bore, m (None without a tunnel)."""
        if self.tunnel_length_m <= 0:
            return None
        return self.tunnel_radius_m if self.tunnel_radius_m is not None else \
            self.machine_radius_m


def graded_axis(key_points: Iterable[float | tuple[float, float]], lo: float, hi: float,
                h_fine: float, growth: float, h_max_fraction: float = 0.25,
                min_cells: int = 2) -> np.ndarray:
    """Node coordinates on [lo, hi] through every key point, fine there and graded away.

    Parameters
    ----------
    key_points : iterable of float or (float, float)
        Coordinates that must be nodes, m; a pair ``(t, h)`` gives its own spacing ``h``
        (default ``h_fine``).
    lo, hi : float
        Ends of the axis (also nodes, not refined), m.
    h_fine : float
        Default spacing at the key points, m.
    growth : float
        Spacing grows by about this factor per cell away from the key points.
    h_max_fraction : float
        Upper bound of the spacing as a fraction of ``max(|t|, 4 m)``, m/m.
    min_cells : int
        At least this many cells between two neighbouring key points (keeps an electrode off
        the cells of a neighbouring structure).

    Returns
    -------
    numpy.ndarray
        Increasing node coordinates, m.
    """
    pairs = []
    for k in key_points:
        t, h = (k if isinstance(k, tuple) else (k, h_fine))
        if lo < t < hi:
            pairs.append((float(t), float(h)))
    pairs.sort()
    kt: list[float] = []
    kh: list[float] = []
    for t, h in pairs:  # merge key points closer than 1 micrometre
        if kt and t - kt[-1] <= 1e-6:
            kh[-1] = min(kh[-1], h)
            continue
        kt.append(t)
        kh.append(h)
    kt_a, kh_a = np.asarray(kt), np.asarray(kh)

    def spacing(t: float) -> float:
        cap = h_max_fraction * max(abs(t), 4.0)
        if len(kt_a) == 0:
            return max(h_fine, cap)
        h = float(np.min(kh_a + (growth - 1.0) * np.abs(t - kt_a)))
        return max(h_fine, min(h, cap))

    ends = [lo, *kt, hi]
    nodes = [lo]
    for a, b in zip(ends[:-1], ends[1:]):
        nodes.extend(graded_nodes(a, b, spacing, end="fit", min_cells=min_cells)[1:])
    out = np.asarray(nodes)
    out[-1] = hi
    return out


@dataclass
class CylMesh:
    """A tensor-product mesh of the (x, r) half-plane with named regions.

    Attributes
    ----------
    x, r : numpy.ndarray
        Node coordinates along the axis (ahead, m) and in radius (m).
    mesh : pygimli.Mesh
        The same grid as a pyGIMLi mesh (cell markers = :data:`REGION_MARKERS`).
    region : numpy.ndarray of str
        Region name per cell (pyGIMLi cell order: x fastest).
    geometry : CylGeometry
        The structures the mesh was built for.
    """

    x: np.ndarray
    r: np.ndarray
    mesh: object
    region: np.ndarray
    geometry: CylGeometry = field(default_factory=CylGeometry)

    @property
    def nx(self) -> int:
        """Number of nodes along x."""
        return len(self.x)

    @property
    def nr(self) -> int:
        """Number of nodes along r."""
        return len(self.r)

    @property
    def n_nodes(self) -> int:
        """Number of nodes."""
        return self.nx * self.nr

    @property
    def n_cells(self) -> int:
        """Number of cells."""
        return (self.nx - 1) * (self.nr - 1)

    def node_id(self, ix: np.ndarray | int, ir: np.ndarray | int) -> np.ndarray | int:
        """Node index of grid position (ix, ir) (pyGIMLi order)."""
        return np.asarray(ir) * self.nx + np.asarray(ix)

    def cell_ij(self) -> tuple[np.ndarray, np.ndarray]:
        """Grid indices (i along x, j along r) of every cell, pyGIMLi cell order."""
        j, i = np.divmod(np.arange(self.n_cells), self.nx - 1)
        return i, j

    def cell_nodes(self) -> np.ndarray:
        """Node indices of every cell, (n_cells, 4), order (i,j), (i+1,j), (i,j+1), (i+1,j+1)."""
        i, j = self.cell_ij()
        n00 = j * self.nx + i
        return np.stack([n00, n00 + 1, n00 + self.nx, n00 + self.nx + 1], axis=1)

    def cell_centers(self) -> np.ndarray:
        """Cell centres (n_cells, 2): (x, r), m."""
        i, j = self.cell_ij()
        return np.stack([0.5 * (self.x[i] + self.x[i + 1]), 0.5 * (self.r[j] + self.r[j + 1])],
                        axis=1)

    def locate(self, x: float, r: float, tol: float = 1e-6) -> int:
        """Index of the node at (x, r).

        Raises
        ------
        ValueError
            If no node lies within ``tol`` of the point.
        """
        ix = int(np.argmin(np.abs(self.x - x)))
        ir = int(np.argmin(np.abs(self.r - r)))
        if abs(self.x[ix] - x) > tol or abs(self.r[ir] - r) > tol:
            raise ValueError(f"no mesh node at (x={x} m, r={r} m): nearest "
                             f"({self.x[ix]} m, {self.r[ir]} m); add the point as a key point")
        return int(self.node_id(ix, ir))

    def region_mask(self, name: str) -> np.ndarray:
        """Boolean mask of the cells of region ``name``."""
        if name not in REGION_MARKERS:
            raise KeyError(f"unknown region {name!r}; expected one of {sorted(REGION_MARKERS)}")
        return self.region == name


def build_cylmesh(points_xr: Sequence[tuple[float, float]], geometry: CylGeometry | None = None,
                  settings: CylMeshSettings | None = None,
                  extra_x: Sequence[float] = (), extra_r: Sequence[float] = ()) -> CylMesh:
    """Build the graded (x, r) mesh through electrode points and structure edges.

    Parameters
    ----------
    points_xr : sequence of (x, r)
        Electrode positions in the machine frame (ahead, radius), m; each becomes a node.
    geometry : CylGeometry, optional
        Machine and tunnel (default: none).
    settings : CylMeshSettings, optional
        Grading.
    extra_x, extra_r : sequence of float
        More grid lines (fine spacing there), m.

    Returns
    -------
    CylMesh
    """
    geo = geometry or CylGeometry()
    s = settings or CylMeshSettings()
    pts = np.asarray(points_xr, float).reshape(-1, 2)
    if np.any(pts[:, 1] < 0):
        raise ValueError("electrode radius must be >= 0")
    far = float(np.max(np.abs(pts))) if len(pts) else 0.0
    h0 = s.h_fine_m

    def h_at(x: float, r: float) -> float:  # electrodes far away need no fine spacing
        return max(h0, 0.02 * math.hypot(x, r))

    kx: list[float | tuple[float, float]] = [(x, h_at(x, r)) for x, r in pts]
    kr: list[float | tuple[float, float]] = [(r, h_at(x, r)) for x, r in pts]
    kx += list(extra_x)
    kr += list(extra_r)
    if geo.has_machine:
        kx += [0.0, -geo.shield_length_m, (-0.5 * geo.shield_length_m, 0.5)]
        kr += [float(geo.machine_radius_m)]
        far = max(far, geo.shield_length_m, float(geo.machine_radius_m))
    bore = geo.bore_radius_m
    if bore is not None:
        kr += [bore]
        if math.isfinite(geo.tunnel_length_m):
            kx += [(-geo.shield_length_m - geo.tunnel_length_m, 10 * h0)]
            far = max(far, geo.shield_length_m + geo.tunnel_length_m)
    edge = max(s.domain_m, 2.0 * far)
    x = graded_axis(kx, -edge, edge, h0, s.growth, s.h_max_fraction)
    r = graded_axis(kr, 0.0, edge, h0, s.growth, s.h_max_fraction)
    mesh = pg.createGrid(x, r)
    nx = len(x)
    ncell = (nx - 1) * (len(r) - 1)
    j, i = np.divmod(np.arange(ncell), nx - 1)
    xc = 0.5 * (x[i] + x[i + 1])
    rc = 0.5 * (r[j] + r[j + 1])
    region = np.full(ncell, "ground", dtype=object)
    if bore is not None:
        back = -geo.shield_length_m - geo.tunnel_length_m
        region[(xc < -geo.shield_length_m) & (xc > back) & (rc < bore)] = "tunnel"
    if geo.has_machine:
        region[(xc < 0.0) & (xc > -geo.shield_length_m) & (rc < geo.machine_radius_m)] = "machine"
    markers = np.array([REGION_MARKERS[n] for n in region], dtype=int)
    mesh.setCellMarkers(pg.IVector(markers.tolist()))
    for b in mesh.boundaries():
        if b.outside():
            c = b.center()
            b.setMarker(AXIS_MARKER if abs(c[1]) < 1e-12 else FARFIELD_MARKER)
    _LOG.debug("cylmesh: %d x %d nodes, domain +-%.0f m", nx, len(r), edge)
    return CylMesh(x=x, r=r, mesh=mesh, region=region.astype(str), geometry=geo)


__all__ = ["REGION_MARKERS", "FARFIELD_MARKER", "AXIS_MARKER", "CylMeshSettings", "CylGeometry",
           "CylMesh", "graded_axis", "build_cylmesh"]
