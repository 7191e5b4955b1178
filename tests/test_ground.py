"""Ground scenarios: evaluation at points, validation, axisymmetry."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.ground import (
    Contact,
    NotAxisymmetricError,
    Scenario,
    ScenarioError,
    demo_ground_path,
    load_scenario,
)


def test_square_contact_and_override_order():
    sc = Scenario.from_dict({
        "background_resistivity_ohmm": 80.0,
        "contact": [{"chainage_m": 100.0, "resistivity_ohmm": 10.0},
                    {"chainage_m": 120.0, "resistivity_ohmm": 500.0}],
    })
    rho = sc.resistivity([99.0, 101.0, 119.0, 121.0], 5.0, -3.0)
    np.testing.assert_array_equal(rho, [80.0, 10.0, 10.0, 500.0])


def test_dipping_contact_sides():
    # strike 90 deg (the strike line points to the right, -y); the plane dips to the right of
    # the strike direction seen from above, i.e. towards smaller chainage: above the axis the
    # plane lies further ahead, below the axis nearer.
    c = Contact(chainage_m=100.0, dip_deg=45.0, strike_deg=90.0, resistivity_ohmm=10.0)
    np.testing.assert_allclose(c.normal, [math.sqrt(0.5), 0.0, -math.sqrt(0.5)], atol=1e-12)
    x = np.array([100.1, 99.9, 101.0, 103.0, 99.0, 97.0])
    z = np.array([0.0, 0.0, 2.0, 2.0, -2.0, -2.0])
    # on the axis: beyond = larger chainage; 2 m up the plane is at x = 102, 2 m down at x = 98
    np.testing.assert_array_equal(c.beyond(x, np.zeros_like(x), z),
                                  [True, False, False, True, True, False])


def test_sphere_inside_outside_and_overrides_contact():
    sc = Scenario.from_dict({
        "background_resistivity_ohmm": 80.0,
        "contact": [{"chainage_m": 100.0, "resistivity_ohmm": 10.0}],
        "sphere": [{"chainage_m": 110.0, "y_m": 1.0, "z_m": -1.0, "radius_m": 2.0,
                    "resistivity_ohmm": 2000.0}],
    })
    inside = sc.resistivity(110.0 + 1.9, 1.0, -1.0)
    outside = sc.resistivity(110.0 + 2.1, 1.0, -1.0)
    assert float(inside) == 2000.0 and float(outside) == 10.0


def test_vectorised_broadcasting():
    sc = load_scenario(demo_ground_path())
    x = np.linspace(1200, 1300, 11)[:, None]
    z = np.linspace(-5, 5, 7)[None, :]
    rho = sc.resistivity(x, 0.0, z)
    assert rho.shape == (11, 7)


def test_ellipsoid_and_water_zone():
    sc = Scenario.from_dict({
        "background_resistivity_ohmm": 50.0,
        "ellipsoid": [{"chainage_m": 10.0, "semi_axes_m": [4.0, 1.0, 1.0],
                       "resistivity_ohmm": 5.0}],
        "water_zone": [{"chainage_start_m": 30.0, "chainage_end_m": 40.0, "z_top_m": 0.0,
                        "resistivity_ohmm": 20.0}],
    })
    np.testing.assert_array_equal(sc.resistivity([13.9, 14.1], 0.0, 0.0), [5.0, 50.0])
    np.testing.assert_array_equal(sc.resistivity([35.0, 35.0], 0.0, [-1.0, 1.0]), [20.0, 50.0])


def test_axisymmetry():
    sym = Scenario.from_dict({"background_resistivity_ohmm": 50.0,
                              "contact": [{"chainage_m": 5.0, "resistivity_ohmm": 5.0}],
                              "sphere": [{"chainage_m": 9.0, "radius_m": 1.0,
                                          "resistivity_ohmm": 1.0}]})
    assert sym.axisymmetric_problems() == []
    np.testing.assert_array_equal(sym.resistivity_axisym([4.0, 6.0, 9.0], [0.0, 3.0, 0.5]),
                                  [50.0, 5.0, 1.0])
    off = Scenario.from_dict({"background_resistivity_ohmm": 50.0,
                              "sphere": [{"chainage_m": 9.0, "y_m": 1.5, "radius_m": 1.0,
                                          "resistivity_ohmm": 1.0}]})
    with pytest.raises(NotAxisymmetricError, match="3D model"):
        off.resistivity_axisym([1.0], [1.0])
    assert load_scenario(demo_ground_path()).axisymmetric_problems() == []
    dip = Scenario.from_dict({"background_resistivity_ohmm": 50.0,
                              "contact": [{"chainage_m": 5.0, "dip_deg": 60.0,
                                           "resistivity_ohmm": 5.0}]})
    assert "not square" in dip.axisymmetric_problems()[0]


@pytest.mark.parametrize(("d", "frag"), [
    ({}, "background_resistivity_ohmm: missing"),
    ({"background_resistivity_ohmm": -1}, "> 0"),
    ({"background_resistivity_ohmm": 1, "contact": [{"chainage_m": 1}]},
     "[contact] #1 resistivity_ohmm: missing"),
    ({"background_resistivity_ohmm": 1,
      "contact": [{"chainage_m": 1, "resistivity_ohmm": 2, "dip_deg": 0}]}, "dip_deg = 0"),
    ({"background_resistivity_ohmm": 1,
      "contact": [{"chainage_m": 1, "resistivity_ohmm": 2, "strike_deg": 0}]}, "parallel"),
    ({"background_resistivity_ohmm": 1,
      "sphere": [{"chainage_m": 1, "radius_m": "big", "resistivity_ohmm": 2}]}, "radius_m"),
])
def test_validation(d, frag):
    with pytest.raises(ScenarioError) as err:
        Scenario.from_dict(d, source="g.toml")
    assert frag in str(err.value) and str(err.value).startswith("g.toml")


def test_round_trip(tmp_path):
    sc = load_scenario(demo_ground_path())
    again = load_scenario(sc.to_toml(tmp_path / "g.toml"))
    assert again == sc
