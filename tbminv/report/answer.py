"""Page 1 of the shift report as text: what was measured, the answer, how sure, what limits it.

:func:`page_one` turns a section, its change-ahead summary, the per-advance table and the
detection limit into the lines page 1 prints (:class:`PageOne`); the drawing is in
:mod:`tbminv.report.document`. Wording rules: a change is said with its chainage, distance
ahead and interval; the level of concern is the calibrated word of
:mod:`tbminv.results.ahead`; "none seen" always comes with the detection limit.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr

from tbminv.layout import layout_document
from tbminv.results.ahead import AheadSummary, Change
from tbminv.studies.detectionlimit import DetectionLimit


@dataclass
class PageOne:
    """The lines of page 1.

    Attributes
    ----------
    title : str
        Drive and shift.
    facts : list of str
        Drive, shift, advances, face chainage range, data quality.
    level : str
        Level of concern (``none seen``, ``watch``, ``likely``, ``firm``).
    headline : list of str
        What changes, where (chainage, distance ahead, interval), which side.
    how_sure : str
        The level in calibrated words.
    detection : str
        The detection limit at this shift's noise.
    narrow : str
        What would narrow the answer (decision support).
    change_chainage_m : float
        Chainage of the reported change (NaN: none).
    """

    title: str
    facts: list[str]
    level: str
    headline: list[str]
    how_sure: str
    detection: str
    narrow: str
    change_chainage_m: float = math.nan
    notes: list[str] = field(default_factory=list)


def drive_name(ds: xr.Dataset) -> str:
    """The layout's name from the store (empty if none)."""
    try:
        return str(layout_document(str(ds.attrs.get("layout_text", ""))).get("name", ""))
    except tomllib.TOMLDecodeError:
        return ""


def _f(v: float, fmt: str = ".1f") -> str:
    return format(v, fmt) if math.isfinite(v) else "open"


def _factor(v: float) -> str:
    return f"{v:.2g}" if v < 100 else f"{v:,.0f}"


def quality_line(table: pd.DataFrame, n_flagged_fit: int) -> str:
    """Readings valid and flagged over the shift, reciprocal error, fits flagged."""
    if table["qc_readings"].notna().any():
        n = int(np.nansum(table["qc_readings"]))
        v = int(np.nansum(table["qc_valid"]))
        f = int(np.nansum(table["qc_flagged"]))
        reasons: dict[str, int] = {}
        for text in table["qc_flagged_by_reason"]:
            for part in filter(None, str(text).split("; ")):
                name, count = part.rsplit(" ", 1)
                reasons[name] = reasons.get(name, 0) + int(count)
        why = ", ".join(f"{k} {v_}" for k, v_ in sorted(reasons.items(), key=lambda kv: -kv[1]))
        med = float(np.nanmedian(table["reciprocal_error_median"]))
        s = f"data quality: {v} of {n} readings valid, {f} flagged"
        s += f" ({why})" if why else ""
        if math.isfinite(med):
            s += f"; reciprocal error median {100 * med:.1f} % over the advances"
    else:
        s = "data quality: readings QC not stored in this store (written by an older version)"
    s += (f"; {n_flagged_fit} advance(s) flagged for their data fit" if n_flagged_fit
          else "; every advance's data fit clean")
    return s


def _body_lines(ds: xr.Dataset) -> tuple[list[str], tuple[float, float] | None]:
    """What the off-axis body analysis says at the last advance, and its chainage range."""
    if "body_ahead_m" not in ds:
        return ["off-axis body: bearing not analysed (this store has no body analysis)"], None
    last = ds.isel(advance=-1)

    def g(name: str) -> float:
        return float(last[name]) if name in ds else math.nan

    d = g("body_ahead_m")
    if not math.isfinite(d):
        return ["off-axis body: none found at the last advance"], None
    face = float(last["face_chainage_m"])
    lo, hi = g("body_ahead_lo_m"), g("body_ahead_hi_m")
    b, blo, bhi = g("body_bearing_deg"), g("body_bearing_lo_deg"), g("body_bearing_hi_deg")
    off = g("body_offset_m")
    line = (f"off-axis body {d:.1f} m ahead (interval {_f(lo)} to {_f(hi)} m), chainage "
            f"{face + d:.1f} m")
    if math.isfinite(b):
        line += (f"; {side_words(b)}, bearing {b:.0f}° clockwise from the crown looking ahead "
                 f"(interval {_f(blo, '.0f')} to {_f(bhi, '.0f')}°)")
    else:
        line += "; bearing not analysed"
    if math.isfinite(off):
        line += f"; {off:.1f} m from the tunnel axis"
    p = g("body_p_none")
    if math.isfinite(p):
        line += f"; false-alarm rate {p:.2g}"
    rng = (face + (lo if math.isfinite(lo) else d), face + (hi if math.isfinite(hi) else d))
    return [line], rng


