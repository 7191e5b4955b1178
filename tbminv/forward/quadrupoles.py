"""Quadrupoles as every forward model takes them.

A forward call names its readings as :class:`tbminv.layout.Measurement` objects or as
``(a, b, m, n)`` label tuples (``b`` / ``n`` None or empty for a pole; reciprocals allowed), or
as None for the layout's protocol in order. :func:`as_measurements` turns any of these into
checked ``Measurement`` objects; :func:`quadrupole_terms` splits them into the signed
(source, receiver) pairs whose unit-current potentials add up to ``R = (V_M - V_N) / I``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from tbminv.layout import Layout, Measurement

Quadrupoles = Sequence[Measurement | Sequence[str | None]]
"""What a forward call accepts for ``measurements``."""


def _label(x: Any) -> str | None:
    return None if (x is None or x == "") else str(x)


def as_measurements(layout: Layout, measurements: Quadrupoles | None = None
                    ) -> list[Measurement]:
    """The quadrupoles of a forward call as checked ``Measurement`` objects.

    Parameters
    ----------
    layout : Layout
        Layout whose electrodes the labels name.
    measurements : sequence of Measurement or (a, b, m, n), optional
        None: ``layout.measurements`` in protocol order.

    Raises
    ------
    ValueError
        For an item that is not four labels, or a label the layout does not know.
    """
    if measurements is None:
        return list(layout.measurements)
    known = set(layout.labels)
    out = []
    for q in measurements:
        t = q.labels() if isinstance(q, Measurement) else tuple(q)
        if len(t) != 4:
            raise ValueError(f"measurement {q!r}: expected (a, b, m, n)")
        a, b, m, n = (_label(v) for v in t)
        for v in (a, b, m, n):
            if v is not None and v not in known:
                raise ValueError(f"{layout.source}: measurement {(a, b, m, n)} names unknown "
                                 f"electrode {v!r}; known: {', '.join(layout.labels)}")
        out.append(Measurement(a=a, b=b, m=m, n=n))
    return out


def quadrupole_labels(layout: Layout, measurements: Quadrupoles | None = None
                      ) -> list[tuple[str | None, str | None, str | None, str | None]]:
    """The quadrupoles of a forward call as checked ``(a, b, m, n)`` label tuples."""
    return [q.labels() for q in as_measurements(layout, measurements)]


def quadrupole_terms(measurements: Sequence[Measurement], infinity: set[str]
                     ) -> list[list[tuple[float, str, str]]]:
    """Signed (source, receiver) pairs of every quadrupole ``R = (V_M - V_N) / I``.

    Parameters
    ----------
    measurements : sequence of Measurement
    infinity : set of str
        Labels at infinity (their terms vanish).

    Returns
    -------
    list of list of (sign, source, receiver)
        In the order A-M, A-N, B-M, B-N.
    """
    out = []
    for q in measurements:
        terms = []
        for cur, sc in ((q.a, 1.0), (q.b, -1.0)):
            if cur is None or cur in infinity:
                continue
            for pot, sp_ in ((q.m, 1.0), (q.n, -1.0)):
                if pot is None or pot in infinity:
                    continue
                terms.append((sc * sp_, cur, pot))
        out.append(terms)
    return out


__all__ = ["Quadrupoles", "as_measurements", "quadrupole_labels", "quadrupole_terms"]
