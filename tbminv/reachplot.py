"""Figures of a reach study: response vs distance and reach over swept parameters."""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import xarray as xr
from matplotlib.figure import Figure

from tbminv.reach import best_measurements


def plot_response_vs_distance(ds: xr.Dataset, n_best: int = 6) -> Figure:
    """|ΔR/R| of every quadrupole vs distance of the target, with the noise band and the reach.

    Parameters
    ----------
    ds : xarray.Dataset
        Output of :func:`tbminv.reach.reach_study`.
    n_best : int
        Quadrupoles drawn in colour and labelled (the others in light grey).
    """
    d = ds["distance_ahead"].values
    diam = float(ds.attrs.get("diameter_m", 1.0))
    rel = np.abs(ds["relative_response"].values)
    err = ds["relative_error"].values
    k = float(ds.attrs.get("k", 3.0))
    fig, ax = plt.subplots(figsize=(7.5, 4.8), constrained_layout=True)
    for row in rel:
        ax.plot(d, row, color="0.82", lw=0.7, zorder=1)
    best = best_measurements(ds, n_best)
    cmap = plt.get_cmap("viridis")
    for i, b in enumerate(best):
        j = b["measurement"]
        lab = f"{b['a']}-{b['b'] or '∞'} / {b['m']}-{b['n'] or '∞'}"
        ax.plot(d, rel[j], color=cmap(i / max(1, len(best) - 1)), lw=1.8, zorder=3, label=lab)
    usable = ds["usable"].values
    floor = k * (float(np.min(err[usable])) if usable.any() else 1.0)
    ax.axhspan(1e-12, floor, color="#d9b3a6", alpha=0.45, zorder=0,
               label=f"below {k:g}σ of the best quadrupole")
    reach = float(ds["reach_m"])
    ax.axvspan(max(reach, d.min()), d.max() * 1.05, facecolor="none", edgecolor="0.5",
               hatch="///", lw=0, zorder=0, label="beyond reach")
    ax.axvline(reach, color="k", lw=1.0, ls="--")
    ax.text(reach, 0.98, f" reach {reach:.1f} m ({reach / diam:.1f} D)", va="top", ha="left",
            fontsize=9, transform=ax.get_xaxis_transform())
    ax.set_xscale("log")
    ax.set_yscale("log")
    top = np.nanmax(rel) if np.isfinite(rel).any() else 1.0
    ax.set_ylim(max(1e-5, floor / 30), max(top * 2, floor * 3))
    ax.set_xlim(d.min(), d.max())
    ax.set_xlabel("distance of the target ahead of the face (m)")
    ax.set_ylabel("|ΔR / R| (1)")
    sec = ax.secondary_xaxis("top", functions=(lambda x: x / diam, lambda x: x * diam))
    sec.set_xlabel("distance ahead (machine diameters)")
    ax.set_title(f"{ds.attrs.get('target', 'contact')} of contrast "
                 f"{ds.attrs.get('contrast', float('nan')):g}, noise "
                 f"{100 * ds.attrs.get('noise_rel', 0):g} % + {ds.attrs.get('noise_abs_v', 0):g} V,"
                 f" k = {k:g}", fontsize=10)
    ax.legend(fontsize=7.5, loc="lower left", ncol=2)
    ax.grid(True, which="both", lw=0.3, color="0.9")
    return fig


def plot_reach_map(ds: xr.Dataset) -> Figure:
    """Reach over one or two swept parameters.

    Lines for one parameter, a map for two; further dimensions are reduced by their maximum.
    """
    reach = ds["reach_m"]
    dims = list(reach.dims)
    fig, ax = plt.subplots(figsize=(6.5, 4.5), constrained_layout=True)
    if len(dims) > 2:
        reach = reach.max(dim=dims[2:])
        dims = dims[:2]
    if len(dims) == 1:
        x = reach[dims[0]].values
        ax.plot(x, reach.values, "o-", color="#2a6f97")
        ax.set_xlabel(f"{dims[0]} ({reach[dims[0]].attrs.get('units', '')})")
        ax.set_ylabel("reach ahead of the face (m)")
    else:
        x, y = reach[dims[1]].values, reach[dims[0]].values
        mesh = ax.pcolormesh(np.arange(x.size + 1) - 0.5, np.arange(y.size + 1) - 0.5,
                             reach.values, cmap="cividis", shading="flat")
        for i in range(y.size):
            for j in range(x.size):
                ax.text(j, i, f"{reach.values[i, j]:.1f}", ha="center", va="center",
                        fontsize=8, color="w")
        ax.set_xticks(range(x.size), [f"{v:g}" for v in x])
        ax.set_yticks(range(y.size), [f"{v:g}" for v in y])
        ax.set_xlabel(f"{dims[1]} ({reach[dims[1]].attrs.get('units', '')})")
        ax.set_ylabel(f"{dims[0]} ({reach[dims[0]].attrs.get('units', '')})")
        fig.colorbar(mesh, ax=ax, label="reach ahead of the face (m)")
    ax.set_title(f"look-ahead reach, length scaling: {ds.attrs.get('length_scaling', '')}",
                 fontsize=10)
    return fig


__all__ = ["plot_response_vs_distance", "plot_reach_map"]
