"""3D forward model of a layout in a ground scenario (pyGIMLi ERT on a tunnel-aware mesh).

For one face chainage and cutterhead angle the machine-frame mesh of
:mod:`tbminv.forward.fem3d.mesh` is filled cell by cell and pyGIMLi's finite-element DC solver
(``DCMultiElectrodeModelling``, no singularity removal, which is inaccurate next to the very
conductive steel) gives the potential of a unit current at every current electrode; transfer
resistances of any quadrupole follow by superposition, ``R = u_A(M) - u_A(N) - u_B(M) + u_B(N)``
(V/A), a missing B or N (or a remote at infinity) contributing nothing.

Cell fill
    Ground cells take ``Scenario.resistivity`` at their centres (world frame). Contacts square to
    the axis that cross the model are **honoured by the mesh** (an internal facet at the
    contact's ahead distance, :attr:`Fem3DSettings.honour_contacts`), so the fill is exact
    there; dipping contacts, spheres, ellipsoids and water zones **rely on the mesh being fine
    enough near them** (cell-centre sampling). Machine cells (``cutterhead``, ``shield``) take the
    capped steel resistivity ``layout.machine.body_resistivity_ohmm`` (default 1e-5 ohm-m;
    steel is about 1e-7): the transfer resistances change by less than 0.1 % between caps of
    1e-3 and 1e-6 ohm-m (``tests/forward/test_fem3d_model.py``), so the cap no longer matters there.
    Tunnel cells take ``layout.tunnel.lining_resistivity_ohmm``. ``model_body`` /
    ``model_cavity`` = false leave these regions out (ground instead).

Electrodes
    Insulated electrodes are mesh nodes a few cm into the ground. Bare electrodes and kind
    ``machine`` are nodes inside the steel: at the machine's potential, so a current into any
    steel node is a current into the whole body (tested). A remote at infinity is a pole; a
    remote at a position is a node (the box grows to hold it).

Cost
    The solve dominates and grows faster than linearly with the unknowns (P2 nodes); extra
    current electrodes cost little. With ``use_reciprocity`` (default) each reading is computed
    from whichever of its pairs (AB or MN) needs fewer current electrodes; reciprocity holds to
    < 0.5 % when both are solved (``tests/forward/test_fem3d_model.py``).

Accuracy
    Quadratic elements (P2, default) on the P1 mesh: about 0.1-0.3 % against closed forms in a
    full space with the default mesh; P1 is 4-8 % off (coarse far field). A finite cover puts a
    ground surface (Neumann) at ``z = radius + cover``; pyGIMLi's mixed far-field condition
    mirrors sources at ``z = 0``, so the mesh is shifted to put the surface at ``z = 0`` for the
    solve.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from tbminv.forward.copies import node_layout, node_quadrupole, roles
from tbminv.forward.fem3d.mesh import (
    MeshSettings,
    TunnelMesh,
    body_refinement_points,
    layout_mesh,
)
from tbminv.forward.quadrupoles import Quadrupoles, quadrupole_labels
from tbminv.gimli import configure_operator, ert, ert_data_container, pg
from tbminv.ground import Scenario
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)


@dataclass(frozen=True)
class Fem3DSettings:
    """Settings of the 3D forward model.

    Attributes
    ----------
    p2 : bool
        Quadratic elements (recommended: P1 is several % off).
    honour_contacts : bool
        Put contacts square to the axis into the mesh as internal facets.
    body_resistivity_ohmm : float or None
        Steel cap, ohm-m; None: the layout's ``machine.body_resistivity_ohmm``.
    mesh : MeshSettings
        Mesh knobs.
    cache_meshes : bool
        Read and write meshes in the mesh cache (:mod:`tbminv.forward.fem3d.mesh`).
    use_reciprocity : bool
        Compute a reading from its potential pair as current pair when that needs fewer
        solves (reciprocity theorem); False solves for every current electrode as given.
    """

    p2: bool = True
    honour_contacts: bool = True
    body_resistivity_ohmm: float | None = None
    mesh: MeshSettings = field(default_factory=MeshSettings)
    cache_meshes: bool = True
    use_reciprocity: bool = True


@dataclass
class ForwardResult:
    """Result of one forward run.

    Attributes
    ----------
    r_ohm : ndarray
        Transfer resistance per measurement, V/A (ohm).
    measurements : list
        The quadrupoles, as (a, b, m, n) label tuples.
    tmesh : TunnelMesh
        The mesh used.
    n_nodes : int
        Unknowns of the solve (P2 nodes with ``p2``).
    seconds : dict
        Wall time of mesh, fill and solve, s.
    """

    r_ohm: np.ndarray
    measurements: list[tuple[str | None, str | None, str | None, str | None]]
    tmesh: TunnelMesh
    n_nodes: int
    seconds: dict[str, float]


def contact_planes(layout: Any, scenario: Any, face_chainage_m: float) -> tuple[float, ...]:
    """Machine-frame ahead distances of the scenario's contacts square to the axis, m."""
    del layout
    return tuple(float(c.chainage_m) - float(face_chainage_m) for c in scenario.contacts
                 if c.square_to_axis)


