"""Checks of the tunnel-aware 3D mesh (geometry, regions, electrodes, planes, cache)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.forward.fem3d.mesh import (
    REGIONS,
    MeshSettings,
    TunnelGeometry,
    build_mesh,
    electrode_points,
    layout_mesh,
)
from tbminv.layout import Layout

COARSE = MeshSettings(box_m=80.0, n_segments=12, face_size_m=1.0, growth=1.8,
                      refine_ahead_m=8.0, electrode_size_m=0.2)


def _layout(body=True, cavity=True, cover=math.inf, length=20.0, steel=True) -> Layout:
    d = {
        "machine": {"diameter_m": 6.0, "shield_length_m": 10.0, "cutterhead_thickness_m": 1.0,
                    "model_body": body},
        "tunnel": {"cover_m": cover, "model_cavity": cavity, "length_m": length},
        "electrode": [
            {"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 1.0,
             "angle_deg": 30},
            {"label": "T0", "kind": "cutterhead", "axial_m": 0.0, "radius_m": 2.0,
             "angle_deg": 0},
            {"label": "S1", "kind": "shield", "axial_m": -3.0, "radius_m": 3.0,
             "angle_deg": 90},
            {"label": "SB", "kind": "shield", "axial_m": -6.0, "radius_m": 3.0,
             "angle_deg": 180, "insulated": False},
            {"label": "BODY", "kind": "machine"},
            {"label": "W1", "kind": "wall", "chainage_m": 90.0, "radius_m": 3.2,
             "angle_deg": 270},
            {"label": "R1", "kind": "remote"}],
        "measurement": [{"a": "T1", "b": "R1", "m": "S1", "n": "R1"}]}
    if not steel:
        d["electrode"] = [e for e in d["electrode"] if e["kind"] != "machine"]
    return Layout.from_dict(d, source="<mesh test>")


def _cells_at_node(tm, i):
    ids = np.array([[n.id() for n in c.nodes()] for c in tm.mesh.cells()])
    return np.where((ids == i).any(axis=1))[0]


@pytest.fixture(scope="module")
def full_mesh():
    return layout_mesh(_layout(), face_chainage_m=100.0, settings=COARSE, planes_m=(4.0, -5.0),
                       use_cache=False)


def test_regions_and_volumes(full_mesh):
    """Region names, and the steel / tunnel volumes equal the inscribed prism,
    V = n/2 R^2 sin(2 pi / n) L (area of a regular polygon, elementary geometry)."""
    tm = full_mesh
    assert set(tm.regions_present()) == set(REGIONS)
    area = 0.5 * 12 * 3.0 ** 2 * math.sin(2 * math.pi / 12)
    vol = np.array([c.size() for c in tm.mesh.cells()])
    for name, length in (("cutterhead", 1.0), ("shield", 9.0), ("tunnel", 20.0)):
        assert vol[tm.region_mask(name)].sum() == pytest.approx(area * length, rel=1e-9)
    assert vol.sum() == pytest.approx(160.0 ** 3, rel=1e-9)
    with pytest.raises(KeyError, match="regions are"):
        tm.region_mask("lining")


def test_electrodes_are_nodes(full_mesh):
    tm = full_mesh
    lay = _layout()
    pts, steel = electrode_points(lay, 100.0, n_segments=COARSE.n_segments)
    xyz = tm.node_positions()
    assert tm.electrode_nodes["R1"] is None
    for label, p in pts.items():
        if p is None:
            continue
        if label != "BODY":  # the steel node keeps off the plane at -5 m
            np.testing.assert_allclose(xyz[tm.electrode_nodes[label]], p, atol=1e-9)
    # insulated electrodes sit in the ground: T0 (given behind the face) moved ahead
    assert pts["T0"][0] == pytest.approx(COARSE.clearance_m)
    assert math.hypot(*pts["S1"][1:]) == pytest.approx(3.0 + COARSE.clearance_m)
    mk = np.asarray(tm.mesh.cellMarkers())
    ground = tm.region_mask("ground")
    for label in ("T1", "T0", "S1", "W1"):
        cells = _cells_at_node(tm, tm.electrode_nodes[label])
        assert ground[cells].all(), label
    # bare and machine electrodes are inside the steel
    steel_mask = tm.steel_mask()
    for label in ("SB", "BODY"):
        cells = _cells_at_node(tm, tm.electrode_nodes[label])
        assert steel_mask[cells].all(), label
    assert tm.steel_node == tm.electrode_nodes["BODY"]
    assert mk.size == tm.mesh.cellCount()


def test_planes_honoured(full_mesh):
    """No cell straddles an honoured plane x = const."""
    tm = full_mesh
    ids = np.array([[n.id() for n in c.nodes()] for c in tm.mesh.cells()])
    x = tm.node_positions()[:, 0][ids]
    assert tm.planes_m == (-5.0, 4.0)
    for c in tm.planes_m:
        straddle = (x.min(axis=1) < c - 1e-9) & (x.max(axis=1) > c + 1e-9)
        assert not straddle.any()


def test_outer_boundaries_only_and_surface():
    """Only outer faces are kept; with a finite cover the top (z = R + cover) is Neumann (-1),
    the rest mixed (-2); the tunnel reaching the box end is cut by it."""
    tm = layout_mesh(_layout(cover=5.0, length=math.inf), 100.0, settings=COARSE,
                     use_cache=False)
    mk = np.array([b.marker() for b in tm.mesh.boundaries()])
    assert set(mk.tolist()) <= {-1, -2}
    zc = np.array([b.center()[2] for b in tm.mesh.boundaries()])
    assert np.allclose(zc[mk == -1], 8.0)
    vol = np.array([c.size() for c in tm.mesh.cells()])
    area = 0.5 * 12 * 9.0 * math.sin(2 * math.pi / 12)
    assert vol[tm.region_mask("tunnel")].sum() == pytest.approx(area * (80.0 - 10.0), rel=1e-9)


def test_body_and_cavity_off():
    tm = layout_mesh(_layout(body=False, cavity=False, steel=False), 100.0, settings=COARSE,
                     use_cache=False)
    assert tm.regions_present() == ["ground"]
    assert tm.steel_node is None


def test_machine_electrode_needs_body():
    with pytest.raises(ValueError, match="model_body"):
        electrode_points(_layout(body=False), 100.0)


def test_cache_roundtrip(tmp_path, monkeypatch):
    """Second build of the same inputs loads pyGIMLi's .bms + JSON sidecar from our cache."""
    monkeypatch.setenv("TBMINV_CACHE_DIR", str(tmp_path))
    g = TunnelGeometry(radius_m=3.0, shield_length_m=10.0, cutterhead_thickness_m=1.0,
                       tunnel_length_m=10.0)
    pts = {"A": np.array([0.05, 0.0, 1.0]), "R": None}
    a = build_mesh(g, pts, COARSE, steel_point=np.array([-5.0, 0, 0]))
    files = sorted(p.suffix for p in (tmp_path / "mesh3d").iterdir())
    assert files == [".bms", ".json"]
    b = build_mesh(g, pts, COARSE, steel_point=np.array([-5.0, 0, 0]))
    assert a.key == b.key
    assert b.mesh.nodeCount() == a.mesh.nodeCount()
    assert b.mesh.boundaryCount() == a.mesh.boundaryCount()
    assert b.electrode_nodes == a.electrode_nodes and b.steel_node == a.steel_node
    np.testing.assert_array_equal(b.region_mask("shield"), a.region_mask("shield"))
    c = build_mesh(g, pts, MeshSettings(**{**COARSE.__dict__, "quality": 1.4}))
    assert c.key != a.key


def test_gap_to_the_wall_kept():
    """An insulated shield electrode keeps its gap (radius_m - D/2) to the polygon wall at its
    angle; regular-polygon apothem R cos(pi/n) (elementary geometry)."""
    from tbminv.forward.fem3d.mesh import polygon_radius

    R, n = 3.0, 12
    assert polygon_radius(R, n, 0.0) == pytest.approx(R)
    assert polygon_radius(R, n, math.pi / n) == pytest.approx(R * math.cos(math.pi / n))
    lay = Layout.from_dict({
        "machine": {"diameter_m": 2 * R, "shield_length_m": 10.0, "cutterhead_thickness_m": 1.0},
        "electrode": [{"label": "S", "kind": "shield", "axial_m": -3.0, "radius_m": 3.1,
                       "angle_deg": 15.0},
                      {"label": "T", "kind": "shield", "axial_m": -6.0, "radius_m": 3.1},
                      {"label": "R1", "kind": "remote"}],
        "measurement": [{"a": "S", "b": "R1", "m": "T", "n": "R1"}]}, source="<gap test>")
    pts, _ = electrode_points(lay, None, n_segments=n)
    r = math.hypot(*pts["S"][1:])
    assert r - R * math.cos(math.pi / n) == pytest.approx(0.1)
