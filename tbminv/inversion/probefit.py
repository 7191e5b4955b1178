"""Probe logs as constraints: of the contact fit (where a contact may lie) and of the images.

The contact fit (:mod:`tbminv.inversion.contactfit`) has one plane square to the axis at
chainage ``X``. A probe log (:mod:`tbminv.readings.probes`) says where the ground changes along
each probe: inside a *run* (consecutive stretches of one material without a gap) there is no
contact; at a change of material, or in a gap between rows, or outside the probed stretches
there may be one. The constraint is the squared distance of ``X`` to that allowed set in units
of the probe's depth resolution ``s``::

    penalty(X) = sum over runs (lo, hi) with lo < X < hi of (min(X - lo, hi - X) / s)^2

added to the fit's chi-squared: a Gaussian prior of standard deviation ``s`` on where the
probe places the ends of each run (Tarantola 2005, *Inverse Problem Theory*, SIAM, ch. 1 and
3: prior information as a misfit term). A probe at the contact pins ``X`` to within about
``2 s`` (95 %) once the readings place it within the run; a probe of one material pushes a
contact out of its stretch; a probe logged 10 m off the true contact forces the fit away
from what the readings say, and the chi-squared it adds flags the contradiction (the
constraint is then not applied: see :meth:`ContactFitter.estimate`).

Where a row gives a measured resistivity, the image of each advance takes the parameter cells
the probe passes through as reference values with that row's relative error
(:func:`probe_reference`; prior information as data, Tarantola 2005, sec. 3.2).

An advance takes the rows drilled at or before its time (:meth:`ProbeLog.known_at`; rows or
advances without a time: from the start). The contact model is square to the axis: a probe
off the axis (``offset_m``) is taken at its chainage.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from tbminv.inversion.grid import ParameterGrid
from tbminv.inversion.image import CellReference
from tbminv.readings.probes import ProbeLog, ProbeRun

KNOT_OFFSETS = np.linspace(-3.0, 3.0, 25)
"""Chainages added to the fit's grid around each end of a run, in depth resolutions."""


class Penalty:
    """The chainage constraint of a set of runs: ``penalty(chainage_m) -> chi-squared``.

    0 where a contact may lie, ``(distance into the run / depth resolution)^2`` inside a run,
    summed over runs. ``knots_m`` are chainages around the ends of the runs (within three
    depth resolutions) that the contact fit adds to its grid, so that a depth resolution
    finer than the grid is resolved.

    Parameters
    ----------
    runs : sequence of ProbeRun
        Stretches without a contact (chainages in m, depth resolution in m).
    """

    def __init__(self, runs: Sequence[ProbeRun]) -> None:
        self.lo = np.array([r.lo_m for r in runs], float)
        self.hi = np.array([r.hi_m for r in runs], float)
        self.s = np.array([r.depth_resolution_m for r in runs], float)
        ends = np.concatenate([self.lo, self.hi])
        scale = np.concatenate([self.s, self.s])
        self.knots_m = np.unique((ends[:, None] + scale[:, None] * KNOT_OFFSETS).ravel())

    def __call__(self, chainage_m: np.ndarray) -> np.ndarray:
        """chi-squared of contact chainages (m), same shape."""
        x = np.asarray(chainage_m, float)[..., None]
        inside = (x > self.lo) & (x < self.hi)
        d = np.minimum(x - self.lo, self.hi - x) / self.s
        return np.where(inside, d * d, 0.0).sum(axis=-1)


def run_penalty(runs: Sequence[ProbeRun]) -> Penalty | None:
    """The chainage constraint of a set of runs (None: no run, no constraint)."""
    return Penalty(runs) if runs else None


def probe_reference(grid: ParameterGrid, log: ProbeLog | None, face_chainage_m: float,
                    time: str | None = None) -> CellReference | None:
    """Reference values for the image of one advance: the parameter cells a probe runs through.

    Rows with a measured ``resistivity_ohmm``, drilled by ``time``, ahead of the face: the
    cells of the parameter grid the probe's line passes through (at its ``offset_m`` from the
    axis, on the axis when not logged), sampled every 0.1 m along the stretch, take the row's
    value with its ``resistivity_rel_error``. A cell crossed by several rows takes their
    geometric mean and the smallest error.

    Parameters
    ----------
    grid : ParameterGrid
        The image's parameter grid (machine frame).
    log : ProbeLog or None
    face_chainage_m : float
        The advance's face chainage, m.
    time : str, optional
        The advance's time (ISO 8601).

    Returns
    -------
    CellReference or None
        None when no probed stretch with a resistivity lies ahead of the face.
    """
    if log is None:
        return None
    cells: dict[int, tuple[list[float], float]] = {}
    for r in log.known_at(time).rows:
        if not math.isfinite(r.resistivity_ohmm):
            continue
        a0 = max(r.chainage_from_m - face_chainage_m, 0.0)
        a1 = r.chainage_to_m - face_chainage_m
        if a1 <= a0:
            continue
        x = np.arange(a0 + 0.05, a1, 0.1) if a1 - a0 > 0.1 else np.array([0.5 * (a0 + a1)])
        rad = max(r.offset_m, 0.0) if math.isfinite(r.offset_m) else 0.0
        idx = grid.locate(x, np.full(x.size, rad + 1e-3))
        for i in np.unique(idx[idx >= 0]):
            logs, err = cells.get(int(i), ([], math.inf))
            cells[int(i)] = (logs + [math.log(r.resistivity_ohmm)],
                             min(err, r.resistivity_rel_error))
    if not cells:
        return None
    index = np.array(sorted(cells), int)
    return CellReference(index, np.array([math.exp(float(np.mean(cells[i][0]))) for i in index]),
                         np.array([cells[i][1] for i in index]))


def advance_penalties(log: ProbeLog | None, times: Sequence[str | None]) -> list[Penalty | None]:
    """The constraint of each advance: the runs of the rows drilled by its time.

    Parameters
    ----------
    log : ProbeLog or None
    times : sequence of str or None
        ISO 8601 times of the advances (None: not logged, every row applies).

    Returns
    -------
    list
        One penalty (or None) per advance.
    """
    if log is None:
        return [None] * len(times)
    return [run_penalty(log.known_at(t).runs()) for t in times]


__all__ = ["KNOT_OFFSETS", "Penalty", "run_penalty", "probe_reference", "advance_penalties"]
