"""Figures of the moving section (matplotlib; used by the report and the widget explorer).

Design: resistivity on a logarithmic colour scale with a perceptually uniform colour map
(:data:`RESISTIVITY_CMAP`, dark = conductive, bright = resistive), one colour scale per section
so that figures compare; units on every axis; the axisymmetric model drawn mirrored about the
tunnel axis (upper half = lower half); the machine drawn as a grey shield with the cutterhead
face as a heavy line; cells the data do not constrain (``covered == 0``) faded and hatched.

Every function takes an optional ``ax`` (drawn into, e.g. by the widget explorer) and returns
the :class:`matplotlib.figure.Figure`. Figures are made with :class:`matplotlib.figure.Figure`
directly (no pyplot state), so they are safe in scripts, tests and notebooks alike.
"""

from __future__ import annotations

import logging
import math
import warnings
from pathlib import Path

import numpy as np
import xarray as xr
from matplotlib.axes import Axes
from matplotlib.colors import ListedColormap, LogNorm
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle
from matplotlib.ticker import FuncFormatter, LogFormatter, MaxNLocator

from tbminv.results.section import (
    axis_median_log10,
    clean_advances,
    transverse_dim,
    world_view,
)

_LOG = logging.getLogger(__name__)

RESISTIVITY_CMAP = "viridis"
RHO_LABEL = "resistivity (ohm·m)"
FADE_ALPHA = 0.6
HATCH = "////"
STEEL = "0.55"


def _new_ax(ax: Axes | None, size: tuple[float, float] = (9.0, 4.0)) -> tuple[Figure, Axes]:
    if ax is not None:
        return ax.figure, ax
    fig = Figure(figsize=size, layout="constrained")
    return fig, fig.add_subplot()


def resistivity_norm(ds: xr.Dataset, vmin: float | None = None,
                     vmax: float | None = None) -> LogNorm:
    """Logarithmic colour scale of a section: 2nd-98th percentile of the covered cells."""
    rho = ds["resistivity"].values
    cov = ds["covered"].values.astype(bool) if "covered" in ds else np.isfinite(rho)
    vals = rho[cov & np.isfinite(rho)]
    if vals.size == 0:
        vals = rho[np.isfinite(rho)]
    if vals.size == 0:
        vals = np.array([1.0, 100.0])
    lo, hi = np.percentile(vals, [2, 98])
    if hi / lo < 3.0:  # nearly homogeneous: show at least a factor 3 around the median
        mid = math.sqrt(lo * hi)
        lo, hi = mid / math.sqrt(3.0), mid * math.sqrt(3.0)
    return LogNorm(vmin=vmin or lo, vmax=vmax or hi)


