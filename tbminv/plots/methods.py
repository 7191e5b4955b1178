"""Figures of the method comparison."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from tbminv.plots.section import save_figure
from tbminv.studies.methods.synthetic import summary_table


def plot_comparison(table: pd.DataFrame) -> Figure:
    """Figure: distance error and chi2 per advance, time per advance, by method and settings.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig = Figure(figsize=(13.0, 4.0), layout="constrained")
    axes = fig.subplots(1, 3)
    groups = list(table.groupby(["method", "settings", "layout"], sort=False))
    markers = {"axisym": "o", "region3d": "s", "section25d": "^"}
    for (m, s, lay), g in groups:
        lab = f"{m} / {s} / {lay}"
        mk = markers.get(m, "x")
        axes[0].plot(g["face_chainage_m"], g["distance_error_m"], marker=mk, label=lab)
        axes[1].plot(g["face_chainage_m"], g["chi2"], marker=mk, label=lab)
    axes[0].axhline(0.0, color="0.5", lw=0.8)
    axes[0].set_xlabel("face chainage (m)")
    axes[0].set_ylabel("distance-to-contact error (m)")
    axes[1].axhspan(0.5, 2.0, color="0.9", zorder=0)
    axes[1].set_yscale("log")
    axes[1].set_xlabel("face chainage (m)")
    axes[1].set_ylabel("chi-squared (1)")
    summ = summary_table(table)
    names = [f"{r.method}\n{r.settings}\n{r.layout}" for r in summ.itertuples()]
    axes[2].barh(np.arange(len(summ)), summ["time_per_advance_s"], color="0.4")
    axes[2].set_yticks(np.arange(len(summ)), names, fontsize=7)
    axes[2].set_xlabel("time per advance (s)")
    axes[0].legend(fontsize=6, loc="best")
    fig.suptitle("Forward geometries compared on one synthetic drive (invented ground)")
    return fig


def save_comparison(table: pd.DataFrame, out_dir: str | Path, stem: str = "methods"
                    ) -> list[Path]:
    """Write the table (CSV), its summary (CSV) and the figure (PDF + PNG) into ``out_dir``."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    p = out / f"{stem}.csv"
    table.to_csv(p, index=False)
    paths.append(p)
    p = out / f"{stem}_summary.csv"
    summary_table(table).to_csv(p, index=False)
    paths.append(p)
    fig = plot_comparison(table)
    paths.extend(save_figure(fig, out / stem))
    return paths


__all__ = ["plot_comparison", "save_comparison"]
