"""Synthetic drives: layout + ground scenario -> a readings log with noise.

The log has the columns of the readings-log format (DEVELOPERS.md, "File formats"). For each face
chainage the chosen forward model gives the transfer resistance (V/A) of every quadrupole of the
protocol and of its reciprocal (current and potential pairs swapped); the log holds one row per
reading, normal then reciprocal. Noise is Gaussian, relative plus absolute, drawn independently
for every row from ``numpy.random.default_rng(seed)`` (same seed, same log)::

    voltage_v = V (1 + noise_rel e1) + noise_abs_v e2,   voltage_std_v = sqrt((noise_rel V)^2
                                                                         + noise_abs_v^2)

With ``cutterhead_angles_deg`` (``tbminv simulate --cutterhead-angles START:STOP:STEP``) every
reading of every advance is simulated at each of those cutterhead angles, angle by angle, and
each row logs its own ``cutterhead_deg`` (a turning cutterhead read at several positions in one
advance). A model with ``response_angles(scenario, face_chainage_m, angles, measurements)``
(the axisymmetric model) solves once per advance for all angles.

The forward model is a registry name (:func:`tbminv.forward.registry.make_model`: ``axisym``,
``3d``, ``section``, ``analytic``) or a model already built for the layout (any object with
``response(scenario, face_chainage_m, cutterhead_deg, measurements)``, e.g. a ``Model3D`` with
coarse settings). Every model computes reciprocals itself.

Contact resistances (columns ``contact_ohm_a``, ``contact_ohm_m``) are those of a hemispherical
electrode of radius 5 cm in the local ground, ``rho / (2 pi a)`` (the grounding resistance of a
hemisphere, Telford, Geldart & Sheriff 1990, Applied Geophysics 2nd ed., ch. 8; section recalled
from memory; the 5 cm radius is an invented demo value), and of a hemisphere of the machine's
radius for electrodes on the steel; empty for a remote at infinity.
"""

from __future__ import annotations

import datetime as _dt
import logging
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tbminv.cache import atomic_path
from tbminv.forward.registry import ForwardModel, resolve_model
from tbminv.ground import Scenario
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)

COLUMNS = ("advance", "face_chainage_m", "a", "b", "m", "n", "current_a", "voltage_v", "time",
           "cutterhead_deg", "stack_n", "voltage_std_v", "contact_ohm_a", "contact_ohm_m",
           "synthetic")
"""Columns of a simulated readings log, in order (``synthetic`` is 1: the log says it is
simulated, and the store and the report carry that on)."""

ELECTRODE_RADIUS_M = 0.05
"""Radius of the hemispherical electrode behind the simulated contact resistance, m."""


def _protocol_with_reciprocals(layout: Layout) -> list[tuple[tuple, bool]]:
    out: list[tuple[tuple, bool]] = []
    seen: set[tuple] = set()
    for q in layout.measurements:
        t = tuple(None if v in (None, "") else v for v in q.labels())
        if t in seen:
            continue
        seen.add(t)
        out.append((t, False))
        rec = (t[2], t[3], t[0], t[1])
        if rec not in seen:
            seen.add(rec)
            out.append((rec, True))
    return out


def _contact_ohm(layout: Layout, scenario: Scenario, face: float, angle: float
                 ) -> dict[str, float]:
    pos = layout.positions_world(face, angle)
    out: dict[str, float] = {}
    for e in layout.electrodes:
        if e.at_infinity:
            out[e.label] = math.nan
            continue
        if e.kind == "machine":
            p = np.array([face - 0.5 * layout.machine.shield_length_m, 0.0, 0.0])
        else:
            p = pos[e.label]
        if e.on_steel:
            p = np.array([p[0], 0.0, layout.machine.radius_m + 0.05])
        rho = float(scenario.resistivity(p[0], p[1], p[2]))
        radius = layout.machine.radius_m if e.on_steel else ELECTRODE_RADIUS_M
        out[e.label] = rho / (2.0 * math.pi * radius)
    return out


