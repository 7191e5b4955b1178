"""Tunnel-aware 3D tetrahedral meshes in the machine frame (tetgen through our own PLC writer).

The mesh lives in the machine frame (DEVELOPERS.md, "Conventions"): ``x`` = ahead of the cutterhead
face (0 at the face, negative behind), ``y`` to the left, ``z`` up, 0 on the tunnel axis. It holds

* a box of ground (``ground``): ``±box_m`` ahead/behind, sideways and down; the top is the ground
  surface at ``z = radius + cover_m`` for a finite cover (homogeneous Neumann), else ``+box_m``.
  Outer faces other than the surface carry pyGIMLi's mixed (Robin) boundary marker;
* the machine as a prismatic cylinder of ``n_segments`` sides, radius ``D/2``: ``cutterhead``
  (the front ``cutterhead_thickness_m``) and ``shield`` (back to ``-shield_length_m``), both steel;
* the tunnel behind the shield tail (``tunnel``), same radius, ``length_m`` long or to the box;
* optional planes ``x = const`` square to the axis (contacts) honoured as internal facets;
* every electrode as a mesh node, with a small cluster of refinement nodes around it, plus
  graded refinement along the steel near the face and along the axis ahead of it.

Regions are addressed by name (:data:`REGIONS`); marker numbers are private to this module. The
cylinder is a polygon inscribed in the circle of radius ``D/2`` (the vertices lie on the circle).

Meshes are cached in ``tbminv.cache.cache_dir("mesh3d")`` under a SHA-256 key of every input
(geometry, electrode node positions, planes, settings, format version): the mesh in pyGIMLi's
binary ``.bms`` format and a JSON sidecar with the electrode node indices, both written
atomically (the sidecar last; an entry counts only when both exist). Nothing is pickled.

The boundary list of the mesh holds only the outer faces (the redundant internal faces tetgen
writes are left out), which keeps pyGIMLi's copies of the mesh cheap.
"""

from __future__ import annotations

import json
import logging
import math
import os
import shutil
import subprocess
import tempfile
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from tbminv.cache import atomic_path, atomic_write_text, cache_dir, cache_key
from tbminv.forward.grading import graded_nodes
from tbminv.gimli import pg

_LOG = logging.getLogger(__name__)

MESH_FORMAT = 4
"""Version of the mesh recipe; part of every cache key."""

REGIONS: tuple[str, ...] = ("ground", "cutterhead", "shield", "tunnel")
"""Region names of a 3D mesh."""

_MARKER = {"ground": 1, "cutterhead": 2, "shield": 3, "tunnel": 4}
_STEEL = ("cutterhead", "shield")
_B_MIXED = -2  # pyGIMLi: mixed (Robin) outer boundary
_B_NEUMANN = -1  # pyGIMLi: homogeneous Neumann (ground surface)


class MeshError(RuntimeError):
    """Mesh generation failed (tetgen missing or refusing the geometry)."""


@dataclass(frozen=True)
class MeshSettings:
    """Knobs of the 3D mesh.

    Attributes
    ----------
    box_m : float
        Half size of the ground box, m (grown to hold far electrodes with margin).
    n_segments : int
        Sides of the polygon approximating the machine/tunnel circle.
    quality : float
        Tetgen radius-edge ratio bound (``-q``); smaller gives better shaped, more cells.
    electrode_size_m : float
        Spacing of the refinement nodes around each electrode, m.
    face_size_m : float
        Axial spacing of rings on the steel next to the face and of the nodes ahead, m.
    growth : float
        Growth factor of the refinement spacing away from the face.
    refine_ahead_m : float
        Axial refinement nodes are placed up to this distance ahead of the face, m.
    clearance_m : float
        Distance of insulated electrodes from the steel / tunnel wall when the layout puts them
        on it or inside it, m ("a few cm into the ground").
    max_volume_m3 : float
        Largest tetrahedron volume anywhere, m³ (0: no bound).
    """

    box_m: float = 200.0
    n_segments: int = 16
    quality: float = 1.3
    electrode_size_m: float = 0.1
    face_size_m: float = 0.5
    growth: float = 1.5
    refine_ahead_m: float = 30.0
    clearance_m: float = 0.05
    max_volume_m3: float = 0.0


