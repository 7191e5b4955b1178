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

import json
import logging
from collections.abc import Sequence
from dataclasses import asdict
from typing import Any

import numpy as np

from tbminv.cache import atomic_write_text, cache_dir, cache_key
from tbminv.forward3d import Forward3D, ForwardSettings, _quads
from tbminv.ground import Scenario

_LOG = logging.getLogger("tbminv.geofactor")

GEOFACTOR_FORMAT = 1


def geometric_factors(layout: Any, measurements: Sequence[Any] | None = None,
                      face_chainage_m: float = 0.0, cutterhead_deg: float = 0.0,
                      reference_resistivity_ohmm: float = 100.0,
                      settings: ForwardSettings | None = None,
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
    settings : ForwardSettings, optional
    use_cache : bool

    Returns
    -------
    ndarray
        ``k`` per reading, m; NaN where the homogeneous response is zero (a null reading).
    """
    if not reference_resistivity_ohmm > 0:
        raise ValueError(f"reference_resistivity_ohmm = {reference_resistivity_ohmm!r}: "
                         "expected > 0")
    s = settings or ForwardSettings()
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


__all__ = ["geometric_factors", "apparent_resistivity"]