def cell_resistivity(tmesh: TunnelMesh, layout: Any, scenario: Any, face_chainage_m: float,
                     body_resistivity_ohmm: float | None = None) -> np.ndarray:
    """Resistivity of every cell, ohm-m (ground from the scenario, fixed regions from the layout).

    Parameters
    ----------
    tmesh : TunnelMesh
    layout : Layout
    scenario : Scenario
        Evaluated at cell centres in the world frame.
    face_chainage_m : float
    body_resistivity_ohmm : float, optional
        Steel cap, ohm-m (default: the layout's).
    """
    c = tmesh.cell_centers()
    rho = np.asarray(scenario.resistivity_machine(c[:, 0], c[:, 1], c[:, 2],
                                                  float(face_chainage_m)), float).copy()
    cap = layout.machine.body_resistivity_ohmm if body_resistivity_ohmm is None \
        else float(body_resistivity_ohmm)
    rho[tmesh.steel_mask()] = cap
    rho[tmesh.region_mask("tunnel")] = layout.tunnel.lining_resistivity_ohmm
    return rho


def unit_potentials(tmesh: TunnelMesh, rho_cells: np.ndarray, source_nodes: Sequence[int],
                    p2: bool = True) -> np.ndarray:
    """Potentials at the P1 nodes for a unit current (1 A) at each source node, V.

    Parameters
    ----------
    tmesh : TunnelMesh
    rho_cells : ndarray
        Resistivity per cell, ohm-m.
    source_nodes : sequence of int
        P1 node indices of the current electrodes.
    p2 : bool
        Solve with quadratic elements.

    Returns
    -------
    ndarray, shape (len(source_nodes), n_p1_nodes)
    """
    mesh = pg.Mesh(tmesh.p2() if p2 else tmesh.mesh)
    g = tmesh.geometry
    dz = -(g.radius_m + g.cover_m) if math.isfinite(g.cover_m) else 0.0
    if dz:
        mesh.translate(pg.Pos(0.0, 0.0, dz))
    xyz = np.asarray(tmesh.mesh.positions())
    ns = len(source_nodes)
    # one pole-pole datum per source: the solve gives every source's potential field
    data = ert_data_container(
        [(xyz[int(i)][0], xyz[int(i)][1], xyz[int(i)][2] + dz) for i in source_nodes],
        [(i, -1, (i + 1) % ns if ns > 1 else i, -1) for i in range(ns)])
    fop = ert.ERTModelling(sr=False)
    configure_operator(fop)
    fop.setData(data)
    fop.setMesh(mesh, ignoreRegionManager=True)
    resp = fop.response(pg.Vector(np.asarray(rho_cells, float)))
    r = np.array(resp)
    if r.size == 0 or not np.all(np.isfinite(r)):
        raise RuntimeError("pyGIMLi returned an empty or non-finite response")
    sol = fop.solution()
    u = np.array([np.array(sol[i]) for i in range(ns)])
    if u.shape[1] < tmesh.mesh.nodeCount():
        raise RuntimeError(f"potential has {u.shape[1]} entries for {tmesh.mesh.nodeCount()} nodes")
    u = u[:, : tmesh.mesh.nodeCount()]
    if not np.any(u):
        raise RuntimeError("pyGIMLi returned all-zero potentials")
    return u


