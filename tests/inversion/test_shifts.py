"""A drive logged shift by shift: appending each shift's log continues the stored drive.

The stored drive tests/data/drive_contact10_seed11.csv (made by tests/data/make_drive_fixtures.py
with the 3D forward model: 50 ohm-m, a contact square to the axis at chainage 30 m with 500 ohm-m
beyond, faces 0..27 m every 1.5 m, 2 % noise) is cut into three shift logs. Inverted one after the
other into one store they must give what the whole log gives in one run.

The QC error model here is the fixed one (``error_model = "fixed"``): a reciprocal error model
fitted per log would be fitted on a third of the readings in each shift and differ from the
whole log's, which changes every weight; that is a property of the QC grouping, not of the
continuation tested here.
"""

from __future__ import annotations

import logging
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.image import ImageResult
from tbminv.inversion.journal import Journal, journal_root
from tbminv.inversion.outcome import SectionError
from tbminv.inversion.settings import load_settings
from tbminv.jobs import invert_job, run_drive
from tbminv.layout import load_layout
from tbminv.results.store import open_section
from tests.helpers import DATA

LOG = DATA / "drive_contact10_seed11.csv"
CONTACT_CHAINAGE_M = 30.0   # the scenario of the stored drive (make_drive_fixtures.py)
D = 6.0

SETTINGS = """\
[qc]
error_model = "fixed"
fallback_a_ohm = 1e-4
fallback_b = 0.02

[invert]
forward_settings = "fast"
max_iter = {max_iter}
cell_m = 1.5

[contact]
contrasts = [0.1, 0.3, 1.0, 3.0, 10.0]
distances_in_diameters = [0.25, 0.5, 1.0, 2.0, 4.0, 8.0]
"""

CONTACT_VARS = ("contact_ahead_m", "contact_ahead_lo_m", "contact_ahead_hi_m",
                "contact_chainage_m", "resistivity_around", "resistivity_beyond",
                "contact_p_none", "contact_p_homogeneous")


def _split(folder: Path, advances: list[list[int]], prefix: str = "shift") -> list[Path]:
    """Shift logs of the stored drive, one per group of advance numbers (rows unchanged)."""
    log = pd.read_csv(LOG, dtype=str, keep_default_na=False)
    paths = []
    for i, group in enumerate(advances):
        p = folder / f"{prefix}{i + 1}.csv"
        log[log["advance"].astype(int).isin(group)].to_csv(p, index=False)
        paths.append(p)
    return paths


def _settings(folder: Path, max_iter: int = 4) -> Path:
    p = folder / "settings.toml"
    p.write_text(SETTINGS.format(max_iter=max_iter))
    return p


def _chained_image(self: DriveInverter, adv, start=None, reference=None) -> ImageResult:
    """A stand-in image inversion whose model depends on its start model and its advance.

    Each model is the start (or 50 ohm-m) times (1 + advance / 100): the model of an advance
    records the whole chain of warm starts before it, so a broken chain shows.
    """
    n = self.grid.n_param
    base = np.full(n, 50.0) if start is None else np.asarray(start, float)
    model = base * (1.0 + adv.advance / 100.0)
    return ImageResult(model, 1.0, 2.0, 1, 10.0, "stand-in", True, 0.0, [2.0, 1.0],
                       np.zeros(n), None, 3, np.ones(3), np.ones(3), np.full(3, 0.02))


def _invert(readings: Path, store: Path, settings: Path) -> int:
    return invert_job(readings, DATA / "fixture_layout.toml", store, settings_path=settings,
                      progress=False, echo=lambda line: None)


@pytest.fixture
def chained(monkeypatch):
    monkeypatch.setattr(DriveInverter, "invert_advance", _chained_image)


def _assert_same_contacts(a, b, rtol: float) -> None:
    for name in CONTACT_VARS:
        x, y = a[name].values, b[name].values
        # found / not found the same in every advance
        np.testing.assert_array_equal(np.isfinite(x), np.isfinite(y), err_msg=name)
        np.testing.assert_allclose(x, y, rtol=rtol, equal_nan=True, err_msg=name)


