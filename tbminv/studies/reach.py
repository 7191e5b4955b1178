"""Look-ahead reach: how far ahead a layout sees a given change at a given noise level.

For a layout, a planar contact square to the axis (or a sphere on the axis) is moved from far ahead
of the face towards it; at each distance the forward model gives every quadrupole's transfer
resistance ``R(d)`` against the homogeneous ``R0``. A quadrupole *sees* the change at distance ``d``
when ``|R(d)/R0 - 1| >= k sigma(R0)/|R0|`` with the error model ``sigma = a + b|R|``
(``a = noise_abs_v / current_a`` in ohm, ``b = noise_rel``; the envelope of Slater et al. 2000,
J. Appl. Geophys. 44:85-102). Its detectable distance is the largest such ``d`` on the grid (0 where
never), and the layout's reach is the largest detectable distance over usable quadrupoles.

Sweeps over diameter, contrast, noise and cover run as independent tasks on dask.distributed
(:func:`run_sweep`): tasks carry plain dictionaries and rebuild layouts and meshes in the worker.
"""

from __future__ import annotations

import dataclasses
import logging
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from tbminv.forward.registry import ForwardModel, make_model
from tbminv.ground import Contact, Scenario, Sphere
from tbminv.layout import Layout
from tbminv.tomlfile import read_toml

_LOG = logging.getLogger(__name__)

SWEEP_PARAMETERS = ("diameter_m", "contrast", "noise_rel", "noise_abs_v", "cover_m",
                    "shield_length_m")


@dataclass(frozen=True)
class ReachSettings:
    """Settings of a reach study (SI units).

    Attributes
    ----------
    contrast : float
        Resistivity beyond the contact / resistivity around the machine.
    background_ohmm : float
        Resistivity around the machine, ohm-m.
    noise_rel : float
        Relative error b of the envelope (fraction).
    noise_abs_v : float
        Absolute voltage error, V (``a = noise_abs_v / current_a``).
    current_a : float
        Injected current, A.
    k : float
        Detection threshold in standard deviations.
    distances_m : tuple of float
        Distances ahead of the face, m (default: 0.25 D … 12 D, 33 steps, geometric).
    target : str
        ``contact`` (plane square to the axis) or ``sphere`` (on the axis).
    sphere_radius_m : float
        Radius of the sphere target, m (its near surface is at the distance).
    model : str
        Forward model name (:mod:`tbminv.forward.registry`).
    face_chainage_m : float or None
        Face chainage for the study; default puts it 5.5 m ahead of the shield tail past the last
        electrode fixed in the ground (or 0 if there are none).
    model_options : mapping
        Options of the model built by name (``settings=``; presets:
        :func:`tbminv.forward.registry.model_options_for`).
    """

    contrast: float = 10.0
    background_ohmm: float = 100.0
    noise_rel: float = 0.02
    noise_abs_v: float = 0.0
    current_a: float = 1.0
    k: float = 3.0
    distances_m: tuple[float, ...] = ()
    target: str = "contact"
    sphere_radius_m: float = 2.0
    model: str = "axisym"
    face_chainage_m: float | None = None
    model_options: Mapping[str, Any] = field(default_factory=dict)

    def distances(self, diameter_m: float) -> np.ndarray:
        """Distances ahead, m."""
        if self.distances_m:
            return np.sort(np.asarray(self.distances_m, float))
        return diameter_m * np.geomspace(0.25, 12.0, 33)


def default_face_chainage(layout: Layout) -> float:
    """A face chainage that keeps ground-fixed electrodes behind the shield tail, m."""
    fixed = [e.chainage_m for e in layout.electrodes if e.fixed_in_ground and e.kind == "wall"]
    if not fixed:
        return 0.0
    return max(fixed) + layout.machine.shield_length_m + 5.5


def target_scenario(settings: ReachSettings, face_chainage_m: float,
                    distance_m: float) -> Scenario:
    """Ground with the target ``distance_m`` ahead of the face."""
    bg = settings.background_ohmm
    beyond = bg * settings.contrast
    if settings.target == "contact":
        return Scenario(background_resistivity_ohmm=bg,
                        contacts=(Contact(chainage_m=face_chainage_m + distance_m,
                                          resistivity_ohmm=beyond),))
    if settings.target == "sphere":
        r = settings.sphere_radius_m
        return Scenario(background_resistivity_ohmm=bg,
                        spheres=(Sphere(chainage_m=face_chainage_m + distance_m + r,
                                        radius_m=r, resistivity_ohmm=beyond),))
    raise ValueError(f"reach target {settings.target!r}: expected 'contact' or 'sphere'")


