"""Running several methods on synthetic drives and tabulating them."""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from tbminv.ground import Scenario
from tbminv.layout import Layout
from tbminv.studies.methods.axisym import run_axisym
from tbminv.studies.methods.cartesian import run_cartesian25d
from tbminv.studies.methods.region3d import run_region3d
from tbminv.studies.methods.synthetic import METHODS, AdvanceRecord, SyntheticDrive, records_table

_LOG = logging.getLogger(__name__)
# ------------------------------------------------------------------------ comparison
@dataclass(frozen=True)
class MethodCase:
    """One run of the comparison: a method with a settings label and keyword arguments.

    ``kwargs`` go to the method's ``run_*`` function (``settings=``, ``error_floor=``, ...).
    """

    method: str
    label: str = "default"
    kwargs: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ValueError(f"unknown method {self.method!r}; expected one of "
                             f"{', '.join(METHODS)}")


_RUNNERS: dict[str, Callable[..., list[AdvanceRecord]]] = {
    "axisym": run_axisym, "region3d": run_region3d, "section25d": run_cartesian25d}


def compare(drives: SyntheticDrive | Sequence[SyntheticDrive], cases: Sequence[MethodCase]
            ) -> pd.DataFrame:
    """Run every case on every drive; the comparison table (:data:`RECORD_COLUMNS`)."""
    if isinstance(drives, SyntheticDrive):
        drives = [drives]
    recs: list[AdvanceRecord] = []
    for drive in drives:
        for case in cases:
            _LOG.info("method %s (%s) on %s", case.method, case.label, drive.name)
            recs.extend(_RUNNERS[case.method](drive, label=case.label, **case.kwargs))
    return records_table(recs)


# ------------------------------------------------------------------------ simulation hooks
def _coarse3d_simulate(layout: Layout, scenario: Scenario, face_chainage_m: float,
                       cutterhead_deg: float, measurements: Sequence[tuple]) -> np.ndarray:
    """``simulate`` signature on pyGIMLi's 3D with the default mesh and P1 elements."""
    from tbminv.forward.fem3d.model import Fem3DSettings, forward3d

    return forward3d(layout, scenario, face_chainage_m, cutterhead_deg, measurements,
                     settings=Fem3DSettings(p2=False))


def register_simulate_models() -> tuple[str, ...]:
    """Register ``3d-p1`` in :data:`tbminv.simulate.MODELS` (idempotent).

    ``3d-p1`` is the 3D model on its default mesh with linear elements (about 4 s per face
    instead of about 20 s with P2; a few percent less accurate in absolute terms, which the
    numeric geometric factors of every method absorb). ``section`` is registered by
    :mod:`tbminv.simulate` itself.

    Returns
    -------
    tuple of str
        The registered names.
    """
    from tbminv.studies.simulate import register_model

    register_model("3d-p1", _coarse3d_simulate, replace=True)
    return ("3d-p1",)


__all__ = ["MethodCase", "compare", "register_simulate_models"]
