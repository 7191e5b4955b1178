"""What the inversion hands on per advance: the image, its fit record and the contact fit."""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

_LOG = logging.getLogger(__name__)

#: Bits of the per-advance ``postprocess_flag`` (CF ``flag_masks``): a step after the image
#: inversion failed for the advance; the image itself is kept.
POSTPROCESS_CONTACT_FIT_FAILED = 1
POSTPROCESS_DOI_FAILED = 2
POSTPROCESS_RESAMPLING_FAILED = 4
POSTPROCESS_MASKS = (POSTPROCESS_CONTACT_FIT_FAILED, POSTPROCESS_DOI_FAILED,
                     POSTPROCESS_RESAMPLING_FAILED)
POSTPROCESS_MEANINGS = "contact_fit_failed doi_failed resampling_failed"


class SectionError(ValueError):
    """Results or a store that do not fit the section contract; the message says where."""


@dataclass(frozen=True)
class ContactFit:
    """Parametric contact fit of one advance: a planar contact ahead of the face.

    Parameters
    ----------
    ahead_m : float
        Best-fitting distance of the contact ahead of the face, m (NaN: no contact within
        reach; negative: the face has passed it).
    ahead_lo_m, ahead_hi_m : float
        Interval of ``ahead_m`` (e.g. the 90 % profile-likelihood or posterior interval), m.
    chainage_m : float or None
        Chainage of the contact on the axis, m; ``None``: face chainage + ``ahead_m``.
    resistivity_around_ohmm : float
        Resistivity of the ground around the machine (the near side of the contact), ohm-m:
        the value the joint fit shares over its window of advances.
    resistivity_beyond_ohmm : float
        Resistivity beyond the contact, ohm-m (NaN with no contact).
    p_no_contact : float
        Calibrated false-alarm probability of the fit's likelihood-ratio statistic against
        "no contact within reach": the share of simulated homogeneous drives whose statistic
        reaches this one's (:mod:`tbminv.inversion.nullcal`). A p-value, not the probability
        that there is no contact. NaN: not computed.
    interval_level : float
        Probability content of ``[ahead_lo_m, ahead_hi_m]`` (default 0.95).
    dip_deg : float
        Fitted dip of the contact, degrees (NaN: not fitted; 90 = square to the axis).
    p_homogeneous : float
        The same calibrated value as ``p_no_contact`` (kept for older readers).
    contrast : float
        Resistivity beyond over resistivity around, ``rho2 / rho1`` (dimensionless; NaN: not
        fitted).
    contrast_lo, contrast_hi : float
        Profile-likelihood interval of ``contrast`` (same level as the distance interval).
    at_bound : bool
        The best point is at a bound of the fit (a table end of the contrast, the first or
        last distance) or the distance interval touches the first or last distance: never
        reported above the lowest level.
    ambiguous : bool
        The distance set has several separate parts; ``ahead_lo_m``/``ahead_hi_m`` span all.
    parts_m : tuple of (float, float)
        The parts ``(lo, hi)`` of the distance set, m ahead of the face (``hi`` NaN: open).
    contrast_open : bool
        The contrast interval reaches a table end (a one-sided answer, e.g. "x5 or more").
    lr_statistic : float
        The likelihood-ratio statistic whose tail probability is ``p_no_contact``
        (dimensionless; NaN: not computed, e.g. results written before it existed).
    probe_constrained : bool
        A probe log constrained the distance (:mod:`tbminv.inversion.probefit`).
    probe_misfit_added : float
        Chi-squared the probe constraint adds to the best fit, scaled by the reduced
        chi-squared (dimensionless; NaN: no probe constraint for this advance).
    probe_contradicts : bool
        The probe constraint contradicts the readings (flagged, not applied).
    """

    ahead_m: float
    ahead_lo_m: float
    ahead_hi_m: float
    chainage_m: float | None = None
    resistivity_around_ohmm: float = math.nan
    resistivity_beyond_ohmm: float = math.nan
    p_no_contact: float = math.nan
    interval_level: float = 0.95
    dip_deg: float = math.nan
    p_homogeneous: float = math.nan
    contrast: float = math.nan
    contrast_lo: float = math.nan
    contrast_hi: float = math.nan
    at_bound: bool = False
    ambiguous: bool = False
    parts_m: tuple[tuple[float, float], ...] = ()
    lr_statistic: float = math.nan
    contrast_open: bool = False
    probe_constrained: bool = False
    probe_misfit_added: float = math.nan
    probe_contradicts: bool = False

    @classmethod
    def from_estimate(cls, est: Any, interval_level: float = 0.95) -> ContactFit:
        """From an object with the fields of :class:`tbminv.inversion.contactfit.ContactEstimate`.

        ``found == False`` gives NaN distances (no contact within reach), no bound or
        ambiguity flag, and keeps the evidence measures and the contrast interval.
        """
        found = bool(getattr(est, "found", np.isfinite(getattr(est, "ahead_m", math.nan))))
        nan = math.nan

        def get(name: str) -> float:
            return float(getattr(est, name, nan))

        return cls(
            ahead_m=get("ahead_m") if found else nan,
            ahead_lo_m=get("ahead_lo_m") if found else nan,
            ahead_hi_m=get("ahead_hi_m") if found else nan,
            chainage_m=get("chainage_m") if found else None,
            resistivity_around_ohmm=get("resistivity_around_ohmm"),
            resistivity_beyond_ohmm=get("resistivity_beyond_ohmm") if found else nan,
            p_no_contact=get("p_no_contact"), interval_level=interval_level,
            p_homogeneous=get("p_homogeneous"),
            contrast=get("contrast") if found else nan,
            contrast_lo=get("contrast_lo"), contrast_hi=get("contrast_hi"),
            at_bound=bool(getattr(est, "at_bound", False)) if found else False,
            ambiguous=bool(getattr(est, "ambiguous", False)) if found else False,
            parts_m=tuple((float(a), float(b)) for a, b in getattr(est, "parts_m", ()) or ())
            if found else (),
            lr_statistic=get("lr_statistic"),
            contrast_open=bool(getattr(est, "contrast_open", False)) if found else False,
            probe_constrained=bool(getattr(est, "probe_constrained", False)),
            probe_misfit_added=get("probe_misfit_added"),
            probe_contradicts=bool(getattr(est, "probe_contradicts", False)))

    @property
    def found(self) -> bool:
        """True if a contact distance was fitted (finite ``ahead_m``)."""
        return bool(np.isfinite(self.ahead_m))


