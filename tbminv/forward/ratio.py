"""Every homogeneous-ratio factor, from one cached homogeneous response.

All the factors below divide or multiply readings by transfer resistances of a *homogeneous*
ground computed with the true geometry (the ratio correction of Fox et al. 1980, Geophysics
45(1):75-93). They are built from one quantity, :func:`homogeneous_response` — ``R_hom`` (ohm)
of any registry model (:mod:`tbminv.forward.registry`) in homogeneous ground of ``rho`` —
and one cache:

geometric factors, :func:`geometric_factors`
    ``k = rho / R_hom`` (m, :func:`geometric_factors_from_response`), by default from the 3D
    model with the machine and tunnel in. The apparent resistivity ``rho_a = k R`` equals
    ``rho`` for that ground, and the ground's resistivity for any other homogeneous ground as
    long as the fixed regions keep their contrast: the steel (capped at 1e-5 ohm-m) is a perfect
    conductor for every practical ground, so with the body alone ``k`` is a property of the
    geometry; the tunnel region has a fixed resistivity (``lining_resistivity_ohmm``), so with the
    cavity in ``k`` holds exactly for ground of ``rho`` and approximately otherwise. Choose
    ``rho`` near the expected ground. (The closed-form full-space factor of point electrodes is
    :func:`tbminv.forward.analytic.full_space_geometric_factor`.)
surface factors, :func:`surface_factors`
    ``f = R_3D(hom, surface) / R_3D(hom, no surface)`` per protocol quadrupole: the axisymmetric
    model has no ground surface, so readings under a finite cover are divided by ``f`` first.
Cartesian ratio, :func:`cartesian_ratio`
    ``R_3D(hom) / R_2.5D(hom)`` of the Cartesian 2.5D section (:mod:`tbminv.forward.cartesian25d`),
    which multiplies its responses.

Cache: ``R_hom`` is kept in memory and in ``tbminv.cache.cache_dir("ratio")`` as JSON (written
atomically), keyed by the model's class and settings, the layout (its full plain-data form), the
quadrupoles, the cutterhead angle, ``rho`` and — only when the layout has an electrode fixed in
the ground — the face chainage: with every electrode travelling with the machine (or at
infinity) the geometry in homogeneous ground, under a surface parallel to the axis or not, is the
same at every face, so one set serves the whole drive. A model whose ``settings`` is not a
dataclass cannot be keyed and is run every time.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
from collections.abc import Callable
from typing import Any

import numpy as np

from tbminv.cache import atomic_write_text, cache_dir, cache_key
from tbminv.forward.fem3d.model import Fem3DSettings, Model3D
from tbminv.forward.quadrupoles import Quadrupoles, as_measurements
from tbminv.forward.surfacetable import SurfaceTableSpec, table_surface_factors
from tbminv.ground import Scenario
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)

RATIO_FORMAT = 1
"""Version of the cache entries (bump when their meaning changes)."""

_MEMORY: dict[str, np.ndarray] = {}
_MEMORY_MAX = 256


def clear_memory_cache() -> None:
    """Forget the homogeneous responses held in memory (the on-disk cache stays)."""
    _MEMORY.clear()


def geometric_factors_from_response(r_hom_ohm: Any, rho_ohmm: Any) -> np.ndarray:
    """Geometric factors ``k = rho / R_hom``, m, from homogeneous transfer resistances.

    Parameters
    ----------
    r_hom_ohm : array_like
        Transfer resistances of homogeneous ground, ohm.
    rho_ohmm : float or array_like
        Resistivity of that ground, ohm-m.

    Returns
    -------
    ndarray
        ``k`` per reading, m; NaN where ``R_hom`` is zero (a null reading) or not finite.
    """
    r = np.asarray(r_hom_ohm, float)
    ok = np.isfinite(r) & (r != 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(ok, np.asarray(rho_ohmm, float) / np.where(ok, r, 1.0), np.nan)


def apparent_resistivity(r_ohm: Any, k_m: Any) -> np.ndarray:
    """Apparent resistivity ``k R``, ohm-m, from transfer resistances (V/A) and factors (m)."""
    return np.asarray(k_m, float) * np.asarray(r_ohm, float)


def _identity(model: Any) -> dict[str, Any] | None:
    """What makes a model's response reproducible: class and settings (None: not keyable)."""
    settings = getattr(model, "settings", None)
    if not dataclasses.is_dataclass(settings) or isinstance(settings, type):
        return None
    cls = type(model)
    return {"model": f"{cls.__module__}.{cls.__qualname__}", "settings": settings}


def _remember(key: str, r: np.ndarray) -> None:
    if len(_MEMORY) >= _MEMORY_MAX:
        _MEMORY.clear()
    _MEMORY[key] = r.copy()