@dataclass(frozen=True)
class TunnelGeometry:
    """Plain-number geometry of machine and tunnel (machine frame), m.

    ``shield_length_m`` is from the face to the shield tail; ``tunnel_length_m`` from the tail
    back (``inf``: to the box); ``cover_m`` crown to surface (``inf``: full space).
    """

    radius_m: float
    shield_length_m: float
    cutterhead_thickness_m: float
    model_body: bool = True
    model_cavity: bool = True
    tunnel_length_m: float = math.inf
    cover_m: float = math.inf

    @classmethod
    def from_layout(cls, layout: Any) -> TunnelGeometry:
        """Geometry of a :class:`tbminv.layout.Layout`."""
        m, t = layout.machine, layout.tunnel
        return cls(radius_m=m.radius_m, shield_length_m=m.shield_length_m,
                   cutterhead_thickness_m=m.cutterhead_thickness_m, model_body=m.model_body,
                   model_cavity=t.model_cavity, tunnel_length_m=t.length_m, cover_m=t.cover_m)


@dataclass
class TunnelMesh:
    """A meshed machine-frame model.

    Attributes
    ----------
    mesh : pygimli.Mesh
        P1 tetrahedral mesh (cell markers private; use :meth:`region_mask`).
    electrode_nodes : dict
        label -> node index, or None for a pole at infinity.
    geometry, settings : TunnelGeometry, MeshSettings
    planes_m : tuple of float
        Honoured planes ``x = const`` (machine frame), m.
    key : str
        Cache key of the inputs.
    steel_node : int or None
        A node inside the steel (kind ``machine`` electrodes inject here), None without body.
    """

    mesh: Any
    electrode_nodes: dict[str, int | None]
    geometry: TunnelGeometry
    settings: MeshSettings
    planes_m: tuple[float, ...] = ()
    key: str = ""
    steel_node: int | None = None
    _p2: Any = field(default=None, repr=False)

    def region_mask(self, name: str) -> np.ndarray:
        """Boolean mask over cells of region ``name`` (one of :data:`REGIONS`)."""
        if name not in _MARKER:
            raise KeyError(f"unknown region {name!r}; regions are {', '.join(REGIONS)}")
        return np.asarray(self.mesh.cellMarkers()) == _MARKER[name]

    def regions_present(self) -> list[str]:
        """Names of the regions that have cells."""
        mk = set(np.unique(np.asarray(self.mesh.cellMarkers())).tolist())
        return [r for r in REGIONS if _MARKER[r] in mk]

    def steel_mask(self) -> np.ndarray:
        """Cells of the machine (cutterhead and shield)."""
        return self.region_mask("cutterhead") | self.region_mask("shield")

    def cell_centers(self) -> np.ndarray:
        """Cell centres (n_cells, 3), m."""
        return np.asarray(self.mesh.cellCenters())

    def node_positions(self) -> np.ndarray:
        """Node positions (n_nodes, 3), m."""
        return np.asarray(self.mesh.positions())

    def p2(self) -> Any:
        """The quadratic (P2) version of the mesh (P1 nodes keep their indices), cached."""
        if self._p2 is None:
            self._p2 = self.mesh.createP2()
        return self._p2


# --------------------------------------------------------------------------- PLC assembly
class _PLC:
    """A piecewise-linear complex for tetgen: nodes, multi-polygon facets, region points."""

    def __init__(self) -> None:
        self.nodes: list[tuple[float, float, float]] = []
        self._index: dict[tuple[int, int, int], int] = {}
        self.facets: list[tuple[list[list[int]], int]] = []
        self.regions: list[tuple[tuple[float, float, float], int, float]] = []

    def node(self, p: Any) -> int:
        q = (float(p[0]), float(p[1]), float(p[2]))
        k = (round(q[0] * 1e6), round(q[1] * 1e6), round(q[2] * 1e6))
        if k not in self._index:
            self._index[k] = len(self.nodes)
            self.nodes.append(q)
        return self._index[k]

    def facet(self, polygons: list[list[int]], marker: int = 0) -> None:
        self.facets.append((polygons, marker))

    def region(self, p: Any, marker: int, max_volume: float = -1.0) -> None:
        self.regions.append(((float(p[0]), float(p[1]), float(p[2])), marker, max_volume))

    def write(self, path: Path) -> None:
        out = [f"{len(self.nodes)} 3 0 0"]
        out += [f"{i} {x!r} {y!r} {z!r}" for i, (x, y, z) in enumerate(self.nodes)]
        out.append(f"{len(self.facets)} 1")
        for polys, marker in self.facets:
            out.append(f"{len(polys)} 0 {marker}")
            for poly in polys:
                out.append(f"{len(poly)} " + " ".join(str(i) for i in poly))
        out.append("0")
        out.append(f"{len(self.regions)}")
        for i, ((x, y, z), mk, vol) in enumerate(self.regions):
            out.append(f"{i} {x!r} {y!r} {z!r} {mk} {vol!r}")
        path.write_text("\n".join(out) + "\n")


