"""The axisymmetric model against pyGIMLi's 3D model with the steel machine and the bore in.

No closed form exists with the machine in; the reference is the 3D finite-element model (P2,
default mesh, itself checked against closed forms in tests/forward/test_fem3d_model.py). Both
must agree within 2 % on every reading of a layout with cutterhead, shield and steel electrodes,
for homogeneous ground and for contacts ahead (measured here: 0.3-0.6 % max).
"""

from __future__ import annotations

import numpy as np
import pytest

from tbminv.forward.registry import make_model
from tbminv.ground import Contact, Scenario
from tests.helpers import fixture_layout


@pytest.mark.slow
@pytest.mark.parametrize("scenario", [
    Scenario.homogeneous(50.0),
    Scenario(50.0, contacts=(Contact(12.0, 500.0),)),
    Scenario(50.0, contacts=(Contact(6.0, 5.0),)),
], ids=["homogeneous", "contact-10-at-2D", "contact-0.1-at-1D"])
def test_axisym_agrees_with_3d_with_body_and_bore(scenario):
    layout = fixture_layout()
    r3 = make_model("3d", layout).response(scenario, 0.0)
    ra = make_model("axisym", layout).response(scenario, 0.0)
    np.testing.assert_allclose(ra, r3, rtol=0.02)
