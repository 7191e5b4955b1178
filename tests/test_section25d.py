"""Cartesian 2.5D comparison model (pyGIMLi 2.5D ERT on the vertical plane through the axis)."""

from __future__ import annotations

import numpy as np
import pytest

from tbminv.forward.cartesian25d import Cartesian25DModel, Cartesian25DSettings
from tbminv.forward.registry import make_model
from tbminv.ground import Scenario
from tbminv.layout import Layout


def layout(model_body: bool, cover_m: float = 14.0) -> Layout:
    els = [{"label": "A", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.0},
           {"label": "M", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 1.5,
            "angle_deg": 0.0},
           {"label": "N", "kind": "shield", "axial_m": -3.0, "radius_m": 3.1,
            "angle_deg": 180.0},
           {"label": "S", "kind": "shield", "axial_m": -3.0, "radius_m": 3.1,
            "angle_deg": 90.0},
           {"label": "R", "kind": "remote"}]
    return Layout.from_dict({
        "machine": {"diameter_m": 6.0, "shield_length_m": 9.0, "model_body": model_body},
        "tunnel": {"model_cavity": False, "cover_m": cover_m},
        "electrode": els,
        "measurement": [{"a": "A", "b": "R", "m": "M", "n": "R"},
                        {"a": "A", "b": "R", "m": "N", "n": "R"},
                        {"a": "A", "b": "M", "m": "N", "n": "R"}]})


def test_half_space_matches_image_solution():
    # point source under an insulating surface: one image source (Telford, Geldart & Sheriff
    # 1990, Applied Geophysics 2nd ed., sec. 8.3). pyGIMLi 2.5D, sr=False, 5 cm refinement
    # nodes around electrodes, quality 34, max area 50 m^2: within 2.5 %.
    lay = layout(model_body=False)
    r = Cartesian25DModel(lay, Cartesian25DSettings(ratio_correction=False)).response(
        Scenario.homogeneous(100.0), 0.0)
    expected = make_model("analytic", lay).response(Scenario.homogeneous(100.0), 0.0)
    np.testing.assert_allclose(r, expected, rtol=0.025)


def test_projection_moves_side_electrodes_off_the_slab():
    lay = layout(model_body=True)
    proj = Cartesian25DModel(lay).projected_positions(0.0)
    # angle 90 deg projects to z = 0, inside the steel slab: moved to the crown face + offset
    assert proj["S"][1] == pytest.approx(3.0 + 0.05)
    assert proj["N"][1] == pytest.approx(-3.1)
    assert proj["R"] is None


def test_steel_slab_bias_is_large():
    # the known bias: the slab is earthed across the whole section, so potentials near the
    # machine fall far below the same layout without steel
    with_steel = Cartesian25DModel(layout(True), Cartesian25DSettings(ratio_correction=False))
    without = Cartesian25DModel(layout(False), Cartesian25DSettings(ratio_correction=False))
    hom = Scenario.homogeneous(100.0)
    ratio = with_steel.response(hom, 0.0)[0] / without.response(hom, 0.0)[0]
    assert ratio < 0.5
