"""Parametric fit of a small off-axis body (boulder, lens) to one advance's readings.

Data: every reading of the advance at its own logged cutterhead angle, ``y_i = ln(R_i / R0_i)``
with ``R0`` the background (axisymmetric) response at that angle and weight ``1 / e_i`` (``e_i``
the relative error). Model, linearised (:mod:`tbminv.inversion.bodysens`):

    y_i = c + q h_i(p),    h_i(p) = g_i(p) / R0_i

with ``c`` a common log scale (the ground's resistivity around the machine is not known), ``q``
the body's moment (m^3; volume x ``3 (sigma_1 - sigma_0) / (sigma_1 + 2 sigma_0)`` for a
sphere, positive when conductive) and ``p`` the body's centre: distance ahead of the cutterhead
face, offset from the axis and bearing (clockwise from the crown looking ahead). For each ``p``
of a grid, ``c`` and ``q`` follow by weighted least squares in closed form, so the profile
``chi2(p)`` is exact on the grid.

Outputs (:class:`BodyFit`):

- the best grid point; ``body_ahead_lo_m``/``_hi_m`` and ``body_bearing_lo_deg``/``_hi_deg``:
  the profile interval ``{min chi2 over the other parameters <= chi2_min + delta}`` (run holding
  the best point, crossings interpolated linearly), ``delta`` the chi-squared quantile of
  ``confidence`` for one parameter times the reduced chi-squared when above 1 (as for the contact
  fit); the bearing interval runs clockwise from ``lo`` to ``hi`` and may cross north (0 deg);
- ``lr_statistic``: ``(chi2_none - chi2_min) / max(1, chi2_min / dof)``;
- ``body_p_none``: the probability of a statistic at least as large without a body, **measured
  by simulation**: noise-only data at the readings' stated errors are fitted over the same grid
  (the maximum over positions, so the search is paid for). It assumes the errors are right and
  independent; errors shared by the readings of an advance (the background model's own error)
  are not in it.

Background: by default the axisymmetric model's homogeneous response at every reading's angle.
Any error of that background shared by readings (the axisymmetric model against the ground's
real geometry) looks like a body to this statistic: give ``background_r_ohm`` (e.g. the
homogeneous ground computed in 3D at every angle) or ``nuisance='quadrupole'``
(``bench/results/body_fit.json`` measures both).

A body is reported (the ``body_*`` values not NaN) when ``body_p_none <= p_report``. Readings
whose sign differs from the background response's, or near-null ones, are left out. An advance
with cutterhead readings at fewer than 3 distinct angles gives no fit (NaN, reason stated).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.stats import chi2 as chi2_dist

from tbminv.inversion.bodysens import BodySensitivity

_LOG = logging.getLogger(__name__)

Quad = tuple[str | None, str | None, str | None, str | None]


@dataclass(frozen=True)
class AdvanceReadings:
    """One advance's readings, each at its own cutterhead angle.

    Attributes
    ----------
    measurements : tuple of (a, b, m, n)
        Electrode labels of each reading (None or a remote label for poles).
    cutterhead_deg : numpy.ndarray
        Cutterhead angle of each reading, degrees.
    r_ohm : numpy.ndarray
        Transfer resistance, ohm.
    rel_error : numpy.ndarray
        Relative standard error of each reading (1), modelling floor included.
    face_chainage_m : float
        Chainage of the cutterhead face, m.
    """

    measurements: tuple[Quad, ...]
    cutterhead_deg: np.ndarray
    r_ohm: np.ndarray
    rel_error: np.ndarray
    face_chainage_m: float

    def __post_init__(self) -> None:
        n = len(self.measurements)
        for name in ("cutterhead_deg", "r_ohm", "rel_error"):
            arr = np.asarray(getattr(self, name), float)
            if arr.shape != (n,):
                raise ValueError(f"AdvanceReadings.{name}: {arr.shape[0] if arr.ndim else 0} "
                                 f"values for {n} readings")
            object.__setattr__(self, name, arr)
        if np.any(~(self.rel_error > 0)):
            raise ValueError("AdvanceReadings.rel_error: every relative error must be > 0")
        object.__setattr__(self, "measurements", tuple(tuple(q) for q in self.measurements))


@dataclass(frozen=True)
class BodyGrid:
    """Candidate body centres: distance ahead x offset from the axis x bearing.

    Attributes
    ----------
    ahead_m, offset_m : numpy.ndarray
        Distances ahead of the cutterhead face and offsets from the axis, m.
    bearing_deg : numpy.ndarray
        Bearings, degrees clockwise from the crown looking ahead (a full turn, even steps).
    """

    ahead_m: np.ndarray
    offset_m: np.ndarray
    bearing_deg: np.ndarray

    @classmethod
    def for_diameter(cls, diameter_m: float, ahead_max_d: float = 2.5,
                     offset_max_d: float = 1.0, step_d: float = 0.125,
                     bearing_step_deg: float = 10.0) -> BodyGrid:
        """A grid in units of the machine diameter ``D``.

        Ahead ``2 step_d .. ahead_max_d``, offset ``step_d .. offset_max_d``, both in steps of
        ``step_d`` (all in D); bearings every ``bearing_step_deg``.
        """
        h = step_d * diameter_m
        return cls(ahead_m=np.arange(2 * h, ahead_max_d * diameter_m + 0.5 * h, h),
                   offset_m=np.arange(h, offset_max_d * diameter_m + 0.5 * h, h),
                   bearing_deg=np.arange(0.0, 360.0, bearing_step_deg))

    def points(self) -> np.ndarray:
        """(P, 3) points (ahead, offset, bearing), bearing fastest."""
        a, o, b = np.meshgrid(self.ahead_m, self.offset_m, self.bearing_deg, indexing="ij")
        return np.stack([a.ravel(), o.ravel(), b.ravel()], axis=1)

    @property
    def shape(self) -> tuple[int, int, int]:
        """(n_ahead, n_offset, n_bearing)."""
        return (len(self.ahead_m), len(self.offset_m), len(self.bearing_deg))


@dataclass(frozen=True)
class BodyFit:
    """What the body fit of one advance hands on (NaN where no body is reported).

    Distances in m from the cutterhead face, bearings in degrees clockwise from the crown looking
    ahead; ``body_moment_m3`` the moment (m^3, positive: more conductive than the background).
    """

    body_ahead_m: float = math.nan
    body_ahead_lo_m: float = math.nan
    body_ahead_hi_m: float = math.nan
    body_bearing_deg: float = math.nan
    body_bearing_lo_deg: float = math.nan
    body_bearing_hi_deg: float = math.nan
    body_offset_m: float = math.nan
    body_moment_m3: float = math.nan
    lr_statistic: float = math.nan
    body_p_none: float = math.nan
    found: bool = False
    chi2_min: float = math.nan
    chi2_none: float = math.nan
    n_readings: int = 0
    n_angles: int = 0
    reason: str = ""
    best: dict[str, float] = field(default_factory=dict)
    profile_ahead: np.ndarray | None = None
    profile_bearing: np.ndarray | None = None


def _interval(grid: np.ndarray, prof: np.ndarray, level: float, best: int
              ) -> tuple[float, float]:
    """Run of ``prof <= level`` holding ``best``, crossings interpolated (open: grid end)."""
    lo = best
    while lo > 0 and prof[lo - 1] <= level:
        lo -= 1
    hi = best
    while hi < len(prof) - 1 and prof[hi + 1] <= level:
        hi += 1

    def cross(i_in: int, i_out: int) -> float:
        a, b = prof[i_in], prof[i_out]
        t = (level - a) / (b - a) if b != a else 0.0
        return float(grid[i_in] + t * (grid[i_out] - grid[i_in]))

    x_lo = cross(lo, lo - 1) if lo > 0 else float(grid[0])
    x_hi = cross(hi, hi + 1) if hi < len(prof) - 1 else float(grid[-1])
    return x_lo, x_hi


def _bearing_interval(bearing: np.ndarray, prof: np.ndarray, level: float, best: int
                      ) -> tuple[float, float]:
    """Circular run of ``prof <= level`` holding ``best``: (lo, hi) clockwise, degrees."""
    n = len(bearing)
    if np.all(prof <= level):
        return 0.0, 360.0
    ext = np.concatenate([prof, prof, prof])
    grid = np.concatenate([bearing - 360.0, bearing, bearing + 360.0])
    lo, hi = _interval(grid, ext, level, best + n)
    return lo % 360.0, hi % 360.0


class BodyFitter:
    """The body fit of one advance: sensitivity, background response, profile and calibration.

    Parameters
    ----------
    layout : tbminv.layout.Layout
    background_ohmm : float
        Background resistivity (the advance's homogeneous or reference value), ohm-m.
    grid : BodyGrid, optional
        Candidate centres (default :meth:`BodyGrid.for_diameter`).
    confidence : float
        Level of the profile intervals.
    p_report : float
        A body is reported when ``body_p_none`` is at most this.
    n_null : int
        Noise-only simulations for ``body_p_none``.
    nuisance : str
        ``'scale'``: one common log scale; ``'quadrupole'``: one free log scale per quadrupole
        (only the change with the cutterhead angle is then fitted: robust to axisymmetric
        changes, blind to a body's axisymmetric part).
    seed : int
        Seed of the simulations.
    sensitivity_options : dict
        More options of :class:`BodySensitivity` (``m_max``, ``settings``).
    """

    def __init__(self, layout: Any, background_ohmm: float, grid: BodyGrid | None = None,
                 confidence: float = 0.95, p_report: float = 0.01, n_null: int = 400,
                 nuisance: str = "scale", seed: int = 0,
                 sensitivity_options: dict[str, Any] | None = None) -> None:
        if nuisance not in ("scale", "quadrupole"):
            raise ValueError(f"nuisance = {nuisance!r}: expected 'scale' or 'quadrupole'")
        self.layout = layout
        self.background_ohmm = float(background_ohmm)
        diam = 2.0 * float(layout.machine.radius_m)
        self.grid = grid or BodyGrid.for_diameter(diam)
        self.confidence = float(confidence)
        self.p_report = float(p_report)
        self.n_null = int(n_null)
        self.nuisance = nuisance
        self.seed = int(seed)
        self.sensitivity_options = dict(sensitivity_options or {})
        self.sensitivity: BodySensitivity | None = None

    # ------------------------------------------------------------------ set-up
    def prepare(self, readings: AdvanceReadings,
                background_r_ohm: np.ndarray | None = None) -> dict[str, Any]:
        """Background response, usable readings, whitened data and nuisance of an advance.

        ``background_r_ohm`` (per reading, ohm) replaces the axisymmetric background response
        (e.g. the homogeneous ground computed in 3D at every angle).
        """
        quads = sorted(set(readings.measurements), key=lambda q: tuple(str(v) for v in q))
        qidx = {q: i for i, q in enumerate(quads)}
        g = self.grid
        self.sensitivity = BodySensitivity(
            self.layout, quads, readings.face_chainage_m, self.background_ohmm,
            ahead_max_m=float(g.ahead_m.max()) + 1.0,
            radius_max_m=float(g.offset_m.max()) + 1.0, **self.sensitivity_options)
        qi = np.array([qidx[q] for q in readings.measurements])
        r0 = np.empty(len(qi))
        for a in np.unique(readings.cutterhead_deg):
            rows = readings.cutterhead_deg == a
            r0[rows] = self.sensitivity.background_response(a)[qi[rows]]
        if background_r_ohm is not None:
            r0 = np.asarray(background_r_ohm, float)
            if r0.shape != qi.shape:
                raise ValueError("background_r_ohm: one value per reading expected")
        big = np.median(np.abs(r0))
        ok = (np.sign(r0) == np.sign(readings.r_ohm)) & (np.abs(r0) > 1e-3 * big)
        if np.any(~ok):
            _LOG.info("body fit: %d readings left out (sign against the background or "
                      "near-null)", int(np.sum(~ok)))
        w = 1.0 / readings.rel_error[ok]
        y = np.log(readings.r_ohm[ok] / r0[ok])
        if self.nuisance == "scale":
            nmat = np.ones((int(ok.sum()), 1))
        else:
            used = np.unique(qi[ok])
            nmat = (qi[ok][:, None] == used[None, :]).astype(float)
        nw = nmat * w[:, None]
        qn, _ = np.linalg.qr(nw)
        return {"ok": ok, "qi": qi[ok], "angle": readings.cutterhead_deg[ok], "r0": r0[ok],
                "w": w, "y": y, "qn": qn}

    def project(self, qn: np.ndarray, a: np.ndarray) -> np.ndarray:
        """Remove the whitened nuisance columns from the columns of ``a``."""
        return a - qn @ (qn.T @ a)

    def scan(self, prep: dict[str, Any], data: np.ndarray, chunk: int = 1500
              ) -> tuple[np.ndarray, np.ndarray]:
        """Fitted share ``(h.y)^2 / |h|^2`` and moment at every grid point for data columns.

        Returns (P, n_data) arrays: the chi2 reduction and the moment (m^3).
        """
        pts = self.grid.points()
        sens = self.sensitivity
        assert sens is not None
        red = np.zeros((pts.shape[0], data.shape[1]))
        mom = np.zeros_like(red)
        for k0 in range(0, pts.shape[0], chunk):
            p = pts[k0:k0 + chunk]
            gd = sens.density(prep["qi"], prep["angle"], p)  # (n, P)
            h = self.project(prep["qn"], gd / prep["r0"][:, None] * prep["w"][:, None])
            hh = np.sum(h * h, axis=0)
            hy = h.T @ data  # (P, n_data)
            with np.errstate(divide="ignore", invalid="ignore"):
                red[k0:k0 + chunk] = np.where(hh[:, None] > 0, hy ** 2 / hh[:, None], 0.0)
                mom[k0:k0 + chunk] = np.where(hh[:, None] > 0, hy / hh[:, None], 0.0)
        return red, mom

    # ------------------------------------------------------------------ the fit
    def fit(self, readings: AdvanceReadings, background_r_ohm: np.ndarray | None = None
            ) -> BodyFit:
        """Fit a body to one advance's readings; see the module docstring.

        Parameters
        ----------
        readings : AdvanceReadings
        background_r_ohm : numpy.ndarray, optional
            Background transfer resistance of every reading, ohm (default: the axisymmetric
            model's, homogeneous at ``background_ohmm``).

        Returns
        -------
        BodyFit
        """
        return self.fit_many(readings, readings.r_ohm[None, :], background_r_ohm)[0]

    def fit_many(self, readings: AdvanceReadings, r_ohm: np.ndarray,
                 background_r_ohm: np.ndarray | None = None) -> list[BodyFit]:
        """Fit several realisations of the same readings (same quadrupoles, angles, errors).

        Parameters
        ----------
        readings : AdvanceReadings
            Quadrupoles, angles, errors and face (its ``r_ohm`` decides the readings used).
        r_ohm : numpy.ndarray
            (n_realisations, n_readings) transfer resistances, ohm.
        background_r_ohm : numpy.ndarray, optional
            As in :meth:`fit`.

        Returns
        -------
        list of BodyFit
        """
        cut = [i for i, q in enumerate(readings.measurements)
               if any(lab is not None and _is_cutterhead(self.layout, lab) for lab in q)]
        n_ang = len(np.unique(np.round(readings.cutterhead_deg[cut], 6))) if cut else 0
        r_ohm = np.atleast_2d(np.asarray(r_ohm, float))
        if n_ang < 3:
            return [BodyFit(n_readings=len(readings.measurements), n_angles=n_ang,
                            reason="cutterhead electrodes read at fewer than 3 distinct "
                                   "angles")] * r_ohm.shape[0]
        prep = self.prepare(readings, background_r_ohm)
        ok = prep["ok"]
        with np.errstate(invalid="ignore", divide="ignore"):
            y = np.log(r_ohm[:, ok] / prep["r0"][None, :]).T  # (n, n_real)
        if not np.all(np.isfinite(y)):
            raise ValueError("fit_many: a realisation changes the sign of a used reading")
        yw = self.project(prep["qn"], y * prep["w"][:, None])
        n, n_real = yw.shape
        dof = max(1, n - prep["qn"].shape[1] - 4)
        rng = np.random.default_rng(self.seed)
        sims = self.project(prep["qn"], rng.standard_normal((n, self.n_null)))
        cols = np.concatenate([yw, sims], axis=1)
        red, mom = self.scan(prep, cols)
        chi2_none = np.sum(cols ** 2, axis=0)
        best_red = red.max(axis=0)
        chi2_min = chi2_none - best_red
        stat = best_red / np.maximum(1.0, chi2_min / dof)
        null = np.sort(stat[n_real:])
        return [self._result(k, red, mom, chi2_none, chi2_min, stat, null, dof, n, n_ang)
                for k in range(n_real)]

    def _result(self, k: int, red: np.ndarray, mom: np.ndarray, chi2_none: np.ndarray,
                chi2_min: np.ndarray, stat: np.ndarray, null: np.ndarray, dof: int, n: int,
                n_ang: int) -> BodyFit:
        """The BodyFit of data column ``k`` of a scan."""
        lr = float(stat[k])
        p_none = float((1 + null.size - np.searchsorted(null, lr, side="left"))
                       / (1 + null.size))
        chi2 = (chi2_none[k] - red[:, k]).reshape(self.grid.shape)
        ib = int(np.argmax(red[:, k]))
        ia, io, ibr = np.unravel_index(ib, self.grid.shape)
        g = self.grid
        scale = max(1.0, float(chi2_min[k]) / dof)
        level = float(chi2_min[k]) + float(chi2_dist.ppf(self.confidence, 1)) * scale
        prof_a = chi2.min(axis=(1, 2))
        prof_b = chi2.min(axis=(0, 1))
        a_lo, a_hi = _interval(g.ahead_m, prof_a, level, int(ia))
        b_lo, b_hi = _bearing_interval(g.bearing_deg, prof_b, level, int(ibr))
        best = {"ahead_m": float(g.ahead_m[ia]), "offset_m": float(g.offset_m[io]),
                "bearing_deg": float(g.bearing_deg[ibr]), "moment_m3": float(mom[ib, k])}
        found = p_none <= self.p_report
        common = dict(lr_statistic=lr, body_p_none=p_none, found=found,
                      chi2_min=float(chi2_min[k]), chi2_none=float(chi2_none[k]),
                      n_readings=n, n_angles=n_ang, best=best, profile_ahead=prof_a,
                      profile_bearing=prof_b)
        if not found:
            return BodyFit(reason="no body: body_p_none above p_report", **common)
        return BodyFit(body_ahead_m=best["ahead_m"], body_ahead_lo_m=a_lo, body_ahead_hi_m=a_hi,
                       body_bearing_deg=best["bearing_deg"], body_bearing_lo_deg=b_lo,
                       body_bearing_hi_deg=b_hi, body_offset_m=best["offset_m"],
                       body_moment_m3=best["moment_m3"], **common)


def _is_cutterhead(layout: Any, label: str) -> bool:
    try:
        return layout.electrode(label).kind == "cutterhead"
    except (KeyError, ValueError):
        return False


def fit_body(readings: AdvanceReadings, layout: Any, background_ohmm: float,
             **options: Any) -> BodyFit:
    """Fit a small off-axis body to one advance's readings (:class:`BodyFitter`).

    Parameters
    ----------
    readings : AdvanceReadings
        The advance's readings, each at its own cutterhead angle.
    layout : tbminv.layout.Layout
    background_ohmm : float
        Background resistivity, ohm-m.
    **options
        Options of :class:`BodyFitter`.

    Returns
    -------
    BodyFit
    """
    return BodyFitter(layout, background_ohmm, **options).fit(readings)


def bearing_difference_deg(a: float, b: float) -> float:
    """Smallest angle between two bearings, degrees (0..180)."""
    d = (float(a) - float(b)) % 360.0
    return min(d, 360.0 - d)


__all__ = ["AdvanceReadings", "BodyFit", "BodyFitter", "BodyGrid", "bearing_difference_deg",
           "fit_body"]