@pytest.mark.slow  # four runs of `invert` (mesh, factors, contact fit): 20-35 s
def test_three_shifts_give_the_contact_fits_and_warm_starts_of_one_log(tmp_path, chained):
    settings = _settings(tmp_path)
    whole = tmp_path / "whole.nc"
    assert _invert(LOG, whole, settings) == 0
    store = tmp_path / "shifts.nc"
    for part in _split(tmp_path, [list(range(1, 7)), list(range(7, 14)),
                                  list(range(14, 20))]):
        assert _invert(part, store, settings) == 0
    a, b = open_section(store), open_section(whole)
    assert a.sizes["advance"] == b.sizes["advance"] == 19
    assert sorted(set(a["shift"].values.astype(str))) != sorted(set(b["shift"].values))
    # Reference: the same drive from one log, run here (the property under test, measured
    # with this project's model). The chain of warm starts runs across the shift boundaries:
    # each model is 50 ohm-m times prod(1 + k / 100) over the advances so far, as in one run.
    np.testing.assert_array_equal(a["parameter_resistivity"].values,
                                  b["parameter_resistivity"].values)
    # the contact fits: the same arithmetic on the same numbers (NetCDF doubles come back bit
    # for bit), so equal to round-off
    _assert_same_contacts(a, b, rtol=1e-12)
    np.testing.assert_array_equal(a["reference_resistivity"].values,
                                  b["reference_resistivity"].values)
    # the picks themselves against the scenario that made the data (3D model, contact at 30 m):
    # from 2 D ahead the contact is found within half a diameter (as in test_drive.py)
    faces = a["face_chainage_m"].values
    ahead = a["contact_ahead_m"].values
    near = CONTACT_CHAINAGE_M - faces <= 2 * D + 1e-9
    assert near.sum() >= 6
    assert np.all(np.isfinite(ahead[near])), ahead[near]
    assert np.all(np.abs(ahead[near] - (CONTACT_CHAINAGE_M - faces[near])) <= 0.5 * D)
    assert np.all(a["resistivity_beyond"].values[near] > a["resistivity_around"].values[near])


@pytest.mark.slow  # three runs of `invert` (mesh, factors, contact fit): 20-35 s
def test_a_shift_without_the_stored_evidence_restarts_the_window(tmp_path, chained):
    # the check above has teeth: the second and third shifts alone (no store before them)
    # give other fits in the first advances of their windows
    settings = _settings(tmp_path)
    store, alone = tmp_path / "shifts.nc", tmp_path / "alone.nc"
    parts = _split(tmp_path, [list(range(1, 10)), list(range(10, 20))])
    for part in parts:
        assert _invert(part, store, settings) == 0
    assert _invert(parts[1], alone, settings) == 0
    a = open_section(store).sel(advance=list(range(10, 20)))
    b = open_section(alone)
    differ = ~np.isclose(a["resistivity_around"].values, b["resistivity_around"].values,
                         rtol=1e-6, equal_nan=True)
    assert differ.any()
    assert not np.allclose(a["parameter_resistivity"].values,
                           b["parameter_resistivity"].values)


@pytest.mark.slow  # three runs of `invert` (mesh, factors, contact fit): 20-35 s
def test_repeated_advances_are_skipped_and_conflicts_fail(tmp_path, chained, caplog):
    settings = _settings(tmp_path)
    store = tmp_path / "shifts.nc"
    first, second = _split(tmp_path, [list(range(1, 8)), list(range(6, 12))])
    assert _invert(first, store, settings) == 0
    before = open_section(store)
    with caplog.at_level(logging.WARNING, logger="tbminv"):
        assert _invert(second, store, settings) == 0
    assert "advances 6-7 are already in the store" in caplog.text
    after = open_section(store)
    assert after["advance"].values.tolist() == list(range(1, 12))
    kept = after.sel(advance=[6, 7])
    np.testing.assert_array_equal(kept["parameter_resistivity"].values,
                                  before.sel(advance=[6, 7])["parameter_resistivity"].values)
    assert set(kept["shift"].values.astype(str)) == set(before["shift"].values.astype(str))
    # a log of stored advances only (another shift's label): nothing to invert, store unchanged
    (again,) = _split(tmp_path, [[6, 7, 8]], prefix="again")
    lines: list[str] = []
    assert invert_job(again, DATA / "fixture_layout.toml", store, settings_path=settings,
                      progress=False, echo=lines.append) == 0
    assert any(line.startswith("nothing to invert") for line in lines), lines
    assert open_section(store).sizes["advance"] == 11
    # an advance number stored at another face chainage is a true conflict: one clear error
    moved = pd.read_csv(second, dtype=str, keep_default_na=False)
    moved = moved[moved["advance"] == "11"].assign(advance="5")
    bad = tmp_path / "renumbered.csv"
    moved.to_csv(bad, index=False)
    inv_settings, qc_settings = load_settings(settings)
    with pytest.raises(SectionError, match=r"advance 5 at face chainage 15\.000 m is stored "
                                           r"under shift .* at 6\.000 m"):
        run_drive(bad, load_layout(DATA / "fixture_layout.toml"), store,
                  settings=inv_settings, qc_settings=qc_settings)
    assert open_section(store).sizes["advance"] == 11


