"""Do the contact fit's stated intervals hold the truth on 3D-simulated drives? (slow)

The drives in tests/data were simulated by tests/data/make_drive_fixtures.py with pyGIMLi's 3D
finite elements (steel machine and open tunnel in the mesh; Rücker, Günther & Wagner 2017,
Computers & Geosciences 109:106-123), 2 % Gaussian noise, seeds in the file names. The truth
is the scenario they were made with: 50 ohm-m ground and a plane square to the axis at chainage
30 m with 10x or 0.1x that resistivity beyond; one drive has the ground surface 12 m (2 machine
diameters) above the crown. The fit runs on the axisymmetric model through the production path
(read, QC error model, surface correction, running joint fit of
:class:`tbminv.inversion.drive.DriveInverter`): the 3D data carry its modelling error, so this is
no inverse crime.

The 80 % share is the project's acceptance goal for stated 95 % intervals on a handful of
advances (common practice, no source: a few misses in small samples are expected even from a
calibrated 95 % interval; the calibration itself is measured in bench/bench_calibration.py).
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest

from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.settings import InversionSettings
from tbminv.layout import load_layout
from tbminv.readings.advance import prepare_advances
from tbminv.readings.qc import QCSettings
from tests.helpers import DATA

#: drive -> (layout file, true contrast rho2/rho1, true contact chainage m), as made by
#: tests/data/make_drive_fixtures.py
DRIVES = {
    "contact10_seed11": ("fixture_layout.toml", 10.0, 30.0),
    "contact01_seed13": ("fixture_layout.toml", 0.1, 30.0),
    "cover12_contact01_seed19": ("fixture_layout_cover12.toml", 0.1, 30.0),
}
GOAL = 0.8

#: Shallow drive: measured with this project's model (this file, 4 advances within 2 D): 2 of 4
#: distance intervals and 2 of 4 contrast intervals hold the truth (also with the 0.6 %
#: per-reading modelling-error floor); the intervals are too narrow because what the 3D surface
#: correction leaves behind with a contact (3-8 %, bench/results/error_floor.json) is shared by
#: all readings of an advance, and the contact fit has no per-advance term for it yet. Strict:
#: the test reports as failed once the intervals hold, so the marker goes then.
SHALLOW_GAP = pytest.mark.xfail(
    strict=True, reason="shallow cover (2 D): stated intervals hold the truth in 2 of 4 "
    "advances; the surface-correction residual shared by an advance's readings is not "
    "modelled yet")


def _cases() -> list:
    return [pytest.param(n, marks=SHALLOW_GAP) if n.startswith("cover") else n for n in DRIVES]


@functools.cache
def _fit(name: str) -> tuple[float, list[float], list]:
    """Machine diameter, face chainages and contact estimates of one drive (production path)."""
    lay_file, _, _ = DRIVES[name]
    layout = load_layout(DATA / lay_file)
    inv = DriveInverter(layout, InversionSettings())
    data = prepare_advances(DATA / f"drive_{name}.csv", layout, QCSettings()).advances
    data = inv.prepare(data)                      # reference resistivity, surface correction
    r, e, faces = inv._contact_data(data)
    est = inv.contact_fitter(inv.rho_ref_ohmm).fit_drive(r, e, faces, skip_unusable=True)
    return layout.machine.diameter_m, list(faces), est


def _near(name: str) -> list[tuple[float, object]]:
    """(true distance ahead, estimate) of the advances with the contact 0-2 diameters ahead."""
    diam, faces, est = _fit(name)
    x_true = DRIVES[name][2]
    out = [(x_true - f, es) for f, es in zip(faces, est) if 0.0 < x_true - f <= 2 * diam + 1e-9]
    assert len(out) >= 4, f"{name}: only {len(out)} advances within 2 diameters"
    return out


def _holds(lo: float, hi: float, truth: float) -> bool:
    hi = math.inf if math.isnan(hi) and math.isfinite(lo) else hi
    return bool(lo <= truth <= hi)


@pytest.mark.slow
@pytest.mark.parametrize("name", _cases())
def test_distance_interval_holds_the_truth_within_two_diameters(name):
    # truth: the simulated scenario (contact at chainage 30 m, make_drive_fixtures.py); an
    # advance without a reported contact counts as a miss
    near = _near(name)
    held = [es is not None and bool(getattr(es, "found", False))
            and _holds(es.ahead_lo_m, es.ahead_hi_m, d) for d, es in near]
    report = [(round(d, 2), None if es is None else (round(es.ahead_lo_m, 2), round(es.ahead_m, 2),
                                                      round(es.ahead_hi_m, 2)))
              for d, es in near]
    assert np.mean(held) >= GOAL, (name, report)


@pytest.mark.slow
@pytest.mark.parametrize("name", _cases())
def test_contrast_interval_holds_the_true_contrast(name):
    # truth: rho2/rho1 = 10 or 0.1 of the simulated scenario (make_drive_fixtures.py)
    near = _near(name)
    found = [(d, es) for d, es in near if es is not None and getattr(es, "found", False)]
    assert found, f"{name}: no contact reported within 2 diameters"
    c_true = DRIVES[name][1]
    held = [_holds(es.contrast_lo, es.contrast_hi, c_true) for _, es in found]
    report = [(round(d, 2), es.contrast_lo, es.contrast, es.contrast_hi) for d, es in found]
    assert np.mean(held) >= GOAL, (name, report)
    # the direction of the change is right wherever a contact is reported
    assert all((es.contrast > 1) == (c_true > 1) for _, es in found), (name, report)
