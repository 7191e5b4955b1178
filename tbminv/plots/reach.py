"""Figures of a reach study: response vs distance and reach over swept parameters."""

from __future__ import annotations

from typing import Any

import matplotlib.pyplot as plt
import numpy as np
import xarray as xr
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from tbminv.studies.reach import best_measurements

_STYLES = ("-", (0, (5, 2)), (0, (2, 1.5)), "-.", (0, (6, 1, 1, 1)), (0, (1, 1)))


def _plain_log_axis(axis: Any) -> None:
    """Tick labels as plain numbers on a log axis (no 10^x, no overlapping minor labels)."""
    axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())


def _pick(ds: xr.Dataset, n_best: int) -> list[dict[str, Any]]:
    """The best quadrupole of each kind of reading, best kinds first, at most ``n_best``."""
    fam = ds["family"].values if "family" in ds else np.full(ds.sizes["measurement"], "")
    seen: set[str] = set()
    out = []
    for b in best_measurements(ds, ds.sizes["measurement"]):
        f = str(fam[b["measurement"]])
        if f in seen:
            continue
        seen.add(f)
        out.append({**b, "family": f})
        if len(out) == n_best:
            break
    return out


def _reach_text(value: float, at_end: bool, diam: float) -> str:
    bound = "≥ " if at_end else ""
    return f"{bound}{value:.1f} m = {bound}{value / diam:.1f} D"


def _mark_reaches(ax: Any, ds: xr.Dataset, d: np.ndarray, *, label: bool) -> None:
    """Vertical lines at both reaches: solid for ``reach_m``, dashed for the per-reading one."""
    diam = float(ds.attrs.get("diameter_m", 1.0))
    lines = [("reach_m", "reach_at_grid_end", "k", "-",
              "reach_m (whole reading set, resistivity around unknown)"),
             ("reach_per_reading_m", "reach_per_reading_at_grid_end", "#7a4b9c", "--",
              "reach_per_reading_m (best single reading, resistivity around known)")]
    for var, end_var, colour, ls, name in lines:
        if var not in ds:
            continue
        value = float(ds[var])
        at_end = bool(ds[end_var]) if end_var in ds else False
        if value <= 0:
            if label:
                ax.plot([], [], color=colour, lw=1.2, ls=ls, label=f"{name}: not seen")
            continue
        ax.axvline(value, color=colour, lw=1.2, ls=ls, zorder=5,
                   label=f"{name}: {_reach_text(value, at_end, diam)}" if label else None)