def _mirror(radius: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Upper and lower half of an axisymmetric field: (z, values with z as last axis).

    A vertical section (``radius`` holding heights, some negative) is returned as it is.
    """
    if radius[0] < 0:
        return radius, values
    z = np.concatenate([-radius[::-1], radius])
    v = np.concatenate([values[..., ::-1], values], axis=-1)
    return z, v


def _field(ax: Axes, x: np.ndarray, radius: np.ndarray, rho: np.ndarray, covered: np.ndarray,
           norm: LogNorm, mask: bool):
    z, v = _mirror(radius, rho)
    _, c = _mirror(radius, covered.astype(float))
    mesh = ax.pcolormesh(x, z, np.ma.masked_invalid(v).T, cmap=RESISTIVITY_CMAP, norm=norm,
                         shading="nearest", rasterized=True)
    if mask:
        poor = np.where((c < 0.5) & np.isfinite(v), 1.0, np.nan)
        if np.isfinite(poor).any():
            ax.pcolormesh(x, z, np.ma.masked_invalid(poor).T, cmap=ListedColormap(["white"]),
                          alpha=FADE_ALPHA, shading="nearest", rasterized=True)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                ax.contourf(x, z, np.nan_to_num(poor).T, levels=[0.5, 1.5], colors="none",
                            hatches=[HATCH])
    return mesh


def _machine(ax: Axes, ds: xr.Dataset, face_x: float) -> None:
    diam = float(ds.attrs.get("machine_diameter_m", math.nan))
    length = float(ds.attrs.get("machine_shield_length_m", math.nan))
    if not math.isfinite(diam):
        ax.axvline(face_x, color="k", lw=2.0)
        return
    r = diam / 2.0
    if not math.isfinite(length):
        length = 2.0 * diam
    ax.add_patch(Rectangle((face_x - length, -r), length, 2 * r, facecolor=STEEL,
                           edgecolor="k", lw=1.0, zorder=3, label="machine"))
    x_left = face_x - 10 * length  # the axis limits clip it
    ax.add_patch(Rectangle((x_left, -r), face_x - length - x_left, 2 * r, facecolor="0.92",
                           edgecolor="0.4", lw=0.8, hatch="..", zorder=2,
                           label="tunnel (lined)"))
    ax.plot([face_x, face_x], [-r, r], color="k", lw=3.0, zorder=4)


def _plain(v: float, _pos: object = None) -> str:
    return f"{v:g}"


class _PlainMinorLogFormatter(LogFormatter):
    """Minor ticks of a logarithmic axis labelled in plain numbers (20, 50, 0.2, not 2e1).

    Labels the ticks at 2 and 5 times a power of ten, and every tick matplotlib's
    :class:`~matplotlib.ticker.LogFormatter` labels on the current view: all of them on an axis
    shorter than 0.4 decade, a subset up to one decade. An axis that holds no power of ten
    and no 2 or 5 (e.g. 60-90 ohm·m) still shows numbers.
    """

    def __init__(self) -> None:
        super().__init__(labelOnlyBase=False)

    def __call__(self, x: float, pos: int | None = None) -> str:
        if x > 0 and (f"{x:.1g}"[0] in "25" or super().__call__(x, pos)):
            return _plain(x)
        return ""


def _plain_log(axis) -> None:
    """Plain numbers (not powers of ten) on a logarithmic axis, with at least one label in view."""
    axis.set_major_formatter(FuncFormatter(_plain))
    axis.set_minor_formatter(_PlainMinorLogFormatter())


def _colorbar(fig: Figure, mesh, ax: Axes) -> None:
    cb = fig.colorbar(mesh, ax=ax, label=RHO_LABEL, pad=0.01)
    _plain_log(cb.ax.yaxis)


def _mask_note(ax: Axes, mask: bool) -> None:
    if mask:
        ax.text(0.995, 0.01, "hatched: not constrained by the data", transform=ax.transAxes,
                ha="right", va="bottom", fontsize=7, color="0.2",
                bbox={"facecolor": "white", "alpha": 0.7, "lw": 0})


def plot_moving_section(ds: xr.Dataset, ax: Axes | None = None, *, mask: bool = True,
                        norm: LogNorm | None = None, world: xr.Dataset | None = None) -> Figure:
    """The moving section in the world frame (chainage x height), with the face positions.

    Each cell shows the latest clean advance that covers it
    (:func:`tbminv.results.section.world_view`); the machine is drawn at the last face, every
    face position is marked on the top edge.
    """
    fig, ax = _new_ax(ax, (10.0, 4.0))
    w = world if world is not None else world_view(ds)
    norm = norm or resistivity_norm(ds)
    tdim = transverse_dim(ds)
    mesh = _field(ax, w["x"].values, w[tdim].values, w["resistivity_latest"].values,
                  w["covered_latest"].values, norm, mask)
    faces = ds["face_chainage_m"].values
    _machine(ax, ds, float(faces[-1]))
    rmax = float(np.abs(w[tdim].values).max())
    ax.plot(faces, np.full(faces.shape, rmax), "v", color="k", ms=4, clip_on=False,
            label="face positions")
    if "contact_chainage_m" in ds:
        ch = ds["contact_chainage_m"].values
        ok = np.isfinite(ch)
        if ok.any():
            ax.plot(ch[ok], np.zeros(ok.sum()), "o", mfc="none", mec="w", ms=5,
                    label="fitted contact (per advance)")
    ax.set_xlabel("chainage (m)")
    ax.set_ylabel("height above axis (m)")
    ax.set_title(f"moving section, advances {int(ds['advance'].values[0])}"
                 f"-{int(ds['advance'].values[-1])}")
    ax.set_xlim(float(w["x"].values[0]), float(w["x"].values[-1]))
    ax.set_ylim(-rmax, rmax)
    ax.legend(loc="upper left", fontsize=7, framealpha=0.8)
    _colorbar(fig, mesh, ax)
    _mask_note(ax, mask)
    return fig


def plot_section_ahead(ds: xr.Dataset, advance: int | None = None, ax: Axes | None = None, *,
                       mask: bool = True, norm: LogNorm | None = None) -> Figure:
    """The section ahead of the face at one advance (machine frame), contact fit marked."""
    fig, ax = _new_ax(ax, (9.0, 4.0))
    adv = int(ds["advance"].values[-1]) if advance is None else int(advance)
    sub = ds.sel(advance=adv)
    norm = norm or resistivity_norm(ds)
    ahead = ds["ahead"].values
    tdim = transverse_dim(ds)
    mesh = _field(ax, ahead, ds[tdim].values, sub["resistivity"].values,
                  sub["covered"].values, norm, mask)
    _machine(ax, ds, 0.0)
    rmax = float(np.abs(ds[tdim].values).max())
    if "contact_ahead_m" in ds and np.isfinite(float(sub["contact_ahead_m"])):
        d = float(sub["contact_ahead_m"])
        lo, hi = float(sub["contact_ahead_lo_m"]), float(sub["contact_ahead_hi_m"])
        if np.isfinite(lo) and np.isfinite(hi):
            ax.axvspan(lo, hi, color="w", alpha=0.25, lw=0)
        ax.axvline(d, color="w", ls="--", lw=1.2, label=f"fitted contact {d:.1f} m")
        ax.legend(loc="upper left", fontsize=7, framealpha=0.8)
    clean = bool(clean_advances(ds.sel(advance=[adv]))[0])
    face = float(sub["face_chainage_m"])
    note = "" if clean else "  [FLAGGED: fit not clean]"
    ax.set_title(f"ahead of the face, advance {adv} (face at chainage {face:.1f} m){note}",
                 color="k" if clean else "C3")
    ax.set_xlabel("distance ahead of the face (m)")
    ax.set_ylabel("height above axis (m)")
    ax.set_xlim(float(ahead[0]), float(ahead[-1]))
    ax.set_ylim(-rmax, rmax)
    _colorbar(fig, mesh, ax)
    _mask_note(ax, mask)
    return fig


def ahead_profile(ds: xr.Dataset, advance: int | None = None, *, radius_m: float | None = None,
                  n_band: int = 5) -> dict[str, np.ndarray | str]:
    """Axial resistivity profile of one advance with an uncertainty band.

    The band is the per-cell bound of the inversion (``resistivity_lo``/``_hi``) where the
    section has it; otherwise the range of the last ``n_band`` clean advances at the same
    chainage (their repeatability as the face moved), which is not a formal posterior.

    Returns
    -------
    dict
        ``ahead_m``, ``resistivity_ohmm``, ``lo_ohmm``, ``hi_ohmm``, ``covered`` (bool) and
        ``band`` (text saying what the band is).
    """
    adv = int(ds["advance"].values[-1]) if advance is None else int(advance)
    diam = float(ds.attrs.get("machine_diameter_m", 6.0))
    r = radius_m if radius_m is not None else diam / 2.0
    ahead = ds["ahead"].values

    def profile(a: int, var: str = "resistivity") -> np.ndarray:
        return axis_median_log10(ds, a, r, var=var, covered_only=False)

    prof = profile(adv)
    rad = np.abs(ds[transverse_dim(ds)].values)
    cov = ds["covered"].sel(advance=adv).values[:, rad <= max(r, rad.min())].any(axis=1)
    if "resistivity_lo" in ds and "resistivity_hi" in ds:
        lo, hi = profile(adv, "resistivity_lo"), profile(adv, "resistivity_hi")
        band = "per-cell bound of the inversion"
    else:
        face = float(ds["face_chainage_m"].sel(advance=adv))
        advs = [int(a) for a, ok in zip(ds["advance"].values, clean_advances(ds))
                if ok and a <= adv][-n_band:]
        if adv not in advs:
            advs.append(adv)
        stack = []
        for a in advs:
            f = float(ds["face_chainage_m"].sel(advance=a))
            p = profile(a)
            stack.append(np.interp(ahead + face - f, ahead, p, left=np.nan, right=np.nan))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            lo, hi = np.nanmin(stack, axis=0), np.nanmax(stack, axis=0)
        band = f"range of the last {len(advs)} clean advances at the same chainage"
    return {"ahead_m": ahead, "resistivity_ohmm": 10.0**prof, "lo_ohmm": 10.0**lo,
            "hi_ohmm": 10.0**hi, "covered": cov, "band": band}


def plot_ahead_profile(ds: xr.Dataset, advance: int | None = None, ax: Axes | None = None, *,
                       radius_m: float | None = None, n_band: int = 5,
                       mask: bool = True) -> Figure:
    """Resistivity along the axis ahead of the face at one advance, with its band."""
    fig, ax = _new_ax(ax, (8.0, 3.6))
    adv = int(ds["advance"].values[-1]) if advance is None else int(advance)
    p = ahead_profile(ds, adv, radius_m=radius_m, n_band=n_band)
    a, rho, cov = p["ahead_m"], p["resistivity_ohmm"], p["covered"]
    keep = a >= 0
    ax.fill_between(a[keep], p["lo_ohmm"][keep], p["hi_ohmm"][keep], color="C0", alpha=0.25,
                    lw=0, label=str(p["band"]))
    good = np.where(cov | (not mask), rho, np.nan)
    ax.plot(a[keep], good[keep], color="C0", lw=2.0, label="resistivity near the axis")
    if mask:
        poor = np.where(~cov, rho, np.nan)
        ax.plot(a[keep], poor[keep], color="C0", lw=1.0, ls=":",
                label="not constrained by the data")
    sub = ds.sel(advance=adv)
    if "contact_ahead_m" in ds and np.isfinite(float(sub["contact_ahead_m"])):
        d = float(sub["contact_ahead_m"])
        lo, hi = float(sub["contact_ahead_lo_m"]), float(sub["contact_ahead_hi_m"])
        if np.isfinite(lo) and np.isfinite(hi):
            ax.axvspan(lo, hi, color="C1", alpha=0.2, lw=0, label="contact interval")
        ax.axvline(d, color="C1", ls="--", label=f"fitted contact {d:.1f} m")
    ax.axvline(0.0, color="k", lw=2.5)
    ax.text(0.0, 1.01, " face", transform=ax.get_xaxis_transform(), fontsize=8)
    ax.set_yscale("log")
    _plain_log(ax.yaxis)
    ax.set_xlim(0.0, float(a[-1]))
    ax.set_xlabel("distance ahead of the face (m)")
    ax.set_ylabel(RHO_LABEL)
    face = float(sub["face_chainage_m"])
    ax.set_title(f"ahead profile, advance {adv} (face at chainage {face:.1f} m)")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    return fig


def chainage_history(ds: xr.Dataset, chainage_m: float, *,
                     radius_m: float = 0.0) -> dict[str, np.ndarray]:
    """Resistivity of one chainage (nearest radius cell) at every advance that saw it.

    For a vertical section ``radius_m`` is the height above the axis (nearest ``z`` cell).

    Returns
    -------
    dict
        ``advance``, ``face_chainage_m``, ``ahead_m`` (chainage minus face),
        ``resistivity_ohmm`` (NaN where the chainage is outside the advance's grid),
        ``covered`` (bool), ``clean`` (bool: advance without fit flags).
    """
    ahead = ds["ahead"].values
    face = ds["face_chainage_m"].values
    rad_i = int(np.argmin(np.abs(ds[transverse_dim(ds)].values - radius_m)))
    lrho = np.log10(ds["resistivity"].values[:, :, rad_i])
    covd = ds["covered"].values[:, :, rad_i].astype(float)
    d = chainage_m - face
    rho = np.array([np.interp(d[i], ahead, lrho[i], left=np.nan, right=np.nan)
                    for i in range(face.size)])
    cov = np.array([np.interp(d[i], ahead, covd[i], left=0.0, right=0.0)
                    for i in range(face.size)]) >= 0.5
    clean = clean_advances(ds)
    return {"advance": ds["advance"].values, "face_chainage_m": face, "ahead_m": d,
            "resistivity_ohmm": 10.0**rho, "covered": cov & np.isfinite(rho), "clean": clean}


def plot_chainage_history(ds: xr.Dataset, chainage_m: float, ax: Axes | None = None, *,
                          radius_m: float = 0.0, mask: bool = True) -> Figure:
    """Resistivity at one chainage as the face approached it (x: distance still ahead)."""
    fig, ax = _new_ax(ax, (7.0, 3.6))
    h = chainage_history(ds, chainage_m, radius_m=radius_m)
    d, rho, cov, clean = h["ahead_m"], h["resistivity_ohmm"], h["covered"], h["clean"]
    ax.plot(d, rho, color="0.5", lw=1.0, zorder=1)
    good = cov & clean
    ax.plot(d[good], rho[good], "o", color="C0", label="covered, clean fit", zorder=3)
    if mask:
        ax.plot(d[~cov], rho[~cov], "o", mfc="none", mec="C0",
                label="not constrained by the data", zorder=2)
    else:
        ax.plot(d[~cov & clean], rho[~cov & clean], "o", color="C0", zorder=2)
    bad = ~clean & np.isfinite(rho)
    if bad.any():
        ax.plot(d[bad], rho[bad], "x", color="C3", label="fit flagged", zorder=4)
    ax.set_yscale("log")
    _plain_log(ax.yaxis)
    ax.set_xlabel("distance of the chainage ahead of the face (m)")
    ax.set_ylabel(RHO_LABEL)
    ax.invert_xaxis()  # the face approaches from left to right
    ax.set_title(f"history of chainage {chainage_m:.1f} m, {radius_m:.1f} m from the axis")
    ax.grid(True, which="both", alpha=0.3)
    if np.isfinite(rho).any():
        ax.legend(fontsize=7, loc="best")
    else:
        ax.text(0.5, 0.5, "no advance saw this chainage", transform=ax.transAxes,
                ha="center", va="center")
    return fig


def plot_data_fit(ds: xr.Dataset, ax: Axes | None = None, *,
                  highlight: int | None = None) -> Figure:
    """chi2 (left axis) and relative rms misfit (right axis) per advance; flags marked."""
    fig, ax = _new_ax(ax, (8.0, 3.2))
    adv = ds["advance"].values
    chi2 = ds["chi2"].values
    ax.plot(adv, chi2, "-o", color="C0", ms=4, label="chi² (left)")
    bad = ~clean_advances(ds)
    if bad.any():
        ax.plot(adv[bad], chi2[bad], "s", mfc="none", mec="C3", ms=9,
                label="flagged (not converged or misfit)")
    hi = ds["fit_flag"].attrs.get("chi2_high") if "fit_flag" in ds else None
    ax.axhline(1.0, color="0.3", lw=0.8, ls="--")
    if hi:
        ax.axhline(float(hi), color="C3", lw=0.8, ls=":")
    ax.set_xlabel("advance (-)")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))   # advances are whole numbers
    ax.set_ylabel("chi² per datum (-)")
    ax.set_yscale("log")
    _plain_log(ax.yaxis)
    ax2 = ax.twinx()
    ax2.plot(adv, ds["rrms"].values, "-^", color="C2", ms=4, label="rrms (right)")
    ax2.set_ylabel("relative rms misfit (%)")
    if highlight is not None:
        ax.axvline(int(highlight), color="C1", lw=1.5, alpha=0.7)
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = ax2.get_legend_handles_labels()
    ax.legend(h1 + h2, l1 + l2, fontsize=7, loc="upper left")
    ax.set_title("data fit per advance")
    return fig


def save_figure(fig: Figure, stem: str | Path, *, dpi: int = 150) -> list[Path]:
    """Write ``stem.pdf`` (vector, the image cells rasterised) and ``stem.png``.

    Returns
    -------
    list of pathlib.Path
        The PDF and the PNG.
    """
    stem = Path(stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    out = []
    for ext in ("pdf", "png"):
        p = stem.with_name(stem.name + "." + ext)
        fig.savefig(p, dpi=dpi)
        out.append(p)
    return out


__all__ = ["RESISTIVITY_CMAP", "resistivity_norm", "plot_moving_section", "plot_section_ahead",
           "ahead_profile", "plot_ahead_profile", "chainage_history", "plot_chainage_history",
           "plot_data_fit", "save_figure"]