def _cached(key_data: dict[str, Any] | None, n: int, run: Callable[[], np.ndarray]
            ) -> tuple[np.ndarray, bool]:
    """``run()`` through the memory and disk cache; also whether it was run."""
    if key_data is None:
        return run(), True
    key = cache_key(key_data)
    if key in _MEMORY:
        return _MEMORY[key].copy(), False
    path = cache_dir("ratio") / f"{key}.json"
    if path.exists():
        try:
            r = np.array([math.nan if v is None else v
                          for v in json.loads(path.read_text())["r_ohm"]], dtype=float)
            if r.shape == (n,):
                _remember(key, r)
                return r, False
        except (ValueError, KeyError, TypeError, OSError) as exc:
            _LOG.warning("ratio cache entry %s unreadable (%s); recomputing", path, exc)
    r = run()
    atomic_write_text(path, json.dumps({"r_ohm": [float(v) if np.isfinite(v) else None
                                                  for v in r], "key": key}))
    _remember(key, r)
    return r, True


def _homogeneous(model: Any, rho_ohmm: float, face_chainage_m: float, cutterhead_deg: float,
                 measurements: Quadrupoles | None, use_cache: bool) -> tuple[np.ndarray, bool]:
    layout: Layout = model.layout
    quads = as_measurements(layout, measurements)
    ident = _identity(model) if use_cache else None
    key_data = None
    if ident is not None:
        fixed = any(e.fixed_in_ground for e in layout.electrodes)
        key_data = {"format": RATIO_FORMAT, **ident, "layout": layout.to_dict(),
                    "quads": [list(q.labels()) for q in quads],
                    "face": round(float(face_chainage_m), 6) if fixed else None,
                    "angle": round(float(cutterhead_deg), 6), "rho": float(rho_ohmm)}

    def run() -> np.ndarray:
        r = np.asarray(model.response(Scenario.homogeneous(float(rho_ohmm)), face_chainage_m,
                                      cutterhead_deg, quads), float)
        if r.shape != (len(quads),):
            raise RuntimeError(f"forward model {type(model).__name__} returned {r.shape} "
                               f"values for {len(quads)} readings")
        return r

    return _cached(key_data, len(quads), run)


def homogeneous_response(model: Any, rho_ohmm: float, face_chainage_m: float,
                         cutterhead_deg: float = 0.0, measurements: Quadrupoles | None = None,
                         *, use_cache: bool = True) -> np.ndarray:
    """Transfer resistances of homogeneous ground for any registry model, ohm (cached).

    Parameters
    ----------
    model : ForwardModel
        A built model (``response(scenario, face, angle, measurements)`` and ``layout``).
    rho_ohmm : float
        Resistivity of the homogeneous ground, ohm-m.
    face_chainage_m : float
        Face chainage, m (in the cache key only when an electrode is fixed in the ground).
    cutterhead_deg : float
        Cutterhead angle, degrees.
    measurements : sequence of Measurement or (a, b, m, n), optional
        Default: the layout's protocol.
    use_cache : bool
        Read and write the memory and disk cache.

    Returns
    -------
    ndarray
        ``R_hom`` per quadrupole, ohm.
    """
    if not rho_ohmm > 0:
        raise ValueError(f"homogeneous resistivity {rho_ohmm!r}: expected > 0 ohm-m")
    return _homogeneous(model, rho_ohmm, face_chainage_m, cutterhead_deg, measurements,
                        use_cache)[0]


def geometric_factors(layout: Layout, measurements: Quadrupoles | None = None,
                      face_chainage_m: float = 0.0, cutterhead_deg: float = 0.0,
                      reference_resistivity_ohmm: float = 100.0,
                      settings: Fem3DSettings | None = None,
                      use_cache: bool = True, *, model: Any | None = None) -> np.ndarray:
    """Numeric geometric factors ``k = rho_ref / R_hom`` (m) of a layout's readings.

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
        Settings of the default 3D model.
    use_cache : bool
    model : ForwardModel, optional
        Any registry model built for ``layout`` instead of the 3D model.

    Returns
    -------
    ndarray
        ``k`` per reading, m; NaN where the homogeneous response is zero (a null reading).
    """
    if not reference_resistivity_ohmm > 0:
        raise ValueError(f"reference_resistivity_ohmm = {reference_resistivity_ohmm!r}: "
                         "expected > 0")
    if model is None:
        model = Model3D(layout, settings)
    elif settings is not None:
        raise ValueError("geometric_factors: give the 3D settings or a model, not both")
    elif model.layout is not layout and model.layout != layout:
        raise ValueError(f"geometric_factors: the model was built for another layout than "
                         f"{layout.source}")
    r = homogeneous_response(model, reference_resistivity_ohmm, face_chainage_m, cutterhead_deg,
                             measurements, use_cache=use_cache)
    return geometric_factors_from_response(r, reference_resistivity_ohmm)


