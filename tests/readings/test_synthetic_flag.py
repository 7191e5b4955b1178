"""The ``synthetic`` flag: simulate writes it, the reader carries it, the store keeps it.

Plumbing of one attribute with a stand-in forward model (no physics checked here).
"""

from __future__ import annotations

import json

import numpy as np

from tbminv.ground import Scenario
from tbminv.readings.reader import read_readings
from tbminv.results.store import append_shift, open_section
from tbminv.studies.simulate import simulate_drive, write_readings
from tests.helpers import DATA, fixture_layout, make_section


class _OnesModel:
    """A stand-in forward model: 1 ohm for every reading (the flag is what is tested)."""

    def response(self, scenario, face_chainage_m, cutterhead_deg=0.0, measurements=None):
        return np.ones(len(measurements))


def test_simulated_log_says_synthetic_and_measured_log_does_not(tmp_path):
    layout = fixture_layout()
    df = simulate_drive(layout, Scenario.homogeneous(50.0), [0.0, 1.5], model=_OnesModel(),
                        noise_rel=0.01, seed=1)
    assert (df["synthetic"] == 1).all()
    log = write_readings(df, tmp_path / "sim.csv")
    assert read_readings(log, layout).synthetic
    measured = tmp_path / "measured.csv"
    df.drop(columns="synthetic").to_csv(measured, index=False)
    assert not read_readings(measured, layout).synthetic
    zeros = tmp_path / "zeros.csv"
    df.assign(synthetic=0).to_csv(zeros, index=False)
    assert not read_readings(zeros, layout).synthetic
    # the bundled fixtures were simulated before the column existed: read as measured
    assert not read_readings(DATA / "drive_homogeneous_seed7.csv", layout).synthetic


def test_store_keeps_synthetic_per_shift_and_overall(tmp_path):
    path = tmp_path / "s.nc"
    a = make_section(range(3), "A")
    a.attrs["synthetic"] = 1
    append_shift(path, a, "A")
    b = make_section(range(3, 6), "B")
    b.attrs["synthetic"] = 0
    append_shift(path, b, "B")
    ds = open_section(path)
    prov = json.loads(ds.attrs["provenance_by_shift"])
    assert str(prov["A"]["synthetic"]) == "1" and str(prov["B"]["synthetic"]) == "0"
    assert int(ds.attrs["synthetic"]) == 1          # any simulated shift marks the store
    path2 = tmp_path / "m.nc"
    append_shift(path2, b, "B")
    assert int(open_section(path2).attrs["synthetic"]) == 0
    assert np.array_equal(open_section(path2)["advance"].values, [3, 4, 5])
