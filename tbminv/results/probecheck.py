"""Face probes against the section: the site material table and whether probes agree.

* **Site material table** (:func:`site_material_table`): for every probe row, its
  resistivity: the one measured (``resistivity_ohmm``) where given, else the section's,
  fitted: the median near the axis (:func:`tbminv.results.section.axis_median_log10`, covered
  cells within ``radius_m``) over the part of the stretch ahead of the face, at each clean
  advance that had some of it ahead. The table gives each probed material the range of its
  observed values (every row, every advance); it replaces the handbook ranges
  (:mod:`tbminv.materials`) for this site and says so in its ``source``. A range from few
  observations is narrow: it says what was seen here, not what the material can be.
* **Agreement** (:func:`check_probe_contacts`): each probed contact against the contact fit
  of the store (the latest clean advance drilled after the probe that fitted a contact) and
  the per-advance contradiction flag of the constrained fit (``probe_contradicts``).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import xarray as xr

from tbminv.materials import MaterialClass, MaterialTable
from tbminv.readings.probes import ProbeContact, ProbeLog, ProbeRow
from tbminv.results.ahead import AheadSummary
from tbminv.results.section import axis_median_log10, clean_advances


def _radius(ds: xr.Dataset, radius_m: float | None) -> float:
    if radius_m is not None:
        return radius_m
    diam = float(ds.attrs.get("machine_diameter_m", math.nan))
    return diam / 2.0 if math.isfinite(diam) else 3.0


def fitted_stretch_resistivity(ds: xr.Dataset, row: ProbeRow,
                               radius_m: float | None = None) -> list[float]:
    """The section's resistivity of a probed stretch, ohm-m: one value per clean advance.

    The median of the covered cells near the axis ahead of the face whose chainage lies in
    the stretch, at each clean advance whose face was behind the stretch's end; advances
    without such a cell give none.
    """
    r = _radius(ds, radius_m)
    ahead = ds["ahead"].values
    out = []
    for adv, ok in zip(ds["advance"].values, clean_advances(ds)):
        if not ok:
            continue
        face = float(ds["face_chainage_m"].sel(advance=adv))
        if face >= row.chainage_to_m:
            continue
        prof = axis_median_log10(ds, int(adv), r)
        sel = ((ahead >= 0) & (ahead + face >= row.chainage_from_m)
               & (ahead + face <= row.chainage_to_m))
        vals = prof[sel & np.isfinite(prof)]
        if vals.size:
            out.append(float(10.0 ** np.median(vals)))
    return out


def site_material_table(log: ProbeLog, ds: xr.Dataset | None = None, *,
                        radius_m: float | None = None) -> MaterialTable | None:
    """Material -> observed resistivity range at this site, from a probe log.

    Parameters
    ----------
    log : ProbeLog
    ds : xarray.Dataset, optional
        The section store; rows without a measured resistivity take the section's values.
    radius_m : float, optional
        Cells within this distance of the axis count (default: the machine radius).

    Returns
    -------
    MaterialTable or None
        None when no row has a resistivity (measured or fitted).
    """
    values: dict[str, list[float]] = {}
    names: dict[str, str] = {}
    counts = {"measured": 0, "fitted": 0}
    for row in log.rows:
        if math.isfinite(row.resistivity_ohmm):
            vals, how = [row.resistivity_ohmm], "measured"
        elif ds is not None:
            vals, how = fitted_stretch_resistivity(ds, row, radius_m), "fitted"
        else:
            continue
        if not vals:
            continue
        counts[how] += 1
        key = row.material.casefold()
        names.setdefault(key, row.material)
        values.setdefault(key, []).extend(vals)
    if not values:
        return None
    classes = tuple(MaterialClass(names[k], float(min(v)), float(max(v)), "site",
                                  f"{len(v)} observation(s) from the probe log")
                    for k, v in values.items())
    source = (f"site table from the probe log {log.source} ({counts['measured']} row(s) "
              f"measured, {counts['fitted']} row(s) from the section): it replaces the handbook "
              "ranges; it holds only the materials probed here")
    return MaterialTable(classes, source)


@dataclass(frozen=True)
class ProbeAgreement:
    """A probed contact against the readings.

    ``verdict`` is ``"agrees"`` (the contact fit's interval, widened by the probe's depth
    resolution, holds it), ``"contradicts"`` (flagged by the constrained fit, or the fit
    places its contact elsewhere), ``"not seen"`` (no contact fitted after the probe: none
    seen is not all clear) or ``"not yet checked"`` (no advance after the probe).
    """

    contact: ProbeContact
    verdict: str
    text: str
    advance: int | None = None


def check_probe_contacts(log: ProbeLog, ds: xr.Dataset) -> list[ProbeAgreement]:
    """Each probed contact against the contact fit of the store (see the module)."""
    out = []
    adv = ds["advance"].values
    clean = clean_advances(ds)
    times = ds["time"].values if "time" in ds else np.full(adv.size, np.datetime64("NaT"))
    flags = (ds["probe_contradicts"].values.astype(bool) if "probe_contradicts" in ds
             else np.zeros(adv.size, bool))
    for c in log.contacts():
        after = np.ones(adv.size, bool)
        if c.time is not None:
            t = np.datetime64(c.time.tz_localize(None), "ns")
            after = np.isnat(times) | (times >= t)
        where = f"{c.probe_id}: {c.material_before} -> {c.material_after} at chainage " \
                f"{c.chainage_m:.1f} m"
        if not (after & clean).any():
            out.append(ProbeAgreement(c, "not yet checked", f"{where}: no clean advance after "
                                      "the probe"))
            continue
        flagged = adv[after & flags]
        if flagged.size:
            out.append(ProbeAgreement(c, "contradicts", (
                f"{where}: CONTRADICTS the readings at {flagged.size} advance(s) "
                f"({', '.join(str(int(a)) for a in flagged[:8])}"
                f"{', ...' if flagged.size > 8 else ''}): the constraint was not applied; "
                "check the probe log and the readings"), int(flagged[-1])))
            continue
        ch = ds["contact_chainage_m"].values if "contact_chainage_m" in ds else None
        found = after & clean & (np.isfinite(ch) if ch is not None else False)
        if not found.any():
            out.append(ProbeAgreement(c, "not seen", f"{where}: the readings fitted no contact "
                                      "after the probe (none seen is not all clear)"))
            continue
        i = int(np.flatnonzero(found)[-1])
        face = float(ds["face_chainage_m"].values[i])
        lo = face + float(ds["contact_ahead_lo_m"].values[i])
        hi = face + float(ds["contact_ahead_hi_m"].values[i])
        hi = hi if math.isfinite(hi) else math.inf
        s = c.depth_resolution_m
        span = f"{lo:.1f}-{hi:.1f} m" if math.isfinite(hi) else f"{lo:.1f} m-beyond reach"
        if lo - s <= c.hi_m and c.lo_m <= hi + s:
            out.append(ProbeAgreement(c, "agrees", (
                f"{where}: agrees with the contact fit of advance {int(adv[i])} "
                f"(chainage {float(ch[i]):.1f} m, interval {span})"), int(adv[i])))
        else:
            out.append(ProbeAgreement(c, "contradicts", (
                f"{where}: the contact fit of advance {int(adv[i])} places a contact at "
                f"chainage {float(ch[i]):.1f} m (interval {span}), not here"), int(adv[i])))
    return out


def probe_materials_beyond(agreements: Sequence[ProbeAgreement], summary: AheadSummary,
                           tolerance_m: float = 0.0) -> list[str]:
    """Lines naming the probed material beyond each change ahead that a probe confirms.

    A change whose chainage interval, widened by the probe's depth resolution and
    ``tolerance_m``, holds an agreeing probed contact takes the probe's material beyond.
    """
    lines = []
    for ch in summary.changes:
        hi = ch.chainage_hi_m if math.isfinite(ch.chainage_hi_m) else math.inf
        for a in agreements:
            c = a.contact
            pad = c.depth_resolution_m + tolerance_m
            if a.verdict == "agrees" and ch.chainage_lo_m - pad <= c.hi_m and c.lo_m <= hi + pad:
                lines.append(f"beyond chainage {c.chainage_m:.1f} m ({ch.level}): "
                             f"{c.material_after}, as probed ({c.probe_id}); the readings "
                             f"confirm a change there ({ch.direction})")
                break
    return lines


__all__ = ["fitted_stretch_resistivity", "site_material_table", "ProbeAgreement",
           "check_probe_contacts", "probe_materials_beyond"]