@pytest.mark.slow  # four runs of `invert` (mesh, factors, contact fit): 20-35 s
def test_an_interrupted_shift_resumes_from_its_journal_and_the_store(tmp_path, monkeypatch):
    settings = _settings(tmp_path)
    whole, store = tmp_path / "whole.nc", tmp_path / "shifts.nc"
    monkeypatch.setattr(DriveInverter, "invert_advance", _chained_image)
    assert _invert(LOG, whole, settings) == 0
    first, second = _split(tmp_path, [list(range(1, 10)), list(range(10, 20))])
    assert _invert(first, store, settings) == 0

    def dies_at_13(self, adv, start=None, reference=None):
        if adv.advance == 13:
            raise KeyboardInterrupt  # as an operator's Ctrl-C would, mid-shift
        return _chained_image(self, adv, start, reference)

    monkeypatch.setattr(DriveInverter, "invert_advance", dies_at_13)
    with pytest.raises(KeyboardInterrupt):
        _invert(second, store, settings)
    journals = [p for p in journal_root(store).iterdir() if p.is_dir()]
    assert len(journals) == 1
    assert sorted(p.name for p in journals[0].glob("advance-*.npz")) == [
        f"advance-{k:06d}.npz" for k in (10, 11, 12)]
    monkeypatch.setattr(DriveInverter, "invert_advance", _chained_image)
    # resumed, and stopped again between storing the shift and removing its journal
    monkeypatch.setattr(Journal, "remove", lambda self: None)
    assert _invert(second, store, settings) == 0
    assert journal_root(store).exists()
    monkeypatch.undo()
    a, b = open_section(store), open_section(whole)
    np.testing.assert_array_equal(a["parameter_resistivity"].values,
                                  b["parameter_resistivity"].values)
    _assert_same_contacts(a, b, rtol=1e-12)
    # the same command once more: every advance is stored, the left journal is removed
    monkeypatch.setattr(DriveInverter, "invert_advance", _never)
    assert _invert(second, store, settings) == 0
    assert not journal_root(store).exists()
    assert open_section(store).sizes["advance"] == 19


def _never(*args, **kwargs):
    raise AssertionError("a stored advance was inverted again")


@pytest.mark.slow  # 2 x 9 image inversions: 3.5-8 min on 2 shared CPUs (measured)
def test_three_shift_logs_invert_as_one_log(tmp_path):
    settings = _settings(tmp_path, max_iter=3)
    advances = list(range(10, 19))      # faces 13.5 .. 25.5 m: the contact 16.5 .. 4.5 m ahead
    (whole_log,) = _split(tmp_path, [advances], prefix="whole")
    whole = tmp_path / "whole.nc"
    assert _invert(whole_log, whole, settings) == 0
    store = tmp_path / "shifts.nc"
    for part in _split(tmp_path, [advances[:3], advances[3:6], advances[6:]]):
        assert _invert(part, store, settings) == 0
    a, b = open_section(store), open_section(whole)
    assert a["advance"].values.tolist() == b["advance"].values.tolist() == advances
    # Same inputs, same start models, same process: the images agree to round-off of the
    # solver (1e-6 is far below any change the images show; measured with this project's
    # model: equal to the last bit on this machine).
    np.testing.assert_allclose(a["resistivity"].values, b["resistivity"].values, rtol=1e-6,
                               equal_nan=True)
    np.testing.assert_allclose(a["chi2"].values, b["chi2"].values, rtol=1e-6)
    # the same picks: found in the same advances, chainages within 1 mm
    np.testing.assert_array_equal(np.isfinite(a["contact_chainage_m"].values),
                                  np.isfinite(b["contact_chainage_m"].values))
    np.testing.assert_allclose(a["contact_chainage_m"].values, b["contact_chainage_m"].values,
                               atol=1e-3, equal_nan=True)
    _assert_same_contacts(a, b, rtol=1e-6)
    # and the picks against the scenario (contact at 30 m, 3D model): within half a diameter
    # (from 2 D ahead, where the calibration benchmark finds the distance answer sharp; a far
    # early pick may sit anywhere inside its wide interval)
    found = np.isfinite(a["contact_chainage_m"].values)
    near = found & (CONTACT_CHAINAGE_M - a["face_chainage_m"].values <= 2 * D)
    assert near.sum() >= 3
    assert np.all(np.abs(a["contact_chainage_m"].values[near] - CONTACT_CHAINAGE_M)
                  <= 0.5 * D)
    assert math.isfinite(float(a["reference_resistivity"].values[-1]))
