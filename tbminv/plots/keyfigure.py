"""The shift report's key figure: distance to the change against advance, and the section ahead.

Left panel: for every advance (x: face chainage, m), the contact fit's distance ahead of the
face with its interval (y, m; an interval open beyond the fit's reach drawn as an arrow), the
off-axis body's distance where the store has that analysis, the advances flagged for their
data fit hollow, and the chainage of the reported change as the line ``distance = chainage -
face`` (a real change keeps to it; an artefact keeps a fixed distance). An optional detection
limit is drawn as a dashed horizontal line. Right panel: the section ahead of the face at the
last advance (:func:`tbminv.plots.section.plot_section_ahead`).
"""

from __future__ import annotations

import math

import numpy as np
import xarray as xr
from matplotlib.axes import Axes
from matplotlib.colors import LogNorm
from matplotlib.figure import Figure

from tbminv.plots.section import plot_section_ahead
from tbminv.results.section import clean_advances


def _values(ds: xr.Dataset, name: str) -> np.ndarray:
    if name in ds and ds[name].dims == ("advance",):
        return ds[name].values.astype(float)
    return np.full(ds.sizes["advance"], np.nan)


def _intervals(ax, x: np.ndarray, d: np.ndarray, lo: np.ndarray, hi: np.ndarray,
               clean: np.ndarray, top: float, colour: str, marker: str, label: str) -> None:
    ok = np.isfinite(d)
    if not ok.any():
        return
    for xi, di, li, hi_, ci in zip(x[ok], d[ok], lo[ok], hi[ok], clean[ok]):
        li = li if np.isfinite(li) else di
        if np.isfinite(hi_):
            ax.plot([xi, xi], [li, hi_], color=colour, lw=1.4, alpha=0.8 if ci else 0.4)
        else:  # open beyond the fit's reach
            ax.annotate("", xy=(xi, top), xytext=(xi, li),
                        arrowprops={"arrowstyle": "->", "color": colour, "lw": 1.2,
                                    "alpha": 0.8 if ci else 0.4})
    face = np.where(clean[ok], colour, "white")
    ax.scatter(x[ok], d[ok], s=28, marker=marker, facecolors=face, edgecolors=colour,
               zorder=4, label=label)


def plot_key_figure(ds: xr.Dataset, advance: int | None = None, *,
                    change_chainage_m: float | None = None,
                    detection_limit_m: float | None = None, detection_label: str = "",
                    norm: LogNorm | None = None, size: tuple[float, float] = (11.0, 3.6),
                    axes: tuple[Axes, Axes] | None = None) -> Figure:
    """Distance to the change against advance, and the section ahead at ``advance``.

    Parameters
    ----------
    ds : xarray.Dataset
        Section up to and including the reported advance.
    advance : int, optional
        Advance of the right panel (default: the last).
    change_chainage_m : float, optional
        Chainage of the reported change, m (drawn as the line it keeps to).
    detection_limit_m : float, optional
        Distance ahead up to which a reference change is seen at this noise, m.
    detection_label : str
        Legend text of the detection limit.
    norm : LogNorm, optional
        Colour scale of the section.
    size : (float, float)
        Figure size, inches (a new figure only).
    axes : (Axes, Axes), optional
        Draw into these two axes (e.g. on a report page) instead of a new figure.

    Returns
    -------
    matplotlib.figure.Figure
        The figure drawn into.
    """
    if axes is None:
        fig = Figure(figsize=size, layout="constrained")
        left, right = fig.subplots(1, 2, width_ratios=(1.0, 1.35))
    else:
        left, right = axes
        fig = left.get_figure(root=True)
    adv = int(ds["advance"].values[-1]) if advance is None else int(advance)
    x = ds["face_chainage_m"].values.astype(float)
    clean = np.asarray(clean_advances(ds), bool)
    ahead_max = float(ds["ahead"].values.max())
    top = ahead_max
    _intervals(left, x, _values(ds, "contact_ahead_m"), _values(ds, "contact_ahead_lo_m"),
               _values(ds, "contact_ahead_hi_m"), clean, top, "C0", "o",
               "contact fit (95 % interval)")
    _intervals(left, x, _values(ds, "body_ahead_m"), _values(ds, "body_ahead_lo_m"),
               _values(ds, "body_ahead_hi_m"), clean, top, "C3", "D", "off-axis body")
    if change_chainage_m is not None and math.isfinite(change_chainage_m):
        xx = np.array([x.min(), x.max()])
        left.plot(xx, change_chainage_m - xx, color="0.3", ls=":", lw=1.2,
                  label=f"change at chainage {change_chainage_m:.1f} m")
    if detection_limit_m is not None and math.isfinite(detection_limit_m):
        label = detection_label or "detection limit"
        if detection_limit_m > top:
            label += f" ({detection_limit_m:.0f} m: above the plot)"
        left.axhline(min(detection_limit_m, top), color="0.4", ls="--", lw=1.0, label=label)
    if (~clean).any():
        left.scatter([], [], s=28, facecolors="white", edgecolors="0.3",
                     label="hollow: advance flagged (fit not clean)")
    left.set_xlabel("face chainage (m)")
    left.set_ylabel("distance ahead of the face (m)")
    left.set_ylim(0.0, top)
    pad = max(0.5, 0.05 * float(np.ptp(x)) if x.size > 1 else 1.0)
    left.set_xlim(float(x.min()) - pad, float(x.max()) + pad)
    left.set_title("distance to the change, per advance", fontsize=10)
    left.grid(True, lw=0.3, alpha=0.5)
    handles, _ = left.get_legend_handles_labels()
    if handles:
        left.legend(fontsize=7, loc="upper right", framealpha=0.85)
    else:
        left.text(0.5, 0.5, "no contact fitted in these advances", ha="center",
                  va="center", transform=left.transAxes, fontsize=9, color="0.3")
    plot_section_ahead(ds, adv, ax=right, norm=norm)
    right.title.set_fontsize(10)
    return fig


__all__ = ["plot_key_figure"]
