"""Ratio correction of the ground surface for the axisymmetric model.

The axisymmetric model treats the ground as a full space around the tunnel. A ground surface
at a finite cover breaks that symmetry: in a homogeneous ground it raises pole readings by a
few per cent (about 6 % for the demo layout at 32 m cover, D = 6.2 m) and moves others by up to
1 %, as large as the signal of a contact a few diameters ahead. The correction divides each
reading by the factor

    f = R_3D(homogeneous ground, with the surface) / R_3D(homogeneous ground, no surface),

computed with the 3D model of the same layout (machine, bore and electrodes in, same mesh
settings, so most discretisation error cancels), at the advance's face chainage and cutterhead
angle. The corrected readings are what the same ground would give without the surface, which
the axisymmetric model represents. This is the ratio (homogeneous-response) correction of
terrain effects in resistivity data (Fox, Hohmann, Killpack & Rijo 1980, Geophysics 45(1):
75-93). It is exact for a homogeneous ground and first order for a ground that varies; it does
not model what lies near the surface (a surface layer, buildings, services).

Factors are cached on disk (:mod:`tbminv.cache`), keyed by layout, cutterhead angle, settings and,
where the layout has electrodes fixed in the ground, the face chainage.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
from typing import Any

import numpy as np

from tbminv.cache import atomic_write_text, cache_dir, cache_key

_LOG = logging.getLogger("tbminv.surface")

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
    settings : tbminv.forward3d.ForwardSettings, optional
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
    from tbminv.forward3d import Forward3D, ForwardSettings
    from tbminv.ground import Scenario

    fs = settings or ForwardSettings()
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


__all__ = ["needs_correction", "surface_factors"]
