"""Checks of the synthetic-drive simulator (readings-log format, reciprocals, noise, models)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from tbminv.forward.registry import ModelNotAvailable
from tbminv.ground import Scenario
from tbminv.layout import Layout
from tbminv.studies.simulate import COLUMNS, simulate_drive, write_readings


def _layout(body: bool = False) -> Layout:
    return Layout.from_dict({
        "machine": {"diameter_m": 6.0, "shield_length_m": 10.0, "cutterhead_thickness_m": 1.0,
                    "model_body": body},
        "tunnel": {"model_cavity": False},
        "electrode": [
            {"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.5},
            {"label": "T2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.0,
             "angle_deg": 90},
            {"label": "S1", "kind": "shield", "axial_m": -2.0, "radius_m": 3.1},
            {"label": "R1", "kind": "remote"}],
        "measurement": [{"a": "T1", "b": "R1", "m": "T2", "n": "R1"},
                        {"a": "T1", "b": "S1", "m": "T2", "n": ""}]}, source="<sim test>")


class PointModel:
    """Full-space point-source model (rho I/(4 pi r), Telford et al. 1990 sec. 8.2) on the
    electrode positions: a fast stand-in with the forward-model protocol."""

    def __init__(self, layout):
        self.layout = layout
        self.calls = 0

    def response(self, scenario, face, angle=0.0, measurements=None):
        self.calls += 1
        quads = [tuple(q) for q in measurements] if measurements is not None \
            else [q.labels() for q in self.layout.measurements]
        pos = self.layout.positions_machine(face, angle)
        rho = scenario.background_resistivity_ohmm

        def g(p, q):
            if p is None or q is None or pos[p] is None or pos[q] is None:
                return 0.0
            return rho / (4 * np.pi * np.linalg.norm(pos[p] - pos[q]))
        return np.array([g(a, m) - g(a, n) - g(b, m) + g(b, n) for a, b, m, n in quads])


def test_log_format_and_reciprocals():
    lay = _layout()
    df = simulate_drive(lay, Scenario.homogeneous(50.0), [100.0, 101.5], model=PointModel(lay),
                        current_a=0.5, cutterhead_deg=[0.0, 30.0])
    assert list(df.columns) == list(COLUMNS)
    assert df["advance"].tolist() == [1] * 4 + [2] * 4
    first = df[df.advance == 1]
    quads = list(zip(first.a, first.b, first.m, first.n))
    assert quads == [("T1", "R1", "T2", "R1"), ("T2", "R1", "T1", "R1"),
                     ("T1", "S1", "T2", ""), ("T2", "", "T1", "S1")]
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
    point = PointModel(lay)
    clean = simulate_drive(lay, sc, faces, model=point)
    a = simulate_drive(lay, sc, faces, model=point, noise_rel=0.02, noise_abs_v=1e-4, seed=7)
    b = simulate_drive(lay, sc, faces, model=point, noise_rel=0.02, noise_abs_v=1e-4, seed=7)
    c = simulate_drive(lay, sc, faces, model=point, noise_rel=0.02, noise_abs_v=1e-4, seed=8)
    pd.testing.assert_frame_equal(a, b)
    assert not np.allclose(a.voltage_v, c.voltage_v)
    z = (a.voltage_v - clean.voltage_v) / a.voltage_std_v
    assert abs(z.mean()) < 0.3 and 0.8 < z.std() < 1.2
    np.testing.assert_allclose(a.voltage_std_v,
                               np.hypot(0.02 * clean.voltage_v, 1e-4), rtol=1e-12)


def test_unknown_model_lists_models():
    with pytest.raises(ModelNotAvailable, match=r"unknown forward model 'cubic'.*3d"):
        simulate_drive(_layout(), Scenario.homogeneous(50.0), [0.0], model="cubic")


def test_built_model_is_used_once_per_face_and_must_fit_the_layout():
    lay = _layout()
    point = PointModel(lay)
    simulate_drive(lay, Scenario.homogeneous(50.0), [0.0, 1.0, 2.0], model=point)
    assert point.calls == 3
    with pytest.raises(ValueError, match="another layout"):
        simulate_drive(_layout(body=True), Scenario.homogeneous(50.0), [0.0], model=point)
    with pytest.raises(TypeError, match="response"):
        simulate_drive(lay, Scenario.homogeneous(50.0), [0.0], model=object())


def test_registry_models_by_name_match_the_closed_form():
    """``analytic`` and ``axisym`` by name give the point-source numbers for every reading and
    its reciprocal (no body, no cavity, full space): the closed form exactly, the
    axisymmetric model within 1 % (Telford, Geldart & Sheriff 1990, sec. 8.2)."""
    lay = _layout()
    sc = Scenario.homogeneous(50.0)
    ref = simulate_drive(lay, sc, [100.0], model=PointModel(lay))
    ana = simulate_drive(lay, sc, [100.0], model="analytic")
    np.testing.assert_allclose(ana.voltage_v, ref.voltage_v, rtol=1e-12)
    axi = simulate_drive(lay, sc, [100.0])                     # the default: axisym
    np.testing.assert_allclose(axi.voltage_v, ref.voltage_v, rtol=0.01)


def test_write_readings_csv_and_parquet(tmp_path):
    lay = _layout()
    df = simulate_drive(lay, Scenario.homogeneous(50.0), [10.0], model=PointModel(lay))
    p = write_readings(df, tmp_path / "readings.csv")
    back = pd.read_csv(p, keep_default_na=False)
    assert list(back.columns) == list(COLUMNS)
    np.testing.assert_allclose(back.voltage_v.astype(float), df.voltage_v, rtol=1e-9)
    q = write_readings(df, tmp_path / "readings.parquet")
    pd.testing.assert_frame_equal(pd.read_parquet(q), df)
    assert sorted(x.name for x in tmp_path.iterdir()) == ["readings.csv", "readings.parquet"]


def test_3d_model_matches_closed_form():
    """The default 3D model through simulate_drive, no body, full space, against
    V = rho I/(4 pi r) superposition (Telford, Geldart & Sheriff 1990, sec. 8.2): measured
    0.20-0.21 % with this project's model (this test); allowed 0.5 %."""
    lay = _layout()
    sc = Scenario.homogeneous(50.0)
    df = simulate_drive(lay, sc, [100.0], model="3d", current_a=2.0)
    ref = simulate_drive(lay, sc, [100.0], model=PointModel(lay), current_a=2.0)
    np.testing.assert_allclose(df.voltage_v, ref.voltage_v, rtol=0.005)
    assert np.all(df.voltage_v != 0)


