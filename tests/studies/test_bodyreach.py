"""Planning for an off-axis body (tbminv.studies.bodyreach)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.layout import Layout
from tbminv.studies.bodyreach import body_bearing_study, sphere_moment_m3
from tests.helpers import full_space_layout

#: coarse model: these tests check symmetry and scaling, not accuracy
FAST = {"settings": AxisymSettings.fast(), "m_max": 12}


def _layout() -> Layout:
    """Two tools on one bearing (30 deg), no steel, no bore: a full space."""
    els = [{"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 1.0,
            "angle_deg": 30.0},
           {"label": "T2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.5,
            "angle_deg": 30.0},
           {"label": "T3", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 1.8,
            "angle_deg": 210.0},
           {"label": "R", "kind": "remote"}]
    meas = [{"a": "T1", "b": "R", "m": "T2", "n": "R"},
            {"a": "T1", "b": "R", "m": "T3", "n": "R"},
            {"a": "T2", "b": "R", "m": "T3", "n": "R"}]
    return full_space_layout(els, meas, "body planning test layout")


def test_sphere_moment_factor():
    """``3 (sigma_1 - sigma_0) / (sigma_1 + 2 sigma_0)``: 3 for a perfect conductor, -1.5 for
    an insulator (sphere in a uniform field, Telford, Geldart & Sheriff 1990, sec. 8.3, from
    memory)."""
    vol = 4.0 / 3.0 * math.pi
    assert sphere_moment_m3(1.0, 1e-9) == pytest.approx(3.0 * vol, rel=1e-6)
    assert sphere_moment_m3(1.0, 1e9) == pytest.approx(-1.5 * vol, rel=1e-6)
    assert sphere_moment_m3(2.0, 1.0) == 0.0


def test_largest_response_when_the_tools_line_up_with_the_body():
    """Tools T1, T2 on one bearing: by mirror symmetry the response of T1-T2 against the angle
    is even about the angle that lines them up with the body; it is largest there (the body
    is nearest to both). Body at bearing 100 deg, tools at 30 deg: angle 70 deg."""
    ds = body_bearing_study(_layout(), bearing_deg=100.0, offset_m=2.5,
                            distances_m=[2.0, 3.0, 4.0], radius_m=1.0,
                            resistivity_ratio=0.1, angles_deg=np.arange(0.0, 360.0, 10.0),
                            sensitivity_options=FAST)
    resp = ds["relative_response"].sel(measurement="T1/R/T2/R")
    for d in ds.distance_ahead.values:
        r = resp.sel(distance_ahead=d).values
        assert float(ds["angle_of_largest_response"].sel(measurement="T1/R/T2/R",
                                                          distance_ahead=d)) == 70.0
        i = np.arange(36)
        np.testing.assert_allclose(r[(7 + i) % 36], r[(7 - i) % 36], rtol=0.02,
                                   atol=0.02 * np.abs(r).max())
        # a conductive body ahead of both poles lowers the pole-pole resistance
        # (dV/dsigma = -int grad u . grad v, and grad u . grad v > 0 beyond both poles)
        assert r[7] < 0


def test_bearing_reach_shrinks_with_noise():
    """More noise, shorter bearing reach (noncentrality scales as 1 / noise^2)."""
    kw = dict(bearing_deg=100.0, offset_m=2.5, distances_m=np.arange(2.0, 12.1, 1.0),
              radius_m=1.5, resistivity_ratio=0.1, angles_deg=np.arange(0.0, 360.0, 30.0),
              sensitivity_options=FAST)
    lo = body_bearing_study(_layout(), noise_rel=0.01, **kw)
    hi = body_bearing_study(_layout(), noise_rel=0.04, **kw)
    np.testing.assert_allclose(lo.bearing_noncentrality.values,
                               16.0 * hi.bearing_noncentrality.values, rtol=1e-9)
    assert float(lo.bearing_reach_m) > float(hi.bearing_reach_m) > 0.0
