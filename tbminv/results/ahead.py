"""Change ahead of the face, from the moving section and its contact fits.

Each clean advance (no fit flag) gives at most one *pick*: a change along the axis ahead of the
face, either from the parametric contact fit (``contact_chainage_m``, used where its evidence
for "no contact" is low) or, failing that, from a two-level step fitted to the axial profile of
the section (median of the covered cells within ``profile_radius_m`` of the axis, in log10
resistivity). A pick needs a contrast of at least ``min_contrast`` and a step that stands out
of the profile scatter (``min_step_t``).

Picks of successive advances are grouped by chainage (single linkage within
``chainage_tolerance_m``). A real contact stays at one chainage as the face approaches: the
slope of pick chainage against face chainage is near 0. An artefact of the machine and the
layout travels with the machine: the slope is near 1, and the group is rejected. Groups in
between are kept at the lowest level of concern. The slope is a weighted least-squares fit, each
pick weighted by its own stated uncertainty (1 / sigma^2, sigma from its interval): an early,
far pick with a wide interval does not tip the slope of a contact that later, sharper picks
hold at one chainage (a contact fit trades distance against contrast while the contact is far).

Levels of concern (our own words, thresholds in :class:`AheadSettings`):

``"none seen"``
    no change within the covered reach;
``"watch"``
    a change seen in fewer than ``likely_advances`` consistent advances;
``"likely"``
    a change at one chainage in at least ``likely_advances`` advances;
``"firm"``
    at one chainage in at least ``firm_advances`` advances and a contrast of at least
    ``firm_contrast``.

``confidence`` (0-1) is a heuristic score, not a probability: the share of the recent clean
advances that agree on the chainage, times one minus the median contact-fit evidence for "no
contact" where fits exist, times the contrast relative to ``firm_contrast`` (capped at 1).
"""

from __future__ import annotations

import dataclasses
import logging
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from tbminv.results.section import axis_median_log10, clean_advances
from tbminv.tomlfile import read_toml

_LOG = logging.getLogger(__name__)

LEVELS = ("none seen", "watch", "likely", "firm")


class AheadSettingsError(ValueError):
    """An ``[ahead]`` settings table that is not valid; the message names file and key."""


@dataclass(frozen=True)
class AheadSettings:
    """Thresholds of the change-ahead detection (TOML table ``[ahead]``, same key names).

    Parameters
    ----------
    profile_radius_m : float or None
        Cells within this distance of the axis form the axial profile (default: the machine
        radius from the section's attributes, else 3 m).
    min_contrast : float
        Smallest resistivity ratio (either way) counted as a change (default 2).
    min_step_t : float
        Smallest step-to-scatter ratio of a profile step (default 6).
    min_cells_each_side : int
        Profile cells needed on each side of a step (default 3).
    chainage_tolerance_m : float or None
        Picks within this distance are one group (default half a machine diameter, else 3 m).
    max_slope : float
        Largest |d pick chainage / d face chainage| of a stationary change (default 0.35).
    artefact_slope : float
        Slope from which a group is taken as travelling with the machine (default 0.65).
    window_advances : int
        Recent clean advances considered (default 10).
    likely_advances, firm_advances : int
        Consistent advances for the levels "likely" (3) and "firm" (5).
    firm_contrast : float
        Resistivity ratio needed for "firm" (default 3).
    max_p_no_contact : float
        Contact fits whose evidence for "no contact" is above this give no pick (default 0.2).
    """

    profile_radius_m: float | None = None
    min_contrast: float = 2.0
    min_step_t: float = 6.0
    min_cells_each_side: int = 3
    chainage_tolerance_m: float | None = None
    max_slope: float = 0.35
    artefact_slope: float = 0.65
    window_advances: int = 10
    likely_advances: int = 3
    firm_advances: int = 5
    firm_contrast: float = 3.0
    max_p_no_contact: float = 0.2

    @classmethod
    def from_dict(cls, d: dict[str, Any], source: str = "<dict>") -> AheadSettings:
        """Settings from the ``[ahead]`` table's dictionary; unknown or bad keys raise."""
        names = {f.name: f for f in dataclasses.fields(cls)}
        kw: dict[str, Any] = {}
        for key, val in d.items():
            if key not in names:
                raise AheadSettingsError(f"{source}: [ahead] {key}: unknown key; expected one "
                                         f"of {sorted(names)}")
            want_int = key in ("min_cells_each_side", "window_advances", "likely_advances",
                               "firm_advances")
            ok = (isinstance(val, int) if want_int
                  else isinstance(val, (int, float))) and not isinstance(val, bool)
            if not ok or (isinstance(val, float) and not math.isfinite(val)) or val <= 0:
                kind = "an integer > 0" if want_int else "a number > 0"
                raise AheadSettingsError(f"{source}: [ahead] {key} = {val!r}: expected {kind}")
            kw[key] = val
        return cls(**kw)

    @classmethod
    def from_toml(cls, path: str | Path) -> AheadSettings:
        """Read the ``[ahead]`` table of a settings file (defaults where it is absent)."""
        p = Path(path)
        doc = read_toml(p, AheadSettingsError, "settings file")
        tbl = doc.get("ahead", {})
        if not isinstance(tbl, dict):
            raise AheadSettingsError(f"{p}: [ahead] must be a table")
        return cls.from_dict(tbl, str(p))