class Forward3D:
    """3D forward model of one layout (meshes are built per face/angle and cached).

    Parameters
    ----------
    layout : Layout
    settings : Fem3DSettings, optional
    """

    def __init__(self, layout: Any, settings: Fem3DSettings | None = None) -> None:
        self.layout = layout
        self.settings = settings or Fem3DSettings()

    def mesh(self, scenario: Any | None, face_chainage_m: float,
             cutterhead_deg: float = 0.0) -> TunnelMesh:
        """The mesh for a scenario (honoured contacts) at a face chainage and angle."""
        planes = ()
        if scenario is not None and self.settings.honour_contacts:
            box = self.settings.mesh.box_m
            planes = tuple(p for p in contact_planes(self.layout, scenario, face_chainage_m)
                           if abs(p) < box)
        refine = None
        if scenario is not None and scenario.spheres:
            # nodes on and in every sphere, spaced a quarter of its radius, at most the
            # spacing ahead of the face (cells are filled by their centres)
            face_size = self.settings.mesh.face_size_m
            refine = np.vstack([body_refinement_points(
                (sph.chainage_m - face_chainage_m, sph.y_m, sph.z_m), sph.radius_m,
                min(0.25 * sph.radius_m, face_size)) for sph in scenario.spheres])
        return layout_mesh(self.layout, face_chainage_m, cutterhead_deg, self.settings.mesh,
                           planes, use_cache=self.settings.cache_meshes, refine_points_m=refine)

    def run(self, scenario: Any, face_chainage_m: float, cutterhead_deg: float = 0.0,
            measurements: Quadrupoles | None = None) -> ForwardResult:
        """Transfer resistances of the protocol (or ``measurements``), V/A.

        Parameters
        ----------
        scenario : Scenario
            Ground (world frame).
        face_chainage_m : float
            Chainage of the cutterhead face, m.
        cutterhead_deg : float
            Cutterhead angle, degrees.
        measurements : sequence, optional
            Quadrupoles (``Measurement`` or (a, b, m, n) labels); default the layout's protocol.
        """
        quads = quadrupole_labels(self.layout, measurements)
        t0 = time.perf_counter()
        tm = self.mesh(scenario, face_chainage_m, cutterhead_deg)
        t1 = time.perf_counter()
        rho = cell_resistivity(tm, self.layout, scenario, face_chainage_m,
                               self.settings.body_resistivity_ohmm)
        t2 = time.perf_counter()
        node = tm.electrode_nodes
        for e in self.layout.electrodes:
            if e.kind == "machine":
                node[e.label] = tm.steel_node
        def nodes_of(x: str | None, y: str | None) -> set[int]:
            return {node[v] for v in (x, y) if v is not None and node.get(v) is not None}

        swap = []
        if self.settings.use_reciprocity:
            # each reading from whichever of its two electrode pairs carries current in the
            # solve (reciprocity theorem): a greedy cover of the readings by few sources
            chosen: set[int] = set()
            for a, b, m, n in quads:
                ab, mn = nodes_of(a, b), nodes_of(m, n)
                if (ab and ab <= chosen) or not mn:
                    swap.append(False)
                elif mn <= chosen or not ab or len(mn - chosen) < len(ab - chosen):
                    swap.append(True)
                else:
                    swap.append(False)
                chosen |= mn if swap[-1] else ab
        else:
            swap = [False] * len(quads)
        pairs = [(m, n, a, b) if sw else (a, b, m, n) for (a, b, m, n), sw in zip(quads, swap)]
        sources = sorted(set().union(*(nodes_of(q[0], q[1]) for q in pairs)))
        if not sources:
            raise ValueError(f"{self.layout.source}: no current electrode with a position")
        u = unit_potentials(tm, rho, sources, self.settings.p2)
        row = {n: i for i, n in enumerate(sources)}
        r = np.empty(len(quads))
        for k, (a, b, m, n) in enumerate(pairs):
            val = 0.0
            for src, sgn in ((a, 1.0), (b, -1.0)):
                if src is None or node.get(src) is None:
                    continue
                us = u[row[node[src]]]
                for rec, s2 in ((m, 1.0), (n, -1.0)):
                    if rec is None or node.get(rec) is None:
                        continue
                    val += sgn * s2 * us[node[rec]]
            r[k] = val
        t3 = time.perf_counter()
        n_nodes = tm.p2().nodeCount() if self.settings.p2 else tm.mesh.nodeCount()
        _LOG.info("3D forward: %d readings, %d unknowns, %.2f s", len(quads), n_nodes, t3 - t0)
        return ForwardResult(r_ohm=r, measurements=quads, tmesh=tm, n_nodes=n_nodes,
                             seconds={"mesh": t1 - t0, "fill": t2 - t1, "solve": t3 - t2})


