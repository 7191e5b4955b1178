"""Graded node coordinates along one axis: fine at a start point, growing away from it.

Every mesh and grid of tbminv grades its lines the same way: from a point where the field or
the model needs detail (an electrode, a steel edge, the end of the fine parameter zone) the
node spacing grows from cell to cell up to an end of the axis. :func:`graded_nodes` is that
march, once; the callers say where the fine points are and how a run ends:

* the axisymmetric mesh (:func:`tbminv.forward.axisym.mesh.graded_axis`) runs between key
  points with a spacing law of the distance to the nearest key point and stretches each run
  to end on the next key point (``end="fit"``);
* the parameter grid of the inversion (:func:`tbminv.inversion.grid.build_parameter_grid`)
  grows geometrically from the fine zone to the domain edge and cuts the last cell there
  (``end="cut"``);
* the 3D mesh (:mod:`tbminv.forward.fem3d.mesh`) places graded rings and refinement nodes
  geometrically up to a station that already carries a node (``end="open"``).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

ENDS = ("fit", "cut", "open")


def graded_nodes(start: float, stop: float, step: float | Callable[[float], float],
                 growth: float = 1.0, *, end: str = "fit", min_cells: int = 1) -> np.ndarray:
    """Nodes from ``start`` towards ``stop`` (either direction), fine at ``start``.

    Parameters
    ----------
    start, stop : float
        First node and the end of the run, m.
    step : float or callable
        The first step, m (each next step is ``growth`` times the last: a geometric run), or
        a spacing law ``step(t)`` giving the step at node ``t``, m (``growth`` is then unused).
    growth : float
        Factor from one step to the next of a geometric run.
    end : str
        How the run ends:

        ``"fit"``
            On ``stop`` exactly: the first node at or past ``stop`` is kept when it lies
            nearer ``stop`` than the node before it (or is the only one), then all nodes are
            stretched about ``start`` so that the last lands on ``stop``; at least
            ``min_cells`` cells (else ``min_cells`` equal cells).
        ``"cut"``
            On ``stop``: the last step is shortened to end there.
        ``"open"``
            Before ``stop``, which is not a node of the run: a node at or within half of its
            own step of ``stop`` is dropped (the caller has a node at ``stop``).
    min_cells : int
        Fewest cells of a ``"fit"`` run.

    Returns
    -------
    numpy.ndarray
        Node coordinates from ``start`` (included) towards ``stop``, m.
    """
    if end not in ENDS:
        raise ValueError(f"graded_nodes: end = {end!r}; expected one of {', '.join(ENDS)}")
    up = stop >= start
    law = step if callable(step) else None
    h = 0.0 if law is not None else float(step)

    def next_step(t: float) -> float:
        nonlocal h
        if law is not None:
            return law(t)
        out, h = h, h * growth
        return out

    def at_or_past(t: float) -> bool:
        return t >= stop if up else t <= stop

    pts = [start]
    t = start
    if end == "cut":
        while (t < stop) if up else (t > stop):
            s = next_step(t)
            t = min(stop, t + s) if up else max(stop, t - s)
            pts.append(t)
        return np.asarray(pts)
    if end == "open":
        while True:
            s = next_step(t)
            t = t + s if up else t - s
            if (t >= stop - 0.5 * s) if up else (t <= stop + 0.5 * s):
                return np.asarray(pts)
            pts.append(t)
    while True:  # fit
        t_next = t + next_step(t) if up else t - next_step(t)
        if at_or_past(t_next):
            past = t_next - stop if up else stop - t_next
            before = stop - t if up else t - stop
            if past < before or len(pts) == 1:
                pts.append(t_next)
            break
        pts.append(t_next)
        t = t_next
    pts_a = np.asarray(pts)
    if len(pts_a) - 1 < min_cells:
        return np.linspace(start, stop, min_cells + 1)
    return start + (pts_a - start) * (stop - start) / (pts_a[-1] - start)


__all__ = ["graded_nodes"]