@dataclass(frozen=True)
class Pick:
    """A change seen at one advance."""

    advance: int
    face_chainage_m: float
    chainage_m: float
    chainage_lo_m: float
    chainage_hi_m: float
    contrast_log10: float
    resistivity_around_ohmm: float
    resistivity_beyond_ohmm: float
    source: str
    p_no_contact: float = math.nan

    @property
    def sigma_m(self) -> float:
        """Standard uncertainty of the pick chainage from its interval, m.

        The interval is read as a 95 % one (half-width / 1.96); an interval open on one side
        gives the distance ahead of the face as the uncertainty.
        """
        lo, hi = self.chainage_lo_m, self.chainage_hi_m
        if math.isfinite(lo) and math.isfinite(hi) and hi > lo:
            return (hi - lo) / (2.0 * 1.959964)
        return max(abs(self.ahead_m), 1e-3)

    @property
    def ahead_m(self) -> float:
        """Distance of the pick ahead of the face at its advance, m."""
        return self.chainage_m - self.face_chainage_m


@dataclass(frozen=True)
class Change:
    """A change ahead, combined over advances.

    Distances refer to the face of the last advance of the section.
    """

    level: str
    chainage_m: float
    chainage_lo_m: float
    chainage_hi_m: float
    distance_ahead_m: float
    direction: str
    contrast_factor: float
    resistivity_around_ohmm: float
    resistivity_beyond_ohmm: float
    confidence: float
    n_advances: int
    slope: float
    source: str
    advances: tuple[int, ...]
    reasons: tuple[str, ...] = ()

    def describe(self) -> str:
        """One line for the shift report."""
        return (f"{self.level}: {self.direction} ground x{self.contrast_factor:.2g} at chainage "
                f"{self.chainage_m:.1f} m ({self.chainage_lo_m:.1f}-{self.chainage_hi_m:.1f}), "
                f"{self.distance_ahead_m:.1f} m ahead of the last face; seen in "
                f"{self.n_advances} advances, confidence {self.confidence:.2f}")