def forward3d(layout: Any, scenario: Any, face_chainage_m: float, cutterhead_deg: float = 0.0,
              measurements: Quadrupoles | None = None,
              settings: Fem3DSettings | None = None) -> np.ndarray:
    """Transfer resistances (V/A) of a layout's protocol in a scenario; see :class:`Forward3D`."""
    return Forward3D(layout, settings).run(scenario, face_chainage_m, cutterhead_deg,
                                           measurements).r_ohm


class Model3D:
    """Forward model ``3d`` of the registry: pyGIMLi 3D finite elements (:class:`Forward3D`).

    Parameters
    ----------
    layout : Layout
    settings : Fem3DSettings, optional
        Default: P2 on the default mesh.
    """

    def __init__(self, layout: Layout, settings: Fem3DSettings | None = None, **_: Any) -> None:
        self.layout = layout
        self.forward = Forward3D(layout, settings)
        self.settings = self.forward.settings

    def response(self, scenario: Scenario, face_chainage_m: float, cutterhead_deg: float = 0.0,
                 measurements: Quadrupoles | None = None) -> np.ndarray:
        """Transfer resistances of ``measurements`` (default the protocol), ohm."""
        return np.asarray(self.forward.run(scenario, face_chainage_m, cutterhead_deg,
                                           measurements).r_ohm, float)

    def response_angles(self, scenario: Scenario, face_chainage_m: float,
                        angles_deg: Sequence[float], measurements: Quadrupoles | None = None
                        ) -> list[np.ndarray]:
        """Transfer resistances at several cutterhead angles from one mesh and solve, ohm.

        The turning electrodes are put into the mesh at every angle at once
        (:func:`tbminv.forward.copies.node_layout`); readings at each angle follow by
        superposition. The mesh differs from the one-angle meshes of :meth:`response` only by
        the extra electrode nodes.

        Parameters
        ----------
        scenario : Scenario
        face_chainage_m : float
            Chainage of the cutterhead face, m.
        angles_deg : sequence of float
            Cutterhead angles, degrees.
        measurements : sequence, optional
            Quadrupoles (default the protocol).

        Returns
        -------
        list of ndarray
            One array of transfer resistances per angle, ohm.
        """
        angles = [float(a) for a in angles_deg]
        quads = quadrupole_labels(self.layout, measurements)
        turning, _fixed = roles(self.layout)
        if len(angles) < 2 or not any(turning & set(q) for q in quads):
            r = self.response(scenario, face_chainage_m, angles[0] if angles else 0.0,
                              measurements)
            return [r.copy() for _ in angles]
        big = node_layout(self.layout, angles)
        variants = [node_quadrupole(q, turning, set(), k, 0)
                    for k in range(len(angles)) for q in quads]
        r = Forward3D(big, self.settings).run(scenario, face_chainage_m, 0.0, variants).r_ohm
        return [np.asarray(r[k * len(quads):(k + 1) * len(quads)], float)
                for k in range(len(angles))]


__all__ = ["Model3D", "Fem3DSettings", "ForwardResult", "Forward3D", "forward3d",
           "cell_resistivity", "contact_planes", "unit_potentials"]
