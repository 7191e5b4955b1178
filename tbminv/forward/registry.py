"""Forward models by name, behind one protocol.

Every model is built once for a layout (mesh and operator set up once) and then answers::

    response(scenario, face_chainage_m, cutterhead_deg=0.0, measurements=None) -> ndarray

the transfer resistances in ohm of ``measurements`` — None for ``layout.measurements`` in
protocol order, otherwise a sequence of :class:`tbminv.layout.Measurement` or ``(a, b, m, n)``
label tuples (``b`` / ``n`` None for a pole; reciprocals allowed). Names:

``analytic``
    closed forms (:mod:`tbminv.forward.analytic`): no machine, no tunnel; for checks.
``axisym``
    the axisymmetric harmonic model (:mod:`tbminv.forward.axisym.layout`): the 2.5D workhorse.
``3d``
    pyGIMLi's 3D finite elements (:mod:`tbminv.forward.fem3d.model`): the reference.
``section``
    pyGIMLi's Cartesian 2.5D on the vertical plane through the axis
    (:mod:`tbminv.forward.cartesian25d`, comparison method).

The table of names is fixed: a model with other settings is built with :func:`make_model` (or
its class) and handed on as an object; :func:`resolve_model` takes either.
:func:`model_options_for` gives the named accuracy presets of the ``axisym`` model.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from types import MappingProxyType
from typing import Any, Protocol, runtime_checkable

import numpy as np

from tbminv.forward.analytic import AnalyticModel
from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.forward.axisym.layout import AxisymModel
from tbminv.forward.cartesian25d import Cartesian25DModel
from tbminv.forward.fem3d.model import Model3D
from tbminv.forward.quadrupoles import Quadrupoles
from tbminv.ground import Scenario
from tbminv.layout import Layout

MODEL_NAMES = ("axisym", "3d", "section", "analytic")

MODEL_SETTINGS_CHOICES = ("fast", "standard")
"""Named accuracy presets of :func:`model_options_for`."""


class ModelNotAvailable(ValueError):
    """The named forward model does not exist or is not built in this version."""


@runtime_checkable
class ForwardModel(Protocol):
    """What every forward model offers."""

    layout: Layout

    def response(self, scenario: Scenario, face_chainage_m: float, cutterhead_deg: float = 0.0,
                 measurements: Quadrupoles | None = None) -> np.ndarray:
        """Transfer resistances of ``measurements`` (default ``layout.measurements``), ohm."""
        ...


_FACTORIES: Mapping[str, Callable[..., ForwardModel]] = MappingProxyType({
    "analytic": AnalyticModel,
    "axisym": AxisymModel,
    "3d": Model3D,
    "section": Cartesian25DModel,
})


def make_model(name: str, layout: Layout, **opts: Any) -> ForwardModel:
    """Build the forward model ``name`` for ``layout``.

    ``opts`` go to the model's class (e.g. ``settings=``).

    Raises
    ------
    ModelNotAvailable
        For an unknown name.
    """
    if name not in _FACTORIES:
        raise ModelNotAvailable(f"unknown forward model {name!r}; expected one of "
                                f"{', '.join(MODEL_NAMES)}")
    return _FACTORIES[name](layout, **opts)


def resolve_model(model: str | ForwardModel, layout: Layout, **opts: Any) -> ForwardModel:
    """A model for ``layout``: built by name with :func:`make_model`, or a built model as is.

    Raises
    ------
    ModelNotAvailable
        For an unknown name.
    TypeError
        For an object without ``response``.
    ValueError
        For a built model of another layout, or options given with a built model.
    """
    if isinstance(model, str):
        return make_model(model, layout, **opts)
    if not callable(getattr(model, "response", None)):
        raise TypeError(f"forward model {model!r}: expected a name or an object with "
                        "response(scenario, face_chainage_m, cutterhead_deg, measurements)")
    if opts:
        raise ValueError(f"options {sorted(opts)} apply to a model built by name, not to a "
                         "built model")
    own = getattr(model, "layout", layout)
    if own is not layout and own != layout:
        raise ValueError(f"forward model {type(model).__name__} was built for another layout "
                         f"than {layout.source}")
    return model


def model_options_for(model: str, choice: str = "fast") -> dict[str, Any]:
    """Forward-model options for a named accuracy choice.

    ``fast`` (CLI default) is :meth:`tbminv.forward.axisym.fields.AxisymSettings.fast` (coarser
    mesh, fewer harmonics, about 0.6 % from a fine reference on the demo layout,
    bench/results/axisym.json); ``standard`` is the model's defaults (about 0.3 %, 2-3x slower).
    Models other than ``axisym`` take no options here.
    """
    if choice not in MODEL_SETTINGS_CHOICES:
        raise ValueError(f"model settings {choice!r}: expected one of "
                         f"{', '.join(MODEL_SETTINGS_CHOICES)}")
    if model != "axisym" or choice == "standard":
        return {}
    return {"settings": AxisymSettings.fast()}


__all__ = ["MODEL_NAMES", "MODEL_SETTINGS_CHOICES", "ModelNotAvailable", "ForwardModel",
           "make_model", "resolve_model", "model_options_for", "AnalyticModel"]