@dataclass
class AheadSummary:
    """What the detection found on a section.

    ``changes`` are ahead of the last face, strongest first; ``rejected`` travel with the
    machine; ``passed`` were found but the face has reached them.
    """

    changes: list[Change]
    rejected: list[Change]
    picks: list[Pick]
    last_face_chainage_m: float
    reach_m: float
    advances_used: list[int]
    advances_flagged: list[int]
    settings: AheadSettings = field(default_factory=AheadSettings)
    passed: list[Change] = field(default_factory=list)

    @property
    def level(self) -> str:
        """Highest level of concern of the changes (``"none seen"`` without any)."""
        if not self.changes:
            return LEVELS[0]
        return max((c.level for c in self.changes), key=LEVELS.index)

    def describe(self) -> list[str]:
        """Lines of text for the report."""
        lines = [f"level of concern: {self.level}"]
        if not self.changes:
            lines.append(f"no change seen within {self.reach_m:.1f} m ahead of the face at "
                         f"chainage {self.last_face_chainage_m:.1f} m (covered reach)")
        lines += [c.describe() for c in self.changes]
        for c in self.passed:
            lines.append(f"reached by the face: change at chainage {c.chainage_m:.1f} m "
                         f"({c.direction}, x{c.contrast_factor:.2g})")
        for r in self.rejected:
            lines.append(f"rejected (moves with the machine, slope {r.slope:.2f}): feature about "
                         f"{r.distance_ahead_m:.1f} m ahead, seen in {r.n_advances} advances")
        if self.advances_flagged:
            lines.append(f"advances left out for their data fit: {self.advances_flagged}")
        return lines


