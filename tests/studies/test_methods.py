"""Fast unit tests of tbminv.methods pieces that need no forward model."""

import math

import numpy as np
import pandas as pd
import pytest

from tbminv.layout import demo_layout_path, load_layout
from tbminv.plots.methods import save_comparison
from tbminv.readings.advance import AdvanceData
from tbminv.studies import methods as M


def test_equivalent_contact_of_a_sharp_step_is_the_step():
    a = np.linspace(0.1, 30.0, 300)
    for d in (3.0, 11.7, 25.0):
        v = np.where(a < d, math.log(80.0), math.log(12.0))
        got = M.equivalent_contact(a, v)
        assert abs(got - d) < 0.11          # within one sample spacing


def test_equivalent_contact_of_a_linear_ramp_is_its_midpoint():
    # a straight ramp between two levels has its equivalent sharp step at the midpoint
    # (the step with the same area under the normalised curve; elementary geometry)
    a = np.linspace(0.0, 20.0, 2001)
    v = np.interp(a, [0.0, 6.0, 14.0, 20.0], [1.0, 1.0, 3.0, 3.0])
    assert M.equivalent_contact(a, v) == pytest.approx(10.0, abs=1e-6)


def test_equivalent_contact_needs_a_contrast():
    a = np.linspace(0.0, 20.0, 50)
    v = np.full_like(a, math.log(50.0)) + 0.01 * np.sin(a)
    assert math.isnan(M.equivalent_contact(a, v, min_contrast=1.25))
    with pytest.raises(ValueError):
        M.equivalent_contact(a[::-1], v)


def test_slab_contact_interpolates_an_intermediate_slab():
    # slabs [0, 6), [6, 15), [15, 30), [30, inf): a contact at 10 m inside the second slab
    # gives that slab a value a fraction (15 - 10) / 9 of the way to the far value (in log)
    b = [0.0, 6.0, 15.0, 30.0]
    near, far = math.log(80.0), math.log(12.0)
    f = (15.0 - 10.0) / 9.0
    v = [near, near + f * (far - near), far, far]
    assert M.slab_contact(b, v, near) == pytest.approx(10.0, abs=0.06)
    assert np.allclose(M.slab_profile(b, v, np.array([-1.0, 0.5, 7.0, 20.0, 100.0])),
                       [v[0], v[0], v[1], v[2], v[3]])


def test_gauss_newton_matches_linear_least_squares():
    # a linear model in log space: the damped Gauss-Newton must reach the weighted
    # least-squares solution of numpy.linalg.lstsq
    rng = np.random.default_rng(3)
    A = rng.normal(size=(30, 4))
    p_true = np.array([1.0, -0.5, 2.0, 0.3])
    err = np.full(30, 0.01)                 # errors smaller than the noise: chi2 stays > 1
    y = A @ p_true + rng.normal(scale=0.05, size=30)
    p, hist, nf = M.gauss_newton_log(lambda p: A @ p, y, err, np.zeros(4), lam=1e-3,
                                     max_iter=20, bounds=(-10.0, 10.0), min_dphi=1e-9)
    ref = np.linalg.lstsq(A / err[:, None], y / err, rcond=None)[0]
    assert hist[-1] > 1.0
    assert np.allclose(p, ref, atol=1e-3)
    assert hist[-1] <= hist[0] and nf > 1


def test_slab_scenario_fills_slabs():
    sc = M.slab_scenario(1200.0, [0.0, 6.0, 15.0], 80.0, [70.0, 40.0, 12.0])
    x = np.array([1190.0, 1203.0, 1210.0, 1300.0])
    assert np.allclose(sc.resistivity(x, 0.0 * x, 0.0 * x), [80.0, 70.0, 40.0, 12.0])


def test_compact_layout_and_machine_only_variant():
    lay = load_layout(demo_layout_path())
    small = M.compact_layout(lay)
    assert small.generators == ()
    assert len(small.measurements) == len(lay.explicit_measurements) + len(M.COMPACT_EXTRA)
    inf = {e.label for e in lay.electrodes if e.at_infinity}
    assert not any(x in inf for q in small.measurements for x in q.labels() if x)
    machine = M.compact_layout(lay, walls=False)
    walls = {e.label for e in lay.electrodes if e.kind == "wall"}
    assert not any(x in walls for q in machine.measurements for x in q.labels() if x)
    assert 3 <= len(machine.measurements) < len(small.measurements)


def test_error_floor_adds_in_quadrature():
    d = AdvanceData(1, 1200.0, 0.0, np.array([1.0, 2.0]), np.array([0.03, np.nan]), 2, 1)
    out = M.with_error_floor([d], 0.04)[0]
    assert out.rel_error[0] == pytest.approx(0.05)     # 3-4-5
    assert math.isnan(out.rel_error[1])
    assert d.rel_error[0] == 0.03                      # input untouched
    with pytest.raises(ValueError):
        M.with_error_floor([d], -0.1)


