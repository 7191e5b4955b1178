"""The forward-model protocol and registry (tbminv.forward.registry)."""

from __future__ import annotations

import numpy as np
import pytest

from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.forward.axisym.mesh import CylMeshSettings
from tbminv.forward.cartesian25d import Cartesian25DSettings
from tbminv.forward.fem3d.mesh import MeshSettings
from tbminv.forward.fem3d.model import Fem3DSettings
from tbminv.forward.registry import (
    MODEL_NAMES,
    ForwardModel,
    ModelNotAvailable,
    make_model,
    model_options_for,
    resolve_model,
)
from tbminv.ground import Scenario
from tbminv.layout import Layout, Measurement

COARSE = AxisymSettings(mesh=CylMeshSettings(h_fine_m=0.05, growth=1.3, domain_m=1000.0),
                        max_harmonics=20)
SMALL3D = Fem3DSettings(p2=False, mesh=MeshSettings(box_m=120.0, n_segments=8, quality=1.5,
                                                     electrode_size_m=0.3, face_size_m=1.5,
                                                     growth=2.0, refine_ahead_m=20.0))
OPTIONS = {"analytic": {}, "axisym": {"settings": COARSE},
           "section": {"settings": Cartesian25DSettings(ratio_correction=False)},
           "3d": {"settings": SMALL3D}}


ELECTRODES = (("T1", "cutterhead", 0.05, 0.5, 0.0), ("T2", "cutterhead", 0.05, 2.0, 180.0),
              ("S1", "shield", -3.0, 3.1, 0.0))
"""label, kind, axial_m, radius_m, angle_deg; plus the remote R1 at infinity."""


def _layout() -> Layout:
    """No machine, no bore, full space: every model can answer it."""
    els = [{"label": lab, "kind": kind, "axial_m": x, "radius_m": r, "angle_deg": a}
           for lab, kind, x, r, a in ELECTRODES] + [{"label": "R1", "kind": "remote"}]
    quads = [("T1", "R1", "T2", "R1"), ("T1", "S1", "T2", "")]
    return Layout.from_dict({
        "machine": {"diameter_m": 6.0, "shield_length_m": 10.0, "model_body": False},
        "tunnel": {"model_cavity": False}, "electrode": els,
        "measurement": [dict(zip("abmn", q)) for q in quads]}, source="<registry test>")


def _check_protocol(name: str, rtol: float = 1e-6) -> None:
    lay = _layout()
    model = make_model(name, lay, **OPTIONS[name])
    assert isinstance(model, ForwardModel)
    sc = Scenario.homogeneous(50.0)
    r = model.response(sc, 100.0)
    assert r.shape == (2,) and np.all(np.isfinite(r)) and np.all(r != 0)
    # labels, Measurement objects and reciprocals in any order give the same numbers
    quads = [("T2", None, "T1", "S1"), lay.measurements[0], ("T1", "", "T2", "")]
    got = model.response(sc, 100.0, 0.0, quads)
    np.testing.assert_allclose(got, [r[1], r[0], r[0]], rtol=rtol)   # R1 is at infinity
    assert isinstance(quads[1], Measurement)


@pytest.mark.parametrize("name", ["analytic", "axisym", "section"])
def test_every_model_answers_the_protocol(name):
    _check_protocol(name)


@pytest.mark.slow
def test_the_3d_model_answers_the_protocol():
    # a reciprocal is solved from the other electrode pair: equal to 4e-6 here (P1, small mesh)
    _check_protocol("3d", rtol=1e-4)


def test_names_and_built_models():
    lay = _layout()
    assert set(MODEL_NAMES) == set(OPTIONS)
    with pytest.raises(ModelNotAvailable, match="'nope'"):
        make_model("nope", lay)
    built = make_model("analytic", lay)
    assert resolve_model(built, lay) is built
    assert type(resolve_model("analytic", lay)) is type(built)
    with pytest.raises(ValueError, match="built model"):
        resolve_model(built, lay, settings=COARSE)


def test_axisym_presets():
    assert model_options_for("axisym", "standard") == {}
    assert model_options_for("axisym", "fast") == {"settings": AxisymSettings.fast()}
    assert model_options_for("3d", "fast") == {}
    with pytest.raises(ValueError, match="'fine'"):
        model_options_for("axisym", "fine")
