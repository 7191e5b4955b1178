"""Checks of the 3D forward model against closed forms and invariants.

Mesh settings of the closed-form checks are stated beside each test (default
``MeshSettings()``: box +-200 m, 16-sided cylinder, tetgen quality 1.3, 0.1 m refinement
nodes around electrodes, 0.5 m graded refinement ahead of the face; P2 elements).

Tolerance of the closed-form checks (:data:`CLOSED_FORM_TOL`): measured with this project's
model (this file, P2 on ``MeshSettings()``), the largest relative error over the quadrupoles was
0.28 % in the full space, 0.28 % under the ground surface and 0.13-0.21 % for the contacts
0.5 D ahead and behind; near-null quadrupoles were within 1.5e-4 of the sum of their pole
terms. Allowed: 0.5 % (a margin of about 1.8), near-null 0.5 % x 5 % = 2.5e-4 of that sum.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from tbminv.forward.fem3d.mesh import MeshSettings, TunnelGeometry, build_mesh, electrode_points
from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D, Model3D, unit_potentials
from tbminv.forward.ratio import (
    apparent_resistivity,
    clear_memory_cache,
    geometric_factors,
    geometric_factors_from_response,
)
from tbminv.gimli import configure_operator, ert, pg
from tbminv.ground import Scenario
from tbminv.layout import Layout

D = 6.0
FACE = 500.0
CLOSED_FORM_TOL = 0.005
FAR_CONTACT_TOL = 0.01
# smaller mesh for runs with the steel body (invariants, not closed forms)
SMALL = MeshSettings(box_m=150.0, n_segments=12, face_size_m=0.8, growth=1.6,
                     refine_ahead_m=15.0)


def make_layout(body: bool = False, cavity: bool = False, cover: float = math.inf,
                extra: list | None = None) -> Layout:
    els = [
        {"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.5, "angle_deg": 0},
        {"label": "T2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.0, "angle_deg": 90},
        {"label": "T3", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.8,
         "angle_deg": 200},
        {"label": "S1", "kind": "shield", "axial_m": -2.0, "radius_m": 3.1, "angle_deg": 0},
        {"label": "S2", "kind": "shield", "axial_m": -7.0, "radius_m": 3.1, "angle_deg": 180},
        {"label": "W1", "kind": "wall", "chainage_m": FACE - 20.0, "radius_m": 3.1,
         "angle_deg": 90},
        {"label": "R1", "kind": "remote"},
    ] + (extra or [])
    d = {"machine": {"diameter_m": D, "shield_length_m": 10.0, "cutterhead_thickness_m": 1.0,
                     "model_body": body},
         "tunnel": {"cover_m": cover, "model_cavity": cavity, "length_m": 30.0},
         "electrode": els,
         "measurement": [{"a": "T1", "b": "R1", "m": "T2", "n": "R1"}]}
    return Layout.from_dict(d, source="<test layout>")


LABELS = ["T1", "T2", "T3", "S1", "S2", "W1"]
# every quadrupole of distinct electrodes (A<B, M<N, AB != MN), plus pole readings
QUADS = [(a, b, m, n) for a, b, m, n in itertools.permutations(LABELS, 4) if a < b and m < n]
QUADS += [(a, "R1", m, "R1") for a, m in itertools.permutations(LABELS, 2)]


def _point_greens(points: dict, rho: float, surface_z: float | None):
    def g(p, q):
        if p is None or q is None or points.get(p) is None or points.get(q) is None:
            return 0.0
        a, b = points[p], points[q]
        v = 1.0 / np.linalg.norm(a - b)
        if surface_z is not None:  # image source above the surface (Neumann plane)
            bi = b.copy()
            bi[2] = 2.0 * surface_z - bi[2]
            v += 1.0 / np.linalg.norm(a - bi)
        return rho / (4.0 * math.pi) * v
    return g


def _quad_values(g, quads):
    terms = np.array([[g(a, m), -g(a, n), -g(b, m), g(b, n)] for a, b, m, n in quads])
    return terms.sum(axis=1), np.abs(terms).sum(axis=1)


def _check_against(r, ana, scale, tol=CLOSED_FORM_TOL):
    """Relative check at ``tol``; near-null quadrupoles (|V| < 5 % of the sum of the magnitudes
    of their four pole terms) are held to ``tol`` of 5 % of that sum, since their relative
    error amplifies the pole-potential error by 1/cancellation."""
    err = np.abs(r - ana)
    strong = np.abs(ana) >= 0.05 * scale
    assert strong.sum() > 0.6 * len(ana)
    rel = err[strong] / np.abs(ana[strong])
    assert rel.max() < tol, f"max relative error {rel.max():.4f}"
    assert np.all(err[~strong] < tol * 0.05 * scale[~strong])
    return rel


def test_full_space_every_quadrupole():
    """Homogeneous full space, body and cavity out, P2 on MeshSettings(): every quadrupole
    within 0.5 % of V = rho I/(4 pi)(1/AM - 1/AN - 1/BM + 1/BN) (point source in a full space,
    Telford, Geldart & Sheriff 1990, Applied Geophysics 2nd ed., sec. 8.2)."""
    lay = make_layout()
    res = Forward3D(lay).run(Scenario.homogeneous(100.0), FACE, 0.0, QUADS)
    pts, _ = electrode_points(lay, FACE)
    ana, scale = _quad_values(_point_greens(pts, 100.0, None), QUADS)
    rel = _check_against(res.r_ohm, ana, scale)
    assert np.median(rel) < 0.005


def test_half_space_image_source():
    """Ground surface at the cover (4 m above the crown), body and cavity out, P2 on
    MeshSettings(): within 0.5 % of the image-source solution of a buried point source
    (Telford, Geldart & Sheriff 1990, sec. 8.2: V = rho I/(4 pi)(1/r + 1/r'))."""
    cover = 4.0
    lay = make_layout(cover=cover)
    res = Forward3D(lay).run(Scenario.homogeneous(100.0), FACE, 0.0, QUADS)
    pts, _ = electrode_points(lay, FACE)
    ana, scale = _quad_values(_point_greens(pts, 100.0, D / 2 + cover), QUADS)
    rel = _check_against(res.r_ohm, ana, scale)
    assert np.median(rel) < 0.005


def _contact_analytic(points, rho1, rho2, c):
    """Point source near a plane contact x = c, image method (Telford, Geldart & Sheriff 1990,
    sec. 8.3; Roy 2008, Potential Theory in Applied Geophysics, ch. 11)."""
    k12 = (rho2 - rho1) / (rho2 + rho1)

    def g(p, q):
        if p is None or q is None or points.get(p) is None or points.get(q) is None:
            return 0.0
        s, x = points[p], points[q]
        r = np.linalg.norm(x - s)
        si = s.copy()
        si[0] = 2.0 * c - si[0]
        ri = np.linalg.norm(x - si)
        s_side1, x_side1 = s[0] < c, x[0] < c
        rho, k = (rho1, k12) if s_side1 else (rho2, -k12)
        if s_side1 == x_side1:
            return rho / (4.0 * math.pi) * (1.0 / r + k / ri)
        return rho * (1.0 + k) / (4.0 * math.pi * r)
    return g


CONTACT_QUADS = [q for q in QUADS if "W1" not in q]


def _contact_case(ratio: float, ahead_d: float, tol: float = CLOSED_FORM_TOL) -> None:
    lay = make_layout()
    rho1 = 100.0
    c_ahead = ahead_d * D
    sc = Scenario.from_dict({"background_resistivity_ohmm": rho1,
                             "contact": [{"chainage_m": FACE + c_ahead,
                                          "resistivity_ohmm": rho1 * ratio}]})
    res = Forward3D(lay).run(sc, FACE, 0.0, CONTACT_QUADS)
    assert c_ahead in res.tmesh.planes_m
    pts, _ = electrode_points(lay, FACE)
    ana, scale = _quad_values(_contact_analytic(pts, rho1, rho1 * ratio, c_ahead),
                              CONTACT_QUADS)
    _check_against(res.r_ohm, ana, scale, tol)


@pytest.mark.parametrize("ratio", [10.0, 0.1])
@pytest.mark.parametrize("ahead_d", [0.5, -0.5])
def test_plane_contact_image_method(ratio, ahead_d):
    """Contact square to the axis (honoured by the mesh), no body, no cavity, P2 on
    MeshSettings(): within 0.5 % of the image method (Telford, Geldart & Sheriff 1990, sec. 8.3),
    rho2/rho1 = 10 and 0.1, contact 0.5 D ahead and 0.5 D behind the face (face past it)."""
    _contact_case(ratio, ahead_d)


@pytest.mark.slow
@pytest.mark.parametrize("ratio", [10.0, 0.1])
@pytest.mark.parametrize("ahead_d", [10.0, 5.0, 2.0, 1.0])
def test_plane_contact_image_method_far(ratio, ahead_d):
    """As above, contact 10 D to 1 D ahead (Telford, Geldart & Sheriff 1990, sec. 8.3). The
    contact plane far ahead is meshed coarser: measured with this project's model (this test),
    largest relative error 0.62 % (x10 at 10 D), near-null quadrupoles within 2.6e-4 of the
    sum of their pole terms (x0.1 at 1 D); allowed 1 % and 5e-4 (a margin of about 1.6)."""
    _contact_case(ratio, ahead_d, tol=FAR_CONTACT_TOL)


STEEL_EXTRA = [{"label": "BODY", "kind": "machine"},
               {"label": "SB", "kind": "shield", "axial_m": -5.0, "radius_m": 3.0,
                "angle_deg": 90, "insulated": False},
               {"label": "R2", "kind": "remote", "axial_m": -60.0, "radius_m": 0.0,
                "angle_deg": 0.0}]


def test_reciprocity_and_steel_with_body():
    """With body and cavity in: swapping AB and MN leaves R unchanged (reciprocity theorem,
    Parasnis 1988, Reciprocity theorems in geoelectric and geoelectromagnetic work,
    Geoexploration 25:177-198, from memory; an invariant of the physics), and a
    current into the kind-machine node equals one into any other steel node (bare SB). The
    finite-element system is symmetric, so the discrete model obeys reciprocity to solver
    precision (measured below 1e-9 with this project's model, this test); allowed 1e-6."""
    lay = make_layout(body=True, cavity=True, extra=STEEL_EXTRA)
    quads = [("T1", "S2", "T2", "W1"), ("T1", "R2", "S1", "R1"), ("T3", None, "W1", None),
             ("BODY", "R2", "T1", "R1"), ("S2", "R2", "W1", "R1")]
    quads += [(m, n, a, b) for a, b, m, n in quads]
    quads += [("SB", "R2", "T1", "R1"), ("T1", "R2", "BODY", "R1"), ("T1", "R2", "SB", "R1")]
    st = Fem3DSettings(mesh=SMALL, use_reciprocity=False)  # every A/B pair really solved
    r = Forward3D(lay, st).run(Scenario.homogeneous(100.0), FACE, 0.0, quads).r_ohm
    n = 5
    assert np.all(np.abs(r[:n]) > 0)
    np.testing.assert_allclose(r[n:2 * n], r[:n], rtol=1e-6)
    # current into BODY (axis, mid-shield) == current into SB (on the skin at -5 m)
    np.testing.assert_allclose(r[3], r[10], rtol=1e-4)
    # the machine reads one potential: BODY and SB as potential electrodes agree
    np.testing.assert_allclose(r[11], r[12], rtol=1e-4)


def test_machine_resistivity_convergence():
    """Response vs steel cap (ohm-m) converges: the default 1e-5 is within 0.1 % of 1e-6 and
    the change shrinks with the cap (P1, small mesh; the cap enters the solve only). Monotone
    convergence to the perfect-conductor limit as the cap falls: common practice, no source;
    the 0.1 % figure is measured with this project's model (this test)."""
    lay = make_layout(body=True, cavity=True, extra=STEEL_EXTRA)
    assert lay.machine.body_resistivity_ohmm == 1e-5
    quads = [("T1", "S2", "T2", "W1"), ("T1", "R2", "S1", "R1"), ("BODY", "R2", "T1", "R1"),
             ("S1", "R2", "W1", "R1")]
    fw = Forward3D(lay, Fem3DSettings(p2=False, mesh=SMALL))
    tm = fw.mesh(None, FACE)
    from tbminv.forward.fem3d.model import cell_resistivity
    caps = [1e-2, 1e-3, 1e-4, 1e-5, 1e-6]
    out = {}
    for cap in caps:
        out[cap] = fw.run(Scenario.homogeneous(100.0), FACE, 0.0, quads).r_ohm if cap == 1e-5 \
            else Forward3D(lay, Fem3DSettings(p2=False, mesh=SMALL,
                                                body_resistivity_ohmm=cap)).run(
                Scenario.homogeneous(100.0), FACE, 0.0, quads).r_ohm
    ref = out[1e-6]
    dev = {c: np.max(np.abs(out[c] / ref - 1)) for c in caps[:-1]}
    assert dev[1e-5] < 1e-3
    assert dev[1e-2] > dev[1e-3] > dev[1e-4] > dev[1e-5]
    rho = cell_resistivity(tm, lay, Scenario.homogeneous(100.0), FACE)
    assert np.all(rho[tm.steel_mask()] == 1e-5)
    assert np.all(rho[tm.region_mask("tunnel")] == lay.tunnel.lining_resistivity_ohmm)


def test_geometric_factors_homogeneous(tmp_path, monkeypatch):
    """Numeric geometric factors with the body in: cached, the same from every entry point, and
    k R = rho for a homogeneous ground of 30 and 1000 ohm-m with factors from a 100 ohm-m run.

    In a homogeneous ground every potential scales with rho (V = rho I G with G fixed by the
    geometry; Telford, Geldart & Sheriff 1990, Applied Geophysics 2nd ed., sec. 8.2), so
    k R = rho exactly, but for the steel, whose 1e-5 ohm-m does not scale with the ground:
    measured 1.2e-4 at most with this project's model (this test); allowed 5e-4.
    """
    monkeypatch.setenv("TBMINV_CACHE_DIR", str(tmp_path))
    lay = make_layout(body=True, cavity=False, extra=STEEL_EXTRA)
    quads = [("T1", "S2", "T2", "W1"), ("T1", "R2", "S1", "R1"), ("BODY", "R2", "T1", "R1"),
             ("S1", "R2", "W1", "R1"), ("T1", None, "T3", None)]
    st = Fem3DSettings(p2=False, mesh=SMALL)
    k = geometric_factors(lay, quads, FACE, settings=st)
    assert np.all(np.isfinite(k))
    assert list((tmp_path / "ratio").glob("*.json"))
    clear_memory_cache()                                    # the second call reads the disk
    k2 = geometric_factors(lay, quads, FACE, settings=st)
    np.testing.assert_array_equal(k, k2)
    # the same factors from the registry model object, and from the primitive
    k3 = geometric_factors(lay, quads, FACE, model=Model3D(lay, st))
    np.testing.assert_array_equal(k, k3)
    r0 = Forward3D(lay, st).run(Scenario.homogeneous(100.0), FACE, 0.0, quads).r_ohm
    np.testing.assert_array_equal(geometric_factors_from_response(r0, 100.0), k)
    for rho in (30.0, 1000.0):
        r = Forward3D(lay, st).run(Scenario.homogeneous(rho), FACE, 0.0, quads).r_ohm
        np.testing.assert_allclose(apparent_resistivity(r, k), rho, rtol=5e-4)


def test_jacobian_and_response_not_zero():
    """An ERT Jacobian on a small 3D mesh is not all zeros (pyGIMLi's sensitivity loop runs no
    thread unless :mod:`tbminv.gimli` sets the worker count: on 2 CPUs it gives a zero Jacobian)
    and obeys Euler's theorem for homogeneous functions: the response is homogeneous of
    degree 1 in the cell resistivities, so sum_j J_ij rho_j = R_i (Euler's theorem, e.g.
    Courant 1936, Differential and Integral Calculus vol. 2, ch. II, from memory). Measured
    2.3e-4 with this project's model (this test, P1, pyGIMLi's refined forward mesh); allowed
    1e-3 (a wrong or partly summed Jacobian is off by far more)."""
    g = TunnelGeometry(radius_m=3.0, shield_length_m=10.0, cutterhead_thickness_m=1.0,
                       model_body=False, model_cavity=False)
    pts = {"A": np.array([0.0, 0.0, 0.0]), "B": np.array([4.0, 0.0, 0.0]),
           "M": np.array([0.0, 4.0, 0.0]), "N": np.array([4.0, 4.0, 0.0])}
    tm = build_mesh(g, pts, MeshSettings(box_m=60.0, electrode_size_m=0.5, face_size_m=2.0,
                                         growth=2.0, refine_ahead_m=8.0), use_cache=False)
    data = pg.DataContainerERT()
    for p in pts.values():
        data.createSensor(pg.Pos(*p))
    data.createFourPointData(0, 0, 1, 2, 3)
    data.createFourPointData(1, 0, 2, 1, 3)
    data.set("k", np.ones(2))
    fop = ert.ERTModelling(sr=False)
    configure_operator(fop)
    fop.setData(data)
    mesh = pg.Mesh(tm.mesh)
    mesh.setCellMarkers(np.arange(mesh.cellCount()))  # one Jacobian column per cell
    fop.setMesh(mesh, ignoreRegionManager=True)
    rho = pg.Vector(tm.mesh.cellCount(), 50.0)
    resp = np.array(fop.response(rho))
    assert resp.size == 2 and np.all(resp != 0)
    fop.createJacobian(rho)
    J = np.array(fop.jacobian())
    assert J.shape == (2, tm.mesh.cellCount())
    assert np.any(J != 0)
    np.testing.assert_allclose(J @ np.asarray(rho), resp, rtol=1e-3)
    u = unit_potentials(tm, np.asarray(rho), [tm.electrode_nodes["A"]], p2=False)
    assert u.shape == (1, tm.mesh.nodeCount()) and np.any(u != 0)
