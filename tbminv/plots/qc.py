"""Figures of the readings check (QC)."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from tbminv.cache import atomic_path
from tbminv.readings.qc import QCResult


def write_figure(qc: QCResult, out_dir: str | os.PathLike[str], stem: str = "qc",
                 max_points: int = 20_000) -> dict[str, Path]:
    """One QC figure as ``<stem>.png`` and ``<stem>.pdf`` (matplotlib, no pyplot state).

    Panels: reciprocal difference vs |R| with the fitted envelopes (at most ``max_points``
    pairs drawn, a fixed random subset), reciprocal-error histogram (all pairs), flagged
    readings per electrode.
    """
    out = Path(out_dir)
    fig = Figure(figsize=(13.0, 4.2), layout="constrained")
    ax1, ax2, ax3 = fig.subplots(1, 3)
    pairs = qc.pairs
    if len(pairs):
        shown = pairs
        if len(pairs) > max_points:  # a fixed random subset keeps the files small
            pick = np.random.default_rng(0).choice(len(pairs), max_points, replace=False)
            shown = pairs.iloc[np.sort(pick)]
            ax1.text(0.02, 0.98, f"{max_points} of {len(pairs)} pairs shown", va="top",
                     fontsize=7, transform=ax1.transAxes)
        used = shown["used_in_fit"].to_numpy()
        x = shown["r_mean_ohm"].to_numpy()
        y = np.abs(shown["dr_ohm"].to_numpy())
        ax1.loglog(x[used], y[used], ".", ms=3, alpha=0.5, color="tab:blue",
                   label="pairs used in fit")
        if (~used).any():
            ax1.loglog(x[~used], y[~used], "x", ms=3, alpha=0.6, color="tab:red",
                       label="pairs with flags")
        pos = x[x > 0]
        xs = np.logspace(np.log10(pos.min()), np.log10(pos.max()), 50) if len(pos) else x
        fitted = [m for m in qc.error_models.values() if m.source != "none"]
        for k, m in enumerate(fitted[:60]):
            ax1.loglog(xs, m.error_ohm(xs), "-", lw=0.8, color="k",
                       alpha=1.0 if len(fitted) == 1 else 0.25,
                       label="e = a + b|R| (per group)" if k == 0 else None)
        ax1.legend(fontsize=7)
        ax2.hist(100 * pairs["reciprocal_error"].to_numpy(), bins=40, color="tab:blue")
        ax2.axvline(100 * qc.settings.reciprocal_max, color="tab:red", lw=1,
                    label=f"max {100 * qc.settings.reciprocal_max:g} %")
        ax2.legend(fontsize=7)
    else:
        ax1.text(0.5, 0.5, "no reciprocal pairs", ha="center", va="center",
                 transform=ax1.transAxes)
        ax2.text(0.5, 0.5, "no reciprocal pairs", ha="center", va="center",
                 transform=ax2.transAxes)
    ax1.set_xlabel("mean |R| of pair (ohm)")
    ax1.set_ylabel("||Rn| - |Rr|| (ohm)")
    ax1.set_title("reciprocal differences and error model", fontsize=9)
    ax2.set_xlabel("reciprocal error (%)")
    ax2.set_ylabel("pairs")
    ax2.set_title("reciprocal error (LaBrecque et al. 1996)", fontsize=9)
    per = qc.flags_per_electrode()
    if len(per):
        bottom = np.zeros(len(per))
        for col in per.columns:
            vals = per[col].to_numpy(float)
            ax3.bar(np.arange(len(per)), vals, bottom=bottom, label=str(col))
            bottom += vals
        ax3.set_xticks(np.arange(len(per)), [str(i) for i in per.index], rotation=90,
                       fontsize=7)
        ax3.legend(fontsize=7)
    else:
        ax3.text(0.5, 0.5, "no flagged readings", ha="center", va="center",
                 transform=ax3.transAxes)
    ax3.set_xlabel("electrode")
    ax3.set_ylabel("flagged readings using it")
    ax3.set_title("flags per electrode", fontsize=9)
    paths = {}
    for ext in ("png", "pdf"):
        target = out / f"{stem}.{ext}"
        with atomic_path(target) as tmp:
            fig.savefig(tmp, format=ext, dpi=120)
        paths[f"figure_{ext}"] = target
    return paths


__all__ = ["write_figure"]
