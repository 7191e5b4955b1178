"""Running several methods on synthetic drives and tabulating them."""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from tbminv.forward.fem3d.model import Fem3DSettings, Model3D
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


# ------------------------------------------------------------------------ simulation model
def model_3d_p1(layout: Layout) -> Model3D:
    """The model the comparison drives are simulated with: 3D, default mesh, P1 elements.

    pyGIMLi's 3D model on its default mesh with linear elements (about 4 s per face instead of
    about 20 s with P2; a few percent less accurate in absolute terms, which the numeric
    geometric factors of every method absorb), on a mesh no inversion method uses. Pass it to
    :func:`tbminv.studies.methods.synthetic.synthetic_drive` as ``model=``.
    """
    return Model3D(layout, Fem3DSettings(p2=False))


__all__ = ["MethodCase", "compare", "model_3d_p1"]
