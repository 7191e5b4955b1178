"""Forward models by name, behind one small interface.

Every model is built once for a layout (mesh and operator set up once) and then answers
``response(scenario, face_chainage_m, cutterhead_deg) -> R`` with the transfer resistances in ohm
of ``layout.measurements``, in protocol order. Names:

``analytic``
    closed forms (:mod:`tbminv.analytic`): no machine, no tunnel; for checks.
``axisym``
    the axisymmetric harmonic model (:mod:`tbminv.axisym`): the 2.5D workhorse.
``3d``
    pyGIMLi's 3D finite elements (:mod:`tbminv.forward3d`): the reference.
``section``
    pyGIMLi's Cartesian 2.5D on the vertical plane through the axis (comparison method).

A model whose module is not part of this version raises :class:`ModelNotAvailable`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, Protocol

import numpy as np

from tbminv.forward.analytic import AnalyticModel
from tbminv.forward.axisym.layout import AxisymModel
from tbminv.forward.cartesian25d import Cartesian25DModel
from tbminv.forward.fem3d.model import Model3D
from tbminv.ground import Scenario
from tbminv.layout import Layout

MODEL_NAMES = ("axisym", "3d", "section", "analytic")


class ModelNotAvailable(ValueError):
    """The named forward model does not exist or is not built in this version."""


class ForwardModel(Protocol):
    """What every forward model offers."""

    layout: Layout

    def response(self, scenario: Scenario, face_chainage_m: float,
                 cutterhead_deg: float = 0.0) -> np.ndarray:
        """Transfer resistances of ``layout.measurements``, ohm."""
        ...


_FACTORIES: dict[str, Callable[..., ForwardModel]] = {
    "analytic": AnalyticModel,
    "axisym": AxisymModel,
    "3d": Model3D,
    "section": Cartesian25DModel,
}


def make_model(name: str, layout: Layout, **opts: Any) -> ForwardModel:
    """Build the forward model ``name`` for ``layout``.

    Raises
    ------
    ModelNotAvailable
        For an unknown name or a model not built in this version.
    """
    if name not in _FACTORIES:
        raise ModelNotAvailable(f"unknown forward model {name!r}; expected one of "
                                f"{', '.join(MODEL_NAMES)}")
    return _FACTORIES[name](layout, **opts)


def register_model(name: str, factory: Callable[..., ForwardModel]) -> None:
    """Register (or replace) a forward model factory under ``name``."""
    _FACTORIES[name] = factory


__all__ = ["make_model", "register_model", "ForwardModel", "ModelNotAvailable", "AnalyticModel",
           "MODEL_NAMES"]