def response_vs_distance(layout: Layout, settings: ReachSettings,
                         model: ForwardModel | None = None) -> xr.Dataset:
    """Relative response of every quadrupole as the target approaches the face.

    Parameters
    ----------
    layout : Layout
    settings : ReachSettings
    model : ForwardModel, optional
        A model already built for ``layout`` (default: ``make_model(settings.model, layout,
        **settings.model_options)``).

    Returns
    -------
    xarray.Dataset
        ``relative_response`` (measurement, distance_ahead) = R(d)/R0 - 1,
        ``delta_voltage_v`` for the settings' current, ``r0_ohm`` (measurement).
    """
    if model is None:
        model = make_model(settings.model, layout, **dict(settings.model_options))
    face = settings.face_chainage_m
    if face is None:
        face = default_face_chainage(layout)
    d = settings.distances(layout.machine.diameter_m)
    t0 = time.perf_counter()
    r0 = np.asarray(model.response(Scenario.homogeneous(settings.background_ohmm), face), float)
    rel = np.empty((r0.size, d.size))
    for j, dist in enumerate(d):
        r = np.asarray(model.response(target_scenario(settings, face, float(dist)), face), float)
        with np.errstate(divide="ignore", invalid="ignore"):
            rel[:, j] = r / r0 - 1.0
    _LOG.info("response vs distance: %d distances x %d quadrupoles in %.1f s", d.size, r0.size,
              time.perf_counter() - t0)
    return _dataset(layout, settings, d, r0, rel, face)


def _dataset(layout: Layout, settings: ReachSettings, d: np.ndarray, r0: np.ndarray,
             rel: np.ndarray, face: float) -> xr.Dataset:
    q = layout.measurements
    coords = {
        "measurement": np.arange(len(q)),
        "distance_ahead": ("distance_ahead", d, {"units": "m",
                                                 "long_name": "distance of the target ahead "
                                                              "of the cutterhead face"}),
        "a": ("measurement", [m.a for m in q]),
        "b": ("measurement", [m.b or "" for m in q]),
        "m": ("measurement", [m.m for m in q]),
        "n": ("measurement", [m.n or "" for m in q]),
        "family": ("measurement", [reading_family(layout, m) for m in q],
                   {"long_name": "kind of reading: current electrodes / potential electrodes"}),
    }
    ds = xr.Dataset(
        {
            "relative_response": (("measurement", "distance_ahead"), rel,
                                  {"units": "1", "long_name": "relative change of transfer "
                                                              "resistance R(d)/R0 - 1"}),
            "delta_voltage_v": (("measurement", "distance_ahead"),
                                rel * r0[:, None] * settings.current_a,
                                {"units": "V", "long_name": "change of measured voltage for "
                                                           "the study current"}),
            "r0_ohm": ("measurement", r0, {"units": "ohm",
                                           "long_name": "transfer resistance, homogeneous "
                                                        "ground"}),
        },
        coords=coords,
    )
    ds.attrs.update(_settings_attrs(settings))
    ds.attrs["face_chainage_m"] = face
    ds.attrs["diameter_m"] = layout.machine.diameter_m
    return ds


def reading_family(layout: Layout, q: Any) -> str:
    """Kind of a reading from its electrodes, e.g. ``machine / cutterhead pole``.

    A remote electrode (at infinity or far back) makes a pole; a bare stud reads the machine's
    potential and is named so.
    """
    def kind(lab: str | None) -> str | None:
        if lab is None:
            return None
        e = layout.electrode(lab)
        if e.kind == "remote":
            return None
        if e.kind in ("cutterhead", "shield") and not e.insulated:
            return "bare stud"
        return e.kind

    def part(x: str | None, y: str | None) -> str:
        kx, ky = kind(x), kind(y)
        if kx and ky:
            return f"{kx} dipole" if kx == ky else f"{kx}-{ky}"
        return f"{kx or ky or 'remote'} pole"

    return f"{part(q.a, q.b)} / {part(q.m, q.n)}"


def _settings_attrs(settings: ReachSettings) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for f in dataclasses.fields(settings):
        v = getattr(settings, f.name)
        if f.name == "model_options":
            out["model_options"] = repr(dict(v))
        elif f.name == "distances_m":
            continue
        elif v is None:
            continue
        else:
            out[f.name] = v
    return out