def _ring(plc: _PLC, x: float, radius: float, n: int) -> list[int]:
    t = 2 * np.pi * np.arange(n) / n
    return [plc.node((x, -radius * math.sin(a), radius * math.cos(a))) for a in t]


def _cylinder_intervals(g: TunnelGeometry, x_end: float) -> list[tuple[float, float, str]]:
    """Axial intervals (x0 < x1) of the cylinder with their region names (ground excluded)."""
    out = []
    if g.model_cavity and x_end < -g.shield_length_m:
        out.append((x_end, -g.shield_length_m, "tunnel"))
    if g.model_body:
        out.append((-g.shield_length_m, -g.cutterhead_thickness_m, "shield"))
        out.append((-g.cutterhead_thickness_m, 0.0, "cutterhead"))
    return out


def _graded(start: float, first: float, growth: float, stop: float) -> list[float]:
    """Offsets start+first, +first*growth, ... up to stop (exclusive)."""
    return graded_nodes(start, stop, first, growth, end="open")[1:].tolist()


def _build_plc(g: TunnelGeometry, points: dict[str, np.ndarray], planes: tuple[float, ...],
               s: MeshSettings, box: float, refine: np.ndarray | None = None) -> _PLC:
    plc = _PLC()
    R, n = g.radius_m, s.n_segments
    ztop = R + g.cover_m if math.isfinite(g.cover_m) else box
    x0, x1, y0, y1, z0 = -box, box, -box, box, -box
    x_end = max(-g.shield_length_m - g.tunnel_length_m, x0)
    intervals = _cylinder_intervals(g, x_end)
    planes = tuple(sorted(p for p in planes if x0 + 1e-3 < p < x1 - 1e-3))

    def region_at(x: float) -> str:
        for a, b, name in intervals:
            if a < x < b:
                return name
        return "ground"

    # ring stations on the cylinder: region changes, planes inside it, graded face refinement
    stations: set[float] = set()
    for a, b, _ in intervals:
        stations.update((a, b))
    cyl_lo = min((a for a, _, _ in intervals), default=None)
    cyl_hi = max((b for _, b, _ in intervals), default=None)
    extra: list[float] = []
    if intervals:
        for p in planes:
            if cyl_lo < p < cyl_hi:
                stations.add(p)
        # graded rings behind the front of the cylinder (steel edges are current hot spots)
        extra = [cyl_hi - d for d in _graded(0.0, s.face_size_m, s.growth, cyl_hi - cyl_lo)]
        for e in extra:
            if all(abs(e - q) > 0.3 * s.face_size_m for q in stations):
                stations.add(e)
    st = sorted(stations)
    rings = {x: _ring(plc, x, R, n) for x in st}
    # side faces of the cylinder, split at every station inside a modelled interval
    for a, b in zip(st[:-1], st[1:]):
        if region_at(0.5 * (a + b)) == "ground":
            continue
        ra, rb = rings[a], rings[b]
        for i in range(n):
            j = (i + 1) % n
            plc.facet([[ra[i], ra[j], rb[j], rb[i]]])
    # box cross-sections: the planes, split box sides into strips
    xs = [x0, *planes, x1]

    def rect(x: float) -> list[int]:
        return [plc.node((x, y0, z0)), plc.node((x, y1, z0)), plc.node((x, y1, ztop)),
                plc.node((x, y0, ztop))]

    for i, x in enumerate(xs):
        polys = [rect(x)]
        marker = _B_MIXED if i in (0, len(xs) - 1) else 0
        if x in rings:
            polys.append(rings[x])
        elif intervals and cyl_lo < x < cyl_hi and region_at(x) != "ground":
            polys.append(_ring(plc, x, R, n))  # not expected: planes are stations
        plc.facet(polys, marker)
    for a, b in zip(xs[:-1], xs[1:]):
        ra, rb = rect(a), rect(b)
        plc.facet([[ra[0], ra[1], rb[1], rb[0]]], _B_MIXED)  # bottom z0
        plc.facet([[ra[1], ra[2], rb[2], rb[1]]], _B_MIXED)  # side y1
        top = _B_NEUMANN if math.isfinite(g.cover_m) else _B_MIXED
        plc.facet([[ra[2], ra[3], rb[3], rb[2]]], top)  # top
        plc.facet([[ra[3], ra[0], rb[0], rb[3]]], _B_MIXED)  # side y0
        # ground region point of this slab, far from the cylinder
        plc.region((0.5 * (a + b), 0.5 * (y0 + y1) + 0.45 * box, 0.5 * (z0 - R)),
                   _MARKER["ground"])
    # disks where the region changes along the cylinder (and not already a box section)
    for x in st:
        if x in xs:
            continue
        left, right = region_at(x - 1e-6), region_at(x + 1e-6)
        if left != right:
            plc.facet([rings[x]])
    for a, b in zip(st[:-1], st[1:]):
        name = region_at(0.5 * (a + b))
        if name != "ground":
            plc.region((0.5 * (a + b), 0.0, 0.31 * R), _MARKER[name])

    # refinement nodes: graded along the axis ahead of the face, and around every electrode
    facet_x = set(st) | set(xs)
    ahead = [0.0, *_graded(0.0, s.face_size_m, s.growth, s.refine_ahead_m)]
    for d in ahead[1:]:
        if d < x1 and all(abs(d - q) > 0.2 * s.face_size_m for q in facet_x):
            plc.node((d, 0.0, 0.0))
            for k in range(4):
                a = 0.5 * np.pi * k
                rr = min(0.5 * R, d)
                plc.node((d, -rr * math.sin(a), rr * math.cos(a)))
    h = s.electrode_size_m
    for p in points.values():
        plc.node(p)
    for p in points.values():
        for scale in (1.0, 3.0):
            for ax in range(3):
                for sign in (-1.0, 1.0):
                    q = np.array(p, float)
                    q[ax] += sign * scale * h
                    if _near_facet(q, g, st, xs, R, n, box, ztop, 0.3 * h):
                        continue
                    plc.node(q)
    if refine is not None:   # refinement nodes of bodies (off facets and out of the cylinder)
        for q in np.asarray(refine, float).reshape(-1, 3):
            if _near_facet(q, g, st, xs, R, n, box, ztop, 0.3 * h):
                continue
            if st and st[0] <= q[0] <= st[-1] and math.hypot(q[1], q[2]) < R + 0.3 * h:
                continue
            plc.node(q)
    return plc


