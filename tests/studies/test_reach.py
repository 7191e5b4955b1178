"""Look-ahead reach: both reach figures against the image method and the Gaussian detection
closed forms, sweeps serial vs dask, the CLI outputs."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq

from tbminv.forward.registry import make_model
from tbminv.layout import Layout
from tbminv.studies.reach import ReachSettings, reach_study
from tbminv.studies.sweep import run_sweep, scale_layout


def pole_pole_layout(diameter_m: float = 6.0) -> Layout:
    """Two insulated cutterhead electrodes, remote at infinity, no steel, no tunnel."""
    return Layout.from_dict({
        "machine": {"diameter_m": diameter_m, "shield_length_m": 9.0,
                    "cutterhead_thickness_m": 1.0, "model_body": False},
        "tunnel": {"model_cavity": False},
        "electrode": [
            {"label": "A", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.0},
            {"label": "M", "kind": "cutterhead", "axial_m": 0.05, "radius_m": diameter_m / 4,
             "angle_deg": 90.0},
            {"label": "R", "kind": "remote"},
        ],
        "measurement": [{"a": "A", "b": "R", "m": "M", "n": "R"}],
    })


def closed_form_relative_response(d: float, a: np.ndarray, m: np.ndarray, k: float) -> float:
    """Image method, both electrodes in medium 1, contact at x = d (Telford, Geldart & Sheriff
    1990, Applied Geophysics 2nd ed., sec. 8.3): V = rho1 I/(4 pi) (1/r + k/r')."""
    r = np.linalg.norm(m - a)
    img = a.copy()
    img[0] = 2 * d - a[0]
    r_img = np.linalg.norm(m - img)
    return k * r / r_img


def _grid_rule(d: np.ndarray, seen: np.ndarray) -> float:
    """The former rule: the last grid distance at which the change is seen."""
    return float(d[seen].max()) if seen.any() else 0.0


@pytest.mark.parametrize("model", ["analytic", "axisym"])
@pytest.mark.parametrize("contrast", [10.0, 0.1])
def test_reach_matches_image_method_crossing(model, contrast):
    layout = pole_pole_layout()
    fwd = make_model(model, layout)
    noise = 0.05
    # the default grid: 33 geometric steps of 12.8 %
    settings = ReachSettings(contrast=contrast, noise_rel=noise, k=3.0, model=model,
                             face_chainage_m=0.0)
    ds = reach_study(layout, settings, model=fwd)
    d = ds.distance_ahead.values
    # For model="analytic" the response below is the same image-method closed form the model
    # evaluates (checked on its own against the interface conditions in
    # tests/forward/test_analytic.py): that branch checks the reach machinery (threshold,
    # interpolated crossing) against a root found by scipy's brentq; "axisym" checks the
    # response too.
    kk = (contrast - 1) / (contrast + 1)
    a = np.array([0.05, 0.0, 0.0])
    m = np.array([0.05, -1.5, 0.0])
    # closed-form response at every distance
    expected = [closed_form_relative_response(x, a, m, kk) for x in d]
    np.testing.assert_allclose(ds.relative_response.values[0], expected, rtol=0.01)
    # closed-form distance where |dR/R| = 3 sigma/R = 3 * 0.05
    def excess(x: float) -> float:
        return abs(closed_form_relative_response(x, a, m, kk)) - 3 * noise

    d_star = brentq(excess, 0.06, 50)
    # tolerance: 0.5 % for the log-log interpolation between grid points, plus the model's
    # response tolerance above (1 % for axisym) divided by the log slope of the response there
    h = 1e-4
    slope = abs(np.log(abs(closed_form_relative_response(d_star * (1 + h), a, m, kk)))
                - np.log(abs(closed_form_relative_response(d_star, a, m, kk)))) / np.log1p(h)
    tol = 0.005 + (0.01 / slope if model == "axisym" else 0.0)
    assert float(ds.detectable_ahead_m[0]) == pytest.approx(d_star, rel=tol)
    assert float(ds.reach_per_reading_m) == pytest.approx(d_star, rel=tol)
    # the grid rule misses the crossing by more than the tolerance: the check can fail
    assert abs(_grid_rule(d, ds.detected.values[0]) - d_star) > tol * d_star
    # one reading cannot tell a contact from another resistivity around the machine: the
    # fitted homogeneous model (R = s R0) reproduces any single reading exactly, lambda = 0
    assert float(ds.reach_m) == 0.0
    assert not bool(ds.reach_at_grid_end)


def two_pole_layout(r1_m: float = 1.0, r2_m: float = 2.5) -> Layout:
    """A current pole at the centre of the cutterhead, two potential poles at other radii."""
    return Layout.from_dict({
        "machine": {"diameter_m": 6.0, "shield_length_m": 9.0, "cutterhead_thickness_m": 1.0,
                    "model_body": False},
        "tunnel": {"model_cavity": False},
        "electrode": [
            {"label": "A", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.0},
            {"label": "M1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": r1_m,
             "angle_deg": 90.0},
            {"label": "M2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": r2_m,
             "angle_deg": 90.0},
            {"label": "R", "kind": "remote"},
        ],
        "measurement": [{"a": "A", "b": "R", "m": "M1", "n": "R"},
                        {"a": "A", "b": "R", "m": "M2", "n": "R"}],
    })


def test_profiled_reach_two_readings_closed_form():
    # Two pole readings of the same sign: most of the contact's response is a common scale,
    # which the free resistivity around the machine absorbs.
    layout = two_pole_layout()
    noise, contrast = 0.02, 10.0
    settings = ReachSettings(contrast=contrast, noise_rel=noise, k=3.0, model="analytic",
                             face_chainage_m=0.0)
    ds = reach_study(layout, settings)
    kk = (contrast - 1) / (contrast + 1)
    a = np.array([0.05, 0.0, 0.0])
    ms = [np.array([0.05, -1.0, 0.0]), np.array([0.05, -2.5, 0.0])]

    # Image method for each response (Telford, Geldart & Sheriff 1990, Applied Geophysics 2nd
    # ed., sec. 8.3). Weighted least squares with equal relative errors b: the best common
    # scale is the mean response, and the minimum chi-squared of two readings is
    # (r1 - r2)^2 / (2 b^2) (the sample-variance identity).
    def lam(x: float) -> float:
        r1, r2 = (closed_form_relative_response(x, a, m, kk) for m in ms)
        return (r1 - r2) ** 2 / (2 * noise**2)

    np.testing.assert_allclose(ds.noncentrality.values,
                               [lam(x) for x in ds.distance_ahead.values], rtol=1e-6)
    # threshold: two-sided Gaussian test at 3 sigma with detection probability 1/2 needs a mean
    # shift of 3 sigma, lambda* = 9 (P(|N(3, 1)| > 3) = 1/2 + Phi(-6); Kay 1998, Fundamentals of
    # Statistical Signal Processing vol. II, ch. 3, from memory)
    assert float(ds.detection_threshold) == pytest.approx(9.0, rel=1e-6)
    # (lambda falls with distance from the grid's first point, 1.5 m, on)
    d_star = brentq(lambda x: lam(x) - 9.0, 1.5, 100.0)
    assert float(ds.reach_m) == pytest.approx(d_star, rel=0.005)
    # the per-reading figure assumes the resistivity known and is longer here
    assert float(ds.reach_m) <= float(ds.reach_per_reading_m)
    d_single = brentq(lambda x: abs(closed_form_relative_response(x, a, ms[1], kk)) - 3 * noise,
                      0.1, 100.0)
    assert float(ds.reach_per_reading_m) == pytest.approx(d_single, rel=0.005)
    assert float(ds.reach_m) < 0.8 * d_single


def test_stated_probabilities_hold_by_simulation():
    # The criterion claims: without a contact the test alarms with probability false_alarm, with
    # the contact at reach_m it alarms with probability detection_probability. Measured here by
    # Monte Carlo on Gaussian noise of the stated size, with the detector written out: weighted
    # least squares of R/R0 = s (homogeneous, s free) against R/R0 = s + t g (the contact's
    # signature g at that distance, strength t free), statistic = the drop in chi-squared,
    # alarm above the chi-squared(1) quantile. Binomial tolerances: 5 standard errors.
    from scipy.stats import chi2

    layout = two_pole_layout()
    noise, contrast = 0.02, 10.0
    settings = ReachSettings(contrast=contrast, noise_rel=noise, k=3.0, model="analytic",
                             face_chainage_m=0.0)
    ds = reach_study(layout, settings)
    reach = float(ds.reach_m)
    kk = (contrast - 1) / (contrast + 1)
    a = np.array([0.05, 0.0, 0.0])
    # image method at the reported reach (Telford, Geldart & Sheriff 1990, sec. 8.3)
    g = np.array([closed_form_relative_response(reach, a, m, kk)
                  for m in (np.array([0.05, -1.0, 0.0]), np.array([0.05, -2.5, 0.0]))])
    sigma = np.full(2, noise)
    x0 = (np.ones(2) / sigma)[:, None]
    x1 = np.column_stack([np.ones(2), g]) / sigma[:, None]

    def chi2_min(x: np.ndarray, yw: np.ndarray) -> np.ndarray:
        coef, *_ = np.linalg.lstsq(x, yw.T, rcond=None)
        return ((yw.T - x @ coef) ** 2).sum(axis=0)

    rng = np.random.default_rng(20261203)
    n = 200_000
    crit = chi2.isf(float(ds.attrs["false_alarm"]), 1)
    for truth, p_expected in ((np.zeros(2), float(ds.attrs["false_alarm"])),
                              (g, float(ds.attrs["detection_probability"]))):
        y = 1.0 + truth + rng.normal(0.0, 1.0, (n, 2)) * sigma   # R/R0 with noise
        yw = y / sigma
        q = chi2_min(x0, yw) - chi2_min(x1, yw)
        rate = float(np.mean(q > crit))
        se = np.sqrt(p_expected * (1 - p_expected) / n)
        # at the reach the noncentrality is lambda* up to the 0.5 % interpolation of the
        # distance (a change of about 0.1 in lambda, 0.01 in probability): allowed beside
        tol = 5 * se + (0.01 if p_expected > 0.1 else 0.0)
        assert abs(rate - p_expected) <= tol, (rate, p_expected)


def test_uniform_scaling_has_no_reach():
    # Ohm's law in a homogeneous ground, V = rho I / (4 pi r) (Telford, Geldart & Sheriff 1990,
    # sec. 8.2): another resistivity around the machine scales every transfer resistance alike.
    # Such a change is seen by every single reading but tells nothing about a contact.
    from tbminv.ground import Scenario
    from tbminv.studies.reach import detectability, response_vs_distance

    layout = two_pole_layout()
    settings = ReachSettings(contrast=10.0, noise_rel=0.02, model="analytic", face_chainage_m=0.0)
    fwd = make_model("analytic", layout)
    ds = response_vs_distance(layout, settings, model=fwd)
    r_scaled = fwd.response(Scenario.homogeneous(1.3 * settings.background_ohmm), 0.0)
    rel = np.asarray(r_scaled) / ds.r0_ohm.values - 1.0
    np.testing.assert_allclose(rel, 0.3, rtol=1e-12)
    ds["relative_response"] = (ds.relative_response.dims,
                               np.repeat(rel[:, None], ds.sizes["distance_ahead"], axis=1))
    out = detectability(ds, noise_rel=0.02)
    assert bool(out.reach_per_reading_at_grid_end)  # 30 % >> 3 x 2 %: every reading sees it
    assert float(out.reach_m) == 0.0 and not bool(out.reach_at_grid_end)
    np.testing.assert_allclose(out.noncentrality.values, 0.0, atol=1e-20)
    np.testing.assert_allclose(out.fitted_resistivity_ratio.values, 1.3, rtol=1e-12)


@pytest.mark.parametrize(("alpha", "beta"), [(0.01, 0.9), (2 * 0.0013498980316301, 0.5),
                                             (1e-4, 0.99)])
def test_detection_threshold_one_dof_gaussian_closed_form(alpha, beta):
    # One degree of freedom: the statistic is the square of a unit Gaussian with mean
    # sqrt(lambda); the two-sided test at level alpha alarms beyond z = Phi^-1(1 - alpha/2),
    # power Phi(sqrt(lambda) - z) + Phi(-sqrt(lambda) - z) (Kay 1998, Fundamentals of
    # Statistical Signal Processing vol. II, ch. 3, from memory).
    from scipy.stats import norm

    from tbminv.studies.reach import detection_threshold

    z = norm.isf(alpha / 2)
    lam = brentq(lambda x: norm.cdf(np.sqrt(x) - z) + norm.cdf(-np.sqrt(x) - z) - beta, 0, 400)
    assert detection_threshold(alpha, beta, 1) == pytest.approx(lam, rel=1e-8)


def test_detection_threshold_rejects_bad_probabilities():
    from tbminv.studies.reach import detection_threshold

    for alpha, beta in [(0.0, 0.5), (0.5, 0.4), (0.01, 1.0)]:
        with pytest.raises(ValueError, match="probab"):
            detection_threshold(alpha, beta)


def test_threshold_crossing_power_law_is_exact():
    # v = C d^-p is a straight line in log-log: interpolation recovers (C / t)^(1/p) exactly
    from tbminv.studies.reach import threshold_crossing

    d = np.geomspace(1.0, 100.0, 9)
    v = 50.0 * d**-2.5
    x, end = threshold_crossing(d, v, 0.3)
    assert x == pytest.approx((50.0 / 0.3) ** (1 / 2.5), rel=1e-12) and not end
    assert threshold_crossing(d, v, 1e3) == (0.0, False)
    assert threshold_crossing(d, v, 1e-9) == (100.0, True)


def test_reach_sweep_dask_equals_serial():
    distributed = pytest.importorskip("dask.distributed")
    layout = pole_pole_layout()
    settings = ReachSettings(model="analytic", face_chainage_m=0.0, noise_rel=0.01)
    sweep = {"diameter_m": [4.0, 6.0], "contrast": [0.1, 10.0]}
    serial = run_sweep(layout, sweep, settings, serial=True, progress=False)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        par = run_sweep(layout, sweep, settings, client=client, progress=False)
    np.testing.assert_array_equal(serial.reach_m.values, par.reach_m.values)
    np.testing.assert_array_equal(serial.reach_per_reading_m.values,
                                  par.reach_per_reading_m.values)
    np.testing.assert_array_equal(serial.relative_response.values, par.relative_response.values)
    assert serial.reach_m.dims == ("diameter_m", "contrast")
    assert serial.reach_per_reading_m.dims == ("diameter_m", "contrast")


def test_scale_layout_keeps_skin_offsets():
    from tbminv.layout import demo_layout_path, load_layout

    layout = load_layout(demo_layout_path())
    big = scale_layout(layout, 12.4, length="proportional")
    assert big.machine.shield_length_m == pytest.approx(19.0)
    s1 = big.electrode("S1")
    assert s1.radius_m == pytest.approx(6.2 + 0.05) and s1.axial_m == pytest.approx(-3.0)
    assert big.electrode("T1").radius_m == pytest.approx(0.8)
    fixed = scale_layout(layout, 12.4, length="fixed")
    assert fixed.machine.shield_length_m == pytest.approx(9.5)


def test_scale_layout_proportional_scales_walls_about_the_face():
    from tbminv.layout import demo_layout_path, load_layout
    from tbminv.studies.reach import default_face_chainage

    layout = load_layout(demo_layout_path())
    face = default_face_chainage(layout)
    big = scale_layout(layout, 12.4, length="proportional", face_chainage_m=face)
    # W1 is 15 m behind the face of the 6.2 m machine: 30 m behind for twice the diameter
    assert big.electrode("W1").chainage_m == pytest.approx(face - 30.0)
    assert big.electrode("S5").axial_m == pytest.approx(-16.0)


def test_demo_sweep_file_reads():
    from importlib.resources import files

    from tbminv.studies.reach import load_sweep

    sweep, opts = load_sweep(files("tbminv") / "data" / "demo_sweep.toml")
    assert sweep == {"diameter_m": [4.0, 6.0, 8.0, 10.0], "contrast": [0.1, 10.0]}
    assert opts["length"] in ("fixed", "proportional") and opts["model_settings"] == "fast"


def _reduced_demo_toml(tmp_path):
    import tomli_w

    from tbminv.layout import demo_layout_path, load_layout

    d = load_layout(demo_layout_path()).to_dict()
    d.pop("protocol", None)
    path = tmp_path / "layout.toml"
    path.write_text(tomli_w.dumps(d), encoding="utf-8")
    return path




def test_cli_single_layout_writes_dataset_and_figure(tmp_path, capsys):
    import xarray as xr

    from tbminv.jobs import reach_job

    layout = _reduced_demo_toml(tmp_path)
    assert reach_job(layout, tmp_path / "out", echo=print) == 0
    ds = xr.load_dataset(tmp_path / "out" / "reach.nc")
    assert ds.relative_response.dims == ("measurement", "distance_ahead")
    assert ds.detectable_ahead_m.dims == ("measurement",)
    assert list(ds.a.values) == ["BODY"] * 5 + ["T1"] and list(ds.m.values)[:2] == ["T1", "T4"]
    assert ds.reach_m.dims == () and float(ds.reach_m) > 0
    assert ds.reach_per_reading_m.dims == () and float(ds.reach_per_reading_m) > 0
    assert "unknown" in ds.reach_m.attrs["long_name"]
    assert "single reading" in ds.reach_per_reading_m.attrs["long_name"]
    assert (ds.detectable_ahead_m.values >= 0).all()
    assert ds.attrs["model_settings"] == "fast"
    for ext in ("pdf", "png"):
        assert (tmp_path / "out" / f"reach.{ext}").stat().st_size > 1000
    out = capsys.readouterr().out
    assert "reach of" in out and "whole reading set" in out and "best single reading" in out
    assert f"{float(ds.reach_m):.1f} m" in out and f"{float(ds.reach_per_reading_m):.1f} m" in out


@pytest.mark.slow
def test_cli_sweep_writes_dataset_and_map(tmp_path):
    import xarray as xr

    from tbminv.jobs import reach_job

    layout = _reduced_demo_toml(tmp_path)
    sweep = tmp_path / "sweep.toml"
    sweep.write_text('[sweep]\ndiameter_m = [4.0, 8.0]\n[options]\nlength = "proportional"\n'
                     'distances_in_diameters = [0.5, 1.0, 2.0, 4.0]\n', encoding="utf-8")
    assert reach_job(layout, tmp_path / "out", sweep_path=sweep, workers=2) == 0
    ds = xr.load_dataset(tmp_path / "out" / "sweep.nc")
    assert ds.reach_m.dims == ("diameter_m",)
    assert ds.reach_per_reading_m.dims == ("diameter_m",)
    assert (tmp_path / "out" / "reach_map.png").exists()
