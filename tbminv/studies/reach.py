"""Look-ahead reach: how far ahead a layout sees a given change at a given noise level.

For a layout, a planar contact square to the axis (or a sphere on the axis) is moved from far ahead
of the face towards it; at each distance the forward model gives every quadrupole's transfer
resistance ``R(d)`` against the homogeneous ``R0``. The noise of a reading is the error model
``sigma = a + b|R0|`` (``a = noise_abs_v / current_a`` in ohm, ``b = noise_rel``; the envelope of
Slater et al. 2000, J. Appl. Geophys. 44:85-102), independent between readings.

Two figures of reach, named apart everywhere they are written:

``reach_m`` (whole reading set, resistivity around the machine unknown)
    The distance up to which the layout's whole set of readings tells "contact at d" from "no
    contact", with the resistivity around the machine fitted. The homogeneous model scales every
    transfer resistance by one factor ``s = rho / rho0``; fitted to the noise-free contact data
    (the "Asimov" data set of Cowan, Cranmer, Gross & Vitells 2011, Eur. Phys. J. C 71:1554) by
    weighted least squares, ``s - 1`` is the weighted mean of the relative responses
    ``r_i = R_i(d)/R0_i - 1`` with weights ``w_i = (|R0_i| / sigma_i)^2`` (closed form), and the
    minimum chi-squared ``lambda(d) = sum w_i (r_i - rbar)^2`` is the noncentrality of the
    likelihood-ratio statistic (its expected value under the contact). A change that scales all
    readings alike (``r_i`` equal) is absorbed by ``s`` and gives ``lambda = 0``: no reach. The
    fit is linear in ``s`` because a homogeneous ground's transfer resistance is proportional to
    its resistivity, so it is exact for Gaussian errors on ``R`` (to first order in ``r`` it is
    the weighted mean of ``log(R/R0)``, the log-resistivity form), and a reading whose response
    changes sign stays in; ``sigma`` is held at ``R0`` (a fixed covariance, as the asymptotic
    formulae assume). The
    contact counts as seen where ``lambda`` reaches the threshold ``lambda*`` of the detection
    criterion (:func:`detection_threshold`): a statistic asymptotically chi-squared with ``dof``
    degrees of freedom under "no contact" and noncentral chi-squared ``(dof, lambda)`` under the
    contact (Wald 1943, Trans. Amer. Math. Soc. 54:426-482; Cowan et al. 2011, sec. 3), a false
    alarm probability ``alpha`` and a detection probability ``beta``. Default: ``dof = 1``,
    ``alpha = 2 Phi(-k)`` (0.27 % for k = 3) and ``beta = 0.5``, which gives ``lambda* = k^2`` to
    1e-6: one reading with the resistivity known would reach exactly as far as by ``|dR/R| >= k
    sigma/|R|``. ``dof = 1`` is a detector that looks for the contact at the given distance with
    its strength free; one that searches over distances alarms more often by chance (the
    look-elsewhere effect, Gross & Vitells 2010, Eur. Phys. J. C 70:525): for it, lower
    ``false_alarm`` or raise ``dof``.
``reach_per_reading_m`` (best single reading, resistivity around the machine known)
    The largest distance at which any one usable quadrupole sees ``|R(d)/R0 - 1| >= k
    sigma/|R0|``: optimistic, it assumes ``rho0`` known and picks the best of many readings.

Both distances (and ``detectable_ahead_m`` per quadrupole) interpolate the threshold crossing
between the grid distance where the change is last seen and the next one, linearly in
log(value) against log(distance): exact for a power-law decay between two grid points (the far
field of a contact falls off as a power of the distance). A reach at the grid's last distance is
a lower bound (``reach_at_grid_end``, ``reach_per_reading_at_grid_end``).

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
from scipy.optimize import brentq
from scipy.stats import chi2, ncx2, norm

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
        Detection threshold of one reading, in standard deviations (``reach_per_reading_m``).
    false_alarm : float or None
        False alarm probability of the whole-set criterion (``reach_m``); None: ``2 Phi(-k)``.
    detection_probability : float
        Probability of detecting the contact at the reach (``reach_m``); 0.5 is the median.
    dof : int
        Degrees of freedom of the likelihood-ratio statistic under "no contact" (``reach_m``).
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
    false_alarm: float | None = None
    detection_probability: float = 0.5
    dof: int = 1
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


def detection_threshold(false_alarm: float, detection_probability: float, dof: int = 1) -> float:
    """Noncentrality a likelihood-ratio test needs to meet its false-alarm and detection goals.

    The statistic is chi-squared with ``dof`` degrees of freedom under "no contact" and
    noncentral chi-squared ``(dof, lambda)`` under the contact (Wald 1943, Trans. Amer. Math.
    Soc. 54:426-482; Cowan, Cranmer, Gross & Vitells 2011, Eur. Phys. J. C 71:1554, sec. 3). The
    test alarms above ``c = chi2.isf(false_alarm, dof)``; the threshold is the ``lambda`` with
    ``P(chi2'(dof, lambda) > c) = detection_probability``.

    Parameters
    ----------
    false_alarm : float
        Probability of an alarm without a contact, in (0, 1).
    detection_probability : float
        Probability of an alarm with the contact, in ``(false_alarm, 1)``.
    dof : int
        Degrees of freedom (>= 1).

    Returns
    -------
    float
        Threshold noncentrality ``lambda*`` (dimensionless, > 0).
    """
    if not 0.0 < false_alarm < 1.0:
        raise ValueError(f"false_alarm = {false_alarm!r}: expected a probability in (0, 1)")
    if not false_alarm < detection_probability < 1.0:
        raise ValueError(f"detection_probability = {detection_probability!r}: expected a "
                         f"probability above the false alarm {false_alarm!r} and below 1")
    if int(dof) != dof or dof < 1:
        raise ValueError(f"dof = {dof!r}: expected a whole number >= 1")
    crit = float(chi2.isf(false_alarm, dof))
    hi = 1.0
    while float(ncx2.sf(crit, dof, hi)) < detection_probability:
        hi *= 2.0
    return float(brentq(lambda lam: float(ncx2.sf(crit, dof, lam)) - detection_probability,
                        0.0, hi, xtol=1e-12, rtol=1e-12))


def profiled_noncentrality(relative_response: np.ndarray, relative_error: np.ndarray,
                           *, resistivity_known: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Minimum chi-squared of the homogeneous model against noise-free contact data.

    Parameters
    ----------
    relative_response : ndarray (measurement, distance)
        ``r = R(d)/R0 - 1`` (dimensionless); non-finite entries are left out.
    relative_error : ndarray (measurement,)
        ``sigma / |R0|`` (dimensionless); infinite entries carry no weight.
    resistivity_known : bool
        Hold the resistivity around the machine at its true value (``s = 1``) instead of
        fitting it.

    Returns
    -------
    noncentrality : ndarray (distance,)
        ``lambda = sum w (r - (s - 1))^2`` at the best ``s`` (dimensionless).
    resistivity_ratio : ndarray (distance,)
        Best homogeneous resistivity / true resistivity around the machine, ``s``
        (dimensionless; 1 where nothing is weighted or the resistivity is known).
    """
    r = np.asarray(relative_response, float)
    err = np.asarray(relative_error, float)
    with np.errstate(divide="ignore"):
        w = np.where(np.isfinite(err) & (err > 0), 1.0 / err**2, 0.0)
    w = np.broadcast_to(w[:, None], r.shape)
    ok = np.isfinite(r) & (w > 0)
    wz = np.where(ok, w, 0.0)
    rz = np.where(ok, r, 0.0)
    wsum = wz.sum(axis=0)
    if resistivity_known:
        shift = np.zeros(r.shape[1])
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            shift = np.where(wsum > 0, (wz * rz).sum(axis=0) / np.where(wsum > 0, wsum, 1.0),
                             0.0)
    lam = (wz * (rz - shift[None, :]) ** 2).sum(axis=0)
    return lam, 1.0 + shift


def threshold_crossing(distance_m: np.ndarray, value: np.ndarray,
                       threshold: float) -> tuple[float, bool]:
    """Largest distance where ``value >= threshold``, interpolated to the crossing.

    The crossing lies between the last grid distance where the value reaches the threshold and
    the next one; there ``log(value)`` is interpolated linearly in ``log(distance)`` (exact for a
    power law between the two points). Where the next value is not positive, ``value`` itself is
    interpolated linearly in ``log(distance)``.

    Parameters
    ----------
    distance_m : ndarray
        Increasing distances, m.
    value : ndarray
        Detection statistic at each distance (non-finite: not seen).
    threshold : float
        Value at which the change counts as seen (> 0).

    Returns
    -------
    distance : float
        Crossing distance, m; 0 when never seen; the last distance when still seen there.
    at_end : bool
        Seen at the last grid distance (the distance is a lower bound).
    """
    d = np.asarray(distance_m, float)
    v = np.asarray(value, float)
    seen = np.isfinite(v) & (v >= threshold)
    if not seen.any():
        return 0.0, False
    j = int(np.flatnonzero(seen)[-1])
    if j == d.size - 1:
        return float(d[j]), True
    v0, v1 = float(v[j]), float(v[j + 1])
    x0, x1 = np.log(d[j]), np.log(d[j + 1])
    if np.isfinite(v1) and v1 > 0:
        t = (np.log(v0) - np.log(threshold)) / (np.log(v0) - np.log(v1))
    else:
        v1 = v1 if np.isfinite(v1) else 0.0
        t = (v0 - threshold) / (v0 - v1) if v0 > v1 else 0.0
    t = float(np.clip(t, 0.0, 1.0))
    return float(np.exp(x0 + t * (x1 - x0))), False


def detectability(ds: xr.Dataset, *, noise_rel: float, noise_abs_v: float = 0.0,
                  current_a: float = 1.0, k: float = 3.0, false_alarm: float | None = None,
                  detection_probability: float = 0.5, dof: int = 1) -> xr.Dataset:
    """Add detectable distance per quadrupole and the layout's two reaches to a response dataset.

    Parameters
    ----------
    ds : xarray.Dataset
        Output of :func:`response_vs_distance`.
    noise_rel : float
        Relative error b (fraction).
    noise_abs_v : float
        Absolute voltage error, V.
    current_a : float
        Injected current, A.
    k : float
        Threshold of one reading in standard deviations.
    false_alarm : float, optional
        False alarm probability of the whole-set criterion (default ``2 Phi(-k)``).
    detection_probability : float
        Detection probability at the whole-set reach.
    dof : int
        Degrees of freedom of the whole-set statistic.

    Returns
    -------
    xarray.Dataset
        The input plus ``relative_error`` (measurement), ``detected`` (measurement,
        distance_ahead), ``detectable_ahead_m`` (measurement; interpolated crossing, 0 where
        never), ``usable`` (measurement; relative error below 1), ``noncentrality`` and
        ``noncentrality_known_resistivity`` and ``fitted_resistivity_ratio`` (distance_ahead),
        the scalars ``reach_m`` (whole set, resistivity unknown), ``reach_per_reading_m`` (best
        single reading, resistivity known), ``detection_threshold``, and the flags
        ``reach_at_grid_end`` / ``reach_per_reading_at_grid_end`` (still seen at the grid's last
        distance: a lower bound).
    """
    if false_alarm is None:
        false_alarm = float(2.0 * norm.sf(k))
    lam_star = detection_threshold(false_alarm, detection_probability, dof)
    r0 = np.abs(ds["r0_ohm"].values)
    a_ohm = noise_abs_v / current_a
    with np.errstate(divide="ignore", invalid="ignore"):
        rel_err = (a_ohm + noise_rel * r0) / r0
    rel_err = np.where(np.isfinite(rel_err), rel_err, np.inf)
    rel = ds["relative_response"].values
    resp = np.abs(rel)
    detected = resp >= k * rel_err[:, None]
    detected &= np.isfinite(resp)
    d = ds["distance_ahead"].values
    usable = rel_err < 1.0
    det = np.zeros(r0.size)
    for i in range(r0.size):
        if np.isfinite(rel_err[i]) and rel_err[i] > 0:
            det[i] = threshold_crossing(d, resp[i] / (k * rel_err[i]), 1.0)[0]
    if usable.any():
        i_best = int(np.flatnonzero(usable)[np.argmax(det[usable])])
        per_reading = float(det[i_best])
        per_reading_end = bool(d.size and detected[i_best, -1] and per_reading >= d.max())
    else:
        per_reading, per_reading_end = 0.0, False
    lam, ratio = profiled_noncentrality(rel, rel_err)
    lam_known, _ = profiled_noncentrality(rel, rel_err, resistivity_known=True)
    reach, reach_end = threshold_crossing(d, lam, lam_star)
    crit = (f"likelihood ratio, {dof} degree(s) of freedom: false alarm {false_alarm:.3g}, "
            f"detection probability {detection_probability:.3g}")
    out = ds.copy()
    out["relative_error"] = ("measurement", rel_err,
                             {"units": "1", "long_name": "relative standard error a/|R0| + b"})
    out["detected"] = (("measurement", "distance_ahead"), detected,
                       {"long_name": f"|dR/R| >= {k:g} sigma/|R|"})
    out["detectable_ahead_m"] = ("measurement", det,
                                 {"units": "m", "long_name": "largest distance ahead at which "
                                                             "this reading alone sees the change "
                                                             "(resistivity around known; "
                                                             "crossing interpolated in log-log)"})
    out["usable"] = ("measurement", usable, {"long_name": "relative error below 100 %"})
    out["noncentrality"] = ("distance_ahead", lam,
                            {"units": "1", "long_name": "minimum chi-squared of the homogeneous "
                                                        "model with free resistivity against "
                                                        "the noise-free contact data"})
    out["noncentrality_known_resistivity"] = (
        "distance_ahead", lam_known,
        {"units": "1", "long_name": "chi-squared of the true homogeneous ground against the "
                                    "noise-free contact data (resistivity around known)"})
    out["fitted_resistivity_ratio"] = ("distance_ahead", ratio,
                                       {"units": "1", "long_name": "best homogeneous "
                                                                   "resistivity / resistivity "
                                                                   "around the machine"})
    out["detection_threshold"] = ((), lam_star, {"units": "1", "long_name": "noncentrality "
                                                 "needed by the criterion: " + crit})
    out["reach_m"] = ((), reach, {"units": "m", "long_name": "look-ahead reach: whole reading "
                                  "set, resistivity around the machine unknown (" + crit + ")"})
    out["reach_at_grid_end"] = ((), bool(reach_end),
                                {"long_name": "reach_m is the last distance of the grid (a lower "
                                              "bound: the change is still seen there)"})
    out["reach_per_reading_m"] = ((), per_reading,
                                  {"units": "m", "long_name": f"best single reading, resistivity "
                                                              f"around the machine known, "
                                                              f"|dR/R| >= {k:g} sigma/|R|"})
    out["reach_per_reading_at_grid_end"] = ((), per_reading_end,
                                            {"long_name": "reach_per_reading_m is the last "
                                                          "distance of the grid (a lower "
                                                          "bound)"})
    out.attrs.update(noise_rel=noise_rel, noise_abs_v=noise_abs_v, current_a=current_a, k=k,
                     false_alarm=false_alarm, detection_probability=detection_probability,
                     dof=int(dof))
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
                         current_a=settings.current_a, k=settings.k,
                         false_alarm=settings.false_alarm,
                         detection_probability=settings.detection_probability, dof=settings.dof)


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
           "response_vs_distance", "reading_family", "detection_threshold",
           "profiled_noncentrality", "threshold_crossing", "detectability", "best_measurements",
           "reach_study", "load_sweep"]