def _near_facet(q: np.ndarray, g: TunnelGeometry, stations: list[float], xs: list[float],
                R: float, n: int, box: float, ztop: float, tol: float) -> bool:
    """True if ``q`` is outside the box or within ``tol`` of a facet (refinement nodes skip it)."""
    x, y, z = q
    if not (-box + tol < x < box - tol and -box + tol < y < box - tol
            and -box + tol < z < ztop - tol):
        return True
    if any(abs(x - p) < tol for p in xs):
        return True
    r = math.hypot(y, z)
    inside_span = stations and stations[0] - tol <= x <= stations[-1] + tol
    if inside_span:
        if abs(r - R) < tol + R * (1 - math.cos(math.pi / n)):
            return True
        if r < R + tol and any(abs(x - p) < tol for p in stations):
            return True
    return False


# --------------------------------------------------------------------------- tetgen I/O
def _tetgen() -> str:
    exe = os.environ.get("TBMINV_TETGEN") or shutil.which("tetgen")
    if not exe:
        raise MeshError("tetgen not found on PATH (Debian package 'tetgen'); set TBMINV_TETGEN "
                        "to its path")
    return exe


def _run_tetgen(plc: _PLC, s: MeshSettings) -> Any:
    with tempfile.TemporaryDirectory(prefix="tbminv-tetgen-") as tmp:
        poly = Path(tmp) / "model.poly"
        plc.write(poly)
        switches = f"-pq{s.quality}AazQ"
        if s.max_volume_m3 > 0:
            switches += f"a{s.max_volume_m3}"
        proc = subprocess.run([_tetgen(), switches, str(poly)], capture_output=True, text=True,
                              cwd=tmp)
        base = Path(tmp) / "model.1"
        if proc.returncode != 0 or not Path(str(base) + ".ele").exists():
            raise MeshError(f"tetgen failed (exit {proc.returncode}) on {len(plc.nodes)} nodes, "
                            f"{len(plc.facets)} facets: {proc.stdout[-800:]} {proc.stderr[-800:]}")
        return _read_tetgen(base)


