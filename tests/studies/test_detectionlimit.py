"""Detection limit of a shift (tbminv.studies.detectionlimit): axisymmetric model, small layout.

Checks: the reach shrinks as the noise grows (the noncentrality of the whole-set statistic is
proportional to 1 / noise^2, Cowan, Cranmer, Gross & Vitells 2011, Eur. Phys. J. C 71:1554,
sec. 3: four times the noise needs the response four times larger), the responses are cached
(a new noise level computes nothing), and bad input is refused.
"""

from __future__ import annotations

import pytest

from tbminv.cache import cache_dir
from tbminv.studies.detectionlimit import detection_limit
from tests.helpers import fixture_layout

pytestmark = pytest.mark.slow


def test_reach_shrinks_with_noise_and_responses_are_cached(tmp_path, monkeypatch):
    monkeypatch.setenv("TBMINV_CACHE_DIR", str(tmp_path))   # a cache of this test's own
    layout = fixture_layout()
    quiet = detection_limit(layout, 0.0005)
    files = sorted(cache_dir("detection-limit").glob("*.npz"))
    assert len(files) == 3      # contact x5, contact x0.2, body
    noisy = detection_limit(layout, 0.001)
    assert sorted(cache_dir("detection-limit").glob("*.npz")) == files
    # the small test layout has few readings: noise levels well below a real log's
    assert 0 < noisy.contact_reach_m < quiet.contact_reach_m
    assert 0 < noisy.body_reach_m < quiet.body_reach_m
    # a 2 m body is harder to see than a contact across the whole tunnel
    assert noisy.body_reach_m < noisy.contact_reach_m
    assert noisy.body_diameter_m == 2.0 and noisy.contact_contrast == 5.0


def test_bad_noise_is_refused():
    with pytest.raises(ValueError, match="noise_rel"):
        detection_limit(fixture_layout(), 0.0)