@dataclass
class AdvanceResult:
    """The inversion result of one advance, on a regular grid in the machine frame.

    Parameters
    ----------
    advance : int
        Advance number (from the readings log; increasing along the drive).
    face_chainage_m : float
        Chainage of the cutterhead face at this advance, m.
    ahead_m : ndarray, shape (n_ahead,)
        Cell centres along the axis, m, measured from the face (positive ahead), increasing.
    radius_m : ndarray, shape (n_radius,), or None
        Cell centres in distance from the tunnel axis, m, increasing, >= 0 (axisymmetric
        model). ``None`` for a vertical section: give ``z_m`` instead.
    resistivity_ohmm : ndarray, shape (n_ahead, n_radius)
        Resistivity model, ohm-m (> 0; NaN where the grid cell is outside the ground, e.g.
        inside the machine).
    coverage : ndarray, shape (n_ahead, n_radius)
        log10 of the cumulative (error-weighted, absolute) sensitivity of the data to each
        cell, dimensionless.
    doi_index : ndarray or None
        Depth-of-investigation index (Oldenburg & Li 1999, Geophysics 64(2):403-416): 0 where
        the model is fixed by the data, about 1 where it follows the reference model.
    chi2 : float
        Error-weighted chi-squared misfit per datum at the final model.
    rrms_percent : float
        Relative root-mean-square misfit, percent.
    iterations : int
        Number of Gauss-Newton iterations.
    lambda_ : float
        Regularisation strength of the final model.
    stop_reason : str
        Why the inversion stopped (free text of the inversion, e.g. ``"chi2 reached"``).
    converged : bool
        True if the inversion met its convergence criterion.
    time_s : float
        Wall-clock time of the inversion, s.
    chi2_history : list of float
        chi2 after each iteration (first entry: the starting model).
    n_data : int
        Readings of this advance.
    n_used : int
        Readings used by the inversion (after QC).
    contact : ContactFit or None
        Parametric contact fit, if one was made.
    resistivity_lo_ohmm, resistivity_hi_ohmm : ndarray or None
        Optional per-cell uncertainty bounds of the resistivity (same shape), ohm-m.
    time : str or None
        Time of the advance's readings, ISO 8601 (UTC), if known.
    z_m : ndarray or None
        Cell centres in height above the tunnel axis, m, increasing (vertical section through
        the axis; frames in DEVELOPERS.md), instead of ``radius_m``; the section's dimension is
        then ``z`` and ``n_radius`` above reads ``n_z``.
    postprocess_flag : int
        Bits of the post-processing steps that failed for this advance
        (``POSTPROCESS_*``: contact fit, DOI, resampling; 0: none failed). The image is kept;
        the failure is logged as a warning.
    """

    advance: int
    face_chainage_m: float
    ahead_m: np.ndarray
    radius_m: np.ndarray | None
    resistivity_ohmm: np.ndarray
    coverage: np.ndarray
    doi_index: np.ndarray | None = None
    chi2: float = math.nan
    rrms_percent: float = math.nan
    iterations: int = 0
    lambda_: float = math.nan
    stop_reason: str = ""
    converged: bool = False
    time_s: float = math.nan
    chi2_history: list[float] = field(default_factory=list)
    n_data: int = 0
    n_used: int = 0
    contact: ContactFit | None = None
    resistivity_lo_ohmm: np.ndarray | None = None
    resistivity_hi_ohmm: np.ndarray | None = None
    time: str | None = None
    z_m: np.ndarray | None = None
    postprocess_flag: int = 0

    @property
    def transverse_dim(self) -> str:
        """``"radius"`` (axisymmetric model) or ``"z"`` (vertical section)."""
        return "z" if self.z_m is not None else "radius"

    @property
    def transverse_m(self) -> np.ndarray:
        """The cell centres across the axis (``radius_m`` or ``z_m``), m."""
        return self.z_m if self.z_m is not None else self.radius_m

    def __post_init__(self) -> None:
        where = f"AdvanceResult(advance={self.advance})"
        self.ahead_m = np.asarray(self.ahead_m, dtype=float)
        if (self.radius_m is None) == (self.z_m is None):
            raise SectionError(f"{where}: give exactly one of radius_m (axisymmetric) and z_m "
                               "(vertical section)")
        tname = "z_m" if self.z_m is not None else "radius_m"
        trans = np.asarray(self.transverse_m, dtype=float)
        setattr(self, tname, trans)
        if self.ahead_m.ndim != 1 or self.ahead_m.size < 2:
            raise SectionError(f"{where}.ahead_m: expected a 1-D array of >= 2 cell centres")
        if trans.ndim != 1 or trans.size < 1:
            raise SectionError(f"{where}.{tname}: expected a 1-D array of cell centres")
        if np.any(np.diff(self.ahead_m) <= 0) or np.any(np.diff(trans) <= 0):
            raise SectionError(f"{where}: ahead_m and {tname} must increase strictly")
        if tname == "radius_m" and np.any(trans < 0):
            raise SectionError(f"{where}.radius_m: expected values >= 0 m")
        shape = (self.ahead_m.size, trans.size)
        for name in ("resistivity_ohmm", "coverage", "doi_index", "resistivity_lo_ohmm",
                     "resistivity_hi_ohmm"):
            val = getattr(self, name)
            if val is None:
                continue
            arr = np.asarray(val, dtype=float)
            if arr.shape != shape:
                raise SectionError(f"{where}.{name}: shape {arr.shape}, expected {shape} "
                                   "(n_ahead, n_radius)")
            setattr(self, name, arr)
        rho = self.resistivity_ohmm
        if np.any(rho[np.isfinite(rho)] <= 0):
            raise SectionError(f"{where}.resistivity_ohmm: expected values > 0 ohm-m")
        self.chi2_history = [float(v) for v in self.chi2_history]


__all__ = ["POSTPROCESS_CONTACT_FIT_FAILED", "POSTPROCESS_DOI_FAILED",
           "POSTPROCESS_RESAMPLING_FAILED", "POSTPROCESS_MASKS", "POSTPROCESS_MEANINGS",
           "SectionError", "ContactFit", "AdvanceResult"]