def _read_tetgen(base: Path) -> Any:
    nodes = np.loadtxt(str(base) + ".node", skiprows=1, comments="#", ndmin=2)
    ele = np.loadtxt(str(base) + ".ele", skiprows=1, comments="#", ndmin=2)
    faces = np.loadtxt(str(base) + ".face", skiprows=1, comments="#", ndmin=2)
    mesh = pg.Mesh(3)
    for p in nodes[:, 1:4]:
        mesh.createNode(pg.Pos(*p))
    cells = ele[:, 1:5].astype(int)
    markers = ele[:, 5].astype(int) if ele.shape[1] > 5 else np.full(len(ele), 1)
    markers[markers == 0] = _MARKER["ground"]
    for c, mk in zip(cells, markers):
        mesh.createCell([int(i) for i in c], marker=int(mk))
    if faces.shape[1] > 4:
        outer = faces[faces[:, 4] < 0]
        for f in outer:
            mesh.createBoundary([int(f[1]), int(f[2]), int(f[3])], marker=int(f[4]))
    return mesh


# --------------------------------------------------------------------------- public API
def polygon_radius(radius_m: float, n_segments: int, angle_rad: float) -> float:
    """Distance from the axis to the inscribed cylinder polygon at an angle (from the crown)."""
    seg = 2.0 * math.pi / n_segments
    off = (angle_rad % seg) - 0.5 * seg
    return radius_m * math.cos(0.5 * seg) / math.cos(off)


def electrode_points(layout: Any, face_chainage_m: float | None = None,
                     cutterhead_deg: float = 0.0, clearance_m: float = 0.05,
                     n_segments: int = 16
                     ) -> tuple[dict[str, np.ndarray | None], np.ndarray | None]:
    """Mesh-node positions of the layout's electrodes in the machine frame.

    Insulated electrodes beside a modelled steel / tunnel cylinder keep their gap to its wall
    (``radius_m - D/2``, at least ``clearance_m``), measured from the mesh's inscribed polygon
    at their angle: readings next to the steel depend on that gap far more than on the exact
    radius (a 16-sided polygon lies up to 2 % of the radius inside the circle). Cutterhead
    electrodes on or behind the face are moved ``clearance_m`` ahead of it.

    Electrodes on the steel (bare, or kind ``machine``) are placed inside the steel:
    a bare one at its own axial position and angle at 70 % of the radius, kind ``machine`` on the
    axis at mid-shield. Without the body they stay where the layout puts them (kind ``machine``
    then has no meaning and raises ValueError).

    Returns
    -------
    points : dict
        label -> (3,) position, m, or None for a pole at infinity.
    steel : ndarray or None
        The node inside the steel used for kind ``machine``, None without body.
    """
    g = TunnelGeometry.from_layout(layout)
    R, ls, t = g.radius_m, g.shield_length_m, g.cutterhead_thickness_m
    pos = layout.positions_machine(cutterhead_deg=cutterhead_deg,
                                   face_chainage_m=face_chainage_m)
    steel = np.array([-0.5 * ls, 0.0, 0.0]) if g.model_body else None
    x_tail = -ls - g.tunnel_length_m
    out: dict[str, np.ndarray | None] = {}
    for e in layout.electrodes:
        p = pos[e.label]
        if e.kind == "machine":
            if steel is None:
                raise ValueError(f"{layout.source}: electrode {e.label!r} of kind 'machine' needs "
                                 "the body (machine.model_body = true)")
            out[e.label] = steel.copy()
            continue
        if p is None:
            out[e.label] = None
            continue
        p = np.array(p, float)
        r = math.hypot(p[1], p[2])
        ang = math.atan2(-p[1], p[2])
        if e.on_steel and g.model_body:
            x = min(max(p[0], -ls + 0.25 * t), -0.5 * t)
            rr = 0.7 * R
            out[e.label] = np.array([x, -rr * math.sin(ang), rr * math.cos(ang)])
            continue
        body_span = g.model_body and -ls <= p[0] <= 0.0
        tunnel_span = g.model_cavity and x_tail <= p[0] <= -ls
        if (body_span or tunnel_span) and e.kind == "cutterhead" and g.model_body \
                and r < R - clearance_m:
            p[0] = clearance_m
            _LOG.info("electrode %s moved %.3f m ahead of the face", e.label, clearance_m)
        elif body_span or tunnel_span:
            # keep the electrode's gap to the wall: measured from the polygon at its angle
            gap = max(r - R, clearance_m)
            rr = polygon_radius(R, n_segments, ang) + gap
            if abs(rr - r) > 1e-9:
                _LOG.debug("electrode %s at %.3f m from the axis (gap %.3f m to the wall)",
                           e.label, rr, gap)
            p[1], p[2] = -rr * math.sin(ang), rr * math.cos(ang)
        elif g.model_body and 0.0 <= p[0] < clearance_m and r < R + clearance_m:
            p[0] = clearance_m
        out[e.label] = p
    return out, steel


