"""Linearised 3D image ahead of the face on an (ahead, radius, bearing) grid.

The readings of one advance, each at its own cutterhead angle, as in
:mod:`tbminv.inversion.bodyfit` (``y = ln(R / R0)``, weights ``1 / e``, a common log scale
removed), are explained by a change of ``ln(sigma)`` in cells of a cylindrical grid ahead of the
face: ``y = c + G m`` with ``G`` the harmonic sensitivity (:mod:`tbminv.inversion.bodysens`,
density at the cell centre x cell volume, divided by ``R0``). The image is the damped
least-squares model with sensitivity weighting (``W = diag((sum_i G_ij^2)^(1/4))``, the
depth-weighting idea of Li & Oldenburg 1996, Geophysics 61(2):394-408, from memory), the
damping chosen so that ``chi2 = n - k`` (discrepancy principle, Morozov 1966), solved in data
space. It is a first-order picture of where the readings point, not a calibrated model: its
amplitude is smeared and its largest cells are those the readings see best.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr
from scipy.optimize import brentq

from tbminv.inversion.bodyfit import AdvanceReadings, BodyFitter


@dataclass(frozen=True)
class ImageGrid:
    """Cell edges of the image: ahead of the face (m), radius (m), bearing (degrees)."""

    ahead_edges_m: np.ndarray
    radius_edges_m: np.ndarray
    bearing_edges_deg: np.ndarray

    @classmethod
    def for_diameter(cls, diameter_m: float, ahead_max_d: float = 2.0,
                     radius_max_d: float = 1.0, step_d: float = 0.125,
                     n_bearings: int = 12) -> ImageGrid:
        """A grid in units of the machine diameter ``D``.

        Cells ``step_d`` x ``step_d`` (D) from ``step_d`` D ahead to ``ahead_max_d``, radius 0 to
        ``radius_max_d``; bearings in ``n_bearings`` even sectors, the first centred on 0 deg.
        """
        h = step_d * diameter_m
        half = 180.0 / n_bearings
        return cls(np.arange(h, ahead_max_d * diameter_m + 0.5 * h, h),
                   np.arange(0.0, radius_max_d * diameter_m + 0.5 * h, h),
                   np.linspace(-half, 360.0 - half, n_bearings + 1))

    def centres(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Cell centres along each axis."""
        return tuple(0.5 * (e[1:] + e[:-1]) for e in (self.ahead_edges_m, self.radius_edges_m,
                                                      self.bearing_edges_deg))

    def cells(self) -> tuple[np.ndarray, np.ndarray]:
        """(P, 3) centres (ahead, radius, bearing) and (P,) volumes, m^3; bearing fastest."""
        ca, cr, cb = self.centres()
        a, r, b = np.meshgrid(ca, cr, cb, indexing="ij")
        da = np.diff(self.ahead_edges_m)
        dr2 = np.diff(self.radius_edges_m ** 2) / 2.0
        db = np.radians(np.diff(self.bearing_edges_deg))
        vol = da[:, None, None] * dr2[None, :, None] * db[None, None, :]
        return np.stack([a.ravel(), r.ravel(), b.ravel() % 360.0], axis=1), vol.ravel()


def body_image(readings: AdvanceReadings, layout: Any, background_ohmm: float,
               grid: ImageGrid | None = None, fitter: BodyFitter | None = None) -> xr.Dataset:
    """The linearised 3D image of one advance.

    Parameters
    ----------
    readings : AdvanceReadings
    layout : tbminv.layout.Layout
    background_ohmm : float
        Background resistivity, ohm-m.
    grid : ImageGrid, optional
        Default :meth:`ImageGrid.for_diameter` of the machine.
    fitter : BodyFitter, optional
        A fitter already prepared for these readings (its sensitivity is reused).

    Returns
    -------
    xarray.Dataset
        ``dlog_conductivity`` (ahead, radius, bearing), 1; ``sensitivity_weight`` (same), the
        column norms of the weighted sensitivity (how well each cell is seen); attributes
        ``alpha``, ``chi2``, ``chi2_target``, ``n_readings``.
    """
    diam = 2.0 * float(layout.machine.radius_m)
    grid = grid or ImageGrid.for_diameter(diam)
    if fitter is None:
        fitter = BodyFitter(layout, background_ohmm)
    prep = fitter.prepare(readings)
    pts, vol = grid.cells()
    sens = fitter.sensitivity
    assert sens is not None
    g = sens.density(prep["qi"], prep["angle"], pts) * vol[None, :]
    g = fitter.project(prep["qn"], g / prep["r0"][:, None] * prep["w"][:, None])
    d = fitter.project(prep["qn"], (prep["y"] * prep["w"])[:, None])[:, 0]
    norm = np.sqrt(np.sum(g * g, axis=0))
    wgt = np.sqrt(np.maximum(norm, 1e-30 * max(norm.max(), 1e-300)))
    gw = g / wgt[None, :]
    lam, u = np.linalg.eigh(gw @ gw.T)
    lam = np.maximum(lam, 0.0)
    proj = u.T @ d
    n = d.size
    target = float(max(n - prep["qn"].shape[1], 1))

    def chi2(alpha: float) -> float:
        return float(np.sum((alpha / (lam + alpha) * proj) ** 2))

    total = float(d @ d)
    if total <= target:
        alpha = math.inf
        m = np.zeros(pts.shape[0])
    else:
        top = float(lam.max()) if lam.size else 1.0
        f = lambda la: chi2(10.0 ** la) - target  # noqa: E731
        lo, hi = math.log10(top) - 14.0, math.log10(top) + 6.0
        la = brentq(f, lo, hi) if f(lo) < 0 < f(hi) else lo
        alpha = 10.0 ** la
        coef = u @ (proj / (lam + alpha))
        m = (gw.T @ coef) / wgt
    shape = (len(grid.ahead_edges_m) - 1, len(grid.radius_edges_m) - 1,
             len(grid.bearing_edges_deg) - 1)
    ca, cr, cb = grid.centres()
    coords = {"ahead": ("ahead", ca, {"units": "m", "long_name": "distance ahead of the "
                                      "cutterhead face (cell centre)"}),
              "radius": ("radius", cr, {"units": "m", "long_name": "distance from the tunnel "
                                        "axis (cell centre)"}),
              "bearing": ("bearing", cb % 360.0, {"units": "degree",
                                                  "long_name": "bearing clockwise from the "
                                                  "crown looking ahead (sector centre)"})}
    dims = ("ahead", "radius", "bearing")
    return xr.Dataset(
        {"dlog_conductivity": (dims, m.reshape(shape),
                               {"units": "1", "long_name": "change of ln(conductivity) from "
                                "the background, linearised (positive: more conductive)"}),
         "sensitivity_weight": (dims, norm.reshape(shape),
                                {"units": "1", "long_name": "norm of the weighted sensitivity "
                                 "of the cell (how well the readings see it)"})},
        coords=coords,
        attrs={"alpha": alpha, "chi2": chi2(alpha) if math.isfinite(alpha) else total,
               "chi2_target": target, "n_readings": n,
               "face_chainage_m": readings.face_chainage_m,
               "background_resistivity_ohmm": float(background_ohmm),
               "source": "tbminv.inversion.bodyimage: harmonic 3D sensitivity of the "
                         "axisymmetric background, damped least squares",
               "caution": "linearised interpretation aid; not a substitute for probing "
                          "ahead of the face"})


__all__ = ["ImageGrid", "body_image"]
