"""Parametric body fit of one advance (tbminv.inversion.bodyfit)."""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import pytest

from tbminv.inversion.bodyfit import (
    AdvanceReadings,
    BodyFitter,
    _bearing_interval,
    bearing_difference_deg,
)

DATA = Path(__file__).resolve().parents[1] / "data"


def test_readings_are_checked():
    with pytest.raises(ValueError, match="r_ohm"):
        AdvanceReadings((("T1", None, "T2", None),), [0.0], [1.0, 2.0], [0.02], 0.0)
    with pytest.raises(ValueError, match="rel_error"):
        AdvanceReadings((("T1", None, "T2", None),), [0.0], [1.0], [0.0], 0.0)


def test_fewer_than_three_angles_gives_no_fit():
    from tbminv.layout import demo_layout_path, load_layout

    lay = load_layout(demo_layout_path())
    rd = AdvanceReadings((("T1", None, "T2", None),) * 4, [0.0, 0.0, 90.0, 90.0],
                         [1.0] * 4, [0.02] * 4, 0.0)
    fit = BodyFitter(lay, 100.0).fit(rd)
    assert not fit.found and math.isnan(fit.body_bearing_deg)
    assert "fewer than 3" in fit.reason and fit.n_angles == 2


def test_bearing_interval_wraps_through_north():
    b = np.arange(0.0, 360.0, 10.0)
    prof = np.minimum((b - 0.0) % 360.0, (0.0 - b) % 360.0)  # V-shaped about 0 deg
    lo, hi = _bearing_interval(b, prof, 25.0, 0)
    assert lo == pytest.approx(335.0) and hi == pytest.approx(25.0)
    assert bearing_difference_deg(350.0, 20.0) == pytest.approx(30.0)


def _load(case: str, seed: int, noise: float = 0.02) -> tuple[AdvanceReadings, object]:
    import importlib.util

    spec = importlib.util.spec_from_file_location("make_body_fixtures",
                                                  DATA / "make_body_fixtures.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    with open(DATA / f"body_{case}_3d.csv") as fh:
        rows = list(csv.DictReader(fh))
    quads = tuple(tuple(r[k] or None for k in "abmn") for r in rows)
    r = np.array([float(x["r_ohm"]) for x in rows])
    rng = np.random.default_rng(seed)
    r_noisy = r * (1.0 + noise * rng.standard_normal(r.size))
    err = np.full(r.size, math.hypot(noise, 0.006))  # stated noise and the modelling floor
    ang = np.array([float(x["cutterhead_deg"]) for x in rows])
    return AdvanceReadings(quads, ang, r_noisy, err, mod.FACE), mod


def _background_3d() -> np.ndarray:
    """The homogeneous ground computed by the same 3D model at every angle, ohm."""
    with open(DATA / "body_hom_3d.csv") as fh:
        return np.array([float(r["r_ohm"]) for r in csv.DictReader(fh)])


@pytest.mark.slow
@pytest.mark.parametrize("case", ["cond", "res"])
def test_body_in_3d_simulated_advance(case):
    """3D data (pyGIMLi P2, steel and bore in, 8 cutterhead angles, 2 % noise, 20 noise
    realisations).

    Body within 1.5 D of the face: the **median** bearing error within 30 deg and the median
    error of the centre's distance ahead within 0.5 D (the acceptance of the off-axis
    analysis; common practice, no source), the moment's sign right in every reported fit.
    Not every realisation meets it: over 50 realisations 68 % (conductive) and 79 %
    (resistive) do, 90th percentile of the bearing error 110 and 50 deg
    (``bench/results/body_fit.json``). Background: the homogeneous ground by the same 3D model
    (the test mesh's own error against the axisymmetric model, about 1 % RMS per quadrupole,
    is larger than the body's signal).
    """
    rd, mod = _load(case, seed=5)
    lay = mod.deep_demo_layout()
    diam = 2.0 * lay.machine.radius_m
    _, ahead, off, bearing = mod.CASES[case]
    with open(DATA / f"body_{case}_3d.csv") as fh:
        r = np.array([float(x["r_ohm"]) for x in csv.DictReader(fh)])
    rng = np.random.default_rng(21)
    reals = r[None, :] * (1.0 + 0.02 * rng.standard_normal((20, r.size)))
    fits = BodyFitter(lay, mod.BACKGROUND_OHMM).fit_many(rd, reals, _background_3d())
    found = [f for f in fits if f.found]
    assert len(found) >= 10
    be = [bearing_difference_deg(f.body_bearing_deg, bearing) for f in found]
    de = [abs(f.body_ahead_m - ahead) for f in found]
    assert np.median(be) <= 30.0
    assert np.median(de) <= 0.5 * diam
    assert all(f.body_ahead_lo_m <= f.body_ahead_m <= f.body_ahead_hi_m for f in found)
    assert all((f.body_moment_m3 > 0) == (case == "cond") for f in found)


@pytest.mark.slow
@pytest.mark.parametrize("background, nuisance", [("3d", "scale"), ("axisym", "quadrupole")])
def test_no_body_in_3d_simulated_homogeneous_advance(background, nuisance):
    """Homogeneous ground, same 3D set-up: no body reported, with the 3D background, or with
    the axisymmetric background and a free scale per quadrupole (which absorbs the forward
    models' difference)."""
    rd, mod = _load("hom", seed=5)
    fitter = BodyFitter(mod.deep_demo_layout(), mod.BACKGROUND_OHMM, nuisance=nuisance)
    fit = fitter.fit(rd, _background_3d() if background == "3d" else None)
    assert not fit.found
    assert math.isnan(fit.body_ahead_m) and math.isnan(fit.body_bearing_deg)
    assert fit.body_p_none > 0.01
