"""Surface factors of a whole drive from two 3D solves per block of faces.

The surface factor ``f = R_3D(hom, surface) / R_3D(hom, no surface)`` of a protocol quadrupole
(:func:`tbminv.forward.ratio.surface_factors`) depends on the face chainage only through the
electrodes fixed in the ground (wall electrodes, a remote fixed in the ground: the machine,
the bore and a surface parallel to the axis move with the face), and on the cutterhead angle
only through the insulated cutterhead electrodes (the surface is the only part of the geometry
that is not axisymmetric). Solving two 3D models for every face and every angle costs about
30 s a time on the demo layout; this module solves them once per **block** of faces instead:

* Every insulated cutterhead electrode is put into the mesh ``angle_nodes`` times, turned by
  ``k * 360 / angle_nodes`` degrees, and every electrode fixed in the ground is put in once per
  face node ``F_j = block start + j * face_step_m`` of the block, at the machine-frame position
  it has when the face is at ``F_j``. One 3D mesh (with surface) and its twin (without) then hold
  the homogeneous response of every quadrupole at every (angle node, face node) — superposition
  of unit-current potentials, as in :class:`tbminv.forward.fem3d.model.Forward3D`; extra
  current electrodes cost one back-substitution each.
* Between nodes ``f`` is interpolated: a periodic cubic spline over the angle and a cubic
  spline (not-a-knot) over the face (:class:`scipy.interpolate.CubicSpline`). Both are smooth
  functions there: the surface is at least a cover away, so its field near the machine varies
  on the scale of the cover, not of the electrode spacing.
* A layout with no electrode fixed in the ground needs one block for the whole drive; with no
  insulated cutterhead electrode, one angle node.

The accuracy against per-face, per-angle 3D factors is measured in
``bench/bench_surface_table.py`` (``bench/results/surface_table.json``). Tables are cached in
memory and in ``tbminv.cache.cache_dir("surface_table")`` (JSON, atomic), keyed by the layout,
the 3D settings, the resistivity, the node spacing and the block.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline

from tbminv.cache import atomic_write_text, cache_dir, cache_key
from tbminv.forward.copies import node_layout, node_quadrupole, roles
from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D
from tbminv.ground import Scenario
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)

TABLE_FORMAT = 1
"""Version of the cached tables (bump when their meaning changes)."""

_MEMORY: dict[str, tuple[np.ndarray, np.ndarray]] = {}
_MEMORY_MAX = 32


@dataclass(frozen=True)
class SurfaceTableSpec:
    """Node spacing of the surface-factor table.

    Attributes
    ----------
    angle_nodes : int
        Cutterhead angles per turn (``360 / angle_nodes`` degrees apart), >= 4.
    face_step_m : float
        Spacing of the face nodes, m (only for layouts with electrodes fixed in the ground).
    block_m : float
        Face-chainage span of one table, m: a multiple of ``face_step_m``; blocks start at
        multiples of it, so later shifts reuse the tables of earlier ones.
    """

    angle_nodes: int = 12
    face_step_m: float = 2.0
    block_m: float = 32.0

    def __post_init__(self) -> None:
        if int(self.angle_nodes) != self.angle_nodes or self.angle_nodes < 4:
            raise ValueError(f"angle_nodes = {self.angle_nodes!r}: expected an integer >= 4")
        if not self.face_step_m > 0:
            raise ValueError(f"face_step_m = {self.face_step_m!r}: expected > 0 m")
        n = self.block_m / self.face_step_m
        if not self.block_m > 0 or abs(n - round(n)) > 1e-9 or round(n) < 3:
            raise ValueError(f"block_m = {self.block_m!r}: expected a multiple (>= 3) of "
                             f"face_step_m = {self.face_step_m!r}")

    @property
    def face_nodes(self) -> int:
        """Face nodes per block, both ends included."""
        return int(round(self.block_m / self.face_step_m)) + 1


def clear_memory_cache() -> None:
    """Forget the tables held in memory (the on-disk cache stays)."""
    _MEMORY.clear()


def _solve(layout: Layout, spec: SurfaceTableSpec, settings: Fem3DSettings, rho: float,
           block_start_m: float) -> tuple[np.ndarray, np.ndarray]:
    """``R_hom`` with and without the surface, shape (n_quadrupoles, n_angle, n_face), ohm."""
    turning, fixed = roles(layout)
    quads = [q.labels() for q in layout.measurements]
    n_angle = spec.angle_nodes if any(turning & set(q) for q in quads) else 1
    n_face = spec.face_nodes if any(fixed & set(q) for q in quads) else 1
    big = node_layout(layout, [k * 360.0 / spec.angle_nodes for k in range(n_angle)],
                      [j * spec.face_step_m for j in range(n_face)])
    variants: list[tuple] = []
    where: list[tuple[int, int, int]] = []
    for i, q in enumerate(quads):
        ks = range(n_angle) if turning & set(q) else (0,)
        js = range(n_face) if fixed & set(q) else (0,)
        for k in ks:
            for j in js:
                variants.append(node_quadrupole(q, turning, fixed, k, j))
                where.append((i, k, j))
    out = []
    for cover in (layout.tunnel.cover_m, math.inf):
        lay = dataclasses.replace(big, tunnel=dataclasses.replace(big.tunnel, cover_m=cover))
        r = Forward3D(lay, settings).run(Scenario.homogeneous(rho), block_start_m, 0.0,
                                         variants).r_ohm
        t = np.full((len(quads), n_angle, n_face), np.nan)
        for (i, k, j), v in zip(where, r):
            t[i, k, j] = v
        for i, q in enumerate(quads):   # a quadrupole that neither turns nor moves: one value
            if not turning & set(q):
                t[i] = t[i, :1]
            if not fixed & set(q):
                t[i] = t[i, :, :1]
        out.append(t)
    _LOG.info("surface table: %d quadrupoles x %d angles x %d faces from %d 3D readings",
              len(quads), n_angle, n_face, len(variants))
    return out[0], out[1]


def _block_start(layout: Layout, spec: SurfaceTableSpec, face_chainage_m: float) -> float:
    if not any(e.fixed_in_ground for e in layout.electrodes):
        return 0.0
    return math.floor(float(face_chainage_m) / spec.block_m + 1e-12) * spec.block_m


def surface_table(layout: Layout, face_chainage_m: float, *, rho_ohmm: float = 100.0,
                  settings: Fem3DSettings | None = None, spec: SurfaceTableSpec | None = None,
                  use_cache: bool = True) -> tuple[float, np.ndarray, np.ndarray]:
    """The table of the block holding a face: its first face and ``R_hom`` with/without surface.

    Parameters
    ----------
    layout : Layout
        With a finite cover.
    face_chainage_m : float
        Any face chainage of the block, m.
    rho_ohmm : float
        Resistivity of the homogeneous ground, ohm-m.
    settings : Fem3DSettings, optional
        3D settings (default P2 on the default mesh).
    spec : SurfaceTableSpec, optional
    use_cache : bool
        Read and write the memory and disk cache.

    Returns
    -------
    block_start_m : float
        Face chainage of the first face node, m.
    r_top, r_deep : ndarray, shape (n_quadrupoles, n_angle, n_face)
        Homogeneous transfer resistances with and without the surface, ohm.
    """
    spec = spec or SurfaceTableSpec()
    settings = settings or Fem3DSettings()
    start = _block_start(layout, spec, face_chainage_m)
    key = cache_key({"format": TABLE_FORMAT, "layout": layout.to_dict(),
                     "settings": settings, "spec": spec, "rho": float(rho_ohmm),
                     "block": round(start, 6)})
    if use_cache and key in _MEMORY:
        top, deep = _MEMORY[key]
        return start, top.copy(), deep.copy()
    path = cache_dir("surface_table") / f"{key}.json"
    if use_cache and path.exists():
        try:
            d = json.loads(path.read_text())
            top = np.array(d["r_top_ohm"], dtype=float)
            deep = np.array(d["r_deep_ohm"], dtype=float)
            if top.shape == deep.shape and top.ndim == 3 and \
                    top.shape[0] == len(layout.measurements):
                _remember(key, top, deep)
                return start, top, deep
        except (ValueError, KeyError, TypeError, OSError) as exc:
            _LOG.warning("surface table %s unreadable (%s); recomputing", path, exc)
    top, deep = _solve(layout, spec, settings, float(rho_ohmm), start)
    if use_cache:
        atomic_write_text(path, json.dumps({
            "key": key, "block_start_m": start,
            "r_top_ohm": np.where(np.isfinite(top), top, 0.0).tolist(),
            "r_deep_ohm": np.where(np.isfinite(deep), deep, 0.0).tolist()}))
        _remember(key, top, deep)
    return start, top, deep


def _remember(key: str, top: np.ndarray, deep: np.ndarray) -> None:
    if len(_MEMORY) >= _MEMORY_MAX:
        _MEMORY.clear()
    _MEMORY[key] = (top.copy(), deep.copy())


def interpolate_factors(ratio: np.ndarray, block_start_m: float, spec: SurfaceTableSpec,
                        face_chainage_m: float, cutterhead_deg: float) -> np.ndarray:
    """Interpolate node factors ``(n, n_angle, n_face)`` to one face and angle (dimensionless).

    Periodic cubic spline over the angle nodes, not-a-knot cubic spline over the face nodes;
    a single node on an axis is used as is.
    """
    f = np.asarray(ratio, float)
    n_angle, n_face = f.shape[1], f.shape[2]
    if n_angle > 1:
        step = 360.0 / n_angle
        x = np.arange(n_angle + 1) * step
        y = np.concatenate([f, f[:, :1]], axis=1)
        f = CubicSpline(x, y, axis=1, bc_type="periodic")(float(cutterhead_deg) % 360.0)
    else:
        f = f[:, 0]
    if n_face > 1:
        t = float(face_chainage_m) - block_start_m
        if not -1e-9 <= t <= spec.block_m + 1e-9:
            raise ValueError(f"face {face_chainage_m} m is outside the block starting at "
                             f"{block_start_m} m")
        f = CubicSpline(np.arange(n_face) * spec.face_step_m, f, axis=1)(t)
    else:
        f = f[:, 0]
    return np.asarray(f, float)


def table_surface_factors(layout: Layout, face_chainage_m: float, cutterhead_deg: float = 0.0,
                          *, rho_ohmm: float = 100.0, settings: Fem3DSettings | None = None,
                          spec: SurfaceTableSpec | None = None, use_cache: bool = True
                          ) -> tuple[np.ndarray, bool]:
    """Surface factor per protocol quadrupole from the block's table; also where it is a null.

    Returns
    -------
    f : ndarray (n_quadrupoles,)
        ``R_with_surface / R_without``, interpolated; 1 where the homogeneous response is at a
        null (a node of the table zero or not finite, or a factor <= 0).
    null : ndarray of bool
        Where the factor was set to 1.
    """
    spec = spec or SurfaceTableSpec()
    start, top, deep = surface_table(layout, face_chainage_m, rho_ohmm=rho_ohmm,
                                     settings=settings, spec=spec, use_cache=use_cache)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where((np.abs(deep) > 0) & np.isfinite(top) & np.isfinite(deep),
                         top / deep, np.nan)
    null = ~np.all(np.isfinite(ratio) & (ratio > 0), axis=(1, 2))
    ratio[null] = 1.0
    f = interpolate_factors(ratio, start, spec, face_chainage_m, cutterhead_deg)
    bad = null | ~np.isfinite(f) | (f <= 0)
    f[bad] = 1.0
    return f, bad


__all__ = ["SurfaceTableSpec", "TABLE_FORMAT", "clear_memory_cache", "surface_table",
           "interpolate_factors", "table_surface_factors"]