def build_mesh(geometry: TunnelGeometry, points: dict[str, np.ndarray | None],
               settings: MeshSettings | None = None, planes_m: tuple[float, ...] = (),
               steel_point: np.ndarray | None = None, use_cache: bool = True,
               refine_points_m: np.ndarray | None = None) -> TunnelMesh:
    """Mesh a machine/tunnel geometry with the given electrode nodes (cached).

    Parameters
    ----------
    geometry : TunnelGeometry
        Machine and tunnel, m.
    points : dict
        label -> node position (machine frame, m) or None (a pole at infinity: no node).
    settings : MeshSettings, optional
    planes_m : tuple of float
        Planes ``x = const`` (machine frame, m) honoured as internal facets (contacts square to
        the axis).
    steel_point : ndarray, optional
        A node to place inside the steel (current into the whole machine).
    use_cache : bool
        Read/write the mesh cache.
    refine_points_m : ndarray (n, 3), optional
        More mesh nodes (machine frame, m), e.g. on and in a body of the ground
        (:func:`body_refinement_points`); those near a facet or inside the cylinder are skipped.

    Returns
    -------
    TunnelMesh
    """
    s = settings or MeshSettings()
    refine = (None if refine_points_m is None or len(refine_points_m) == 0
              else np.round(np.asarray(refine_points_m, float).reshape(-1, 3), 6))
    pts = {k: np.round(np.asarray(v, float), 9) for k, v in points.items() if v is not None}
    if steel_point is not None:
        pts["__steel__"] = np.round(np.asarray(steel_point, float), 9)
    far = max((float(np.max(np.abs(v))) for v in pts.values()), default=0.0)
    box = max(s.box_m, 1.5 * far)
    planes = tuple(sorted({round(float(p), 9) for p in planes_m}))
    if "__steel__" in pts:  # the steel node is arbitrary: keep it off the planes
        sp0 = pts["__steel__"].copy()
        sp = sp0.copy()
        while any(abs(sp[0] - p) < 0.05 for p in planes):
            sp[0] -= 0.1
        for k, v in pts.items():  # kind-machine electrodes share the steel node
            if np.array_equal(v, sp0):
                pts[k] = sp.copy()
    moved = []
    for p in planes:  # tetgen refuses a vertex on a facet: nudge the plane off electrodes
        q = p
        while any(abs(v[0] - q) < 0.01 for v in pts.values()):
            q += 0.02
        if q != p:
            _LOG.warning("plane x = %.3f m moved to %.3f m: an electrode sits on it", p, q)
        moved.append(round(q, 9))
    planes = tuple(sorted(set(moved)))
    key_items = {"format": MESH_FORMAT, "geometry": asdict(geometry),
                 "settings": asdict(s), "points": {k: v for k, v in sorted(pts.items())},
                 "planes": planes, "box": box}
    if refine is not None:   # absent without bodies: earlier cache entries stay valid
        key_items["refine"] = refine.tolist()
    key = cache_key(key_items)
    folder = cache_dir("mesh3d")
    bms, side = folder / f"{key}.bms", folder / f"{key}.json"
    mesh = None
    if use_cache and bms.exists() and side.exists():
        try:
            mesh = pg.Mesh(3)
            mesh.load(str(bms), False)  # no neighbour infos: keeps only the outer faces
            nodes = json.loads(side.read_text())["nodes"]
            _LOG.debug("mesh %s from cache", key[:12])
        except Exception as exc:  # a damaged entry is rebuilt, never trusted
            _LOG.warning("mesh cache entry %s unreadable (%s); rebuilding", bms, exc)
            mesh = None
    if mesh is None:
        plc = _build_plc(geometry, pts, planes, s, box, refine)
        mesh = _run_tetgen(plc, s)
        xyz = np.asarray(mesh.positions())
        nodes = {}
        for k, v in pts.items():
            d = np.linalg.norm(xyz - v, axis=1)
            i = int(np.argmin(d))
            if d[i] > 1e-6:
                raise MeshError(f"electrode {k!r} at {v.tolist()} is not a mesh node "
                                f"(nearest {d[i]:.3g} m away)")
            nodes[k] = i
        if use_cache:
            with atomic_path(bms) as tmp:
                mesh.save(str(tmp))
            atomic_write_text(side, json.dumps({"nodes": nodes, "key": key}))
        _LOG.info("3D mesh: %d nodes, %d cells, %d outer faces", mesh.nodeCount(),
                  mesh.cellCount(), mesh.boundaryCount())
    steel_node = nodes.pop("__steel__", None)
    enodes: dict[str, int | None] = {k: nodes.get(k) for k in points}
    return TunnelMesh(mesh=mesh, electrode_nodes=enodes, geometry=geometry, settings=s,
                      planes_m=planes, key=key, steel_node=steel_node)


