"""QC per advance (tbminv.readings.qcadvance) on a simulated drive with known noise.

The drive log tests/data/drive_contact10_seed11.csv was simulated with 2 % Gaussian relative
noise on every reading, normal and reciprocal drawn independently (tests/data/
make_drive_fixtures.py). The reciprocal error ``|Rn - Rr| / mean|R|`` is then, to first order,
``|e|`` with ``e ~ N(0, (sqrt(2) * 0.02)^2)``: a half-normal distribution, whose median is
``0.6745 sigma`` and 90th percentile ``1.6449 sigma`` (standard normal quantiles; Johnson,
Kotz & Balakrishnan 1994, Continuous Univariate Distributions vol. 1, ch. 13, half-normal,
from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import halfnorm

from tbminv.readings.advance import prepare_advances
from tbminv.readings.qc import FLAG_NAMES, QCSettings
from tbminv.readings.qcadvance import QC_VARIABLES, qc_per_advance
from tests.helpers import DATA, fixture_layout


@pytest.fixture(scope="module")
def prepared():
    return prepare_advances(DATA / "drive_contact10_seed11.csv", fixture_layout(),
                            QCSettings(), model_error_floor=0.006)


def test_reciprocal_error_matches_the_half_normal_of_the_simulated_noise(prepared):
    ds = qc_per_advance(prepared.qc, model_error_floor=0.006)
    sigma = math.sqrt(2.0) * 0.02
    # median over advances of the per-advance statistics (21 pairs each)
    med = float(np.median(ds["reciprocal_error_median"].values))
    p90 = float(np.median(ds["reciprocal_error_p90"].values))
    assert med == pytest.approx(halfnorm.ppf(0.5, scale=sigma), rel=0.15)
    assert p90 == pytest.approx(halfnorm.ppf(0.9, scale=sigma), rel=0.2)


def test_counts_add_up_and_variables_carry_units(prepared):
    ds = qc_per_advance(prepared.qc, model_error_floor=0.006, synthetic=True)
    assert set(QC_VARIABLES) <= set(ds.data_vars)
    t = prepared.qc.table
    assert int(ds["qc_readings"].sum()) == len(t)
    assert int(ds["qc_valid"].sum()) == int(t["valid"].sum())
    assert list(ds["qc_flag"].values) == list(FLAG_NAMES)
    assert (ds["qc_flag_count"].sum("qc_flag") >= ds["qc_flagged"]).all()
    assert (ds["qc_synthetic"] == 1).all()
    for name in QC_VARIABLES:
        assert "units" in ds[name].attrs and "long_name" in ds[name].attrs
    # one reading as inverted: at least the modelling floor, about the simulated 2 %
    rel = ds["qc_rel_error_median"].values
    assert np.all(rel >= 0.006) and 0.01 < float(np.median(rel)) < 0.03
