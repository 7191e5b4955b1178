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

import importlib
from collections.abc import Callable
from typing import Any, Protocol

import numpy as np

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


class AnalyticModel:
    """Closed-form model (see :func:`tbminv.analytic.layout_response`)."""

    def __init__(self, layout: Layout, **_: Any) -> None:
        self.layout = layout

    def response(self, scenario: Scenario, face_chainage_m: float,
                 cutterhead_deg: float = 0.0) -> np.ndarray:
        """Transfer resistances, ohm."""
        from tbminv.analytic import layout_response

        return layout_response(self.layout, scenario, face_chainage_m, cutterhead_deg)


class Model3D:
    """pyGIMLi 3D finite elements (see :class:`tbminv.forward3d.Forward3D`)."""

    def __init__(self, layout: Layout, **opts: Any) -> None:
        from tbminv.forward3d import Forward3D

        self.layout = layout
        self.forward = Forward3D(layout, opts.get("settings"))
        self.settings = opts.get("settings")

    def response(self, scenario: Scenario, face_chainage_m: float,
                 cutterhead_deg: float = 0.0) -> np.ndarray:
        """Transfer resistances, ohm."""
        return np.asarray(self.forward.run(scenario, face_chainage_m, cutterhead_deg).r_ohm,
                          float)


def _lazy(module: str, attr: str) -> Callable[..., ForwardModel]:
    def factory(layout: Layout, **opts: Any) -> ForwardModel:
        try:
            mod = importlib.import_module(f"tbminv.{module}")
        except ModuleNotFoundError as exc:
            if exc.name == f"tbminv.{module}":
                raise ModelNotAvailable(f"forward model needs tbminv.{module}, which is not "
                                        "built in this version") from None
            raise
        return getattr(mod, attr)(layout, **opts)

    return factory


_FACTORIES: dict[str, Callable[..., ForwardModel]] = {
    "analytic": AnalyticModel,
    "axisym": _lazy("axisym", "AxisymModel"),
    "3d": Model3D,
    "section": _lazy("section25d", "SectionModel"),
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
