"""Numeric geometric factors from a homogeneous 3D run with the true geometry.

The geometric factor of a reading is ``k = rho_ref / R_hom`` with ``R_hom`` the transfer
resistance (V/A) computed by :mod:`tbminv.forward3d` for homogeneous ground of ``rho_ref`` with
the machine and tunnel in (the ratio correction of Fox et al. 1980, Geophysics 45(1):75-93).
The apparent resistivity ``rho_a = k R`` of any reading then equals ``rho_ref`` for that
homogeneous ground, and equals the ground's resistivity for any other homogeneous ground as long
as the fixed regions keep their contrast: the steel (capped at 1e-5 ohm-m) is a perfect conductor
for every practical ground, so with the body alone ``k`` is a property of the geometry; the tunnel
region has a fixed resistivity (``lining_resistivity_ohmm``), so with the cavity in, ``k`` holds
exactly for ground of ``rho_ref`` and approximately otherwise. Choose ``rho_ref`` near the
expected ground.

Factors are cached per layout (its full plain-data form), face chainage (wall electrodes move
relative to the machine), cutterhead angle, ``rho_ref`` and forward settings, in
``tbminv.cache.cache_dir("geofactor")`` as JSON, written atomically.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
from collections.abc import Sequence
from dataclasses import asdict
from typing import Any

import numpy as np

from tbminv.cache import atomic_write_text, cache_dir, cache_key
from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D, _quads
from tbminv.ground import Scenario

_LOG = logging.getLogger(__name__)

GEOFACTOR_FORMAT = 1


def geometric_factors(layout: Any, measurements: Sequence[Any] | None = None,
                      face_chainage_m: float = 0.0, cutterhead_deg: float = 0.0,
                      reference_resistivity_ohmm: float = 100.0,
                      settings: Fem3DSettings | None = None,
                      use_cache: bool = True) -> np.ndarray:
    """Numeric geometric factors ``k`` (m) of a layout's readings.

    Parameters
    ----------
    layout : Layout
    measurements : sequence, optional
        Quadrupoles (default: the layout's protocol).
    face_chainage_m : float
        Face chainage, m (matters only for electrodes fixed in the ground).
    cutterhead_deg : float
        Cutterhead angle, degrees.
    reference_resistivity_ohmm : float
        Resistivity of the homogeneous reference ground, ohm-m.
    settings : Fem3DSettings, optional
    use_cache : bool

    Returns
    -------
    ndarray
        ``k`` per reading, m; NaN where the homogeneous response is zero (a null reading).
    """
    if not reference_resistivity_ohmm > 0:
        raise ValueError(f"reference_resistivity_ohmm = {reference_resistivity_ohmm!r}: "
                         "expected > 0")
    s = settings or Fem3DSettings()
    quads = _quads(layout, measurements)
    key = cache_key({"format": GEOFACTOR_FORMAT, "layout": layout.to_dict(),
                     "quads": [list(q) for q in quads], "face": float(face_chainage_m),
                     "angle": float(cutterhead_deg), "rho": float(reference_resistivity_ohmm),
                     "settings": asdict(s)})
    path = cache_dir("geofactor") / f"{key}.json"
    if use_cache and path.exists():
        try:
            k = np.array(json.loads(path.read_text())["k"], dtype=float)
            if k.size == len(quads):
                return k
        except (ValueError, KeyError, TypeError) as exc:
            _LOG.warning("geometric-factor cache entry %s unreadable (%s); recomputing", path, exc)
    hom = Scenario.homogeneous(float(reference_resistivity_ohmm))
    r = Forward3D(layout, s).run(hom, face_chainage_m, cutterhead_deg, quads).r_ohm
    with np.errstate(divide="ignore"):
        k = np.where(r != 0.0, reference_resistivity_ohmm / np.where(r != 0.0, r, 1.0), np.nan)
    if use_cache:
        atomic_write_text(path, json.dumps({"k": [None if not np.isfinite(v) else float(v)
                                                  for v in k], "key": key}))
    return k


def apparent_resistivity(r_ohm: Any, k_m: Any) -> np.ndarray:
    """Apparent resistivity ``k R``, ohm-m, from transfer resistances (V/A) and factors (m)."""
    return np.asarray(k_m, float) * np.asarray(r_ohm, float)





_LOG = logging.getLogger(__name__)

FORMAT = 1


def needs_correction(layout: Any) -> bool:
    """True when the layout has a ground surface at a finite cover."""
    return math.isfinite(float(layout.tunnel.cover_m))


def surface_factors(layout: Any, face_chainage_m: float, cutterhead_deg: float = 0.0, *,
                    rho_ohmm: float = 100.0, settings: Any | None = None,
                    use_cache: bool = True) -> np.ndarray:
    """Surface factor f per protocol quadrupole (1 where no surface), dimensionless.

    Parameters
    ----------
    layout : Layout
    face_chainage_m : float
        Chainage of the cutterhead face, m.
    cutterhead_deg : float
        Cutterhead angle, degrees.
    rho_ohmm : float
        Resistivity of the homogeneous ground of the two runs, ohm-m (the factor depends on it
        only through the contrast with the lining and the steel).
    settings : tbminv.forward3d.Fem3DSettings, optional
        Settings of the two 3D runs (default: P2, the default mesh).
    use_cache : bool
        Read and write the factor cache.

    Returns
    -------
    ndarray (n_quadrupoles,)
        ``R_with_surface / R_without``; divide readings by it.
    """
    n = len(layout.measurements)
    if not needs_correction(layout):
        return np.ones(n)
    from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D
    from tbminv.ground import Scenario

    fs = settings or Fem3DSettings()
    # with every electrode travelling with the machine (or at infinity) the geometry under a
    # surface parallel to the axis is the same at every face: one factor set serves the drive
    fixed = any(e.fixed_in_ground for e in layout.electrodes)
    key = cache_key({"format": FORMAT, "layout": layout.to_dict(),
                     "face": round(float(face_chainage_m), 6) if fixed else None,
                     "angle": round(float(cutterhead_deg), 6), "rho": float(rho_ohmm),
                     "settings": dataclasses.asdict(fs)})
    path = cache_dir("surface") / f"{key}.json"
    if use_cache and path.exists():
        try:
            f = np.asarray(json.loads(path.read_text())["factors"], float)
            if f.shape == (n,):
                return f
        except (ValueError, KeyError, OSError) as exc:
            _LOG.warning("surface factor cache entry %s unreadable (%s); recomputing", path, exc)
    deep = dataclasses.replace(layout, tunnel=dataclasses.replace(layout.tunnel,
                                                                  cover_m=math.inf))
    sc = Scenario.homogeneous(float(rho_ohmm))
    quads = [q.labels() for q in layout.measurements]
    r_top = Forward3D(layout, fs).run(sc, face_chainage_m, cutterhead_deg, quads).r_ohm
    r_deep = Forward3D(deep, fs).run(sc, face_chainage_m, cutterhead_deg, quads).r_ohm
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where((np.abs(r_deep) > 0) & np.isfinite(r_top), r_top / r_deep, np.nan)
    bad = ~np.isfinite(f) | (f <= 0)
    if bad.any():  # a reading near a null of the homogeneous response: leave it uncorrected
        _LOG.warning("surface correction: %d readings near a null of the homogeneous response "
                     "left uncorrected", int(bad.sum()))
        f[bad] = 1.0
    _LOG.info("surface correction at %.2f m: factors %.4f-%.4f (median %.4f)", face_chainage_m,
              float(f.min()), float(f.max()), float(np.median(f)))
    if use_cache:
        atomic_write_text(path, json.dumps({"factors": f.tolist(), "key": key}))
    return f


__all__ = ["GEOFACTOR_FORMAT", "geometric_factors", "apparent_resistivity", "FORMAT",
           "needs_correction", "surface_factors"]
