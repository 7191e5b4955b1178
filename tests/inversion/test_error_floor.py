"""The modelling-error floor: quadrature arithmetic, the settings key, the production chain."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.settings import InversionError, InversionSettings, load_settings
from tbminv.readings.advance import AdvanceData, prepare_advances
from tbminv.readings.errorfloor import floored_error, with_error_floor
from tbminv.readings.qc import QCSettings
from tbminv.studies.methods import synthetic
from tests.helpers import DATA, fixture_layout


def test_floor_adds_in_quadrature():
    # independent errors add in quadrature: 3 % and 4 % give 5 % (closed arithmetic)
    np.testing.assert_allclose(floored_error([0.03, 0.0, 0.12], 0.04),
                               [0.05, 0.04, math.hypot(0.12, 0.04)], rtol=1e-12)
    assert math.isnan(floored_error([np.nan], 0.04)[0])
    np.testing.assert_array_equal(floored_error([0.03], 0.0), [0.03])
    with pytest.raises(ValueError, match="floor"):
        floored_error([0.03], -0.01)


def test_with_error_floor_copies_and_is_the_one_research_uses():
    d = AdvanceData(1, 0.0, 0.0, np.array([1.0, 2.0]), np.array([0.05, 0.12]), 2, 2)
    out = with_error_floor([d], 0.09)[0]
    np.testing.assert_allclose(out.rel_error, [math.hypot(0.05, 0.09), 0.15])  # 9-12-15
    np.testing.assert_array_equal(d.rel_error, [0.05, 0.12])        # input untouched
    assert synthetic.with_error_floor is with_error_floor           # one implementation


def test_settings_key(tmp_path):
    # default: measured with this project's models (bench/results/error_floor.json)
    assert InversionSettings().model_error_floor == 0.006
    p = tmp_path / "s.toml"
    p.write_text("[invert]\nmodel_error_floor = 0.02\n")
    assert load_settings(p)[0].model_error_floor == 0.02
    for bad in ("-0.01", "1.5", "'high'", "nan"):
        p.write_text(f"[invert]\nmodel_error_floor = {bad}\n")
        with pytest.raises(InversionError, match="model_error_floor"):
            load_settings(p)


def test_drive_prepare_gives_images_and_contact_fit_the_floored_error():
    layout = fixture_layout()
    prep = prepare_advances(DATA / "drive_homogeneous_seed7.csv", layout,
                            QCSettings(error_model_group="log"))
    data = prep.advances[:2]
    settings = InversionSettings(forward_settings="fast", model_error_floor=0.05,
                                 contact_fit=False)
    inv = DriveInverter(layout, settings)
    inv.rho_ref_ohmm = 100.0      # set: no forward run needed for this check
    out = inv.prepare(data)
    for before, after in zip(data, out):
        np.testing.assert_allclose(after.rel_error, np.hypot(before.rel_error, 0.05))
    # the contact fit reads the same prepared advances
    _, e, _ = inv._contact_data(out)
    assert np.nanmin(e) >= 0.05