def needs_correction(layout: Layout) -> bool:
    """True when the layout has a ground surface at a finite cover."""
    return math.isfinite(float(layout.tunnel.cover_m))


def surface_factors(layout: Layout, face_chainage_m: float, cutterhead_deg: float = 0.0, *,
                    rho_ohmm: float = 100.0, settings: Fem3DSettings | None = None,
                    use_cache: bool = True, method: str = "table",
                    spec: SurfaceTableSpec | None = None) -> np.ndarray:
    """Surface factor f per protocol quadrupole (1 where no surface), dimensionless.

    ``method = "table"`` (default) interpolates the factors from two 3D solves per block of
    faces that hold every cutterhead angle node and every face node at once
    (:mod:`tbminv.forward.surfacetable`; accuracy against ``"direct"`` in
    ``bench/results/surface_table.json``); ``"direct"`` solves the two 3D models at this face
    and angle.

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
    settings : Fem3DSettings, optional
        Settings of the two 3D runs (default: P2, the default mesh).
    use_cache : bool
        Read and write the cache.
    method : {"table", "direct"}
        Interpolated from the block's table, or solved at this face and angle.
    spec : SurfaceTableSpec, optional
        Node spacing of the table (``method = "table"``).

    Returns
    -------
    ndarray (n_quadrupoles,)
        ``R_with_surface / R_without``; divide readings by it. A reading near a null of the
        homogeneous response is left uncorrected (1).
    """
    n = len(layout.measurements)
    if not needs_correction(layout):
        return np.ones(n)
    if method == "table":
        f, bad = table_surface_factors(layout, face_chainage_m, cutterhead_deg,
                                       rho_ohmm=float(rho_ohmm), settings=settings, spec=spec,
                                       use_cache=use_cache)
        if bad.any():
            _LOG.debug("surface correction: %d readings near a null of the homogeneous "
                       "response left uncorrected", int(bad.sum()))
        return f
    if method != "direct":
        raise ValueError(f"surface_factors: method {method!r}: expected 'table' or 'direct'")
    deep = dataclasses.replace(layout, tunnel=dataclasses.replace(layout.tunnel,
                                                                  cover_m=math.inf))
    rho = float(rho_ohmm)
    r_top, new_top = _homogeneous(Model3D(layout, settings), rho, face_chainage_m,
                                  cutterhead_deg, None, use_cache)
    r_deep, new_deep = _homogeneous(Model3D(deep, settings), rho, face_chainage_m,
                                    cutterhead_deg, None, use_cache)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where((np.abs(r_deep) > 0) & np.isfinite(r_top), r_top / r_deep, np.nan)
    bad = ~np.isfinite(f) | (f <= 0)
    f[bad] = 1.0
    if new_top or new_deep:
        if bad.any():
            _LOG.warning("surface correction: %d readings near a null of the homogeneous "
                         "response left uncorrected", int(bad.sum()))
        _LOG.info("surface correction at %.2f m: factors %.4f-%.4f (median %.4f)",
                  face_chainage_m, float(f.min()), float(f.max()), float(np.median(f)))
    return f


def cartesian_ratio(section: Any, face_chainage_m: float, cutterhead_deg: float = 0.0,
                    measurements: Quadrupoles | None = None, *,
                    use_cache: bool = True) -> np.ndarray:
    """Ratio correction ``R_3D(hom) / R_2.5D(hom)`` of a Cartesian 2.5D section (1).

    Parameters
    ----------
    section : Cartesian25DModel
        The section (its ``reference`` 3D model, ``uncorrected()`` twin and
        ``settings.rho_ref_ohmm``).
    face_chainage_m : float
        Face chainage, m.
    cutterhead_deg : float
        Cutterhead angle, degrees.
    measurements : sequence, optional
        Quadrupoles (default: the layout's protocol).
    use_cache : bool

    Returns
    -------
    ndarray
        The ratio per quadrupole (inf or NaN where the 2.5D response is zero).
    """
    rho = float(section.settings.rho_ref_ohmm)
    r3 = homogeneous_response(section.reference, rho, face_chainage_m, cutterhead_deg,
                              measurements, use_cache=use_cache)
    r2 = homogeneous_response(section.uncorrected(), rho, face_chainage_m, cutterhead_deg,
                              measurements, use_cache=use_cache)
    with np.errstate(divide="ignore", invalid="ignore"):
        return r3 / r2


__all__ = ["RATIO_FORMAT", "clear_memory_cache", "geometric_factors_from_response",
           "apparent_resistivity", "homogeneous_response", "geometric_factors",
           "needs_correction", "surface_factors", "cartesian_ratio"]
