"""Calibrated "no contact": the null distribution of the contact fit's likelihood ratio.

The contact fit's statistic ``T = (chi2_homogeneous - chi2_min) / max(1, chi2_min / dof)``
(:mod:`tbminv.inversion.contactfit`) has no chi-squared null distribution: the distance of a
contact is undefined under "no contact", so Wilks' theorem does not apply (Davies 1987,
Biometrika 74(1):33-43), and readings of one advance share errors. Its distribution under "no
contact" is therefore measured by simulation, for windows of ``n`` advances, and summarised
per ``n`` by a scaled chi-squared ``T ~ g * chi2_h`` whose 90th and 98th percentiles match the
simulated ones (the upper tail is what the levels of concern use).

The table ships with the package (``tbminv/data/contact_null_calibration.toml``); it is made
by ``python bench/bench_contact_null.py``, which states how: layout, forward model, noise
cases, number of simulated drives, and the simulated false-alarm rates at the thresholds.
Several noise cases may be stored; the tail probability is the largest over them
(conservative).
"""

from __future__ import annotations

import functools
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.optimize import brentq
from scipy.stats import chi2 as chi2_dist

#: The calibration table of the package.
CALIBRATION_FILE = Path(__file__).resolve().parents[1] / "data" / "contact_null_calibration.toml"


class CalibrationError(ValueError):
    """A calibration table that cannot be used; the message names the file and key."""


@dataclass(frozen=True)
class NullCase:
    """Null distribution of one noise case, per window length.

    Attributes
    ----------
    name : str
        What was simulated (noise model).
    n_advances : ndarray of int (m,)
        Window lengths simulated, increasing.
    scale, dof : ndarray (m,)
        ``g`` and ``h`` of ``T ~ g * chi2_h`` per window length.
    """

    name: str
    n_advances: np.ndarray
    scale: np.ndarray
    dof: np.ndarray

    def params(self, n_advances: int) -> tuple[float, float]:
        """``(g, h)`` for a window of ``n_advances``, interpolated in log n (clamped)."""
        ln = math.log(max(1, int(n_advances)))
        x = np.log(self.n_advances)
        return float(np.interp(ln, x, self.scale)), float(np.interp(ln, x, self.dof))

    def p_value(self, statistic: float, n_advances: int) -> float:
        """Tail probability ``P(T >= statistic)`` under "no contact"."""
        g, h = self.params(n_advances)
        return float(chi2_dist.sf(max(float(statistic), 0.0) / g, h))


@dataclass(frozen=True)
class NullCalibration:
    """The calibration table: one :class:`NullCase` per noise case."""

    cases: tuple[NullCase, ...]
    source: str = ""

    def p_false_alarm(self, statistic: float, n_advances: int) -> float:
        """Calibrated tail probability of ``statistic`` under "no contact" (largest over cases).

        Parameters
        ----------
        statistic : float
            Likelihood-ratio statistic of the joint fit (dimensionless).
        n_advances : int
            Advances in the joint fit's window.
        """
        if not math.isfinite(statistic):
            return math.nan
        return max(c.p_value(statistic, n_advances) for c in self.cases)

    def threshold(self, p: float, n_advances: int) -> float:
        """Statistic whose calibrated tail probability is ``p`` (largest over the cases)."""
        out = 0.0
        for c in self.cases:
            g, h = c.params(n_advances)
            out = max(out, g * float(chi2_dist.isf(p, h)))
        return out


def fit_scaled_chi2(samples: np.ndarray, q_lo: float = 0.90, q_hi: float = 0.98
                    ) -> tuple[float, float]:
    """``(g, h)`` of ``g * chi2_h`` matching two upper quantiles of simulated statistics.

    Parameters
    ----------
    samples : ndarray
        Simulated statistics (>= 0).
    q_lo, q_hi : float
        The two quantile levels matched.
    """
    x = np.asarray(samples, float)
    a, b = float(np.quantile(x, q_lo)), float(np.quantile(x, q_hi))
    if not (b > a > 0):
        raise ValueError(f"quantiles {a}, {b} do not define a scaled chi-squared")
    ratio = b / a

    def f(h: float) -> float:
        return float(chi2_dist.ppf(q_hi, h) / chi2_dist.ppf(q_lo, h)) - ratio

    lo, hi = 0.05, 500.0
    if f(lo) < 0:     # heavier-tailed than chi2 with 0.05 dof: take the heaviest
        h = lo
    elif f(hi) > 0:
        h = hi
    else:
        h = float(brentq(f, lo, hi, xtol=1e-6))
    return a / float(chi2_dist.ppf(q_lo, h)), h


def read_calibration(path: str | Path) -> NullCalibration:
    """Read a calibration table.

    The TOML file holds ``[[case]]`` tables with ``name``, ``n_advances``, ``scale``, ``dof``.

    Raises
    ------
    CalibrationError
        Missing file or key, or arrays of different lengths.
    """
    p = Path(path)
    try:
        doc = tomllib.loads(p.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise CalibrationError(f"{p}: cannot read the calibration table: {exc}") from exc
    cases = []
    for i, c in enumerate(doc.get("case", [])):
        try:
            n = np.asarray(c["n_advances"], float)
            g = np.asarray(c["scale"], float)
            h = np.asarray(c["dof"], float)
        except KeyError as exc:
            raise CalibrationError(f"{p}: [[case]] {i + 1}: missing key {exc}") from exc
        if not (n.size == g.size == h.size >= 1) or np.any(np.diff(n) <= 0) or \
                np.any(g <= 0) or np.any(h <= 0):
            raise CalibrationError(f"{p}: [[case]] {i + 1}: n_advances, scale and dof must be "
                                   "equally long, n_advances increasing, scale and dof > 0")
        cases.append(NullCase(str(c.get("name", f"case {i + 1}")), n, g, h))
    if not cases:
        raise CalibrationError(f"{p}: no [[case]] table")
    return NullCalibration(tuple(cases), source=str(doc.get("made_by", p.name)))


@functools.lru_cache(maxsize=4)
def load_calibration(path: str | None = None) -> NullCalibration:
    """The package's calibration table (or the one at ``path``), read once."""
    return read_calibration(path or CALIBRATION_FILE)


__all__ = ["CALIBRATION_FILE", "CalibrationError", "NullCase", "NullCalibration",
           "fit_scaled_chi2", "read_calibration", "load_calibration"]