def side_words(bearing_deg: float) -> str:
    """A bearing clockwise from the crown, looking ahead, in words (e.g. ``right side``)."""
    b = bearing_deg % 360.0
    names = ("above (crown)", "upper right", "right side", "lower right", "below (invert)",
             "lower left", "left side", "upper left")
    return names[int(((b + 22.5) % 360.0) // 45.0)]


def _change_line(c: Change) -> str:
    what = f"{c.direction} ground"
    if math.isfinite(c.contrast_factor) and not (c.at_bound or c.contrast_open):
        what += f" by a factor of {_factor(c.contrast_factor)}"
        if math.isfinite(c.contrast_lo) and math.isfinite(c.contrast_hi):
            lo, hi = sorted((c.contrast_lo, c.contrast_hi))
            if c.direction == "less resistive":
                lo, hi = 1.0 / hi, 1.0 / lo
            what += f" (interval {_factor(lo)} to {_factor(hi)})"
    elif c.at_bound or c.contrast_open:
        what += " (contrast at the fit's bound: a limit, not a value)"
    d_lo = c.chainage_lo_m - (c.chainage_m - c.distance_ahead_m)
    d_hi = c.chainage_hi_m - (c.chainage_m - c.distance_ahead_m)
    kind = "a contact across the tunnel" if "contact fit" in c.source else "a step in the image"
    return (f"{what}, {kind}, at chainage {c.chainage_m:.1f} m (interval "
            f"{c.chainage_lo_m:.1f} to {_f(c.chainage_hi_m)} m): {c.distance_ahead_m:.1f} m "
            f"ahead of the last face (interval {d_lo:.1f} to {_f(d_hi)} m)")


def _how_sure(level: str, c: Change | None, summary: AheadSummary) -> str:
    st = summary.settings
    if c is None:
        return ("how sure: nothing seen is a statement about what these readings can see, not "
                "about the ground; see the detection limit below")
    if not math.isfinite(c.p_false_alarm):
        p = "no calibrated statistic"
    elif c.p_false_alarm < 1e-4:
        p = "false-alarm rate below 1e-4"
    else:
        p = f"false-alarm rate {c.p_false_alarm:.2g}"
    meaning = {
        "watch": "seen, not yet supported by a calibrated statistic",
        "likely": f"calibrated: false-alarm rate at most {st.likely_p_false_alarm:g}, "
                  "position steady as the face advances",
        "firm": f"calibrated: false-alarm rate at most {st.firm_p_false_alarm:g}, one "
                "distance range, contrast interval closed",
    }.get(level, "")
    return (f"how sure: '{level}' ({meaning}); {p}, seen in {c.n_advances} advance(s). The "
            "false-alarm rate is the share of simulated drives without any change that score "
            "as high, not the probability that the change is real")


def detection_line(limit: DetectionLimit | None, why_not: str = "") -> str:
    """The detection limit at this shift's noise, in one sentence."""
    if limit is None:
        return f"detection limit: not computed ({why_not or 'no layout protocol'})"

    def dist(d: float, at_end: bool) -> str:
        if d <= 0:
            return "not at any distance studied"
        return f"from {d:.1f} m ahead" + (" (the study's last distance)" if at_end else "")

    return (f"detection limit at this shift's noise (median error {100 * limit.noise_rel:.1f} "
            f"% per reading), at best: a 1:{limit.contact_contrast:g} contact across the "
            f"tunnel is seen {dist(limit.contact_reach_m, limit.contact_at_grid_end)}, a "
            f"{limit.body_diameter_m:g} m body of x{limit.body_contrast:g} on the axis "
            f"{dist(limit.body_reach_m, limit.body_at_grid_end)}; smaller, farther or off-axis "
            "changes can be missed. These are upper bounds, not assurances: the readings are "
            "taken as independent with a 50 % chance of detection, and errors shared by the "
            "readings of an advance, such as the surface correction's, shorten them")


def narrow_line(c: Change | None, n_candidates: int, body: tuple[float, float] | None,
                face_m: float) -> str:
    """What would narrow the answer, said as decision support."""
    pre = "what would narrow this (decision support, under the cautions): "
    if c is None and body is None:
        return (pre + "the next shifts' readings extend the covered reach; probing ahead as "
                "the site's procedures require is not replaced by this report")
    if c is not None:
        lo = max(c.chainage_lo_m, face_m)
        where = (f"between chainages {lo:.1f} and {c.chainage_hi_m:.1f} m"
                 if math.isfinite(c.chainage_hi_m)
                 else f"from chainage {lo:.1f} m on (the interval is open ahead)")
        what = (f"probing ahead {where} would settle where the change is and, with a sample, "
                "what it is")
        if n_candidates > 1:
            what += (f" (resistivity alone leaves {n_candidates} candidate materials, page "
                     "'Candidate materials')")
        if body is not None:
            what += (f"; for the off-axis body, a probe towards its side between chainages "
                     f"{body[0]:.1f} and {body[1]:.1f} m")
        return pre + what
    assert body is not None
    return (pre + f"a probe towards the off-axis body's side between chainages {body[0]:.1f} "
            f"and {body[1]:.1f} m would settle it")


def page_one(ds: xr.Dataset, shift: str, summary: AheadSummary, table: pd.DataFrame,
             limit: DetectionLimit | None, *, n_candidates: int = 0,
             limit_note: str = "") -> PageOne:
    """The lines of page 1 for the advances of one shift.

    Parameters
    ----------
    ds : xarray.Dataset
        The shift's advances.
    shift : str
        Shift label.
    summary : AheadSummary
        Change ahead up to the shift's last advance.
    table : pandas.DataFrame
        :func:`tbminv.report.tables.advance_table` of the shift.
    limit : DetectionLimit or None
        Detection limit at the shift's noise (None: not computed, ``limit_note`` says why).
    n_candidates : int
        Candidate materials beyond the reported change.
    limit_note : str
        Why the detection limit is missing.

    Returns
    -------
    PageOne
    """
    faces = ds["face_chainage_m"].values
    advs = ds["advance"].values
    name = drive_name(ds)
    flagged_fit = int((table["fit_flag"].fillna(0).to_numpy() != 0).sum())
    facts = [f"drive: {name or 'not named in the layout'}",
             f"shift {shift}: advances {int(advs[0])}-{int(advs[-1])} ({advs.size}), face "
             f"chainage {faces[0]:.1f} to {faces[-1]:.1f} m",
             quality_line(table, flagged_fit)]
    c = summary.changes[0] if summary.changes else None
    level = summary.level
    body_lines, body_rng = _body_lines(ds)
    if c is None:
        headline = [f"no change seen within {summary.reach_m:.1f} m ahead of the face at "
                    f"chainage {summary.last_face_chainage_m:.1f} m (covered reach). None seen "
                    "is not all clear."]
    else:
        headline = [_change_line(c)]
        headline += [f"also: {o.level}: {_change_line(o)}" for o in summary.changes[1:3]]
    headline += body_lines
    return PageOne(
        title=f"Shift report: {name + ', ' if name else ''}shift {shift}",
        facts=facts, level=level, headline=headline, how_sure=_how_sure(level, c, summary),
        detection=detection_line(limit, limit_note),
        narrow=narrow_line(c, n_candidates, body_rng, float(faces[-1])),
        change_chainage_m=c.chainage_m if c is not None else math.nan)


__all__ = ["PageOne", "page_one", "drive_name", "side_words", "quality_line",
           "detection_line", "narrow_line"]
