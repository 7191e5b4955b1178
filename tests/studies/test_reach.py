"""Look-ahead reach: detectability logic against the image method, sweeps serial vs dask."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq

from tbminv.forward.registry import ModelNotAvailable, make_model
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


@pytest.mark.parametrize("model", ["analytic", "axisym"])
@pytest.mark.parametrize("contrast", [10.0, 0.1])
def test_reach_matches_image_method_crossing(model, contrast):
    layout = pole_pole_layout()
    try:
        fwd = make_model(model, layout)
    except ModelNotAvailable:
        pytest.skip(f"{model} model not built in this version")
    noise = 0.05
    settings = ReachSettings(contrast=contrast, noise_rel=noise, k=3.0, model=model,
                             face_chainage_m=0.0, distances_m=tuple(np.linspace(0.2, 8.0, 40)))
    ds = reach_study(layout, settings, model=fwd)
    kk = (contrast - 1) / (contrast + 1)
    a = np.array([0.05, 0.0, 0.0])
    m = np.array([0.05, -1.5, 0.0])
    # closed-form response at every distance
    expected = [closed_form_relative_response(d, a, m, kk) for d in ds.distance_ahead.values]
    np.testing.assert_allclose(ds.relative_response.values[0], expected, rtol=0.01)
    # closed-form distance where |dR/R| = 3 sigma/R = 3 * 0.05
    d_star = brentq(lambda d: abs(closed_form_relative_response(d, a, m, kk)) - 3 * noise,
                    0.06, 50)
    step = np.diff(ds.distance_ahead.values).max()
    assert abs(float(ds.reach_m) - d_star) <= step


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
    np.testing.assert_array_equal(serial.relative_response.values, par.relative_response.values)
    assert serial.reach_m.dims == ("diameter_m", "contrast")


def test_scale_layout_keeps_skin_offsets():
    from tbminv.layout import demo_layout_path, load_layout

    layout = load_layout(demo_layout_path())
    big = scale_layout(layout, 12.4, length="proportional")
    assert big.machine.shield_length_m == pytest.approx(19.0)
    s1 = big.electrode("S1")
    assert s1.radius_m == pytest.approx(6.2 + 0.05) and s1.axial_m == pytest.approx(-3.0)
    assert big.electrode("C1").radius_m == pytest.approx(0.8)
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
    assert list(ds.a.values) == ["M0"] * 5 + ["C1"] and list(ds.m.values)[:2] == ["C1", "C4"]
    assert ds.reach_m.dims == () and float(ds.reach_m) > 0
    assert (ds.detectable_ahead_m.values >= 0).all()
    assert ds.attrs["model_settings"] == "fast"
    for ext in ("pdf", "png"):
        assert (tmp_path / "out" / f"reach.{ext}").stat().st_size > 1000
    assert "reach of" in capsys.readouterr().out


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
    assert (tmp_path / "out" / "reach_map.png").exists()