def plot_response_vs_distance(ds: xr.Dataset, n_best: int = 6) -> Figure:
    """Both reaches of a layout: single readings (top) and the whole reading set (bottom).

    Top: |ΔR/R| of every quadrupole vs distance of the target, with each reading's noise
    threshold (the resistivity around the machine taken as known). Bottom: the noncentrality of
    the whole reading set with the resistivity around the machine fitted (and, faint, with it
    known) against the threshold of the detection criterion. Both panels mark ``reach_m``
    (solid) and ``reach_per_reading_m`` (dashed).

    Parameters
    ----------
    ds : xarray.Dataset
        Output of :func:`tbminv.studies.reach.reach_study`.
    n_best : int
        Kinds of reading drawn in colour (the best quadrupole of each; the others in light
        grey).
    """
    d = ds["distance_ahead"].values
    diam = float(ds.attrs.get("diameter_m", 1.0))
    rel = np.abs(ds["relative_response"].values)
    err = ds["relative_error"].values
    k = float(ds.attrs.get("k", 3.0))
    fig, (ax, ax2) = plt.subplots(2, 1, figsize=(8.0, 8.6), sharex=True,
                                  height_ratios=(1.35, 1.0), constrained_layout=True)
    for row in rel:
        ax.plot(d, row, color="0.8", lw=0.6, zorder=1)
    ax.plot([], [], color="0.8", lw=0.6, label="other quadrupoles")
    best = _pick(ds, n_best)
    colours = plt.get_cmap("tab10").colors
    for i, b in enumerate(best):
        j = b["measurement"]
        quad = f"{b['a']}-{b['b'] or '∞'} / {b['m']}-{b['n'] or '∞'}"
        lab = f"{quad}: {b['family']}" if b["family"] else quad
        det = b["detectable_ahead_m"]
        # coinciding curves stay visible: wide solid first, then narrower dashed ones on top
        ax.plot(d, rel[j], color=colours[i % 10], lw=max(1.2, 4.0 - 0.55 * i),
                ls=_STYLES[i % len(_STYLES)], zorder=3 + i,
                label=f"{lab} (alone: to {det:.1f} m)")
        if det > 0 and np.isfinite(err[j]):
            ax.plot([det], [k * err[j]], "o", color=colours[i % 10], ms=5, zorder=4)
    usable = ds["usable"].values
    floor = k * (float(np.min(err[usable])) if usable.any() else 1.0)
    ax.axhspan(1e-12, floor, color="#e3c9bd", alpha=0.55, zorder=0,
               label=f"below {k:g} σ of the best quadrupole")
    _mark_reaches(ax, ds, d, label=False)
    ax.set_yscale("log")
    top = np.nanmax(rel) if np.isfinite(rel).any() else 1.0
    ax.set_ylim(max(1e-4, floor / 30), max(top * 1.6, floor * 3))
    ax.set_ylabel("|ΔR / R|  (relative change of transfer resistance)")
    ax.set_title("single readings, resistivity around the machine known "
                 f"(seen where |ΔR/R| ≥ {k:g} σ; dots: each reading's crossing)", fontsize=9)
    ax.legend(fontsize=7, loc="lower left", framealpha=0.9,
              title="best quadrupole of each kind of reading (curves may coincide)",
              title_fontsize=7)

    if "noncentrality" in ds:
        lam = ds["noncentrality"].values
        thr = float(ds["detection_threshold"])
        if "noncentrality_known_resistivity" in ds:
            ax2.plot(d, ds["noncentrality_known_resistivity"].values, color="0.6", lw=1.0,
                     ls=(0, (4, 2)), label="whole set, resistivity around known (for comparison)")
        ax2.plot(d, lam, color="#1f5f8b", lw=2.2,
                 label="whole set, resistivity around fitted (profiled likelihood ratio)")
        alpha = ds.attrs.get("false_alarm")
        beta = ds.attrs.get("detection_probability")
        crit = (f"threshold λ* = {thr:.3g} (false alarm {100 * alpha:.2g} %, detection "
                f"probability {100 * beta:.0f} %)" if alpha is not None and beta is not None
                else f"threshold λ* = {thr:.3g}")
        ax2.axhline(thr, color="#b5523b", lw=1.0, label=crit)
        pos = lam[np.isfinite(lam) & (lam > 0)]
        lo = min(thr / 30, float(pos.min()) if pos.size else thr / 30)
        hi = max(thr * 10, float(pos.max()) * 1.6 if pos.size else thr * 10)
        ax2.set_yscale("log")
        ax2.set_ylim(max(lo, thr * 1e-4), hi)
    _mark_reaches(ax2, ds, d, label=True)
    reach = float(ds["reach_m"])
    at_end = bool(ds["reach_at_grid_end"]) if "reach_at_grid_end" in ds else False
    if reach > 0 and not at_end:
        ax2.axvspan(reach, d.max() * 1.05, facecolor="none", edgecolor="0.7", hatch="///",
                    lw=0, zorder=0, label="beyond the reach: a contact can be there unseen")
    ax2.set_ylabel("noncentrality λ (expected χ² of 'no contact')")
    ax2.set_title("whole reading set: can 'contact at d' be told from 'no contact'?", fontsize=9)
    ax2.legend(fontsize=7, loc="lower left", framealpha=0.9)
    for a_ in (ax, ax2):
        a_.set_xscale("log")
        a_.set_xlim(d.min(), d.max())
        _plain_log_axis(a_.xaxis)
        _plain_log_axis(a_.yaxis)
        a_.grid(True, which="both", lw=0.3, color="0.9")
    ax2.set_xlabel("distance of the target ahead of the cutterhead face (m)")
    sec = ax.secondary_xaxis("top", functions=(lambda x: x / diam, lambda x: x * diam))
    sec.set_xlabel(f"distance ahead (machine diameters, D = {diam:g} m)")
    _plain_log_axis(sec.xaxis)
    noise = f"{100 * ds.attrs.get('noise_rel', 0):g} %"
    if ds.attrs.get("noise_abs_v", 0):
        noise += f" + {ds.attrs['noise_abs_v']:g} V"
    fig.suptitle(f"{ds.attrs.get('target', 'contact')} of contrast "
                 f"{ds.attrs.get('contrast', float('nan')):g} approaching the face, noise "
                 f"{noise}\nsolid: reach_m, whole reading set, resistivity around the machine "
                 f"unknown (the headline)\ndashed: reach_per_reading_m, best single reading, "
                 f"resistivity around the machine known (optimistic)", fontsize=9)
    return fig


_NAMES = {"diameter_m": "machine diameter (m)", "contrast": "contrast ρ beyond / ρ around",
          "noise_rel": "relative noise (fraction)", "noise_abs_v": "absolute noise (V)",
          "cover_m": "cover (m)", "shield_length_m": "shield length (m)"}


