"""Probe logs drawn on the section figures (matplotlib; used by the report).

Each probe is a line of stretches coloured by material (one colour per material, the same on
every figure: :func:`material_colours`), with its contacts as short bars across it. On the
moving section (world frame) a probe runs at its offset from the axis (on the axis when not
logged); on the ahead profile (machine frame, distance ahead of the face) the stretches are a
band along the top and the contacts vertical lines.
"""

from __future__ import annotations

import math

from matplotlib.axes import Axes
from matplotlib.lines import Line2D

from tbminv.readings.probes import ProbeLog

PROBE_COLOURS = ("#e41a1c", "#ff7f00", "#f781bf", "#a65628", "#17becf", "#984ea3", "#999999")


def material_colours(log: ProbeLog) -> dict[str, str]:
    """One colour per material of the log (case-insensitive names), in order of appearance."""
    out: dict[str, str] = {}
    for r in log.rows:
        key = r.material.casefold()
        if key not in out:
            out[key] = PROBE_COLOURS[len(out) % len(PROBE_COLOURS)]
    return out


def _legend(ax: Axes, log: ProbeLog, colours: dict[str, str], loc: str) -> None:
    names = {r.material.casefold(): r.material for r in log.rows}
    handles = [Line2D([], [], color=colours[k], lw=4, label=f"probed: {names[k]}")
               for k in colours]
    handles.append(Line2D([], [], color="k", marker="|", ms=12, lw=0, label="probed contact"))
    prev, labels = ax.get_legend_handles_labels()
    ax.legend(handles=prev + handles, labels=labels + [h.get_label() for h in handles], loc=loc,
              fontsize=7, framealpha=0.8)


def draw_probes_on_section(ax: Axes, log: ProbeLog) -> None:
    """Draw the probes on the moving section (x: chainage, m; y: height above the axis, m)."""
    colours = material_colours(log)
    height = {}
    for r in log.rows:
        y = 0.0
        if math.isfinite(r.offset_m):
            b = math.radians(r.bearing_deg) if math.isfinite(r.bearing_deg) else 0.0
            y = r.offset_m * math.cos(b)    # bearing 0 = up (crown)
        height[r.line] = y
        ax.plot([r.chainage_from_m, r.chainage_to_m], [y, y], color=colours[
            r.material.casefold()], lw=4, solid_capstyle="butt", zorder=5)
    for c in log.contacts():
        ax.plot([c.chainage_m], [height.get(c.line, 0.0)], marker="|", color="k", ms=14, mew=2,
                zorder=6)
    _legend(ax, log, colours, "upper left")


def draw_probes_on_profile(ax: Axes, log: ProbeLog, face_chainage_m: float) -> None:
    """Draw the probes on the ahead profile of the face at ``face_chainage_m`` (m)."""
    colours = material_colours(log)
    trans = ax.get_xaxis_transform()
    for r in log.rows:
        ax.plot([r.chainage_from_m - face_chainage_m, r.chainage_to_m - face_chainage_m],
                [0.97, 0.97], transform=trans, color=colours[r.material.casefold()], lw=6,
                solid_capstyle="butt", zorder=5, clip_on=True)
    for c in log.contacts():
        d = c.chainage_m - face_chainage_m
        ax.axvline(d, color="k", lw=1.2, ls="-.", zorder=4)
        ax.text(d, 0.92, f" {c.material_before} | {c.material_after} ({c.probe_id})",
                transform=trans, fontsize=7, ha="left", va="top", rotation=0, clip_on=True)
    _legend(ax, log, colours, "center left")


__all__ = ["PROBE_COLOURS", "material_colours", "draw_probes_on_section",
           "draw_probes_on_profile"]