def detectability(ds: xr.Dataset, *, noise_rel: float, noise_abs_v: float = 0.0,
                  current_a: float = 1.0, k: float = 3.0) -> xr.Dataset:
    """Add detectable distance per quadrupole and the layout's reach to a response dataset.

    Returns
    -------
    xarray.Dataset
        The input plus ``relative_error`` (measurement), ``detected`` (measurement,
        distance_ahead), ``detectable_ahead_m`` (measurement; 0 where never), ``usable``
        (measurement; relative error below 1), the scalar ``reach_m`` and the flag
        ``reach_at_grid_end`` (the reach is only a lower bound when it is the grid's last
        distance).
    """
    r0 = np.abs(ds["r0_ohm"].values)
    a_ohm = noise_abs_v / current_a
    with np.errstate(divide="ignore", invalid="ignore"):
        rel_err = (a_ohm + noise_rel * r0) / r0
    rel_err = np.where(np.isfinite(rel_err), rel_err, np.inf)
    resp = np.abs(ds["relative_response"].values)
    detected = resp >= k * rel_err[:, None]
    detected &= np.isfinite(resp)
    d = ds["distance_ahead"].values
    det = np.where(detected, d[None, :], 0.0).max(axis=1)
    usable = rel_err < 1.0
    reach = float(det[usable].max()) if usable.any() else 0.0
    out = ds.copy()
    out["relative_error"] = ("measurement", rel_err,
                             {"units": "1", "long_name": "relative standard error a/|R0| + b"})
    out["detected"] = (("measurement", "distance_ahead"), detected,
                       {"long_name": f"|dR/R| >= {k:g} sigma/|R|"})
    out["detectable_ahead_m"] = ("measurement", det,
                                 {"units": "m", "long_name": "largest distance ahead at which "
                                                             "the change is detectable"})
    out["usable"] = ("measurement", usable, {"long_name": "relative error below 100 %"})
    out["reach_m"] = ((), reach, {"units": "m", "long_name": "look-ahead reach of the layout"})
    out["reach_at_grid_end"] = ((), bool(d.size and reach >= d.max()),
                                {"long_name": "reach is the last distance of the grid (a lower "
                                              "bound: the change is still seen there)"})
    out.attrs.update(noise_rel=noise_rel, noise_abs_v=noise_abs_v, current_a=current_a, k=k)
    return out


def best_measurements(ds: xr.Dataset, n: int = 5) -> list[dict[str, Any]]:
    """The ``n`` quadrupoles with the largest detectable distance (ties: larger response)."""
    det = ds["detectable_ahead_m"].values
    # ties (same grid distance) go to the larger mean |dR/R| beyond the face
    far = np.nan_to_num(np.abs(ds["relative_response"].values)).mean(axis=1)
    order = np.lexsort((-far, -det))[:n]
    return [{"measurement": int(i), "a": str(ds.a.values[i]), "b": str(ds.b.values[i]),
             "m": str(ds.m.values[i]), "n": str(ds.n.values[i]),
             "detectable_ahead_m": float(det[i])} for i in order]


def reach_study(layout: Layout, settings: ReachSettings,
                model: ForwardModel | None = None) -> xr.Dataset:
    """Response vs distance and detectability for one layout (see the module docstring)."""
    ds = response_vs_distance(layout, settings, model)
    return detectability(ds, noise_rel=settings.noise_rel, noise_abs_v=settings.noise_abs_v,
                         current_a=settings.current_a, k=settings.k)


# ----------------------------------------------------------------------------- files, CLI
def load_sweep(path: str | Path) -> tuple[dict[str, list[float]], dict[str, Any]]:
    """Read a sweep file (TOML): ``[sweep]`` name = [values]; optional ``[options]``.

    ``[options]`` may hold ``length`` ("fixed" / "proportional"), ``distances_in_diameters``,
    ``k``, ``model``, ``target``, ``background_ohmm``.
    """
    p = Path(path)
    data = read_toml(p, ValueError, "sweep file")
    sweep = data.get("sweep")
    if not isinstance(sweep, dict) or not sweep:
        raise ValueError(f"{p}: [sweep] table missing; expected e.g. diameter_m = [4.0, 6.0]")
    out: dict[str, list[float]] = {}
    for k, v in sweep.items():
        if k not in SWEEP_PARAMETERS:
            raise ValueError(f"{p}: [sweep] {k}: unknown parameter; expected one of "
                             f"{', '.join(SWEEP_PARAMETERS)}")
        if not isinstance(v, list) or not v or not all(
                isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
            raise ValueError(f"{p}: [sweep] {k} = {v!r}: expected a list of numbers")
        out[k] = [float(x) for x in v]
    return out, dict(data.get("options", {}))


__all__ = ["SWEEP_PARAMETERS", "ReachSettings", "default_face_chainage", "target_scenario",
           "response_vs_distance", "reading_family", "detectability", "best_measurements",
           "reach_study", "load_sweep"]
