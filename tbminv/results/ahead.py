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

Levels of concern (our own words, thresholds in :class:`AheadSettings`) come from the
calibrated statistic of the latest clean advance's contact fit, which already combines the
evidence of its window of advances (picks of overlapping windows are not independent and are
not counted as evidence):

``"none seen"``
    no change within the covered reach (not "all clear": the tool is an interpretation aid);
``"watch"``
    a change seen, but not (or not yet) supported by a calibrated statistic: a section-profile
    step, an older pick, a drifting group, or a contact fit at a bound of its parameters;
``"likely"``
    the group holds the latest contact fit, whose calibrated false-alarm probability
    (``contact_p_none``, measured on simulated homogeneous drives) is at most
    ``likely_p_false_alarm``, not at a bound, stationary (slope at most ``max_slope`` or
    within two standard errors of 0), seen in at least ``likely_advances`` advances;
``"firm"``
    as "likely" with a false-alarm probability at most ``firm_p_false_alarm``, a single
    distance range (not ambiguous), a closed contrast interval (not reaching a table end) that
    excludes 1, a contrast of at least ``firm_contrast`` and at least ``firm_advances``
    advances.

``Change.p_false_alarm`` is that calibrated probability (NaN where the group has no calibrated
fit); it is a p-value of "no contact", not the probability that the change is real.
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
        Least number of clean advances with a pick in the group for "likely" (2) and "firm"
        (3), on top of the calibrated statistic.
    firm_contrast : float
        Resistivity ratio needed for "firm" (default 3).
    max_p_no_contact : float
        Contact fits whose calibrated false-alarm probability is above this give no pick
        (default 0.2).
    likely_p_false_alarm, firm_p_false_alarm : float
        Largest calibrated false-alarm probability of the latest contact fit for "likely"
        (0.01) and "firm" (0.002): below the goals of at most 2 % false 'likely' and 0.5 %
        false 'firm' per report on homogeneous drives, with a margin for the calibration's
        own sampling error.
    """

    profile_radius_m: float | None = None
    min_contrast: float = 2.0
    min_step_t: float = 6.0
    min_cells_each_side: int = 3
    chainage_tolerance_m: float | None = None
    max_slope: float = 0.35
    artefact_slope: float = 0.65
    window_advances: int = 10
    likely_advances: int = 2
    firm_advances: int = 3
    firm_contrast: float = 3.0
    max_p_no_contact: float = 0.2
    likely_p_false_alarm: float = 0.01
    firm_p_false_alarm: float = 0.002

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
    calibrated: bool = False
    at_bound: bool = False
    ambiguous: bool = False
    contrast_lo: float = math.nan
    contrast_hi: float = math.nan
    parts_m: tuple[tuple[float, float], ...] = ()
    contrast_open: bool = False

    @property
    def sigma_m(self) -> float:
        """Standard uncertainty of the pick chainage from its interval, m.

        The interval is read as a 95 % one (half-width / 1.96); an interval open on one side
        (``chainage_hi_m`` infinite: beyond the fit's reach) gives the distance ahead of the
        face as the uncertainty.
        """
        lo, hi = self.chainage_lo_m, self.chainage_hi_m
        if math.isfinite(lo) and math.isfinite(hi) and hi > lo:
            return (hi - lo) / (2.0 * 1.959964)
        return max(abs(self.ahead_m), 1e-3)


    @property
    def ahead_m(self) -> float:
        """Distance of the pick ahead of the face at its advance, m."""
        return self.chainage_m - self.face_chainage_m


def _factor(v: float) -> str:
    """A contrast factor for reading: two significant digits, whole numbers from 100."""
    return f"{v:.2g}" if v < 100 else f"{v:,.0f}"


def _factor_text(direction: str, lo: float, hi: float, at_bound: bool) -> str:
    """Contrast interval as the factor of the change, e.g. ``by a factor of 3.1-15``.

    ``direction`` says which way the resistivity changes; the factor is always >= 1.
    """
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return ""
    f_lo, f_hi = (lo, hi) if direction == "more resistive" else (1.0 / hi, 1.0 / lo)
    if lo <= 1.0 <= hi:
        return "contrast interval includes 1 (no change)"
    if at_bound:
        return f"by a factor of {_factor(min(f_lo, f_hi))} or more (the fit's bound)"
    return f"by a factor of {_factor(f_lo)}-{_factor(f_hi)}"


@dataclass(frozen=True)
class Change:
    """A change ahead, combined over advances.

    Distances refer to the face of the last advance of the section. ``p_false_alarm`` is the
    calibrated false-alarm probability of the latest contact fit of the group (NaN: none);
    ``contrast_lo``/``contrast_hi`` its contrast interval (beyond / around); ``parts`` the
    chainage ranges ``(lo, hi)`` of an ambiguous distance answer.
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
    p_false_alarm: float
    n_advances: int
    slope: float
    source: str
    advances: tuple[int, ...]
    reasons: tuple[str, ...] = ()
    at_bound: bool = False
    ambiguous: bool = False
    contrast_lo: float = math.nan
    contrast_hi: float = math.nan
    parts: tuple[tuple[float, float], ...] = ()
    contrast_open: bool = False

    def describe(self) -> str:
        """One line for the shift report."""
        hi = (f"{self.chainage_hi_m:.1f}" if math.isfinite(self.chainage_hi_m)
              else "beyond reach")
        if self.at_bound or self.contrast_open:
            factor = _factor_text(self.direction, self.contrast_lo, self.contrast_hi, True) \
                or "contrast at the fit's bound"
            what = f"{self.direction} ground, {factor}"
        else:
            what = f"{self.direction} ground by a factor of {_factor(self.contrast_factor)}"
            rng = _factor_text(self.direction, self.contrast_lo, self.contrast_hi, False)
            if rng:
                what += (f" (interval {rng.removeprefix('by a factor of ')})"
                         if rng.startswith("by a factor") else f" ({rng})")
        line = (f"{self.level}: {what} at chainage {self.chainage_m:.1f} m "
                f"({self.chainage_lo_m:.1f}-{hi}), {self.distance_ahead_m:.1f} m ahead of the "
                f"last face; seen in {self.n_advances} advances")
        if math.isfinite(self.p_false_alarm):
            rate = (f"{self.p_false_alarm:.2g}" if self.p_false_alarm >= 1e-4
                    else "below 1e-4")
            line += (f"; false-alarm rate {rate} (share of simulated drives without a "
                     "contact that score as high)")
        else:
            line += "; no calibrated statistic"
        if self.ambiguous and self.parts:
            line += "; the data allow several distances: chainage " + ", ".join(
                f"{a:.1f}-{b:.1f} m" if math.isfinite(b) else f"{a:.1f} m-beyond reach"
                for a, b in self.parts)
        if self.at_bound:
            line += "; result at a bound of the fit: kept at the lowest level"
        return line


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
                         f"chainage {self.last_face_chainage_m:.1f} m (covered reach); none "
                         "seen is not all clear")
        lines += [c.describe() for c in self.changes]
        for c in self.passed:
            lines.append(f"reached by the face: change at chainage {c.chainage_m:.1f} m "
                         f"({c.direction}, x{c.contrast_factor:.2g})")
        for r in self.rejected:
            lines.append(f"rejected (moves with the machine, slope {r.slope:.2f}): feature about "
                         f"{r.distance_ahead_m:.1f} m ahead, seen in {r.n_advances} advances")
        if self.advances_flagged:
            lines.append("advances left out for their data fit: "
                         + ", ".join(str(a) for a in self.advances_flagged))
        if any(c.source == "contact fit" or "contact fit" in c.source for c in self.changes):
            lines.append("levels: 'likely' and 'firm' need the latest contact fit's "
                         "false-alarm rate (measured on simulated drives without a "
                         "contact) at or below "
                         f"{self.settings.likely_p_false_alarm:g} and "
                         f"{self.settings.firm_p_false_alarm:g}; a fit at a bound of its "
                         "parameters stays at 'watch'; a one-sided contrast is never 'firm'")
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
            def val(name: str, default: float = math.nan, sub: xr.Dataset = sub) -> float:
                return float(sub[name]) if name in ds else default

            around = val("resistivity_around")     # the joint fit's shared value
            beyond = val("resistivity_beyond")
            if not (around > 0):  # no fitted value around the machine: the profile near the face
                a, p = axial_profile(ds, adv, radius_m)
                near = p[a <= max(3.0, 2 * cell_m)]
                around = float(10.0 ** np.median(near)) if near.size else math.nan
            ratio = val("contact_contrast")
            if not (ratio > 0) and around > 0 and beyond > 0:
                ratio = beyond / around
            c = math.log10(ratio) if ratio > 0 else math.nan
            if math.isfinite(c) and abs(c) < min_c:
                continue
            lo = face + float(sub["contact_ahead_lo_m"])
            hi = face + float(sub["contact_ahead_hi_m"])  # NaN: open beyond the fit's reach
            lo = lo if math.isfinite(lo) else ch - cell_m
            hi = hi if math.isfinite(hi) else math.inf
            parts: tuple[tuple[float, float], ...] = ()
            if "contact_part_lo_m" in ds:
                plo = np.atleast_1d(sub["contact_part_lo_m"].values)
                phi = np.atleast_1d(sub["contact_part_hi_m"].values)
                parts = tuple((face + float(x), face + float(y))
                              for x, y in zip(plo, phi) if math.isfinite(x))
            out.append(Pick(adv, face, ch, lo, hi, c, around, beyond, "contact fit", p_none,
                            calibrated=math.isfinite(val("contact_lr_statistic")),
                            at_bound=bool(val("contact_at_bound", 0.0)),
                            ambiguous=bool(val("contact_ambiguous", 0.0)),
                            contrast_lo=val("contact_contrast_lo"),
                            contrast_hi=val("contact_contrast_hi"), parts_m=parts,
                            contrast_open=bool(val("contact_contrast_open", 0.0))))
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
    # the latest clean advance with a contact fit carries the evidence of its whole window
    latest = None
    if window and "contact_p_none" in ds:
        fitted = [a for a in window if math.isfinite(float(ds["contact_p_none"].sel(advance=a)))]
        latest = fitted[-1] if fitted else None
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
        cur = next((q for q in g if q.advance == latest and q.source == "contact fit"), None)
        level = "watch"
        p_fa = math.nan
        at_bound = ambiguous = False
        c_lo = c_hi = math.nan
        c_open = False
        parts: tuple[tuple[float, float], ...] = ()
        if cur is not None:
            p_fa = cur.p_no_contact if cur.calibrated else math.nan
            at_bound, ambiguous = cur.at_bound, cur.ambiguous
            c_lo, c_hi, parts = cur.contrast_lo, cur.contrast_hi, cur.parts_m
            c_open = cur.contrast_open
            med, lo, hi = cur.chainage_m, cur.chainage_lo_m, cur.chainage_hi_m
            if math.isfinite(cur.contrast_log10):
                contrast = cur.contrast_log10
            around, beyond = cur.resistivity_around_ohmm, cur.resistivity_beyond_ohmm
        if math.isfinite(slope) and abs(slope) >= st.artefact_slope:
            kind = "rejected"
        else:
            kind = "change"
            # stationary: slope small, or not told apart from 0 (two standard errors); the
            # latest fit itself already holds one chainage over its window
            stationary = (not math.isfinite(slope) or abs(slope) <= st.max_slope
                          or (math.isfinite(slope_se) and abs(slope) <= 2.0 * slope_se))
            excludes_one = not (c_lo <= 1.0 <= c_hi)      # NaN bounds: not known, no veto
            if cur is None:
                reasons.append("not supported by the latest contact fit: kept at 'watch'")
            elif not math.isfinite(p_fa):
                reasons.append("no calibrated statistic: kept at 'watch'")
            elif at_bound:
                reasons.append("result at a bound of the fit (contrast at a table end or "
                               "distance at the grid's end): kept at the lowest level")
            elif not stationary:
                reasons.append("pick chainage drifts: kept at the lowest level")
            elif (p_fa <= st.firm_p_false_alarm and n >= st.firm_advances and not ambiguous
                  and not c_open and excludes_one and math.isfinite(contrast)
                  and abs(contrast) >= math.log10(st.firm_contrast)):
                level = "firm"
            elif p_fa <= st.likely_p_false_alarm and n >= st.likely_advances:
                level = "likely"
            elif p_fa > st.likely_p_false_alarm:
                reasons.append(f"false-alarm rate {p_fa:.2g} above "
                               f"{st.likely_p_false_alarm:g}: kept at 'watch'")
            else:
                reasons.append(f"seen in fewer than {st.likely_advances} advances: kept at "
                               "'watch'")
            if ambiguous:
                reasons.append(f"{len(parts)} separate distance ranges fit the data")
            if c_open:
                reasons.append("contrast interval open at the fit's bound: not 'firm'")
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
                   p_false_alarm=p_fa, n_advances=n,
                   slope=slope, source=", ".join(sorted({q.source for q in g})),
                   advances=tuple(sorted(q.advance for q in g)), reasons=tuple(reasons),
                   at_bound=at_bound, ambiguous=ambiguous, contrast_lo=c_lo, contrast_hi=c_hi,
                   parts=parts, contrast_open=c_open)
        if kind == "change" and c.distance_ahead_m < 0:
            passed.append(c)  # the face has reached it: no longer ahead
            continue
        (rejected if kind == "rejected" else changes).append(c)
    changes.sort(key=lambda c: (-LEVELS.index(c.level),
                                c.p_false_alarm if math.isfinite(c.p_false_alarm) else 2.0,
                                -c.n_advances))
    if changes:
        _LOG.info("change ahead: %s", changes[0].describe())
    return AheadSummary(changes, rejected, picks, last_face, reach, clean, flagged, st, passed)


__all__ = ["LEVELS", "AheadSettings", "AheadSettingsError", "Pick", "Change", "AheadSummary",
           "axial_profile", "detect_changes"]
