"""The relative modelling-error floor, added in quadrature to the QC error of each reading.

The reciprocal and stacking errors (:mod:`tbminv.readings.qc`) measure the noise of the
instrument. The forward model used to fit the readings differs from the ground's physics by a
further amount that no repeat of a reading reveals: discretisation of the axisymmetric model,
and what the surface correction leaves behind under a shallow cover. That modelling error is
taken as a relative standard deviation ``floor`` of every quadrupole's transfer resistance,
independent of the noise, so the two add in quadrature::

    e = sqrt(e_qc^2 + floor^2)          (relative errors, fractions)

Its default (``[invert] model_error_floor``) is measured in ``bench/bench_error_floor.py``
(DEVELOPERS.md, "Error model"). The floor is a systematic error of the model for a quadrupole,
not of one reading: it is added after the readings of a quadrupole are averaged, and averaging
normal and reciprocal does not reduce it.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from typing import Any, TypeVar

import numpy as np

T = TypeVar("T")


def check_floor(floor_rel: float, where: str = "model_error_floor") -> float:
    """The floor as a float, or :class:`ValueError` naming ``where`` if not finite and >= 0."""
    v = float(floor_rel)
    if not math.isfinite(v) or v < 0:
        raise ValueError(f"{where} = {floor_rel!r}: expected a finite fraction >= 0")
    return v


def floored_error(rel_error: Any, floor_rel: float) -> np.ndarray:
    """``sqrt(rel_error^2 + floor_rel^2)``, element-wise (NaN stays NaN).

    Parameters
    ----------
    rel_error : array_like
        QC relative standard errors, fraction.
    floor_rel : float
        Relative modelling-error floor, fraction (0: unchanged).

    Returns
    -------
    numpy.ndarray
        The combined relative standard error, fraction.
    """
    f = check_floor(floor_rel)
    return np.hypot(np.asarray(rel_error, dtype=float), f)


def with_error_floor(data: Sequence[T], floor_rel: float) -> list[T]:
    """Copies of advance data with the floor added in quadrature to ``rel_error``.

    Parameters
    ----------
    data : sequence of AdvanceData
        Any dataclass with a ``rel_error`` array (:class:`tbminv.readings.advance.AdvanceData`;
        its ``rows``, the readings per cutterhead angle, are floored too).
    floor_rel : float
        Relative modelling-error floor, fraction; 0 returns unchanged copies.

    Returns
    -------
    list
        New objects; the inputs are not changed.
    """
    f = check_floor(floor_rel)
    out = []
    for d in data:
        extra = {}
        rows = getattr(d, "rows", None)
        if rows is not None:   # the readings per cutterhead angle get the same floor
            extra["rows"] = dataclasses.replace(rows, rel_error=floored_error(rows.rel_error, f))
        out.append(dataclasses.replace(d, rel_error=floored_error(d.rel_error, f),  # type: ignore
                                       **extra))
    return out


__all__ = ["check_floor", "floored_error", "with_error_floor"]