def _in_diameters(ds: xr.Dataset, reach: xr.DataArray) -> xr.DataArray | None:
    """Reach in machine diameters where the diameter is swept or known."""
    if "diameter_m" in reach.dims:
        return reach / reach["diameter_m"]
    diam = ds.attrs.get("diameter_m")
    return reach / float(diam) if diam else None


def plot_reach_map(ds: xr.Dataset) -> Figure:
    """Reach over one or two swept parameters.

    Lines for one parameter, a map for two; further dimensions are reduced by their maximum.
    The colour and the first number are ``reach_m`` (whole reading set, resistivity around the
    machine unknown); ``reach_per_reading_m`` (best single reading, resistivity known) is drawn
    dashed or written in brackets. Cases whose reach is the last distance of the grid (still
    seen there; a lower bound) are marked with ``≥`` and hatched.
    """
    reach = ds["reach_m"]
    at_end = ds["reach_at_grid_end"] if "reach_at_grid_end" in ds else xr.zeros_like(
        reach, dtype=bool)
    single = ds["reach_per_reading_m"] if "reach_per_reading_m" in ds else None
    dims = list(reach.dims)
    fig, ax = plt.subplots(figsize=(7.0, 4.8), constrained_layout=True)
    if len(dims) > 2:
        reach = reach.max(dim=dims[2:])
        at_end = at_end.any(dim=dims[2:])
        if single is not None:
            single = single.max(dim=dims[2:])
        dims = dims[:2]
    in_d = _in_diameters(ds, reach)
    if len(dims) == 1:
        x = reach[dims[0]].values
        ax.plot(x, reach.values, "o-", color="#2a6f97",
                label="reach_m: whole reading set, resistivity around unknown")
        if single is not None:
            ax.plot(x, single.values, "s--", color="#7a4b9c", ms=4,
                    label="reach_per_reading_m: best single reading, resistivity around known")
        end = at_end.values.astype(bool)
        if end.any():
            ax.plot(x[end], reach.values[end], "^", color="#b5523b", ms=9,
                    label="still seen at the grid's last distance (≥)")
        if in_d is not None:
            for xi, yi, di in zip(x, reach.values, in_d.values):
                ax.annotate(f"{di:.1f} D", (xi, yi), textcoords="offset points",
                            xytext=(0, 7), ha="center", fontsize=8)
        ax.set_xlabel(_NAMES.get(dims[0], dims[0]))
        ax.set_ylabel("reach ahead of the face (m)")
        ax.legend(fontsize=8)
        ax.grid(True, lw=0.3, color="0.9")
    else:
        x, y = reach[dims[1]].values, reach[dims[0]].values
        mesh = ax.pcolormesh(np.arange(x.size + 1) - 0.5, np.arange(y.size + 1) - 0.5,
                             reach.values, cmap="cividis", shading="flat")
        vmid = 0.5 * (np.nanmin(reach.values) + np.nanmax(reach.values))
        for i in range(y.size):
            for j in range(x.size):
                v = float(reach.values[i, j])
                bound = "≥ " if bool(at_end.values[i, j]) else ""
                txt = f"{bound}{v:.1f} m"
                if in_d is not None:
                    txt += f"\n{bound}{float(in_d.values[i, j]):.1f} D"
                if single is not None:
                    txt += f"\n({float(single.values[i, j]):.1f} m)"
                ax.text(j, i, txt, ha="center", va="center", fontsize=8,
                        color="k" if v > vmid else "w")
                if bound:
                    ax.add_patch(plt.Rectangle((j - 0.5, i - 0.5), 1, 1, fill=False,
                                               hatch="//", edgecolor="0.6", lw=0))
        ax.set_xticks(range(x.size), [f"{v:g}" for v in x])
        ax.set_yticks(range(y.size), [f"{v:g}" for v in y])
        ax.set_xlabel(_NAMES.get(dims[1], dims[1]))
        ax.set_ylabel(_NAMES.get(dims[0], dims[0]))
        fig.colorbar(mesh, ax=ax, label="reach_m ahead of the face (m)")
    lines = ["look-ahead reach_m: whole reading set, resistivity around the machine unknown"]
    if single is not None and len(dims) == 2:
        lines.append("(in brackets) reach_per_reading_m: best single reading, resistivity known")
    if "length_scaling" in ds.attrs:
        lines.append(f"machine length {ds.attrs['length_scaling']} as D changes")
    if bool(np.any(at_end.values)):
        lines.append("≥ / hatched: still seen at the last distance of the grid")
    ax.set_title("\n".join(lines), fontsize=9)
    return fig


__all__ = ["plot_response_vs_distance", "plot_reach_map"]