def simulate_drive(layout: Layout, scenario: Scenario, faces_m: Sequence[float],
                   model: str | ForwardModel = "axisym", noise_rel: float = 0.0,
                   noise_abs_v: float = 0.0, seed: int | None = None,
                   current_a: float = 1.0, cutterhead_deg: float | Sequence[float] = 0.0,
                   stack_n: int = 4, start_time: str = "2026-01-05T06:00:00+00:00",
                   advance_minutes: float = 45.0, reading_seconds: float = 2.0,
                   cutterhead_angles_deg: Sequence[float] | None = None) -> pd.DataFrame:
    """Simulate the readings log of a drive.

    Parameters
    ----------
    layout : Layout
    scenario : Scenario
    faces_m : sequence of float
        Face chainage of each advance, m (advance numbers 1, 2, ... in this order).
    model : str or ForwardModel
        Forward model: a registry name (``axisym``, ``3d``, ``section``, ``analytic``) built
        here with its defaults, or a model built for ``layout``.
    noise_rel : float
        Relative Gaussian noise (standard deviation as a fraction of the voltage).
    noise_abs_v : float
        Absolute Gaussian noise, V.
    seed : int, optional
        Seed of the noise generator (reproducible logs).
    current_a : float
        Injected current, A.
    cutterhead_deg : float or sequence of float
        Cutterhead angle for all advances or one per advance, degrees (ignored with
        ``cutterhead_angles_deg``).
    stack_n : int
        Stacks per reading written to the log.
    start_time : str
        ISO 8601 time of the first reading.
    advance_minutes, reading_seconds : float
        Time between advances, min, and between readings, s.
    cutterhead_angles_deg : sequence of float, optional
        Cutterhead angles, degrees: every reading of every advance is simulated at each, in
        this order, and logs its angle (:func:`angle_range` builds ``START:STOP:STEP``).

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COLUMNS`; ``b`` / ``n`` empty for a pole.
    """
    fwd = resolve_model(model, layout)
    faces = [float(f) for f in faces_m]
    if noise_rel < 0 or noise_abs_v < 0:
        raise ValueError(f"noise_rel = {noise_rel!r}, noise_abs_v = {noise_abs_v!r}: "
                         "expected >= 0")
    if not current_a > 0:
        raise ValueError(f"current_a = {current_a!r}: expected > 0")
    if cutterhead_angles_deg is not None:
        turn = [float(a) for a in np.atleast_1d(np.asarray(cutterhead_angles_deg, float))]
        if not turn or not all(math.isfinite(a) for a in turn):
            raise ValueError(f"cutterhead_angles_deg = {cutterhead_angles_deg!r}: expected "
                             "one or more finite angles in degrees")
        angles = [turn] * len(faces)
    elif np.ndim(cutterhead_deg) == 0:
        angles = [[float(cutterhead_deg)]] * len(faces)
    else:
        angles = [[float(a)] for a in cutterhead_deg]
        if len(angles) != len(faces):
            raise ValueError(f"cutterhead_deg has {len(angles)} angles for {len(faces)} faces")
    rng = np.random.default_rng(seed)
    t0 = _dt.datetime.fromisoformat(start_time)
    proto = _protocol_with_reciprocals(layout)
    quads = [q for q, _ in proto]
    rows: list[dict[str, Any]] = []
    for adv, (face, turn) in enumerate(zip(faces, angles), start=1):
        responses = _responses(fwd, scenario, face, turn, quads)
        t_adv = t0 + _dt.timedelta(minutes=advance_minutes * (adv - 1))
        i_row = 0
        for ang, r in zip(turn, responses):
            v = r * current_a
            e1 = rng.standard_normal(len(v))
            e2 = rng.standard_normal(len(v))
            vn = v * (1.0 + noise_rel * e1) + noise_abs_v * e2
            std = np.sqrt((noise_rel * v) ** 2 + noise_abs_v ** 2)
            cr = _contact_ohm(layout, scenario, face, ang)
            for i, (a, b, m, n) in enumerate(quads):
                rows.append({
                    "advance": adv, "face_chainage_m": face, "a": a, "b": b or "", "m": m,
                    "n": n or "", "current_a": current_a, "voltage_v": float(vn[i]),
                    "time": (t_adv + _dt.timedelta(seconds=reading_seconds * i_row)).isoformat(),
                    "cutterhead_deg": ang, "stack_n": int(stack_n),
                    "voltage_std_v": float(std[i]), "contact_ohm_a": cr[a],
                    "contact_ohm_m": cr[m], "synthetic": 1,
                })
                i_row += 1
        _LOG.info("advance %d at %.2f m: %d readings at %d cutterhead angles", adv, face,
                  len(quads) * len(turn), len(turn))
    return pd.DataFrame(rows, columns=list(COLUMNS))


def _responses(fwd: Any, scenario: Scenario, face: float, angles: Sequence[float],
               quads: list[tuple]) -> list[np.ndarray]:
    """Transfer resistances of ``quads`` at each cutterhead angle (one solve where offered)."""
    multi = getattr(fwd, "response_angles", None)
    if multi is not None and len(angles) > 1:
        out = [np.asarray(r, float) for r in multi(scenario, face, angles, quads)]
    else:
        out = [np.asarray(fwd.response(scenario, face, ang, quads), float) for ang in angles]
    for r in out:
        if r.shape != (len(quads),):
            raise RuntimeError(f"forward model {type(fwd).__name__} returned {r.shape} values "
                               f"for {len(quads)} readings")
    return out


def angle_range(start_deg: float, stop_deg: float, step_deg: float) -> np.ndarray:
    """Cutterhead angles ``START:STOP:STEP``, degrees, STOP included when on the step grid.

    Parameters
    ----------
    start_deg, stop_deg, step_deg : float
        First angle, last angle and step, degrees (the step moves from START towards STOP).

    Returns
    -------
    numpy.ndarray
        The angles, degrees (not wrapped: 0:360:45 gives 0 and 360, the same position).

    Raises
    ------
    ValueError
        If a value is not finite or the step is 0 or points away from STOP.
    """
    vals = (float(start_deg), float(stop_deg), float(step_deg))
    if not all(math.isfinite(v) for v in vals):
        raise ValueError(f"angles {vals}: expected finite numbers of degrees")
    start, stop, step = vals
    if step == 0 or (stop - start) * step < 0:
        raise ValueError(f"angles {start:g}:{stop:g}:{step:g}: STEP must move from START "
                         "towards STOP")
    n = int(np.floor((stop - start) / step + 1e-9)) + 1
    return start + step * np.arange(n)


def write_readings(df: pd.DataFrame, path: str | Path) -> Path:
    """Write a readings log atomically: Parquet for ``.parquet``/``.pq``, else CSV.

    Returns
    -------
    Path
        The written file.
    """
    target = Path(path)
    with atomic_path(target) as tmp:
        if target.suffix.lower() in (".parquet", ".pq"):
            df.to_parquet(tmp, index=False)
        else:
            df.to_csv(tmp, index=False, float_format="%.10g")
    return target


__all__ = ["COLUMNS", "ELECTRODE_RADIUS_M", "angle_range", "simulate_drive", "write_readings"]