def axial_profile(ds: xr.Dataset, advance: int, radius_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Covered axial profile of one advance: (ahead_m, log10 resistivity) ahead of the face.

    The median over the covered cells within ``radius_m`` of the axis
    (:func:`tbminv.results.section.axis_median_log10`); the profile stops at the first ahead
    position with no covered cell.
    """
    ahead = ds["ahead"].values
    prof = axis_median_log10(ds, advance, radius_m)
    keep = ahead >= 0
    a, p = ahead[keep], prof[keep]
    bad = np.flatnonzero(~np.isfinite(p))
    if bad.size:
        a, p = a[: bad[0]], p[: bad[0]]
    return a, p


def _step_fit(a: np.ndarray, p: np.ndarray, n_min: int) -> tuple[int, float, float, float] | None:
    """Best two-level split: (index of first cell beyond, contrast, t ratio, level before)."""
    n = p.size
    if n < 2 * n_min:
        return None
    cs, cs2 = np.cumsum(p), np.cumsum(p * p)
    best = None
    for k in range(n_min, n - n_min + 1):
        n1, n2 = k, n - k
        s1, s2 = cs[k - 1], cs[-1] - cs[k - 1]
        q1, q2 = cs2[k - 1], cs2[-1] - cs2[k - 1]
        ss = (q1 - s1 * s1 / n1) + (q2 - s2 * s2 / n2)
        if best is None or ss < best[0]:
            best = (ss, k, s2 / n2 - s1 / n1, s1 / n1)
    ss, k, c, m1 = best
    sigma = math.sqrt(max(ss, 0.0) / max(n - 2, 1)) + 1e-6
    t = abs(c) / (sigma * math.sqrt(1.0 / k + 1.0 / (n - k)))
    return k, c, t, m1


def _picks(ds: xr.Dataset, advances: list[int], st: AheadSettings, radius_m: float,
           cell_m: float) -> list[Pick]:
    out: list[Pick] = []
    min_c = math.log10(st.min_contrast)
    for adv in advances:
        sub = ds.sel(advance=adv)
        face = float(sub["face_chainage_m"])
        ch = float(sub["contact_chainage_m"]) if "contact_chainage_m" in ds else math.nan
        p_none = float(sub["contact_p_none"]) if "contact_p_none" in ds else math.nan
        if math.isfinite(ch) and not (p_none > st.max_p_no_contact):
            around = float(sub["resistivity_around"]) if "resistivity_around" in ds else math.nan
            beyond = float(sub["resistivity_beyond"])
            if not (around > 0):  # no fitted value around the machine: the profile near the face
                a, p = axial_profile(ds, adv, radius_m)
                near = p[a <= max(3.0, 2 * cell_m)]
                around = float(10.0 ** np.median(near)) if near.size else math.nan
            c = (math.log10(beyond / around) if around > 0 and beyond > 0 else math.nan)
            if math.isfinite(c) and abs(c) < min_c:
                continue
            lo = face + float(sub["contact_ahead_lo_m"])
            hi = face + float(sub["contact_ahead_hi_m"])  # NaN: open beyond the fit's reach
            lo = lo if math.isfinite(lo) else ch - cell_m
            hi = hi if math.isfinite(hi) else ch + cell_m
            out.append(Pick(adv, face, ch, lo, hi, c, around, beyond, "contact fit", p_none))
            continue
        a, p = axial_profile(ds, adv, radius_m)
        fit = _step_fit(a, p, st.min_cells_each_side)
        if fit is None:
            continue
        k, c, t, m1 = fit
        if abs(c) < min_c or t < st.min_step_t:
            continue
        # locate the step at the mid-level crossing of the profile, between the two cells
        mid = m1 + c / 2.0
        cross = np.flatnonzero(np.sign(p[:-1] - mid) != np.sign(p[1:] - mid))
        if cross.size:
            j = cross[np.argmin(np.abs(cross - (k - 1)))]
            f = (mid - p[j]) / (p[j + 1] - p[j]) if p[j + 1] != p[j] else 0.5
            d = float(a[j] + f * (a[j + 1] - a[j]))
        else:
            d = float(0.5 * (a[k - 1] + a[k]))
        out.append(Pick(adv, face, face + d, face + d - cell_m, face + d + cell_m, c,
                        10.0**m1, 10.0 ** (m1 + c), "section profile", p_none))
    return out


def _groups(picks: list[Pick], tol: float) -> list[list[Pick]]:
    if not picks:
        return []
    ps = sorted(picks, key=lambda q: q.chainage_m)
    groups = [[ps[0]]]
    for q in ps[1:]:
        if q.chainage_m - groups[-1][-1].chainage_m <= tol:
            groups[-1].append(q)
        else:
            groups.append([q])
    return groups


def _slope(g: list[Pick]) -> tuple[float, float]:
    """Weighted slope of pick chainage against face chainage and its standard error.

    Weights 1 / sigma^2 of the picks; the standard error is scaled by the reduced chi-squared
    of the line where that exceeds 1 (scatter larger than the stated uncertainties).
    """
    f = np.array([q.face_chainage_m for q in g])
    c = np.array([q.chainage_m for q in g])
    if len(g) < 2 or np.ptp(f) <= 0:
        return math.nan, math.nan
    w = 1.0 / np.array([q.sigma_m for q in g]) ** 2
    fc = f - np.average(f, weights=w)
    sxx = float((w * fc * fc).sum())
    slope = float((w * fc * c).sum() / sxx)
    if len(g) < 3:
        return slope, math.nan
    resid = c - np.average(c, weights=w) - slope * fc
    chi2r = float((w * resid ** 2).sum()) / (len(g) - 2)
    return slope, math.sqrt(max(chi2r, 1.0) / sxx)


def detect_changes(ds: xr.Dataset, settings: AheadSettings | None = None) -> AheadSummary:
    """Find changes ahead of the face in a section (machine frame, from the store).

    Parameters
    ----------
    ds : xarray.Dataset
        Section from :func:`tbminv.results.section.build_section` or
        :func:`tbminv.results.store.open_section`.
    settings : AheadSettings, optional
        Thresholds.

    Returns
    -------
    AheadSummary
        Changes (strongest level first), rejected machine-locked features, the per-advance
        picks, the covered reach at the last clean advance and the advances left out.
    """
    st = settings or AheadSettings()
    diam = float(ds.attrs.get("machine_diameter_m", math.nan))
    radius_m = st.profile_radius_m or (diam / 2 if math.isfinite(diam) else 3.0)
    tol = st.chainage_tolerance_m or (diam / 2 if math.isfinite(diam) else 3.0)
    ahead = ds["ahead"].values
    cell = float(np.median(np.diff(ahead)))
    adv_all = [int(a) for a in ds["advance"].values]
    is_clean = clean_advances(ds)
    clean = [a for a, ok in zip(adv_all, is_clean) if ok]
    flagged = [a for a, ok in zip(adv_all, is_clean) if not ok]
    window = clean[-st.window_advances:]
    last_face = float(ds["face_chainage_m"].values[-1])
    reach = 0.0
    if clean:
        a, _ = axial_profile(ds, clean[-1], radius_m)
        reach = float(a[-1]) if a.size else 0.0
    picks = _picks(ds, window, st, radius_m, cell)
    changes: list[Change] = []
    rejected: list[Change] = []
    passed: list[Change] = []
    for g in _groups(picks, tol):
        slope, slope_se = _slope(g)
        ch = np.array([q.chainage_m for q in g])
        med = float(np.median(ch))
        lo = float(np.median([q.chainage_lo_m for q in g]))
        hi = float(np.median([q.chainage_hi_m for q in g]))
        if len(g) > 1:
            spread = float(np.std(ch))
            lo, hi = min(lo, med - spread), max(hi, med + spread)
        cvals = np.array([q.contrast_log10 for q in g if math.isfinite(q.contrast_log10)])
        contrast = float(np.median(cvals)) if cvals.size else math.nan
        around = float(np.median([q.resistivity_around_ohmm for q in g]))
        beyond = float(np.median([q.resistivity_beyond_ohmm for q in g]))
        reasons = [f"{len(g)} of {len(window)} recent clean advances"]
        if math.isfinite(slope):
            se = f" +/- {slope_se:.2f}" if math.isfinite(slope_se) else ""
            reasons.append(f"pick chainage moves {slope:+.2f}{se} m per m of advance "
                           "(weighted by the picks' uncertainties)")
        n = len(g)
        level = "watch"
        if math.isfinite(slope) and abs(slope) >= st.artefact_slope:
            kind = "rejected"
        else:
            kind = "change"
            stationary = math.isfinite(slope) and abs(slope) <= st.max_slope
            if stationary and n >= st.firm_advances and math.isfinite(contrast) and \
                    abs(contrast) >= math.log10(st.firm_contrast):
                level = "firm"
            elif stationary and n >= st.likely_advances:
                level = "likely"
            elif not stationary and n > 1:
                reasons.append("pick chainage drifts: kept at the lowest level")
        p_none = np.array([q.p_no_contact for q in g if math.isfinite(q.p_no_contact)])
        conf = (n / max(len(window), 1)) * (1.0 - (float(np.median(p_none)) if p_none.size
                                                   else 0.0))
        if math.isfinite(contrast):
            conf *= min(1.0, abs(contrast) / math.log10(st.firm_contrast))
        if not math.isfinite(contrast):
            direction = "unknown direction"
        else:
            direction = "more resistive" if contrast > 0 else "less resistive"
        c = Change(level=level, chainage_m=med, chainage_lo_m=lo, chainage_hi_m=hi,
                   distance_ahead_m=med - last_face,
                   direction=direction,
                   contrast_factor=float(10 ** abs(contrast)) if math.isfinite(contrast)
                   else math.nan,
                   resistivity_around_ohmm=around, resistivity_beyond_ohmm=beyond,
                   confidence=float(min(max(conf, 0.0), 1.0)), n_advances=n,
                   slope=slope, source=", ".join(sorted({q.source for q in g})),
                   advances=tuple(sorted(q.advance for q in g)), reasons=tuple(reasons))
        if kind == "change" and c.distance_ahead_m < 0:
            passed.append(c)  # the face has reached it: no longer ahead
            continue
        (rejected if kind == "rejected" else changes).append(c)
    changes.sort(key=lambda c: (-LEVELS.index(c.level), -c.confidence))
    if changes:
        _LOG.info("change ahead: %s", changes[0].describe())
    return AheadSummary(changes, rejected, picks, last_face, reach, clean, flagged, st, passed)


__all__ = ["LEVELS", "AheadSettings", "AheadSettingsError", "Pick", "Change", "AheadSummary",
           "axial_profile", "detect_changes"]