def test_cutterhead_angles_every_reading_at_every_angle():
    """``cutterhead_angles_deg``: each advance holds the whole protocol (with reciprocals) once
    per angle, each row logging its angle; the voltages are the point-source superposition
    (Telford, Geldart & Sheriff 1990, sec. 8.2) at the turned positions (T2 turns, S1 not)."""
    from tbminv.studies.simulate import angle_range

    lay = _layout()
    angles = angle_range(0.0, 315.0, 45.0)
    assert angles.tolist() == [0.0, 45.0, 90.0, 135.0, 180.0, 225.0, 270.0, 315.0]
    df = simulate_drive(lay, Scenario.homogeneous(50.0), [100.0, 101.5], model=PointModel(lay),
                        cutterhead_angles_deg=angles)
    n_proto = 4   # two quadrupoles and their reciprocals
    assert len(df) == 2 * len(angles) * n_proto
    for adv in (1, 2):
        part = df[df.advance == adv]
        assert part.groupby("cutterhead_deg").size().to_dict() == {a: n_proto for a in angles}
        assert pd.to_datetime(part.time).is_monotonic_increasing
    for ang in angles:
        one = simulate_drive(lay, Scenario.homogeneous(50.0), [100.0], model=PointModel(lay),
                             cutterhead_deg=ang)
        got = df[(df.advance == 1) & (df.cutterhead_deg == ang)]
        np.testing.assert_allclose(got.voltage_v.to_numpy(), one.voltage_v.to_numpy(),
                                   rtol=1e-12)
    # the T1-S1 reading (T1 at 0.5 m radius) changes as the head turns
    t1s1 = df[(df.advance == 1) & (df.a == "T1") & (df.b == "S1")].voltage_v.to_numpy()
    assert np.ptp(t1s1) > 0.01 * np.abs(t1s1).max()


def test_cutterhead_angles_one_axisym_solve_per_advance():
    """The axisymmetric model by name sums one solve per advance at every angle; the readings
    match the full-space closed form at each angle within 1 % (Telford, Geldart & Sheriff
    1990, sec. 8.2)."""
    lay = _layout()
    sc = Scenario.homogeneous(50.0)
    angles = [0.0, 120.0, 240.0]
    axi = simulate_drive(lay, sc, [100.0], cutterhead_angles_deg=angles)
    ref = simulate_drive(lay, sc, [100.0], model=PointModel(lay), cutterhead_angles_deg=angles)
    np.testing.assert_allclose(axi.voltage_v, ref.voltage_v, rtol=0.01)
    assert axi.cutterhead_deg.tolist() == ref.cutterhead_deg.tolist()


@pytest.mark.parametrize("bad", [(0.0, 90.0, -10.0), (0.0, 90.0, 0.0), (0.0, math.nan, 1.0)])
def test_angle_range_refuses_a_step_that_never_arrives(bad):
    from tbminv.studies.simulate import angle_range

    with pytest.raises(ValueError):
        angle_range(*bad)
