"""Ratio correction of the ground surface (tbminv.forward.ratio.surface_factors).

The correction factor f = R(with surface) / R(without) of a homogeneous ground is checked
against the image method (one image source mirrored in the insulating surface; Telford,
Geldart & Sheriff 1990, Applied Geophysics, sec. 8.3), and the corrected contact fit against
a drive made with the 3D model under a surface 12 m above the crown (no inverse crime).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from tbminv.forward.analytic import layout_response
from tbminv.forward.ratio import needs_correction, surface_factors
from tbminv.ground import Scenario
from tbminv.layout import Layout, load_layout
from tests.helpers import DATA

D = 6.0


def _point_layout(cover_m: float) -> Layout:
    """No machine, no bore: electrodes are points in the ground (closed forms apply)."""
    els = [{"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.5,
            "angle_deg": 0},
           {"label": "T2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.0,
            "angle_deg": 90},
           {"label": "S1", "kind": "shield", "axial_m": -3.0, "radius_m": 3.1, "angle_deg": 0},
           {"label": "S2", "kind": "shield", "axial_m": -8.0, "radius_m": 3.1,
            "angle_deg": 180},
           {"label": "W1", "kind": "wall", "chainage_m": 480.0, "radius_m": 3.1,
            "angle_deg": 0},
           {"label": "R1", "kind": "remote"}]
    meas = [{"a": a, "b": "R1", "m": m, "n": "R1"}
            for a in ("T1", "S1") for m in ("T2", "S2", "W1")]
    meas += [{"a": "T1", "b": "S2", "m": "T2", "n": "S1"},
             {"a": "S1", "b": "W1", "m": "T1", "n": "S2"}]
    return Layout.from_dict({
        "machine": {"diameter_m": D, "shield_length_m": 10.0, "cutterhead_thickness_m": 1.0,
                    "model_body": False},
        "tunnel": {"cover_m": cover_m, "model_cavity": False, "length_m": 30.0},
        "electrode": els, "measurement": meas}, source="<surface test layout>")


def test_deep_tunnel_needs_no_correction():
    lay = load_layout(DATA / "fixture_layout.toml")
    assert not needs_correction(lay)
    assert np.all(surface_factors(lay, 0.0) == 1.0)


@pytest.mark.slow
@pytest.mark.parametrize("method", ["direct", "table"])
def test_surface_factor_matches_image_method(method):
    """Direct 3D factors, and the block table interpolated between its face and angle nodes
    (faces 501.3 and 507.9 m, angles 37 and 203 degrees are off the 2 m / 30 degree nodes),
    against the image method (Telford et al. 1990, sec. 8.3). 1 %: the 3D model's own
    accuracy on this coarse point layout (measured with this project's model, this file)."""
    lay = _point_layout(cover_m=6.0)
    deep = dataclasses.replace(lay, tunnel=dataclasses.replace(lay.tunnel, cover_m=math.inf))
    sc = Scenario.homogeneous(40.0)
    points = [(500.0, 0.0)] + ([(501.3, 37.0), (507.9, 203.0)] if method == "table" else [])
    for face, angle in points:
        want = layout_response(lay, sc, face, angle) / layout_response(deep, sc, face, angle)
        got = surface_factors(lay, face, angle, rho_ohmm=40.0, use_cache=False, method=method)
        assert want.max() > 1.5   # the surface matters
        np.testing.assert_allclose(got, want, rtol=0.01, err_msg=f"face {face}, angle {angle}")


@pytest.mark.slow
def test_corrected_contact_fit_under_a_surface():
    # 1:10 contact at chainage 30 m, ground 50 ohm-m, surface 12 m above the crown (2 D), 3D
    # model, 2 % noise, seed 19 (tests/data/make_drive_fixtures.py); faces 6..27 m every 3 m
    from tbminv.inversion.drive import DriveInverter
    from tbminv.inversion.settings import InversionSettings
    from tbminv.readings.advance import prepare_advances
    from tbminv.readings.qc import QCSettings

    lay = load_layout(DATA / "fixture_layout_cover12.toml")
    data = prepare_advances(DATA / "drive_cover12_contact01_seed19.csv", lay,
                            QCSettings(error_model_group="log")).advances
    inv = DriveInverter(lay, InversionSettings(forward_settings="fast"))
    inv.reference_resistivity(data[0])
    use = [inv.surface_corrected(d) for d in data]
    ratio = np.array([u.r_ohm / d.r_ohm for u, d in zip(use, data)])
    assert np.nanmax(np.abs(ratio - 1.0)) > 0.01       # the surface is seen and removed
    fits, _failed = inv._contacts(use)
    rows = [(d.face_chainage_m, c) for d, c in zip(data, fits)
            if 30.0 - d.face_chainage_m <= 2 * D + 1e-9]
    assert len(rows) >= 4
    for f, c in rows:   # from 2 D ahead on: found, on the right side, within 0.5 D
        assert c.found, (f, c)
        assert c.resistivity_beyond_ohmm < c.resistivity_around_ohmm
        assert abs(c.ahead_m - (30.0 - f)) <= 0.5 * D, (f, c.ahead_m)


def test_table_copies_sit_where_the_electrodes_are_at_each_node():
    """The block table's copies are the layout's electrodes at each (angle, face) node: a
    turned copy at angle node k is the electrode at cutterhead angle k * 360 / n, a fixed copy
    at face node j is the electrode seen from face F_0 + j * step (positions from the layout's
    own frames, :meth:`Layout.positions_machine`)."""
    from tbminv.forward.copies import copy_label as _copy_label
    from tbminv.forward.copies import node_layout
    from tbminv.forward.surfacetable import SurfaceTableSpec

    lay = _point_layout(cover_m=6.0)
    spec = SurfaceTableSpec()
    turning = {"T1", "T2"}
    big = node_layout(lay, [k * 360.0 / spec.angle_nodes for k in range(spec.angle_nodes)],
                      [j * spec.face_step_m for j in range(spec.face_nodes)])
    f0 = 480.0
    seen = big.positions_machine(f0, 0.0)
    for k in range(spec.angle_nodes):
        want = lay.positions_machine(f0, k * 360.0 / spec.angle_nodes)
        for lab in turning:
            got = seen[_copy_label(lab, k, 0) if k else lab]
            np.testing.assert_allclose(got, want[lab], atol=1e-9)
    for j in range(spec.face_nodes):
        want = lay.positions_machine(f0 + j * spec.face_step_m, 0.0)
        got = seen[_copy_label("W1", 0, j) if j else "W1"]
        np.testing.assert_allclose(got, want["W1"], atol=1e-9)


@pytest.mark.slow
def test_3d_readings_at_several_angles_from_one_mesh_match_image_method():
    """``Model3D.response_angles`` (every angle's electrodes in one mesh) against the image
    method under a 6 m cover (Telford et al. 1990, sec. 8.3), where the surface makes the
    readings depend on the cutterhead angle. 1 %: the 3D model's accuracy on this coarse point
    layout (measured with this project's model, this file)."""
    from tbminv.forward.fem3d.model import Model3D

    lay = _point_layout(cover_m=6.0)
    sc = Scenario.homogeneous(40.0)
    angles = [0.0, 37.0, 203.0]
    got = Model3D(lay).response_angles(sc, 500.0, angles)
    want = [layout_response(lay, sc, 500.0, a) for a in angles]
    assert np.max(np.abs(want[1] / want[0] - 1.0)) > 0.02   # the angle matters here
    for a, g, w in zip(angles, got, want):
        np.testing.assert_allclose(g, w, rtol=0.01, err_msg=f"angle {a}")