def layout_mesh(layout: Any, face_chainage_m: float | None = None, cutterhead_deg: float = 0.0,
                settings: MeshSettings | None = None, planes_m: tuple[float, ...] = (),
                use_cache: bool = True, refine_points_m: np.ndarray | None = None
                ) -> TunnelMesh:
    """Mesh of a :class:`tbminv.layout.Layout` at a face chainage and cutterhead angle.

    ``face_chainage_m`` is needed when the layout has electrodes fixed in the ground (wall,
    ground-fixed remote). ``planes_m`` are contact planes square to the axis, machine frame;
    ``refine_points_m`` more nodes (machine frame, see :func:`build_mesh`).
    """
    s = settings or MeshSettings()
    points, steel = electrode_points(layout, face_chainage_m, cutterhead_deg, s.clearance_m,
                                     s.n_segments)
    return build_mesh(TunnelGeometry.from_layout(layout), points, s, planes_m, steel, use_cache,
                      refine_points_m)


def body_refinement_points(centre_m: np.ndarray, radius_m: float, size_m: float
                           ) -> np.ndarray:
    """Mesh nodes that resolve a sphere: shells at ``radius -+ 0.15 size`` and a lattice inside.

    Cells are filled by their centres (:func:`tbminv.forward.fem3d.model.cell_resistivity`), so
    the body's surface is resolved to about ``size_m``.

    Parameters
    ----------
    centre_m : array (3,)
        Centre, m (machine frame).
    radius_m : float
        Radius, m.
    size_m : float
        Node spacing, m.

    Returns
    -------
    ndarray (n, 3)
        Node positions, m.
    """
    c = np.asarray(centre_m, float)
    h = float(size_m)
    out = []
    for rr in (radius_m - 0.15 * h, radius_m + 0.15 * h):
        if rr <= 0:
            continue
        k = max(12, int(math.ceil(4.0 * math.pi * rr * rr / (h * h))))
        i = np.arange(k) + 0.5   # Fibonacci sphere: near-uniform points
        phi = np.arccos(1.0 - 2.0 * i / k)
        th = math.pi * (1.0 + 5.0 ** 0.5) * i
        out.append(c + rr * np.column_stack([np.cos(phi), np.sin(phi) * np.cos(th),
                                             np.sin(phi) * np.sin(th)]))
    g = np.arange(-radius_m + h, radius_m - h + 1e-9, h)
    if g.size:
        gx, gy, gz = np.meshgrid(g, g, g, indexing="ij")
        pts = np.column_stack([gx.ravel(), gy.ravel(), gz.ravel()])
        out.append(c + pts[np.linalg.norm(pts, axis=1) < radius_m - h])
    return np.vstack(out) if out else np.zeros((0, 3))


__all__ = ["REGIONS", "MeshError", "MeshSettings", "TunnelGeometry", "TunnelMesh",
           "body_refinement_points", "build_mesh", "electrode_points", "layout_mesh",
           "polygon_radius"]
