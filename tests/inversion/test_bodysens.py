"""Harmonic 3D sensitivity of the axisymmetric background (tbminv.inversion.bodysens)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.inversion.bodysens import (
    BodySensitivity,
    cylindrical_to_machine,
    machine_to_cylindrical,
)
from tbminv.layout import Layout
from tests.helpers import full_space_layout

FACE = 1000.0


def _layout(body: bool, cavity: bool, nodes_at: np.ndarray | None = None) -> Layout:
    """The test layout; ``nodes_at`` (machine frame, m) adds unused ground-fixed electrodes
    there: the 3D mesh refines around every electrode, so a small body gets many cells."""
    extra = [] if nodes_at is None else [
        {"label": f"G{i}", "kind": "remote", "chainage_m": FACE + float(p[0]),
         "y_m": float(p[1]), "z_m": float(p[2])} for i, p in enumerate(nodes_at)]
    els = extra + [{"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 1.5,
            "angle_deg": 30.0},
           {"label": "T2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.5,
            "angle_deg": 200.0},
           {"label": "S1", "kind": "shield", "axial_m": -2.0, "radius_m": 3.05,
            "angle_deg": 90.0},
           {"label": "R", "kind": "remote"}]
    if body:
        els.append({"label": "BODY", "kind": "machine"})
    meas = [{"a": "T1", "b": "R", "m": "T2", "n": "R"}]
    if body:
        meas += [{"a": "T1", "b": "R", "m": "BODY", "n": "R"},
                 {"a": "BODY", "b": "R", "m": "S1", "n": "R"},
                 {"a": "T1", "b": "T2", "m": "S1", "n": "BODY"}]
    return full_space_layout(els, meas, "body sensitivity test layout", body, cavity)


def test_frames_round_trip():
    """Bearing convention: 90 deg is -y (clockwise from the crown, z up, looking ahead)."""
    p = np.array([[2.0, 3.0, 90.0], [1.0, 2.0, 0.0], [4.0, 1.0, 225.0]])
    xyz = cylindrical_to_machine(p)
    np.testing.assert_allclose(xyz[0], [2.0, -3.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(xyz[1], [1.0, 0.0, 2.0], atol=1e-12)
    np.testing.assert_allclose(machine_to_cylindrical(xyz), p, atol=1e-12)


@pytest.mark.parametrize("cutterhead_deg", [0.0, 45.0, 170.0])
def test_full_space_pole_pole_closed_form(cutterhead_deg):
    """No steel, no bore: the density is the full-space pole-pole Frechet derivative.

    ``dV/d ln(sigma) = -sigma grad u . grad v`` with ``u = rho / (4 pi |x - s|)`` and
    ``v = rho / (4 pi |x - k|)`` (adjoint sensitivity: Geselowitz 1971, IEEE Trans. Biomed.
    Eng. 18(1):38-41; the pole-pole form as in Loke & Barker 1995, Geophysics 60(6):1682-1690,
    from memory). Points 1.5-7 m from the electrodes, off the axis, all bearings; 5 % is the
    mesh's gradient accuracy relative to ``|grad u| |grad v|`` (measured with this project's
    model, this file).
    """
    rho = 100.0
    lay = _layout(body=False, cavity=False)
    bs = BodySensitivity(lay, [("T1", "R", "T2", "R")], FACE, rho)
    pts = np.array([[2.0, 1.0, 60.0], [3.0, 2.5, 120.0], [1.5, 3.0, 300.0], [4.0, 0.5, 10.0],
                    [6.0, 4.0, 90.0], [2.5, 2.0, 200.0], [5.0, 6.0, 250.0]])
    g = bs.density([0], [cutterhead_deg], pts)[0]
    pos = lay.positions_machine(FACE, cutterhead_deg)
    x = cylindrical_to_machine(pts)
    ds, dk = x - pos["T1"], x - pos["T2"]
    scale = rho / (16.0 * math.pi ** 2 * np.linalg.norm(ds, axis=1) ** 3
                   * np.linalg.norm(dk, axis=1) ** 3)
    ref = -scale * np.sum(ds * dk, axis=1)
    # error against |grad u| |grad v| (the dot product can cancel): what the mesh controls
    size = scale * np.linalg.norm(ds, axis=1) * np.linalg.norm(dk, axis=1)
    assert np.max(np.abs(g - ref) / size) < 0.05


def test_background_response_turns_with_the_head():
    """The background pole-pole resistance is the full-space one at every angle.

    ``R = rho / (4 pi |s - k|)`` (Telford, Geldart & Sheriff 1990, sec. 8.2, from memory);
    the cutterhead tools turn together, so their distance and R do not change.
    """
    lay = _layout(body=False, cavity=False)
    bs = BodySensitivity(lay, [("T1", "R", "T2", "R")], FACE, 100.0)
    pos = lay.positions_machine(FACE, 0.0)
    ref = 100.0 / (4 * math.pi * np.linalg.norm(pos["T1"] - pos["T2"]))
    for a in (0.0, 90.0, 250.0):
        assert bs.background_response(a)[0] == pytest.approx(ref, rel=0.01)


def test_point_outside_region_is_refused():
    lay = _layout(body=False, cavity=False)
    bs = BodySensitivity(lay, [("T1", "R", "T2", "R")], FACE, 100.0, ahead_max_m=5.0)
    with pytest.raises(ValueError, match="outside the sensitivity region"):
        bs.density([0], [0.0], np.array([[30.0, 1.0, 0.0]]))
    with pytest.raises(ValueError, match="outside"):
        bs.density([0], [0.0], np.array([[-1.0, 1.0, 0.0]]))


@pytest.mark.slow
def test_harmonic_sensitivity_vs_3d_finite_difference():
    """Steel and bore in: the harmonic sensitivity of a small off-axis cell against pyGIMLi 3D.

    A sphere of radius 0.75 m, 2.5 m ahead, 2 m off the axis at bearing 100 deg is given
    ``sigma x 1.1`` and ``sigma / 1.1``; the central difference of the 3D transfer resistances
    divided by ``2 ln 1.1`` is ``dR / d ln(sigma)`` of that cell, to second order. The
    harmonic sum integrates the density over the very 3D cells that changed (centre x volume).
    Within 10 % (measured: 0.1-1.1 % for the pole readings; the four-electrode reading, a
    small difference of its pole terms, 0.02 % of their magnitudes, 29 % of its own tiny
    value). Unused ground-fixed electrodes on a lattice in the sphere refine the 3D mesh
    there (1298 cells changed). Reference: pyGIMLi 3D P2 (Ruecker, Guenther & Wagner 2017,
    Computers & Geosciences 109:106-123), a general-purpose finite-element library.
    """
    from tbminv.forward.fem3d.mesh import MeshSettings
    from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D, cell_resistivity
    from tbminv.ground import Scenario, Sphere

    rho = 100.0
    ahead, off, bearing, rad = 2.5, 2.0, 100.0, 0.75
    centre = cylindrical_to_machine(np.array([[ahead, off, bearing]]))[0]
    lattice = np.stack(np.meshgrid(*[[-0.45, 0.0, 0.45]] * 3, indexing="ij"), -1).reshape(-1, 3)
    lay = _layout(body=True, cavity=True, nodes_at=centre + lattice)
    quads = [q.labels() for q in lay.measurements]
    ms = MeshSettings(box_m=150.0, n_segments=12, face_size_m=0.5, growth=1.4,
                      refine_ahead_m=10.0, electrode_size_m=0.15)
    fw = Forward3D(lay, Fem3DSettings(mesh=ms))
    k = 1.1

    def scenario(f: float) -> Scenario:
        return Scenario(rho, spheres=(Sphere(FACE + centre[0], rad, rho / f, centre[1],
                                             centre[2]),))

    r_up = fw.run(scenario(k), FACE, 0.0, quads)
    r_dn = fw.run(scenario(1.0 / k), FACE, 0.0, quads)
    fd = (r_up.r_ohm - r_dn.r_ohm) / (2.0 * math.log(k))
    tm = r_up.tmesh
    changed = cell_resistivity(tm, lay, scenario(k), FACE) != cell_resistivity(
        tm, lay, Scenario.homogeneous(rho), FACE)
    assert changed.sum() > 20
    cells = np.nonzero(changed)[0]
    vol = np.array([tm.mesh.cell(int(c)).size() for c in cells])
    cyl = machine_to_cylindrical(tm.cell_centers()[cells])
    # the pole-pole terms of every reading: a four-electrode reading is judged against the
    # sum of their magnitudes (it is their small difference; for a pole-pole reading, itself)
    poles = sorted({(s_, "R", k, "R") for q in quads for s_ in q[:2] if s_ not in (None, "R")
                    for k in q[2:] if k not in (None, "R")})
    bs = BodySensitivity(lay, quads + poles, FACE, rho)
    n_all = len(quads) + len(poles)
    harm_all = bs.density(np.arange(n_all), np.zeros(n_all), cyl) @ vol
    harm, pole_val = harm_all[:len(quads)], dict(zip(poles, harm_all[len(quads):]))
    size = np.array([sum(abs(pole_val[(s_, "R", k, "R")]) for s_ in q[:2]
                         if s_ not in (None, "R") for k in q[2:] if k not in (None, "R"))
                     for q in quads])
    assert np.all(np.abs(fd) > 0)
    np.testing.assert_array_less(np.abs(harm - fd), 0.10 * size)


@pytest.mark.slow
def test_confirm_with_3d_prefers_the_body():
    """3D data of a conductive sphere at three cutterhead angles, 2 % noise: the 3D model
    with the fitted sphere explains them better than without (pyGIMLi 3D P2 on both sides;
    measured with this project's model, this file)."""
    from tbminv.forward.fem3d.mesh import MeshSettings
    from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D
    from tbminv.ground import Scenario, Sphere
    from tbminv.inversion.bodyconfirm import confirm_with_3d, sphere_for_moment
    from tbminv.inversion.bodyfit import AdvanceReadings, BodyFit
    from tbminv.studies.bodyreach import sphere_moment_m3

    lay = _layout(body=True, cavity=True)
    quads = [q.labels() for q in lay.measurements]
    ms = MeshSettings(box_m=150.0, n_segments=12, face_size_m=0.5, growth=1.4,
                      refine_ahead_m=10.0, electrode_size_m=0.15)
    settings = Fem3DSettings(mesh=ms)
    centre = cylindrical_to_machine(np.array([[3.0, 2.5, 120.0]]))[0]
    truth = Scenario(100.0, spheres=(Sphere(FACE + centre[0], 1.5, 10.0, centre[1],
                                            centre[2]),))
    fw = Forward3D(lay, settings)
    angles = [0.0, 120.0, 240.0]
    rng = np.random.default_rng(3)
    r = np.concatenate([fw.run(truth, FACE, a, quads).r_ohm for a in angles])
    r *= 1.0 + 0.02 * rng.standard_normal(r.size)
    rd = AdvanceReadings(tuple(quads) * 3, np.repeat(angles, len(quads)), r,
                         np.full(r.size, 0.02), FACE)
    q = sphere_moment_m3(1.5, 0.1)
    assert sphere_for_moment(q, 1.5) == pytest.approx((1.5, 0.1))
    fit = BodyFit(body_ahead_m=3.0, body_bearing_deg=120.0, body_offset_m=2.5,
                  body_moment_m3=q, found=True)
    conf = confirm_with_3d(fit, rd, lay, 100.0, radius_m=1.5, settings=settings)
    assert conf.resistivity_ratio == pytest.approx(0.1)
    assert conf.chi2_body_3d < conf.chi2_none_3d
