"""The drive's state in the store: written per shift, read back by the next shift's run.

Plumbing checks on invented sections (tests/helpers.py), no inversion: the inversion-level
check that three shift logs give one log's results is tests/inversion/test_shifts.py.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.inversion.history import DriveHistory, grid_signature
from tbminv.inversion.outcome import SectionError
from tbminv.results.drivestate import add_history, read_history, repeated_advances
from tbminv.results.store import append_shift, open_section
from tests.helpers import assert_cf_compliant, make_section

LABELS = ("T0/-/T1/-", "T1/-/T0/-", "S0/-/T2/-")


def _history(advances, seed: int, labels=LABELS, n_param: int = 40) -> DriveHistory:
    rng = np.random.default_rng(seed)
    n = len(advances)
    r = rng.uniform(0.1, 2.0, (n, len(labels)))
    r[0, 1] = np.nan                                  # a reading not valid in one advance
    return DriveHistory(
        advances=np.asarray(advances, int), faces_m=1200.0 + 1.5 * np.asarray(advances, float),
        contact_labels=tuple(labels), contact_r_ohm=r,
        contact_rel_error=rng.uniform(0.01, 0.03, (n, len(labels))),
        models_ohmm=rng.uniform(10.0, 500.0, (n, n_param)),
        grid_sha256=grid_signature(np.arange(5.0), np.arange(3.0), np.ones(8, bool)),
        reference_resistivity_ohmm=80.0)


def test_state_round_trips_through_two_shifts_exactly(tmp_path):
    store = tmp_path / "section.nc"
    day, night = _history(range(0, 4), 1), _history(range(4, 8), 2)
    append_shift(store, add_history(make_section(range(0, 4)), day), shift="day")
    append_shift(store, add_history(make_section(range(4, 8)), night), shift="night")
    ds = open_section(store)
    assert ds["contact_transfer_resistance"].attrs["units"] == "ohm"
    assert ds["parameter_resistivity"].attrs["units"] == "ohm m"
    back = read_history(ds, before_advance=8)
    assert back is not None and back.advances.tolist() == list(range(8))
    # NetCDF NC_DOUBLE is IEEE 754 binary64 (NetCDF Users Guide, "Data Types"): the stored
    # numbers come back bit for bit, NaN where a reading was not valid
    for name in ("contact_r_ohm", "contact_rel_error", "models_ohmm", "faces_m"):
        want = np.concatenate([getattr(day, name), getattr(night, name)])
        np.testing.assert_array_equal(getattr(back, name), want, err_msg=name)
    assert back.contact_labels == LABELS and back.reference_resistivity_ohmm == 80.0
    # the advances before a later shift only
    assert read_history(ds, before_advance=3).advances.tolist() == [0, 1, 2]
    assert read_history(ds, before_advance=0) is None
    model, face = back.last_model(night.grid_sha256, 40)
    np.testing.assert_array_equal(model, night.models_ohmm[-1])
    assert face == night.faces_m[-1]
    assert back.last_model("another grid", 40) is None     # other grid: no warm start
    assert back.last_model(night.grid_sha256, 41) is None


def test_contact_columns_follow_labels_and_tail_keeps_the_latest():
    h = _history(range(10), 3)
    r, e = h.contact_columns([LABELS[2], "BODY/-/C9/-", LABELS[0]])
    np.testing.assert_array_equal(r[:, 0], h.contact_r_ohm[:, 2])
    assert np.all(np.isnan(r[:, 1]) & np.isnan(e[:, 1]))      # a reading the store lacks
    np.testing.assert_array_equal(e[:, 2], h.contact_rel_error[:, 0])
    assert h.tail(3).advances.tolist() == [7, 8, 9] and h.tail(0).n_advances == 0
    assert h.tail(30).n_advances == 10
    assert h.signature() != _history(range(10), 4).signature()


def test_store_of_an_older_version_continues_without_state(tmp_path, caplog):
    store = tmp_path / "section.nc"
    append_shift(store, make_section(range(0, 4)), shift="old")        # no state variables
    back = read_history(open_section(store), before_advance=4)
    assert "no per-advance readings" in caplog.text
    assert back.models_ohmm is None and back.contact_r_ohm.shape == (4, 0)
    assert back.last_model(back.grid_sha256, 40) is None
    assert math.isnan(back.reference_resistivity_ohmm)
    append_shift(store, add_history(make_section(range(4, 6)), _history(range(4, 6), 5)),
                 shift="new")
    ds = open_section(store)
    r = ds["contact_transfer_resistance"].values
    assert np.all(np.isnan(r[:4])) and np.isfinite(r[4:]).sum() == r[4:].size - 1
    assert ds["parameter_grid_sha256"].values.astype(str)[:4].tolist() == [""] * 4
    assert read_history(ds, before_advance=4).last_model("", 40) is None


def test_repeated_advances_are_found_and_conflicts_refused(tmp_path):
    store = tmp_path / "section.nc"
    append_shift(store, make_section(range(0, 4), first_face_m=1200.0, step_m=1.5), shift="A")
    ds = open_section(store)
    faces = 1200.0 + 1.5 * np.arange(2, 7)
    got = repeated_advances(ds, advances=np.arange(2, 7), faces_m=faces)
    assert got.tolist() == [2, 3]
    assert repeated_advances(None, advances=np.arange(3), faces_m=np.zeros(3)).size == 0
    with pytest.raises(SectionError, match=r"log\.csv: advance 3 at face chainage 1210\.000 m "
                                           r"is stored under shift 'A' at 1204\.500 m"):
        repeated_advances(ds, advances=np.array([3]), faces_m=np.array([1210.0]),
                          source="log.csv")


def test_state_of_other_advances_is_refused():
    with pytest.raises(SectionError, match="advances differ"):
        add_history(make_section(range(0, 4)), _history(range(1, 5), 6))


def test_store_with_state_passes_cf_checker(tmp_path):
    # the IOOS compliance checker on the CF-1.8 suite (as tests/results/test_section.py does for
    # the section without the state variables)
    store = tmp_path / "s.nc"
    append_shift(store, add_history(make_section(range(0, 3)), _history(range(0, 3), 7)),
                 shift="A")
    append_shift(store, add_history(make_section(range(3, 5)), _history(range(3, 5), 8)),
                 shift="B")
    assert_cf_compliant(store, tmp_path)
