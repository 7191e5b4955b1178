"""Axisymmetric model glued to layouts, scenarios and pyGIMLi's inversion."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.forward.analytic import layout_response
from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.forward.axisym.layout import AxisymLayoutSolver, AxisymModel
from tbminv.forward.axisym.mesh import CylMeshSettings
from tbminv.ground import NotAxisymmetricError, Scenario
from tbminv.layout import Layout

COARSE = AxisymSettings(mesh=CylMeshSettings(h_fine_m=0.1, growth=1.3, domain_m=300.0),
                        max_harmonics=30)


def _layout(model_body=True, model_cavity=True):
    return Layout.from_dict({
        "machine": {"diameter_m": 6.0, "shield_length_m": 8.0, "cutterhead_thickness_m": 1.0,
                    "model_body": model_body},
        "tunnel": {"cover_m": "inf", "lining_resistivity_ohmm": 300.0,
                   "model_cavity": model_cavity, "length_m": 30.0},
        "electrode": [
            {"label": "T1", "kind": "cutterhead", "axial_m": 0.2, "radius_m": 0.5},
            {"label": "T2", "kind": "cutterhead", "axial_m": 0.2, "radius_m": 1.5,
             "angle_deg": 90.0},
            {"label": "T3", "kind": "cutterhead", "axial_m": 0.2, "radius_m": 2.5,
             "angle_deg": 180.0},
            {"label": "S1", "kind": "shield", "axial_m": -2.0, "radius_m": 3.2},
            {"label": "SB", "kind": "shield", "axial_m": -4.0, "radius_m": 3.0,
             "insulated": False},
            {"label": "R", "kind": "remote"},
        ],
        "protocol": {"generate": ["pole-pole"], "remote": "R"},
        "measurement": [{"a": "SB", "b": "R", "m": "T1", "n": "R"},
                        {"a": "T1", "b": "T2", "m": "T3", "n": "S1"}],
    }, source="<test layout>")


def test_from_layout_matches_closed_form_without_body():
    """No body, no cavity: the protocol's transfer resistances equal the full-space closed
    forms (V = rho I / (4 pi R), Telford et al. 1990 sec. 8.2) within 0.5 %; cutterhead turns
    are honoured."""
    lay = _layout(model_body=False, model_cavity=False)
    lay = Layout.from_dict({**lay.to_dict(), "measurement": [
        {"a": "T1", "b": "T2", "m": "T3", "n": "S1"}]}, source="<test>")
    model = AxisymLayoutSolver(lay, settings=COARSE)
    sc = Scenario.homogeneous(40.0)
    for ch in (0.0, 37.0):
        r = model.response_scenario(sc, 1000.0, cutterhead_deg=ch)
        ref = layout_response(lay, sc, 1000.0, cutterhead_deg=ch)
        np.testing.assert_allclose(r, ref, rtol=5e-3)


def test_from_layout_with_steel_and_bare_electrode():
    lay = _layout()
    model = AxisymLayoutSolver(lay, settings=COARSE)
    r = model.response_scenario(Scenario.homogeneous(100.0), 500.0)
    assert r.shape == (len(lay.measurements),)
    assert np.all(np.isfinite(r))
    # pole-pole readings with the steel in are positive
    pp = [i for i, q in enumerate(lay.measurements) if q.b == "R" and q.n == "R"]
    assert np.all(r[pp] > 0)
    # the registry model gives the same numbers
    reg = AxisymModel(lay, settings=COARSE)
    np.testing.assert_allclose(reg.response(Scenario.homogeneous(100.0), 500.0), r, rtol=1e-10)


def test_not_axisymmetric_scenario_is_refused():
    lay = _layout()
    model = AxisymLayoutSolver(lay, settings=COARSE)
    sc = Scenario.from_dict({"background_resistivity_ohmm": 50.0,
                             "sphere": [{"chainage_m": 20.0, "y_m": 2.0, "z_m": 0.0,
                                         "radius_m": 1.0, "resistivity_ohmm": 5.0}]})
    with pytest.raises(NotAxisymmetricError, match="3D"):
        model.response_scenario(sc, 0.0)


def test_modelling_inversion_smoke():
    """pyGIMLi's Inversion on the axisymmetric Modelling recovers a homogeneous ground
    (invariant: homogeneous ground returns its resistivity; common practice, no source)."""
    from tbminv.gimli import pg
    from tbminv.inversion.grid import build_parameter_grid
    from tbminv.inversion.operator import DriveOperator, ImageModelling
    from tbminv.inversion.settings import InversionSettings

    lay = _layout()
    grid = build_parameter_grid(lay, InversionSettings(cell_m=3.0, ahead_m=12.0, behind_m=12.0,
                                                       radius_m=8.0, growth=2.0),
                                domain_m=300.0)
    # the operator's forward mesh carries the parameter grid lines
    model = DriveOperator(lay, grid, 0.0, 0.0, AxisymLayoutSolver(lay, settings=COARSE)).fwd
    # numeric geometric factors from a homogeneous run with the bodies in (k = rho / R)
    r1 = model.response(np.full(len(model.forward.ground_cells), 100.0))
    sel = np.nonzero(r1 > 0)[0]
    k = 100.0 / r1[sel]
    fop = ImageModelling(model, grid, scale=k, select=sel)
    data = np.asarray(fop.response(np.full(grid.n_param, 100.0)))
    np.testing.assert_allclose(data, 100.0, rtol=1e-8)
    # the Jacobian is filled and not zero
    fop.createJacobian(pg.Vector(grid.n_param, 80.0))
    jac = np.array([np.array(fop.jacobian().row(i)) for i in range(sel.size)])
    assert np.abs(jac).max() > 0
    inv = pg.Inversion(fop=fop)
    inv.dataTrans = pg.trans.TransLog()
    inv.modelTrans = pg.trans.TransLogLU(1.0, 1e4)
    res = inv.run(pg.Vector(data), pg.Vector(sel.size, 0.01),
                  startModel=pg.Vector(grid.n_param, 30.0), lam=10, maxIter=8, verbose=False)
    res = np.asarray(res)
    resp = np.asarray(fop.response(res))
    assert np.max(np.abs(resp / data - 1)) < 0.02
    assert inv.chi2() < 2.0
    assert math.isclose(float(np.median(res)), 100.0, rel_tol=0.1)


def test_registry_model_takes_label_tuples_and_reciprocals():
    """``AxisymModel.response(..., measurements)`` gives the closed-form numbers for (a, b, m, n)
    tuples (empty for a pole) and their reciprocals (no body, no cavity)."""
    lay = _layout(model_body=False, model_cavity=False)
    quads = [("T1", "T2", "T3", "S1"), ("T1", "", "T3", ""), ("T3", "S1", "T1", "T2")]
    sc = Scenario.homogeneous(40.0)
    r = AxisymModel(lay).response(sc, 100.0, 0.0, quads)
    lay2 = Layout.from_dict({**lay.to_dict(), "protocol": {}, "measurement": [
        {"a": "T1", "b": "T2", "m": "T3", "n": "S1"}, {"a": "T1", "m": "T3"},
        {"a": "T3", "b": "S1", "m": "T1", "n": "T2"}]}, source="<t>")
    ref = layout_response(lay2, sc, 100.0)
    np.testing.assert_allclose(r, ref, rtol=5e-3)
    np.testing.assert_allclose(r[2], r[0], rtol=1e-6)       # reciprocity
    with pytest.raises(ValueError, match="unknown electrode 'X9'"):
        AxisymModel(lay).response(sc, 100.0, 0.0, [("T1", None, "X9", None)])


@pytest.mark.parametrize("contact_ahead_m", [0.37, 2.9, 13.3])
def test_scenario_contact_fitted_to_mesh_line(contact_ahead_m):
    """A square contact from a scenario (not a mesh line when the mesh was built) moves a free
    mesh line onto itself: transfer resistances within 1 % of the image method (Telford et
    al. 1990 sec. 8.3), no body, no cavity. A contact nearer than ``near_field_m`` to ring
    electrodes needs that setting lowered and a larger harmonic factor."""
    lay = _layout(model_body=False, model_cavity=False)
    # pole-pole readings (potentials); a dipole-dipole differences them 10x down
    lay = Layout.from_dict({**lay.to_dict(), "measurement": [
        {"a": "T1", "b": "R", "m": "T3", "n": "R"}]}, source="<test>")
    close = contact_ahead_m < 1.0
    settings = AxisymSettings(near_field_m=0.1, harmonic_factor=5.0) if close else None
    model = AxisymLayoutSolver(lay, settings=settings)
    face = 100.0
    for rho2 in (400.0, 4.0):
        sc = Scenario.from_dict({"background_resistivity_ohmm": 40.0, "contact": [
            {"chainage_m": face + contact_ahead_m, "resistivity_ohmm": rho2}]})
        r = model.response_scenario(sc, face)
        ref = layout_response(lay, sc, face)
        np.testing.assert_allclose(r, ref, rtol=1e-2)
    assert model.forward.fit_x_lines([]) == 0  # restores the original lines
    np.testing.assert_array_equal(model.mesh.x, model.forward._x0)