def _records():
    rows = []
    for m in M.METHODS:
        for k, face in enumerate((1220.0, 1225.0)):
            rows.append(M.AdvanceRecord(m, "default", "compact", k + 1, face, 1240.0 - face,
                                        1240.0 - face + (1.0 if m == "axisym" else math.nan),
                                        1.0 if m == "axisym" else math.nan, 1.0 + 0.1 * k,
                                        2.0, 3, 14, 2.5))
    return rows


def test_tables_have_a_row_per_method():
    table = M.records_table(_records())
    assert list(table.columns) == list(M.RECORD_COLUMNS)
    summ = M.summary_table(table)
    assert set(summ["method"]) == set(M.METHODS) and len(summ) == len(M.METHODS)
    ax = summ.set_index("method").loc["axisym"]
    assert ax["found"] == 2 and ax["median_abs_error_m"] == pytest.approx(1.0)
    assert summ.set_index("method").loc["region3d", "found"] == 0
    assert ax["median_chi2"] == pytest.approx(1.05)


def test_save_comparison_writes_tables_and_figures(tmp_path):
    table = M.records_table(_records())
    paths = save_comparison(table, tmp_path, stem="cmp")
    names = {p.name for p in paths}
    assert {"cmp.csv", "cmp_summary.csv", "cmp.pdf", "cmp.png"} <= names
    back = pd.read_csv(tmp_path / "cmp.csv")
    assert len(back) == len(table)


def test_settings_are_checked():
    with pytest.raises(ValueError):
        M.MethodCase("nonsense")
    with pytest.raises(ValueError):
        M.Region3DSettings(boundaries_in_diameters=(1.0, 2.0))
    with pytest.raises(ValueError):
        M.Region3DSettings(lam=0.0)


def test_gauss_newton_with_smoothness_matches_augmented_least_squares():
    # phi = |W (A p - y)|^2 + s |C p|^2 is the stacked least-squares problem
    # [W A; sqrt(s) C] p = [W y; 0], solved here by numpy.linalg.lstsq
    rng = np.random.default_rng(5)
    A = rng.normal(size=(12, 5))
    err = np.full(12, 0.02)                 # errors smaller than the noise: chi2 stays > 1
    y = A @ np.array([0.0, 2.0, -1.0, 0.5, 1.5]) + rng.normal(scale=0.1, size=12)
    C = np.diff(np.eye(5), axis=0)
    s = 4.0
    p, hist, _ = M.gauss_newton_log(lambda p: A @ p, y, err, np.zeros(5), lam=1e-4,
                                    max_iter=30, bounds=(-10.0, 10.0), min_dphi=1e-12,
                                    roughness=C, smoothness=s)
    big = np.vstack([A / err[:, None], np.sqrt(s) * C])
    ref = np.linalg.lstsq(big, np.concatenate([y / err, np.zeros(4)]), rcond=None)[0]
    assert hist[-1] > 1.0
    assert np.allclose(p, ref, atol=1e-3)
    assert hist[-1] < hist[0]


def test_image_contact_reads_the_axis_column():
    from types import SimpleNamespace

    lay = load_layout(demo_layout_path())
    a = np.arange(-20.0, 31.0, 0.5) + 0.25
    r = np.arange(0.0, 15.0, 0.5) + 0.25
    rho = np.full((a.size, r.size), 80.0)
    rho[a > 12.0, :] = 12.0                       # a sharp contact 12 m ahead
    res = SimpleNamespace(ahead_m=a, radius_m=r, resistivity_ohmm=rho)
    assert M.image_contact(res, lay) == pytest.approx(12.0, abs=0.5)
    res.resistivity_ohmm = np.full_like(rho, 80.0)
    assert math.isnan(M.image_contact(res, lay))


@pytest.mark.slow
def test_p1_simulation_model_obeys_reciprocity():
    """The comparison's simulation model is pyGIMLi's 3D forward with linear elements (P1) on
    the default mesh, and obeys reciprocity: swapping the current and potential pairs leaves R
    unchanged (Parasnis 1988, Reciprocity theorems in geoelectric and geoelectromagnetic work,
    Geoexploration 25:177-198, from memory). Its finite-element system is symmetric, so the
    discrete model obeys it to solver precision (measured below 1e-9 for P2 with this
    project's model, tests/forward/test_fem3d_model.py); allowed 1e-6."""
    from tbminv.forward.fem3d.model import Fem3DSettings, forward3d
    from tbminv.ground import Scenario

    lay = M.compact_layout(load_layout(demo_layout_path()), walls=False)
    model = M.model_3d_p1(lay)
    assert model.settings == Fem3DSettings(p2=False)
    quads = [q.labels() for q in lay.measurements][:4]
    recip = [(m, n, a, b) for a, b, m, n in quads]
    sc = Scenario.homogeneous(100.0)
    r = model.response(sc, 1222.0, 0.0, quads)
    assert np.all(np.abs(r) > 0)
    rr = forward3d(lay, sc, 1222.0, 0.0, recip,
                   settings=Fem3DSettings(p2=False, use_reciprocity=False))
    np.testing.assert_allclose(rr, r, rtol=1e-6)
