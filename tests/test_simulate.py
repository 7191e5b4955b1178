"""Checks of the synthetic-drive simulator (readings-log format, reciprocals, noise, registry)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tbminv.ground import Scenario
from tbminv.layout import Layout
from tbminv.studies.simulate import (
    COLUMNS,
    MODELS,
    get_model,
    register_model,
    simulate_drive,
    write_readings,
)


def _layout(body: bool = False) -> Layout:
    return Layout.from_dict({
        "machine": {"diameter_m": 6.0, "shield_length_m": 10.0, "cutterhead_thickness_m": 1.0,
                    "model_body": body},
        "tunnel": {"model_cavity": False},
        "electrode": [
            {"label": "C1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.5},
            {"label": "C2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.0,
             "angle_deg": 90},
            {"label": "S1", "kind": "shield", "axial_m": -2.0, "radius_m": 3.1},
            {"label": "R1", "kind": "remote"}],
        "measurement": [{"a": "C1", "b": "R1", "m": "C2", "n": "R1"},
                        {"a": "C1", "b": "S1", "m": "C2", "n": ""}]}, source="<sim test>")


def _point_model(layout, scenario, face, angle, quads):
    """Full-space point-source model (rho I/(4 pi r), Telford et al. 1990 sec. 8.2) on the
    electrode positions: a fast stand-in with the registry's call signature."""
    pos = layout.positions_machine(angle, face)
    rho = scenario.background_resistivity_ohmm

    def g(p, q):
        if p is None or q is None or pos[p] is None or pos[q] is None:
            return 0.0
        return rho / (4 * np.pi * np.linalg.norm(pos[p] - pos[q]))
    return np.array([g(a, m) - g(a, n) - g(b, m) + g(b, n) for a, b, m, n in quads])


@pytest.fixture(autouse=True)
def _point_registered():
    register_model("point-test", _point_model, replace=True)
    yield
    MODELS.pop("point-test", None)


def test_log_format_and_reciprocals():
    lay = _layout()
    df = simulate_drive(lay, Scenario.homogeneous(50.0), [100.0, 101.5], model="point-test",
                        current_a=0.5, cutterhead_deg=[0.0, 30.0])
    assert list(df.columns) == list(COLUMNS)
    assert df["advance"].tolist() == [1] * 4 + [2] * 4
    first = df[df.advance == 1]
    quads = list(zip(first.a, first.b, first.m, first.n))
    assert quads == [("C1", "R1", "C2", "R1"), ("C2", "R1", "C1", "R1"),
                     ("C1", "S1", "C2", ""), ("C2", "", "C1", "S1")]
    # reciprocity of the model carries into the log (noise free)
    v = first.voltage_v.to_numpy()
    np.testing.assert_allclose(v[1], v[0], rtol=1e-12)
    np.testing.assert_allclose(v[3], v[2], rtol=1e-12)
    assert (df.voltage_std_v == 0).all()
    assert df.cutterhead_deg.tolist() == [0.0] * 4 + [30.0] * 4
    assert pd.to_datetime(df.time).is_monotonic_increasing
    # contact resistance of a 5 cm hemisphere, rho/(2 pi a) (textbook grounding resistance of
    # a hemisphere, Telford et al. 1990 ch. 8; recalled from memory)
    np.testing.assert_allclose(first.contact_ohm_a.iloc[0], 50.0 / (2 * np.pi * 0.05))
    assert np.all(np.isfinite(first.contact_ohm_m))


def test_noise_reproducible_and_sized():
    lay = _layout()
    sc = Scenario.homogeneous(50.0)
    faces = np.arange(100.0, 140.0, 0.5)
    clean = simulate_drive(lay, sc, faces, model="point-test")
    a = simulate_drive(lay, sc, faces, model="point-test", noise_rel=0.02, noise_abs_v=1e-4,
                       seed=7)
    b = simulate_drive(lay, sc, faces, model="point-test", noise_rel=0.02, noise_abs_v=1e-4,
                       seed=7)
    c = simulate_drive(lay, sc, faces, model="point-test", noise_rel=0.02, noise_abs_v=1e-4,
                       seed=8)
    pd.testing.assert_frame_equal(a, b)
    assert not np.allclose(a.voltage_v, c.voltage_v)
    z = (a.voltage_v - clean.voltage_v) / a.voltage_std_v
    assert abs(z.mean()) < 0.3 and 0.8 < z.std() < 1.2
    np.testing.assert_allclose(a.voltage_std_v,
                               np.hypot(0.02 * clean.voltage_v, 1e-4), rtol=1e-12)


def test_unknown_model_lists_models():
    with pytest.raises(ValueError, match=r"unknown forward model 'cubic'.*3d"):
        simulate_drive(_layout(), Scenario.homogeneous(50.0), [0.0], model="cubic")
    with pytest.raises(ValueError, match="already registered"):
        register_model("3d", _point_model)
    assert get_model("point-test") is _point_model


def test_write_readings_csv_and_parquet(tmp_path):
    df = simulate_drive(_layout(), Scenario.homogeneous(50.0), [10.0], model="point-test")
    p = write_readings(df, tmp_path / "readings.csv")
    back = pd.read_csv(p, keep_default_na=False)
    assert list(back.columns) == list(COLUMNS)
    np.testing.assert_allclose(back.voltage_v.astype(float), df.voltage_v, rtol=1e-9)
    q = write_readings(df, tmp_path / "readings.parquet")
    pd.testing.assert_frame_equal(pd.read_parquet(q), df)
    assert sorted(x.name for x in tmp_path.iterdir()) == ["readings.csv", "readings.parquet"]


def test_3d_model_matches_closed_form():
    """The default 3D model through simulate_drive, no body, full space: within 2 % of
    V = rho I/(4 pi r) superposition (Telford, Geldart & Sheriff 1990, sec. 8.2)."""
    lay = _layout()
    sc = Scenario.homogeneous(50.0)
    df = simulate_drive(lay, sc, [100.0], model="3d", current_a=2.0)
    ref = simulate_drive(lay, sc, [100.0], model="point-test", current_a=2.0)
    np.testing.assert_allclose(df.voltage_v, ref.voltage_v, rtol=0.02)
    assert np.all(df.voltage_v != 0)
