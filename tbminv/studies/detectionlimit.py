"""The detection limit of a shift: how far ahead two reference changes are seen at its noise.

Two reference targets, both on the axis of the layout's machine, with the whole-set reach
``reach_m`` of :mod:`tbminv.studies.reach` (resistivity around the machine unknown; false alarm
``2 Phi(-3)``, detection probability 0.5):

- a plane contact square to the axis with resistivity beyond / around = ``contact_contrast``
  (default 5, and its inverse 1/5: the shorter of the two reaches is stated);
- a sphere of ``body_diameter_m`` (default 2 m) and resistivity ``body_contrast`` (default 10)
  times the ground's.

The noise is the shift's median relative error of one reading as inverted (QC error with the
modelling floor): ``noise_rel``, no absolute part. The responses do not depend on the noise, so
they are computed once per layout and target with the axisymmetric ``fast`` preset on a short
distance grid and cached (:func:`tbminv.cache.cache_dir` ``"detection-limit"``); a new noise
level costs only the closed-form detectability.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, replace

import numpy as np
import xarray as xr

from tbminv.cache import atomic_path, cache_dir, cache_key
from tbminv.forward.registry import make_model, model_options_for
from tbminv.layout import Layout
from tbminv.studies.reach import ReachSettings, _dataset, detectability, response_vs_distance

_LOG = logging.getLogger(__name__)

DISTANCES_IN_DIAMETERS = tuple(float(x) for x in np.geomspace(0.15, 12.0, 14))
"""Distances of the targets ahead of the face, in machine diameters (short grid: cheap)."""


@dataclass(frozen=True)
class DetectionLimit:
    """Reaches of the reference targets at one noise level.

    Attributes
    ----------
    noise_rel : float
        Relative error of one reading used (1).
    contact_contrast : float
        Contrast of the reference contact (and its inverse), 1.
    contact_reach_m : float
        Shorter whole-set reach of the two contacts, m (0: not seen at the grid's first distance).
    contact_at_grid_end : bool
        The contact is still seen at the grid's last distance (the reach is a lower bound).
    body_diameter_m, body_contrast : float
        The reference body: sphere diameter, m, and resistivity ratio, 1.
    body_reach_m : float
        Whole-set reach of the body (distance of its near surface), m.
    body_at_grid_end : bool
        As ``contact_at_grid_end`` for the body.
    """

    noise_rel: float
    contact_contrast: float
    contact_reach_m: float
    contact_at_grid_end: bool
    body_diameter_m: float
    body_contrast: float
    body_reach_m: float
    body_at_grid_end: bool


def _response(layout: Layout, settings: ReachSettings) -> xr.Dataset:
    """Response vs distance of one target, from the cache or computed and cached."""
    key = cache_key({"layout": layout.to_dict(), "contrast": settings.contrast,
                     "target": settings.target, "sphere_radius_m": settings.sphere_radius_m,
                     "distances_m": list(settings.distances_m), "model": settings.model,
                     "preset": "fast", "version": 1})
    path = cache_dir("detection-limit") / f"{key}.npz"
    if path.exists():
        with np.load(path, allow_pickle=False) as z:
            face = float(z["face"])
            return _dataset(layout, settings, z["d"], z["r0"], z["rel"], face)
    model = make_model(settings.model, layout, **model_options_for(settings.model, "fast"))
    ds = response_vs_distance(layout, settings, model)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, d=ds["distance_ahead"].values, r0=ds["r0_ohm"].values,
                     rel=ds["relative_response"].values,
                     face=np.float64(ds.attrs["face_chainage_m"]))
    return ds


def _reach(layout: Layout, settings: ReachSettings, noise_rel: float) -> tuple[float, bool]:
    ds = detectability(_response(layout, settings), noise_rel=noise_rel)
    return float(ds["reach_m"]), bool(ds["reach_at_grid_end"])


def detection_limit(layout: Layout, noise_rel: float, *, contact_contrast: float = 5.0,
                    body_contrast: float = 10.0, body_diameter_m: float = 2.0,
                    model: str = "axisym") -> DetectionLimit:
    """Whole-set reach of a reference contact and body at a noise level.

    Parameters
    ----------
    layout : Layout
        Machine, electrodes and protocol (at least one measurement).
    noise_rel : float
        Relative standard error of one reading (1), > 0.
    contact_contrast : float
        Contrast of the reference contact; the contact and its inverse are both computed.
    body_contrast : float
        Resistivity of the reference body / the ground's.
    body_diameter_m : float
        Diameter of the reference body (a sphere on the axis), m.
    model : str
        Forward model name (axisymmetric by default).

    Returns
    -------
    DetectionLimit

    Raises
    ------
    ValueError
        ``noise_rel`` not finite and positive, or a layout without measurements.
    """
    if not (math.isfinite(noise_rel) and noise_rel > 0):
        raise ValueError(f"noise_rel = {noise_rel!r}: expected a finite number > 0")
    if not layout.measurements:
        raise ValueError(f"layout {layout.name!r} has no measurements: no detection limit")
    dist = tuple(layout.machine.diameter_m * x for x in DISTANCES_IN_DIAMETERS)
    base = ReachSettings(distances_m=dist, model=model, noise_rel=noise_rel)
    contacts = [_reach(layout, replace(base, contrast=c), noise_rel)
                for c in (contact_contrast, 1.0 / contact_contrast)]
    c_reach, c_end = min(contacts)
    body = replace(base, contrast=body_contrast, target="sphere",
                   sphere_radius_m=body_diameter_m / 2.0)
    b_reach, b_end = _reach(layout, body, noise_rel)
    _LOG.info("detection limit at %.2g %% noise: contact 1:%g from %.1f m, body from %.1f m",
              100 * noise_rel, contact_contrast, c_reach, b_reach)
    return DetectionLimit(noise_rel, contact_contrast, c_reach, c_end, body_diameter_m,
                          body_contrast, b_reach, b_end)


__all__ = ["DISTANCES_IN_DIAMETERS", "DetectionLimit", "detection_limit"]
