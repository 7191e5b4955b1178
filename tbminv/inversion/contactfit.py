"""Parametric contact fit: is there a planar change ahead, how far, which way, how sure.

Model: ground of resistivity ``rho1`` around the machine and a plane square to the axis at
distance ``d`` ahead of the face with ``rho2 = c * rho1`` beyond. The forward physics is the one
of the chosen forward model (machine and tunnel in), tabulated once per layout as a response
table ``R(c, d)`` for ``rho1 = rho_ref`` (:class:`ResponseTable`, cached on disk). Readings scale
with ``rho1`` exactly where the fixed regions scale with it (steel: yes, to within its cap; the
tunnel lining: no), so ``rho_ref`` is taken near the data's apparent resistivity; the
approximation is stated in the results.

Fit, per advance: for every (c, d) the best ``log rho1`` is a weighted mean (closed form) and
``chi2(c, d)`` follows; the profile ``chi2(d) = min_c chi2(c, d)`` gives the best distance and a
profile-likelihood interval ``{d : chi2(d) <= chi2_min + delta}`` (delta = 3.84 for 95 %,
one parameter; scaled by the reduced chi-squared of the best fit when the fit is poor). The
evidence against "no contact within reach" is the likelihood-ratio statistic against the
homogeneous model (c = 1), with its chi-squared p-value for two extra parameters (Wilks'
theorem; an approximation near the edges of the grid), and the posterior weight of the
homogeneous model with equal prior weights in the BIC approximation (Schwarz 1978, Ann. Stat.
6(2):461-464), ``p_no_contact = 1 / (1 + exp((BIC0 - BIC1) / 2))``.

Successive advances combine: a real contact stays at one chainage X while the face approaches,
so ``chi2(c, X) = sum_k chi2_k(c, X - face_k)`` over a window of advances, which breaks the
trade-off between near-and-weak and far-and-strong that one advance leaves.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy.interpolate import RegularGridInterpolator
from scipy.stats import chi2 as chi2_dist

from tbminv.cache import atomic_path, cache_dir, cache_key
from tbminv.ground import Contact, Scenario
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)


@dataclass(frozen=True)
class ContactFitSettings:
    """Settings of the contact fit.

    Attributes
    ----------
    contrasts : tuple of float
        Tabulated contrasts rho2/rho1 (1 is added if missing).
    distances_in_diameters : tuple of float
        Tabulated distances ahead in machine diameters.
    confidence : float
        Confidence of the distance interval (profile likelihood).
    p_threshold : float
        A contact is reported when the homogeneous model's p-value is below this.
    window : int
        Advances combined in the running joint fit (including the current one).
    fine_distances : int
        Points of the interpolated distance grid.
    fine_contrasts : int
        Points of the interpolated contrast grid.
    shared_resistivity : bool
        One resistivity around the machine for all advances of the window (the machine moves
        through the same ground until it reaches the contact). With the steel in, every pole
        reading responds alike to a contact ahead, so one advance alone cannot tell a contact
        from a change of the ground around the machine; a shared value breaks that trade-off.
    null_fraction : float
        A reading whose homogeneous response ``|r0|`` is at or below this fraction of the
        median ``|r0|`` of the table is null-coupled (e.g. a cutterhead dipole symmetric about
        its potential electrodes in axisymmetric ground: 0 up to round-off, about 1e-16 of the
        median): its relative response ``r / r0`` is undefined or round-off, so it is left out
        of the contact fit (with a logged reason; it stays in the image inversion). Our default
        1e-6 takes only numerical zeros: near-null readings above it respond strongly to a
        contact ahead and stay in (the demo drive has 8 of 120 at 6e-5 to 8e-4 of the median;
        leaving them out at 1e-3 moved its fitted distances by up to 3 m).
    """

    contrasts: tuple[float, ...] = (0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 4.0, 10.0, 20.0)
    distances_in_diameters: tuple[float, ...] = tuple(
        float(x) for x in np.round(np.geomspace(0.1, 12.0, 15), 4))
    confidence: float = 0.95
    p_threshold: float = 0.01
    window: int = 30
    fine_distances: int = 240
    fine_contrasts: int = 81
    shared_resistivity: bool = True
    null_fraction: float = 1e-6


@dataclass
class ResponseTable:
    """Transfer resistances for a contact at distance d ahead with contrast c, rho1 = rho_ref.

    Attributes
    ----------
    contrasts : ndarray (nc,)
    distances_m : ndarray (nd,)
    r_ohm : ndarray (nc, nd, nq)
        Transfer resistances, ohm, in ``layout.measurements`` order.
    r0_ohm : ndarray (nq,)
        Homogeneous ground of ``rho_ref_ohmm``.
    rho_ref_ohmm : float
    model : str
    """

    contrasts: np.ndarray
    distances_m: np.ndarray
    r_ohm: np.ndarray
    r0_ohm: np.ndarray
    rho_ref_ohmm: float
    model: str

    def save(self, path: Path) -> Path:
        """Write to ``.npz`` (atomic; no pickled objects)."""
        with atomic_path(path) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, contrasts=self.contrasts, distances_m=self.distances_m,
                         r_ohm=self.r_ohm, r0_ohm=self.r0_ohm,
                         meta=np.array(json.dumps({"rho_ref_ohmm": self.rho_ref_ohmm,
                                                   "model": self.model})))
        return path

    def usable(self, null_fraction: float) -> tuple[np.ndarray, dict[int, str]]:
        """Readings whose relative response ``r / r0`` is defined, and why the others are not.

        Parameters
        ----------
        null_fraction : float
            A reading with ``|r0|`` below this fraction of the median ``|r0|`` (over the
            finite, non-zero ones) is null-coupled.

        Returns
        -------
        (ndarray of bool (nq,), dict)
            The mask, and a reason per left-out reading index.
        """
        r0 = np.asarray(self.r0_ohm, float)
        mag = np.abs(r0)
        finite = np.isfinite(r0) & np.all(np.isfinite(self.r_ohm), axis=(0, 1))
        nonzero = finite & (mag > 0)
        ref = float(np.median(mag[nonzero])) if nonzero.any() else 0.0
        floor = null_fraction * ref
        reasons: dict[int, str] = {}
        for i in range(r0.size):
            if not finite[i]:
                reasons[i] = "response not finite in the contact table"
            elif not mag[i] > floor:
                reasons[i] = (f"null-coupled: homogeneous response |r0| = {mag[i]:.3g} ohm is at "
                              f"or below {null_fraction:g} x the median |r0| ({ref:.3g} ohm)")
        use = np.ones(r0.size, bool)
        use[list(reasons)] = False
        return use, reasons

    @classmethod
    def load(cls, path: Path) -> ResponseTable:
        """Read a table written by :meth:`save`."""
        with np.load(path, allow_pickle=False) as z:
            meta = json.loads(str(z["meta"]))
            return cls(contrasts=z["contrasts"], distances_m=z["distances_m"], r_ohm=z["r_ohm"],
                       r0_ohm=z["r0_ohm"], rho_ref_ohmm=float(meta["rho_ref_ohmm"]),
                       model=str(meta["model"]))


def build_response_table(layout: Layout, model: Any, *, rho_ref_ohmm: float,
                         settings: ContactFitSettings = ContactFitSettings(),
                         model_name: str = "", face_chainage_m: float = 0.0,
                         cache: bool = True, progress: bool = False) -> ResponseTable:
    """Tabulate the forward response for contacts ahead (cached per layout and settings).

    Parameters
    ----------
    layout : Layout
    model : ForwardModel
        Built for ``layout`` (see :mod:`tbminv.forward.registry`).
    rho_ref_ohmm : float
        Resistivity around the machine for the table, ohm-m.
    face_chainage_m : float
        Face chainage used for the table (matters only for electrodes fixed in the ground).
    """
    contrasts = np.array(sorted(set(settings.contrasts) | {1.0}), float)
    d = np.array(settings.distances_in_diameters, float) * layout.machine.diameter_m
    key = cache_key({"layout": layout.to_dict(), "model": model_name or type(model).__name__,
                     "model_settings": repr(getattr(model, "settings", None)),
                     "rho": rho_ref_ohmm, "c": contrasts, "d": d, "face": face_chainage_m})
    path = cache_dir("contact-tables") / f"{key}.npz"
    if cache and path.exists():
        return ResponseTable.load(path)
    from tqdm.auto import tqdm  # late: the progress-bar package is needed only for a new table

    r0 = np.asarray(model.response(Scenario.homogeneous(rho_ref_ohmm), face_chainage_m), float)
    r = np.empty((contrasts.size, d.size, r0.size))
    cases = [(i, j) for i in range(contrasts.size) for j in range(d.size)]
    for i, j in tqdm(cases, disable=not progress, desc="contact table"):
        if contrasts[i] == 1.0:
            r[i, j] = r0
            continue
        sc = Scenario(background_resistivity_ohmm=rho_ref_ohmm,
                      contacts=(Contact(chainage_m=face_chainage_m + d[j],
                                        resistivity_ohmm=rho_ref_ohmm * contrasts[i]),))
        r[i, j] = np.asarray(model.response(sc, face_chainage_m), float)
    table = ResponseTable(contrasts=contrasts, distances_m=d, r_ohm=r, r0_ohm=r0,
                          rho_ref_ohmm=rho_ref_ohmm, model=model_name or type(model).__name__)
    if cache:
        table.save(path)
    return table


@dataclass
class Likelihood:
    """chi2 over the fine (contrast, distance) grid of one advance."""

    contrasts: np.ndarray
    distances_m: np.ndarray
    chi2: np.ndarray          # (nc, nd)
    log_rho1: np.ndarray      # (nc, nd) best log(rho1) per cell
    chi2_homogeneous: float
    log_rho1_homogeneous: float
    n_data: int
    weight: float = 0.0       # sum of the data weights: chi2 grows by weight * (dlog rho1)^2


@dataclass
class ContactEstimate:
    """Result of a contact fit (distances ahead of the current face, m)."""

    found: bool
    ahead_m: float
    ahead_lo_m: float
    ahead_hi_m: float
    chainage_m: float
    contrast: float
    resistivity_around_ohmm: float
    resistivity_beyond_ohmm: float
    chi2: float
    chi2_homogeneous: float
    p_homogeneous: float
    p_no_contact: float
    n_data: int
    n_advances: int
    note: str = ""

    def as_dict(self) -> dict[str, Any]:
        """Plain dictionary."""
        return dataclasses.asdict(self)


class ContactFitter:
    """Fit contacts to per-advance data with a response table.

    Parameters
    ----------
    table : ResponseTable
    settings : ContactFitSettings
    labels : sequence of str, optional
        A name per reading of the table (for the log of left-out readings).

    Attributes
    ----------
    usable : ndarray of bool (nq,)
        Readings of the table with a defined relative response; the others (null-coupled or
        not finite, see :meth:`ResponseTable.usable`) are never used by the fit.
    left_out : dict
        Reading index -> why it was left out.

    Raises
    ------
    ValueError
        No reading of the table has a usable homogeneous response.
    """

    def __init__(self, table: ResponseTable, settings: ContactFitSettings = ContactFitSettings(),
                 labels: Sequence[str] | None = None):
        self.table = table
        self.settings = settings
        c, d = table.contrasts, table.distances_m
        self.usable, self.left_out = table.usable(settings.null_fraction)
        use = self.usable
        if not use.any():
            raise ValueError(f"contact table: none of its {use.size} readings has a usable "
                             "homogeneous response (all null-coupled or not finite)")
        if self.left_out:
            names = list(labels) if labels is not None else [f"#{i}" for i in range(use.size)]
            _LOG.warning("contact fit: %d of %d readings left out of the relative-response "
                         "table (they stay in the image inversion): %s", len(self.left_out),
                         use.size, "; ".join(f"{names[i]}: {why}"
                                             for i, why in self.left_out.items()))
        rel = table.r_ohm[..., use] / table.r0_ohm[None, None, use]
        # interpolate the relative response (smooth) in (log c, log d)
        self._interp = RegularGridInterpolator((np.log(c), np.log(d)), rel, method="cubic"
                                               if min(c.size, d.size) >= 4 else "linear")
        self.fine_c = np.exp(np.linspace(np.log(c[0]), np.log(c[-1]), settings.fine_contrasts))
        if not np.any(np.isclose(self.fine_c, 1.0)):
            self.fine_c = np.sort(np.append(self.fine_c, 1.0))
        self.fine_d = np.exp(np.linspace(np.log(d[0]), np.log(d[-1]), settings.fine_distances))
        lc, ld = np.meshgrid(np.log(self.fine_c), np.log(self.fine_d), indexing="ij")
        pts = np.stack([lc.ravel(), ld.ravel()], axis=-1)
        self.fine_rel = np.full(lc.shape + (use.size,), np.nan)
        self.fine_rel[..., use] = self._interp(pts).reshape(lc.shape + (int(use.sum()),))
        self.fine_rel[np.isclose(self.fine_c, 1.0)] = 1.0

    def usable_readings(self, r_obs_ohm: np.ndarray, rel_error: np.ndarray,
                        use: np.ndarray | None = None) -> np.ndarray:
        """Readings of one advance the fit uses, bool (nq,).

        Finite, with a positive error, of the sign of the table's homogeneous reading, not
        left out of the table (null-coupled), and in ``use`` if given.
        """
        ok = np.isfinite(r_obs_ohm) & np.isfinite(rel_error) & (rel_error > 0)
        ok &= np.sign(r_obs_ohm) == np.sign(self.table.r0_ohm)
        ok &= self.usable
        if use is not None:
            ok &= use
        return ok

    def likelihood(self, r_obs_ohm: np.ndarray, rel_error: np.ndarray,
                   use: np.ndarray | None = None) -> Likelihood:
        """chi2 of one advance's readings over the (contrast, distance) grid.

        Parameters
        ----------
        r_obs_ohm : ndarray (nq,)
            Observed transfer resistances in protocol order, ohm (NaN where missing).
        rel_error : ndarray (nq,)
            Relative standard errors (fraction).
        use : ndarray of bool, optional
            Readings to use (default: finite, same sign as the table's homogeneous reading,
            not left out of the table).

        Raises
        ------
        ValueError
            Fewer than 3 usable readings.
        """
        r0 = self.table.r0_ohm
        ok = self.usable_readings(r_obs_ohm, rel_error, use)
        if ok.sum() < 3:
            raise ValueError(f"contact fit needs at least 3 usable readings, got {int(ok.sum())}")
        # data: log of apparent resistivity against the table's homogeneous response
        y = np.log(np.abs(r_obs_ohm[ok]) / np.abs(r0[ok]) * self.table.rho_ref_ohmm)
        w = 1.0 / rel_error[ok] ** 2
        with np.errstate(divide="ignore", invalid="ignore"):
            g = np.log(np.abs(self.fine_rel[..., ok]))     # (nc, nd, n)
        g = np.where(np.isfinite(g), g, 0.0)
        resid = y[None, None, :] - g
        lr = (resid * w).sum(-1) / w.sum()
        chi2 = (w * (resid - lr[..., None]) ** 2).sum(-1)
        lr0 = float((y * w).sum() / w.sum())
        chi2_0 = float((w * (y - lr0) ** 2).sum())
        return Likelihood(self.fine_c, self.fine_d, chi2, lr, chi2_0, lr0, int(ok.sum()),
                          float(w.sum()))

    def estimate(self, likelihoods: Sequence[Likelihood], faces_m: Sequence[float]
                 ) -> ContactEstimate:
        """Joint estimate over advances (the last one is the current face)."""
        s = self.settings
        faces = np.asarray(faces_m, float)
        cur = faces[-1]
        d = self.fine_d
        dmin, dmax = d[0], d[-1]
        # chainage grid: distances from the current face
        x_grid = cur + d
        nc = self.fine_c.size
        total = np.zeros((nc, x_grid.size))
        total0 = 0.0
        n_data = 0
        shared = self.settings.shared_resistivity
        acc_w = np.zeros((nc, x_grid.size))
        acc_wl = np.zeros((nc, x_grid.size))
        acc_wll = np.zeros((nc, x_grid.size))
        w0 = wl0 = wll0 = 0.0
        for lik, f in zip(likelihoods, faces):
            dist = x_grid - f                         # distance ahead of that advance's face
            n_data += lik.n_data
            total0 += lik.chi2_homogeneous
            inside = (dist >= dmin) & (dist <= dmax)
            ld = np.log(np.clip(dist, dmin, dmax))
            idx = np.interp(ld, np.log(d), np.arange(d.size))
            lo = np.floor(idx).astype(int)
            hi = np.minimum(lo + 1, d.size - 1)
            t = idx - lo
            vals = lik.chi2[:, lo] * (1 - t) + lik.chi2[:, hi] * t
            lrho = lik.log_rho1[:, lo] * (1 - t) + lik.log_rho1[:, hi] * t
            # beyond the table the contact is not seen: homogeneous misfit
            far = ~inside & (dist > dmax)
            vals[:, far] = lik.chi2_homogeneous
            lrho[:, far] = lik.log_rho1_homogeneous
            vals[:, ~inside & (dist < dmin)] = np.nan
            total += vals
            if shared:
                acc_w += lik.weight
                acc_wl += lik.weight * lrho
                acc_wll += lik.weight * lrho ** 2
                w0 += lik.weight
                wl0 += lik.weight * lik.log_rho1_homogeneous
                wll0 += lik.weight * lik.log_rho1_homogeneous ** 2
        if shared:
            # one resistivity around the machine for the whole window: add the spread of the
            # per-advance best values, sum_k W_k (L_k - L*)^2 with L* their weighted mean
            with np.errstate(invalid="ignore", divide="ignore"):
                total += np.maximum(acc_wll - acc_wl ** 2 / acc_w, 0.0)
            total0 += max(wll0 - wl0 ** 2 / w0, 0.0) if w0 > 0 else 0.0
        total = np.where(np.isfinite(total), total, np.inf)
        c1 = int(np.argmin(np.abs(self.fine_c - 1.0)))
        total[c1, :] = total0
        prof = total.min(axis=0)
        best = int(np.argmin(prof))
        chi2_min = float(prof[best])
        ci = int(np.argmin(total[:, best]))
        n_par = 2 + (1 if shared else len(likelihoods))
        dof = max(1, n_data - n_par)
        scale = max(1.0, chi2_min / dof)
        delta = float(chi2_dist.ppf(s.confidence, 1)) * scale
        inside = prof <= chi2_min + delta
        # contiguous interval around the best point
        lo_i = best
        while lo_i > 0 and inside[lo_i - 1]:
            lo_i -= 1
        hi_i = best
        while hi_i < prof.size - 1 and inside[hi_i + 1]:
            hi_i += 1
        stat = max(0.0, (total0 - chi2_min) / scale)
        p_hom = float(chi2_dist.sf(stat, 2))
        # posterior weight of the homogeneous model, equal priors, BIC approximation
        d_bic = stat - 2.0 * math.log(max(n_data, 2))      # BIC0 - BIC1
        p_none = float(1.0 / (1.0 + math.exp(min(700.0, 0.5 * d_bic))))
        ahead = float(x_grid[best] - cur)
        lo_m = float(x_grid[lo_i] - cur)
        hi_m = float(x_grid[hi_i] - cur) if hi_i < prof.size - 1 else math.nan
        contrast = float(self.fine_c[ci])
        found = (p_hom < s.p_threshold and p_none < 0.5 and abs(math.log(contrast)) > 1e-9
                 and math.isfinite(hi_m) and ahead < 0.8 * dmax)
        lik = likelihoods[-1]
        # rho1 of the current advance at the joint best contact
        dist_cur = float(np.clip(x_grid[best] - cur, dmin, dmax))
        j = int(np.argmin(np.abs(d - dist_cur)))
        rho1 = float(np.exp(lik.log_rho1[ci, j])) if found else float(
            np.exp(lik.log_rho1_homogeneous))
        note = ""
        if scale > 1.0:
            note = f"interval widened by the reduced chi-squared {scale:.2f} of the best fit"
        if not found:
            return ContactEstimate(False, math.nan, math.nan, math.nan, math.nan, 1.0, rho1,
                                   rho1, chi2_min, total0, p_hom, p_none, n_data,
                                   len(likelihoods), note)
        return ContactEstimate(True, ahead, lo_m, hi_m, float(x_grid[best]), contrast, rho1,
                               rho1 * contrast, chi2_min, total0, p_hom, p_none,
                               n_data, len(likelihoods), note)

    def fit_drive(self, r_obs: np.ndarray, rel_error: np.ndarray, faces_m: Sequence[float],
                  use: np.ndarray | None = None, *, skip_unusable: bool = False
                  ) -> list[ContactEstimate | None]:
        """Running joint fit along a drive.

        Parameters
        ----------
        r_obs : ndarray (n_advances, nq)
            Observed transfer resistances, ohm (NaN where missing).
        rel_error : ndarray (n_advances, nq)
        faces_m : sequence of float (n_advances,)
        use : ndarray of bool (n_advances, nq), optional
        skip_unusable : bool
            An advance with fewer than 3 usable readings gets ``None`` and is left out of the
            windows of the others (default: :class:`ValueError`).
        """
        liks: list[Likelihood | None] = []
        for k in range(len(faces_m)):
            try:
                liks.append(self.likelihood(r_obs[k], rel_error[k],
                                            None if use is None else use[k]))
            except ValueError as exc:
                if not skip_unusable:
                    raise
                _LOG.warning("contact fit: advance %d of the drive left out: %s", k, exc)
                liks.append(None)
        out: list[ContactEstimate | None] = []
        for k in range(len(faces_m)):
            if liks[k] is None:
                out.append(None)
                continue
            k0 = max(0, k - self.settings.window + 1)
            win = [(lik, f) for lik, f in zip(liks[k0:k + 1], faces_m[k0:k + 1])
                   if lik is not None]
            out.append(self.estimate([w[0] for w in win], [w[1] for w in win]))
        return out


__all__ = ["ContactFitSettings", "ResponseTable", "build_response_table", "ContactFitter",
           "ContactEstimate", "Likelihood"]
