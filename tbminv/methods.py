"""Research comparison of forward geometries on one synthetic drive.

Each method turns the same per-advance data (:class:`tbminv.invert.AdvanceData`) into one record
per advance with the same fields (:data:`RECORD_COLUMNS`): the fitted distance from the face to
the contact, its error against the known synthetic contact, chi-squared of the data fit and the
wall time per advance. Methods (names in :data:`METHODS`):

``axisym``
    The toolkit's main chain: axisymmetric image inversion on the parameter grid, the machine and
    tunnel fixed, warm-started, followed by the parametric contact fit over a window of advances
    (:class:`tbminv.invert.DriveInverter`). Distance: the contact fit.
``region3d``
    Coarse region-wise 3D: the ground ahead of the face split into a few slabs square to the axis
    plus the ground around the machine, one resistivity each, fitted by damped Gauss-Newton
    (Levenberg-Marquardt; Marquardt 1963, J. SIAM 11(2):431-441) in log resistivity, with a
    smoothness term between neighbouring regions, and a
    finite-difference Jacobian on pyGIMLi's 3D forward (:mod:`tbminv.forward3d`, a small P1
    mesh, the same for every parameter vector; slab boundaries are filled by cell centres, as
    facets across the whole box would multiply the nodes five-fold). Distance: the
    equivalent sharp contact of the slab profile (:func:`equivalent_contact`). Resolution is
    bounded by the slab thickness.
``section25d``
    A vertical Cartesian 2.5D section through the axis on pyGIMLi's own 2.5D ERT
    (:class:`tbminv.section25d.SectionModel` meshes, :class:`pygimli.physics.ert.ERTManager`):
    the ground cells of the section are inverted with the machine and tunnel as fixed regions.
    Data are ratio-corrected (Fox et al. 1980, Geophysics 45(1):75-93): apparent resistivities
    ``rho_a = rho_ref R_obs / R_3D(hom)`` with the homogeneous response of the true 3D geometry,
    inverted with the section's own factors ``k = rho_ref / R_2.5D(hom)``.
    **Known bias:** 2.5D makes every body infinite across the section; the machine becomes an
    earthed steel slab and the tunnel a resistive slab. The ratio correction removes the
    homogeneous part of that error only: the sensitivity to the ground ahead stays that of a slab
    geometry (too wide a footprint across the section, a different decay with distance), so the
    image and its distance to a contact are biased; readings near the machine differ from 3D by
    several percent even after correction (as large as the signal of a contact 10-20 m ahead).
    Use it to compare methods, never for decisions. Distance: equivalent sharp contact of the
    image along the axis.

Everything here is an interpretation aid for research: the synthetic ground is invented, and
probing, site investigation and licensed engineers decide; local codes rule.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tbminv.ground import Contact, Scenario
from tbminv.invert import AdvanceData, InversionSettings
from tbminv.layout import Layout, Measurement

_LOG = logging.getLogger("tbminv.methods")

METHODS = ("axisym", "region3d", "section25d")
"""Names of the compared methods."""

RECORD_COLUMNS = ("method", "settings", "layout", "advance", "face_chainage_m", "true_ahead_m",
                  "ahead_m", "distance_error_m", "chi2", "rrms_percent", "iterations",
                  "n_data", "time_s")
"""Columns of the comparison table, one row per method, settings, layout and advance."""


# ------------------------------------------------------------------------ synthetic drive
@dataclass
class SyntheticDrive:
    """A synthetic drive ready for every method.

    Attributes
    ----------
    layout : Layout
        Layout of the readings (its protocol is what the methods invert).
    scenario : Scenario
        The ground the readings were simulated in.
    readings : pandas.DataFrame
        The simulated readings log (DESIGN 3.2 columns).
    data : list of AdvanceData
        QC'd readings per advance (normal and reciprocal merged, error model applied).
    contact_chainage_m : float
        Chainage of the first contact square to the axis ahead of the first face, m (NaN: none).
    name : str
        Label of the layout in the comparison table.
    """

    layout: Layout
    scenario: Scenario
    readings: pd.DataFrame
    data: list[AdvanceData]
    contact_chainage_m: float
    name: str = "layout"

    def true_ahead_m(self, face_chainage_m: float) -> float:
        """Distance from the face to the true contact, m (NaN: no contact)."""
        return float(self.contact_chainage_m - face_chainage_m)

    def with_layout(self, layout: Layout, name: str) -> SyntheticDrive:
        """The same readings restricted to the protocol of ``layout`` (a sub-protocol)."""
        keep = {q.labels() for q in layout.measurements}
        keep |= {q.reciprocal().labels() for q in layout.measurements}
        ab = self.readings[["a", "b", "m", "n"]].astype(object)
        ab = ab.where(ab.notna() & (ab != ""), None)
        mask = [tuple(r) in keep for r in ab.itertuples(index=False, name=None)]
        readings = self.readings.loc[mask].reset_index(drop=True)
        data = _qc_data(readings, layout, None)
        return dataclasses.replace(self, layout=layout, readings=readings, data=data, name=name)


COMPACT_EXTRA = (("M0", "R1", "C1", "R1"), ("M0", "R1", "C4", "R1"), ("M0", "R1", "S1", "R1"),
                 ("C1", "R1", "S1", "R1"), ("C1", "R1", "S3", "R1"), ("C1", "R1", "S5", "R1"),
                 ("C1", "R1", "W1", "R1"), ("C1", "R1", "W3", "R1"), ("M0", "R1", "W2", "R1"),
                 ("M0", "R1", "W4", "R1"), ("M0", "R1", "S6", "R1"))
"""Pole-pole readings added to the demo layout's explicit protocol by :func:`compact_layout`.

The machine-pole readings against the remote at infinity are the ones the contact fit uses
(readings with the remote ``R2`` at a position, or with wall electrodes, stay out of it)."""


def compact_layout(layout: Layout, extra: Sequence[tuple] = COMPACT_EXTRA, *,
                   walls: bool = True) -> Layout:
    """A small protocol for fast comparisons: the explicit readings plus ``extra``.

    Parameters
    ----------
    layout : Layout
    extra : sequence of (a, b, m, n)
        Quadrupoles added after the explicit ones (skipped when a label is not in the layout).
    walls : bool
        False: leave out every reading that uses an electrode fixed in the ground (a layout of
        machine electrodes only).

    Returns
    -------
    Layout
        ``layout`` with ``explicit_measurements`` replaced and no generators; a remote at
        infinity becomes a plain pole (None), as :func:`tbminv.invert.advance_data` matches
        readings to the protocol with poles as None.
    """
    labels = set(layout.labels)
    inf = {e.label for e in layout.electrodes if e.at_infinity}
    quads = []
    for q in (*(m.labels() for m in layout.explicit_measurements), *extra):
        if all(x is None or x in labels for x in q):
            # a remote at infinity is written as a pole (empty b / n in the log)
            quads.append(Measurement(*(None if x in inf else x for x in q)))
    if not walls:
        fixed = {e.label for e in layout.electrodes if e.kind == "wall"}
        quads = [q for q in quads if not fixed & {x for x in q.labels() if x}]
    seen = dict.fromkeys(quads)
    return dataclasses.replace(layout, explicit_measurements=tuple(seen), generators=())


def first_contact_chainage(scenario: Scenario, after_m: float) -> float:
    """Chainage of the first contact square to the axis beyond ``after_m``, m (NaN: none)."""
    xs = [c.chainage_m for c in scenario.contacts if c.square_to_axis and c.chainage_m > after_m]
    return float(min(xs)) if xs else math.nan


def _qc_data(readings: pd.DataFrame, layout: Layout, qc_settings: Any | None
             ) -> list[AdvanceData]:
    """Readings log -> checked (reader, quarantine), QC'd, per-advance data."""
    import tempfile

    from tbminv.invert import advance_data
    from tbminv.qc import QCSettings, run_qc
    from tbminv.readings import read_readings
    from tbminv.simulate import write_readings

    qs = qc_settings or QCSettings(error_model_group="log", min_pairs=8)
    with tempfile.TemporaryDirectory(prefix="tbminv-methods-") as tmp:
        path = write_readings(readings, Path(tmp) / "readings.csv")
        checked = read_readings(path, layout)
    if len(checked.quarantine):
        _LOG.warning("%d simulated readings quarantined", len(checked.quarantine))
    qc = run_qc(checked, qs)
    return advance_data(qc.table, layout)


def synthetic_drive(layout: Layout, scenario: Scenario, faces_m: Sequence[float], *,
                    model: str = "3d", noise_rel: float = 0.02, noise_abs_v: float = 1e-6,
                    seed: int = 7, qc_settings: Any | None = None, name: str = "layout"
                    ) -> SyntheticDrive:
    """Simulate a drive (:func:`tbminv.simulate.simulate_drive`), QC it and group it by advance.

    Parameters
    ----------
    layout, scenario : Layout, Scenario
    faces_m : sequence of float
        Face chainages, m.
    model : str
        Simulation model in :data:`tbminv.simulate.MODELS` (see :func:`register_simulate_models`
        for ``3d-coarse`` and ``section``).
    noise_rel, noise_abs_v : float
        Gaussian noise, relative and in V.
    seed : int
        Noise seed.
    qc_settings : QCSettings, optional
        Default: one reciprocal error model for the whole log (``error_model_group = "log"``),
        as a short drive has too few pairs per advance.
    name : str
        Label of the layout in the comparison table.
    """
    from tbminv.simulate import simulate_drive

    readings = simulate_drive(layout, scenario, faces_m, model=model, noise_rel=noise_rel,
                              noise_abs_v=noise_abs_v, seed=seed)
    data = _qc_data(readings, layout, qc_settings)
    return SyntheticDrive(layout, scenario, readings, data,
                          first_contact_chainage(scenario, float(min(faces_m))), name)


def with_error_floor(data: Sequence[AdvanceData], floor_rel: float) -> list[AdvanceData]:
    """Add a relative modelling-error floor in quadrature to every reading's error.

    ``e = sqrt(e_qc^2 + floor_rel^2)``: an error model for forward models that are known to
    differ from the data's physics by about ``floor_rel`` (0: the QC error model alone).
    """
    if floor_rel < 0:
        raise ValueError(f"floor_rel = {floor_rel!r}: expected >= 0")
    return [dataclasses.replace(d, rel_error=np.sqrt(np.asarray(d.rel_error, float) ** 2
                                                     + floor_rel ** 2)) for d in data]


# ------------------------------------------------------------------------ records
@dataclass(frozen=True)
class AdvanceRecord:
    """One row of the comparison table (see :data:`RECORD_COLUMNS`; lengths in m, time in s)."""

    method: str
    settings: str
    layout: str
    advance: int
    face_chainage_m: float
    true_ahead_m: float
    ahead_m: float
    distance_error_m: float
    chi2: float
    rrms_percent: float
    iterations: int
    n_data: int
    time_s: float


def _record(method: str, label: str, drive: SyntheticDrive, adv: AdvanceData, ahead: float,
            chi2: float, rrms: float, iters: int, n: int, t: float) -> AdvanceRecord:
    true = drive.true_ahead_m(adv.face_chainage_m)
    return AdvanceRecord(method, label, drive.name, int(adv.advance), float(adv.face_chainage_m),
                         true, float(ahead), float(ahead - true), float(chi2), float(rrms),
                         int(iters), int(n), float(t))


def records_table(records: Sequence[AdvanceRecord]) -> pd.DataFrame:
    """The comparison table: one row per record, columns :data:`RECORD_COLUMNS`."""
    return pd.DataFrame([dataclasses.asdict(r) for r in records], columns=list(RECORD_COLUMNS))


def summary_table(table: pd.DataFrame) -> pd.DataFrame:
    """One row per method, settings and layout: medians over the advances.

    Columns: ``method, settings, layout, advances, found`` (advances with a finite distance),
    ``median_abs_error_m``, ``median_chi2``, ``max_chi2``, ``time_per_advance_s``.
    """
    rows = []
    for (m, s, lay), g in table.groupby(["method", "settings", "layout"], sort=False):
        err = g["distance_error_m"].to_numpy(float)
        ok = np.isfinite(err)
        rows.append({"method": m, "settings": s, "layout": lay, "advances": len(g),
                     "found": int(ok.sum()),
                     "median_abs_error_m": float(np.median(np.abs(err[ok]))) if ok.any()
                     else math.nan,
                     "median_chi2": float(np.median(g["chi2"])),
                     "max_chi2": float(np.max(g["chi2"])),
                     "time_per_advance_s": float(np.mean(g["time_s"]))})
    return pd.DataFrame(rows)


# ------------------------------------------------------------------------ contact from a profile
def equivalent_contact(ahead_m: np.ndarray, log_rho: np.ndarray, *,
                       near_value: float | None = None, min_contrast: float = 1.25) -> float:
    """Distance of the sharp contact equivalent to a resistivity profile ahead of the face, m.

    With ``v0`` the log resistivity at the face (``near_value``, else the first sample) and
    ``v1`` the sample farthest from it in log resistivity, the profile is normalised to
    ``f = clip((v - v0) / (v1 - v0), 0, 1)`` and the contact is put where a step from 0 to 1
    has the same integral: ``d = a0 + integral_{a0}^{a1} (1 - f) da`` (``a0`` the first sample,
    ``a1`` the position of ``v1``; trapezoidal rule). A sharp step returns its own position; a
    slab model returns the position interpolated by its intermediate slab values.

    Parameters
    ----------
    ahead_m : ndarray
        Increasing distances ahead of the face, m.
    log_rho : ndarray
        Natural log of resistivity at those distances.
    near_value : float, optional
        Log resistivity on the face side (e.g. the ground around the machine).
    min_contrast : float
        Smallest resistivity ratio ``exp(|v1 - v0|)`` reported as a contact (below: NaN).

    Returns
    -------
    float
        Distance ahead, m; NaN when the profile changes by less than ``min_contrast``.
    """
    a = np.asarray(ahead_m, float)
    v = np.asarray(log_rho, float)
    ok = np.isfinite(a) & np.isfinite(v)
    a, v = a[ok], v[ok]
    if a.size < 2:
        return math.nan
    if np.any(np.diff(a) <= 0):
        raise ValueError("ahead_m must increase")
    v0 = float(v[0] if near_value is None else near_value)
    i1 = int(np.argmax(np.abs(v - v0)))
    v1 = float(v[i1])
    if abs(v1 - v0) < math.log(min_contrast) or i1 == 0:
        return math.nan
    f = np.clip((v[: i1 + 1] - v0) / (v1 - v0), 0.0, 1.0)
    g = 1.0 - f
    return float(a[0] + np.sum(0.5 * (g[1:] + g[:-1]) * np.diff(a[: i1 + 1])))


def slab_profile(boundaries_m: Sequence[float], log_rho_slabs: Sequence[float], ahead_m: np.ndarray
                 ) -> np.ndarray:
    """Log resistivity of a slab model at distances ahead (slab ``k`` from ``b_k`` to ``b_k+1``).

    The last slab extends to infinity; points before ``b_0`` take the first slab's value.
    """
    b = np.asarray(boundaries_m, float)
    v = np.asarray(log_rho_slabs, float)
    if b.size != v.size:
        raise ValueError(f"{b.size} boundaries for {v.size} slabs")
    idx = np.clip(np.searchsorted(b, np.asarray(ahead_m, float), side="right") - 1, 0, v.size - 1)
    return v[idx]


def slab_contact(boundaries_m: Sequence[float], log_rho_slabs: Sequence[float],
                 log_rho_around: float, *, min_contrast: float = 1.25, step_m: float = 0.05
                 ) -> float:
    """Equivalent sharp contact of a slab model (:func:`equivalent_contact` on its profile), m.

    The profile is sampled every ``step_m`` up to the start of the last (open) slab plus one
    thickness of the slab before it.
    """
    b = np.asarray(boundaries_m, float)
    end = b[-1] + (b[-1] - b[-2] if b.size > 1 else 1.0)
    a = np.arange(b[0] + 0.5 * step_m, end, step_m)
    return equivalent_contact(a, slab_profile(b, log_rho_slabs, a), near_value=log_rho_around,
                              min_contrast=min_contrast)


# ------------------------------------------------------------------------ (a) axisymmetric
def drive_inverter(layout: Layout, settings: InversionSettings | None = None,
                   model: Any | None = None) -> Any:
    """A :class:`tbminv.invert.DriveInverter` for a layout.

    Its contact table uses the sub-protocol of the electrodes that travel with the machine, on a
    model built for that sub-protocol.
    """
    from tbminv.invert import DriveInverter

    return DriveInverter(layout, settings, model=model)


def image_contact(res: Any, layout: Layout, *, ahead_max_m: float | None = None,
                  min_contrast: float = 1.25) -> float:
    """Equivalent sharp contact of an axisymmetric image along the axis, m ahead of the face.

    ``res`` is a :class:`tbminv.section.AdvanceResult`; the profile is the image column nearest
    the axis from the face to ``ahead_max_m`` (default 5 D); the face-side value is the median of
    the ground beside the shield (one radius outside it).
    """
    a = np.asarray(res.ahead_m, float)
    rad = np.asarray(res.radius_m, float)
    rho = np.asarray(res.resistivity_ohmm, float)
    d = layout.machine.diameter_m
    big_r, shield = layout.machine.radius_m, layout.machine.shield_length_m
    amax = ahead_max_m or 5.0 * d
    sel = (a > 0) & (a <= amax)
    prof = np.log(rho[sel, int(np.argmin(rad))])
    beside = rho[np.ix_((a < 0) & (a > -shield), (rad > big_r) & (rad < 2 * big_r))]
    near = float(np.nanmedian(np.log(beside))) if np.isfinite(beside).any() else None
    return equivalent_contact(a[sel], prof, near_value=near, min_contrast=min_contrast)


def run_axisym(drive: SyntheticDrive, settings: InversionSettings | None = None, *,
               model: Any | None = None, label: str = "default", error_floor: float = 0.0,
               inverter: Any | None = None, distance: str = "contact") -> list[AdvanceRecord]:
    """Method ``axisym``: image inversion + contact fit along the drive.

    Parameters
    ----------
    drive : SyntheticDrive
    settings : InversionSettings, optional
    model : ForwardModel, optional
        An ``axisym`` model built for ``drive.layout`` (e.g. with coarse settings).
    label : str
        Settings label in the table.
    error_floor : float
        Relative modelling-error floor (:func:`with_error_floor`).
    inverter : DriveInverter, optional
        Reuse an inverter (its response table and operators) built for the same layout.
    distance : {"contact", "image", "both"}
        Distance from the parametric contact fit, from the image along the axis
        (:func:`image_contact`), or both (two records per advance, labels suffixed
        ``" / contact fit"`` and ``" / image"``).

    Returns
    -------
    list of AdvanceRecord
        ``time_s``: wall time of the whole run (images, contact fit, response table if not
        cached) divided by the advances.
    """
    data = with_error_floor(drive.data, error_floor)
    t0 = time.perf_counter()
    inv = inverter or drive_inverter(drive.layout, settings, model=model)
    results = inv.run(data, cold=not inv.settings.warm_start)
    per = (time.perf_counter() - t0) / max(len(data), 1)
    if distance not in ("contact", "image", "both"):
        raise ValueError(f"distance = {distance!r}: expected 'contact', 'image' or 'both'")
    kinds = ("contact", "image") if distance == "both" else (distance,)
    out = []
    for kind in kinds:
        suffix = " / contact fit" if kind == "contact" else " / image"
        lab = label + suffix if distance == "both" else label
        for adv, res in zip(data, results):
            if kind == "contact":
                ahead = res.contact.ahead_m if res.contact is not None else math.nan
            else:
                ahead = image_contact(res, drive.layout)
            out.append(_record("axisym", lab, drive, adv, ahead, res.chi2, res.rrms_percent,
                               res.iterations, res.n_used, per))
    return out


# ------------------------------------------------------------------------ (b) region-wise 3D
def coarse_mesh_settings() -> Any:
    """A small 3D mesh for the region-wise method (P1, ~4k nodes, about 1 s per forward)."""
    from tbminv.mesh3d import MeshSettings

    return MeshSettings(box_m=120.0, n_segments=8, quality=1.5, electrode_size_m=0.3,
                        face_size_m=1.5, growth=2.0, refine_ahead_m=20.0)


@dataclass(frozen=True)
class Region3DSettings:
    """Settings of the region-wise 3D method (lengths in m).

    Attributes
    ----------
    boundaries_in_diameters : tuple of float
        Starts of the slabs ahead of the face in machine diameters (the first is the face, 0);
        the last slab is open. Ground behind the face (around machine and tunnel) is one more
        region.
    p2 : bool
        Quadratic elements (slower; P1 suffices with the ratio-style geometric factors).
    mesh : MeshSettings or None
        3D mesh knobs; None: :func:`coarse_mesh_settings`.
    lam : float
        Marquardt damping relative to the mean diagonal of ``J^T J`` (multiplied by
        ``lambda_factor`` after each accepted step, by 10 after a rejected one).
    lambda_factor : float
        Damping decrease per accepted step.
    smoothness : float
        Weight of the squared log-resistivity differences between neighbouring regions
        (around machine - first slab - second slab ...), in units of one datum's chi-squared
        (0: no smoothing, damping only).
    max_iter : int
        Gauss-Newton iterations.
    fd_step : float
        Step of the finite-difference Jacobian in log resistivity.
    lower_ohmm, upper_ohmm : float
        Bounds of the resistivities, ohm-m.
    min_contrast : float
        Smallest contrast reported as a contact (:func:`equivalent_contact`).
    warm_start : bool
        Start each advance from the previous one's regions (slabs fixed to the machine: the
        values are carried over unshifted).
    """

    boundaries_in_diameters: tuple[float, ...] = (0.0, 1.0, 2.5, 5.0)
    p2: bool = False
    mesh: Any | None = None
    lam: float = 0.1
    lambda_factor: float = 0.3
    smoothness: float = 30.0
    max_iter: int = 6
    fd_step: float = 0.1
    lower_ohmm: float = 0.1
    upper_ohmm: float = 1e5
    min_contrast: float = 1.25
    warm_start: bool = True

    def __post_init__(self) -> None:
        b = self.boundaries_in_diameters
        if len(b) < 1 or b[0] != 0.0 or any(y <= x for x, y in zip(b[:-1], b[1:])):
            raise ValueError("Region3DSettings.boundaries_in_diameters must start at 0 and "
                             "increase")
        if not self.lam > 0 or not 0 < self.lambda_factor <= 1 or self.max_iter < 1:
            raise ValueError("Region3DSettings: expected lam > 0, 0 < lambda_factor <= 1, "
                             "max_iter >= 1")


def model_3d(layout: Layout, *, p2: bool = False, mesh: Any | None = None,
             honour_contacts: bool = True) -> Any:
    """The ``3d`` forward model (:class:`tbminv.models.Model3D`) with a small mesh.

    ``honour_contacts = False`` keeps one mesh for every ground (contacts filled by cell
    centres).
    """
    from tbminv.forward3d import ForwardSettings
    from tbminv.models import make_model

    fs = ForwardSettings(p2=p2, mesh=mesh or coarse_mesh_settings(),
                         honour_contacts=honour_contacts)
    return make_model("3d", layout, settings=fs)


def slab_scenario(face_chainage_m: float, boundaries_m: Sequence[float], rho_around: float,
                  rho_slabs: Sequence[float]) -> Scenario:
    """A ground of slabs square to the axis fixed to the face (resistivities in ohm-m)."""
    contacts = tuple(Contact(chainage_m=float(face_chainage_m + b), resistivity_ohmm=float(r))
                     for b, r in zip(boundaries_m, rho_slabs))
    return Scenario(background_resistivity_ohmm=float(rho_around), contacts=contacts,
                    name="region-wise slabs")


@dataclass
class RegionFit:
    """Outcome of one region-wise fit (resistivities in ohm-m)."""

    rho_around_ohmm: float
    rho_slabs_ohmm: np.ndarray
    chi2: float
    rrms_percent: float
    iterations: int
    chi2_history: list[float]
    n_forward: int


def gauss_newton_log(fun: Callable[[np.ndarray], np.ndarray], y_log: np.ndarray,
                     err_log: np.ndarray, p0: np.ndarray, *, lam: float = 0.1,
                     lambda_factor: float = 0.3, max_iter: int = 6, fd_step: float = 0.1,
                     bounds: tuple[float, float] = (math.log(0.1), math.log(1e5)),
                     min_dphi: float = 0.01, roughness: np.ndarray | None = None,
                     smoothness: float = 0.0) -> tuple[np.ndarray, list[float], int]:
    """Damped Gauss-Newton (Levenberg-Marquardt) fit of a few log parameters.

    Minimises ``phi(p) = sum(((y_log - fun(p)) / err_log)^2) + smoothness |C p|^2`` (``C`` the
    ``roughness`` matrix, e.g. first differences of neighbouring regions) with a
    forward-difference Jacobian and Marquardt damping; reports the data term as
    ``chi2 = mean(((y_log - fun(p)) / err_log)^2)``. Stops at chi2 <= 1, after ``max_iter``
    iterations or when phi improves by less than ``min_dphi`` (fraction).

    Returns
    -------
    (p, chi2_history, n_forward)
    """
    p = np.clip(np.asarray(p0, float), *bounds)
    n_fwd = 0
    c_mat = (np.zeros((0, p.size)) if roughness is None or smoothness <= 0
             else math.sqrt(smoothness) * np.asarray(roughness, float))

    def chi2_of(f: np.ndarray) -> float:
        return float(np.mean(((y_log - f) / err_log) ** 2))

    def phi_of(f: np.ndarray, q: np.ndarray) -> float:
        return float(np.sum(((y_log - f) / err_log) ** 2) + np.sum((c_mat @ q) ** 2))

    f = fun(p)
    n_fwd += 1
    hist = [chi2_of(f)]
    phi = phi_of(f, p)
    mu = lam
    for _ in range(max_iter):
        if hist[-1] <= 1.0:
            break
        jac = np.empty((y_log.size, p.size))
        for j in range(p.size):
            q = p.copy()
            q[j] += fd_step
            jac[:, j] = (fun(q) - f) / fd_step
            n_fwd += 1
        jw = jac / err_log[:, None]
        rw = (y_log - f) / err_log
        jtj = jw.T @ jw
        scale = max(float(np.mean(np.diag(jtj))), 1e-12)
        lhs = jtj + c_mat.T @ c_mat
        rhs = jw.T @ rw - c_mat.T @ (c_mat @ p)
        accepted = False
        for _try in range(4):
            step = np.linalg.solve(lhs + mu * scale * np.eye(p.size), rhs)
            q = np.clip(p + step, *bounds)
            fq = fun(q)
            n_fwd += 1
            phi_q = phi_of(fq, q)
            if phi_q < phi:
                accepted = True
                break
            mu *= 10.0
        if not accepted:
            break
        gain = (phi - phi_q) / phi
        p, f, phi = q, fq, phi_q
        hist.append(chi2_of(fq))
        mu *= lambda_factor
        if gain < min_dphi:
            break
    return p, hist, n_fwd


class RegionInverter:
    """Region-wise 3D inversion of one layout (see :class:`Region3DSettings`).

    Parameters
    ----------
    layout : Layout
    settings : Region3DSettings, optional
    model : ForwardModel, optional
        A 3D model with ``response(scenario, face, angle)`` (default: :func:`model_3d`).
    """

    def __init__(self, layout: Layout, settings: Region3DSettings | None = None,
                 model: Any | None = None) -> None:
        self.layout = layout
        self.settings = settings or Region3DSettings()
        self.model = model or model_3d(layout, p2=self.settings.p2, mesh=self.settings.mesh,
                                       honour_contacts=False)
        d = layout.machine.diameter_m
        self.boundaries_m = tuple(float(b) * d for b in self.settings.boundaries_in_diameters)

    def fit(self, adv: AdvanceData, rho_ref_ohmm: float, start: np.ndarray | None = None
            ) -> tuple[RegionFit, np.ndarray]:
        """Fit one advance; returns the fit and the selected readings' indices."""
        s = self.settings
        face, ch = adv.face_chainage_m, adv.cutterhead_deg
        r_hom = np.asarray(self.model.response(Scenario.homogeneous(rho_ref_ohmm), face, ch),
                           float)
        with np.errstate(divide="ignore", invalid="ignore"):
            k = rho_ref_ohmm / r_hom
            rhoa = k * adv.r_ohm
        sel = np.nonzero(np.isfinite(rhoa) & (rhoa > 0) & np.isfinite(adv.rel_error)
                         & (adv.rel_error > 0))[0]
        if sel.size < 2:
            raise ValueError(f"advance {adv.advance}: {sel.size} usable readings")
        y = np.log(rhoa[sel])
        err = np.asarray(adv.rel_error[sel], float)   # d ln R = dR / R
        n_slab = len(self.boundaries_m)

        def fun(p: np.ndarray) -> np.ndarray:
            rho = np.exp(p)
            sc = slab_scenario(face, self.boundaries_m, rho[0], rho[1:])
            r = np.asarray(self.model.response(sc, face, ch), float)[sel]
            with np.errstate(invalid="ignore", divide="ignore"):
                out = np.log(np.abs(k[sel] * r))
            return out

        p0 = (np.full(n_slab + 1, float(np.median(y))) if start is None
              else np.log(np.asarray(start, float)))
        rough = np.diff(np.eye(n_slab + 1), axis=0)      # first differences of neighbours
        p, hist, nf = gauss_newton_log(fun, y, err, p0, lam=s.lam,
                                       lambda_factor=s.lambda_factor, max_iter=s.max_iter,
                                       fd_step=s.fd_step,
                                       bounds=(math.log(s.lower_ohmm), math.log(s.upper_ohmm)),
                                       roughness=rough, smoothness=s.smoothness)
        resid = np.exp(y - fun(p)) - 1.0
        nf += 1
        rrms = float(100.0 * np.sqrt(np.mean(resid ** 2)))
        rho = np.exp(p)
        return RegionFit(float(rho[0]), rho[1:], hist[-1], rrms, len(hist) - 1, hist, nf), sel

    def contact_ahead_m(self, fit: RegionFit) -> float:
        """Equivalent sharp contact of a fitted slab model, m ahead of the face."""
        return slab_contact(self.boundaries_m, np.log(fit.rho_slabs_ohmm),
                            math.log(fit.rho_around_ohmm),
                            min_contrast=self.settings.min_contrast)


def run_region3d(drive: SyntheticDrive, settings: Region3DSettings | None = None, *,
                 model: Any | None = None, label: str = "default", error_floor: float = 0.0,
                 rho_ref_ohmm: float = 100.0) -> list[AdvanceRecord]:
    """Method ``region3d``: slabs ahead + ground around the machine, Gauss-Newton on 3D.

    ``time_s`` is the wall time of each advance (homogeneous run for the factors, Jacobians,
    line search).
    """
    data = with_error_floor(drive.data, error_floor)
    inv = RegionInverter(drive.layout, settings, model)
    out = []
    start = None
    for adv in data:
        t0 = time.perf_counter()
        fit, sel = inv.fit(adv, rho_ref_ohmm, start)
        ahead = inv.contact_ahead_m(fit)
        t = time.perf_counter() - t0
        _LOG.info("region3d advance %d: chi2 %.2f after %d iterations, %d forwards, %.1f s",
                  adv.advance, fit.chi2, fit.iterations, fit.n_forward, t)
        if inv.settings.warm_start:
            start = np.concatenate([[fit.rho_around_ohmm], fit.rho_slabs_ohmm])
        out.append(_record("region3d", label, drive, adv, ahead, fit.chi2, fit.rrms_percent,
                           fit.iterations, sel.size, t))
    return out


# ------------------------------------------------------------------------ (c) 2.5D section
@dataclass(frozen=True)
class SectionInversionSettings:
    """Settings of the Cartesian 2.5D section inversion.

    Attributes
    ----------
    lam : float
        Regularisation strength (pyGIMLi's ``lam``).
    lambda_factor : float
        Factor on lambda per iteration (1: fixed lambda; < 1: cooling).
    max_iter : int
        Iterations per advance.
    z_weight : float
        Vertical smoothness weight (pyGIMLi ``zWeight``; 1: isotropic).
    area_m2 : float
        Largest triangle of the section mesh, m^2 (the mesh is the parameter mesh).
    refine_m : float
        Refinement distance at the electrodes, m.
    domain_m : float
        Half-width of the section box, m.
    rho_ref_ohmm : float
        Homogeneous resistivity of the ratio correction and factors, ohm-m.
    profile_ahead_m : float or None
        Length of the axial profile read from the image, m (None: 5 D).
    min_contrast : float
        Smallest contrast reported as a contact.
    lower_ohmm, upper_ohmm : float
        Bounds of the log-bounded model, ohm-m.
    """

    lam: float = 2.0
    lambda_factor: float = 0.8
    max_iter: int = 8
    z_weight: float = 1.0
    area_m2: float = 400.0
    refine_m: float = 0.1
    domain_m: float = 250.0
    rho_ref_ohmm: float = 100.0
    profile_ahead_m: float | None = None
    min_contrast: float = 1.25
    lower_ohmm: float = 0.1
    upper_ohmm: float = 1e5


class SectionInverter:
    """Cartesian 2.5D section inversion of one layout (see the module docstring).

    Parameters
    ----------
    layout : Layout
    settings : SectionInversionSettings, optional
    reference : ForwardModel, optional
        The 3D model of the ratio correction (default: :func:`model_3d`, small P1 mesh).
    """

    def __init__(self, layout: Layout, settings: SectionInversionSettings | None = None,
                 reference: Any | None = None) -> None:
        from tbminv.section25d import Section25DSettings, SectionModel

        self.layout = layout
        self.settings = settings or SectionInversionSettings()
        s = self.settings
        self.reference = reference or model_3d(layout)
        self.section = SectionModel(layout, Section25DSettings(
            domain_m=s.domain_m, refine_m=s.refine_m, area_m2=s.area_m2,
            rho_ref_ohmm=s.rho_ref_ohmm, ratio_correction=True), reference=self.reference)

    def fit(self, adv: AdvanceData) -> dict[str, Any]:
        """Invert one advance; returns chi2, rrms, iterations, the axial profile and more."""
        from tbminv.gimli import configure_operator, ert, pg
        from tbminv.section25d import GROUND, MACHINE, TUNNEL

        s = self.settings
        face, ch = adv.face_chainage_m, adv.cutterhead_deg
        ratio = self.section.ratio(face, ch)
        r2_hom = self.section.response_uncorrected(Scenario.homogeneous(s.rho_ref_ohmm), face, ch)
        mesh, sensors, index = self.section._mesh(face, ch)
        with np.errstate(divide="ignore", invalid="ignore"):
            k2 = s.rho_ref_ohmm / r2_hom
            rhoa = k2 * adv.r_ohm / ratio
        sel = np.nonzero(np.isfinite(rhoa) & (rhoa > 0) & np.isfinite(k2)
                         & np.isfinite(adv.rel_error) & (adv.rel_error > 0))[0]
        if sel.size < 3:
            raise ValueError(f"advance {adv.advance}: {sel.size} usable readings")
        data = pg.DataContainerERT()
        for xy in sensors:
            data.createSensor([float(xy[0]), float(xy[1])])
        quads = self.layout.measurements
        for j, i in enumerate(sel):
            abmn = [index.get(lab, -1) if lab is not None else -1 for lab in quads[i].labels()]
            data.createFourPointData(j, *abmn)
        data.set("k", pg.Vector(k2[sel]))
        data.set("rhoa", pg.Vector(rhoa[sel]))
        data.set("err", pg.Vector(adv.rel_error[sel]))
        mgr = ert.ERTManager(sr=False, verbose=False)
        configure_operator(mgr.fop)
        mgr.setData(data)
        # no H2 refinement of the forward mesh: the factors k2 come from the unrefined section
        # mesh, and data and model must see the same discretisation (also 4x faster)
        mgr.fop._refineH2 = False
        mgr.setMesh(mesh)          # first the mesh, then the regions (see PYGIMLI-NOTES)
        if self.layout.machine.model_body:
            mgr.fop.setRegionProperties(MACHINE, fix=self.layout.machine.body_resistivity_ohmm)
        if self.layout.tunnel.model_cavity:
            mgr.fop.setRegionProperties(TUNNEL, fix=self.layout.tunnel.lining_resistivity_ohmm)
        mgr.fop.setRegionProperties(GROUND, background=False)
        model = mgr.invert(lam=s.lam, lambdaFactor=s.lambda_factor, maxIter=s.max_iter,
                           zWeight=s.z_weight, limits=[s.lower_ohmm, s.upper_ohmm],
                           startModel=float(np.median(rhoa[sel])), verbose=False)
        model = np.asarray(model, float)
        pd_mesh = mgr.paraDomain
        centers = np.array(pd_mesh.cellCenters())[:, :2]
        yc = self.section.axis_y_m()
        d = self.layout.machine.diameter_m
        length = s.profile_ahead_m or 5.0 * d
        a = np.linspace(0.05 * d, length, 60)
        # nearest parameter cell to each point on the axis ahead of the face
        from scipy.spatial import cKDTree

        tree = cKDTree(centers)
        _, idx = tree.query(np.column_stack([a, np.full_like(a, yc)]))
        prof = np.log(model[idx])
        # the ground around the machine: cells within one radius outside the shield
        R = self.layout.machine.radius_m
        L = self.layout.machine.shield_length_m
        dz = np.abs(centers[:, 1] - yc)
        around = (centers[:, 0] < -0.1 * L) & (centers[:, 0] > -L) & (dz > R) & (dz < 2 * R)
        near = float(np.median(np.log(model[around]))) if around.any() else None
        ahead = equivalent_contact(a, prof, near_value=near, min_contrast=s.min_contrast)
        chi2 = float(mgr.inv.chi2())
        return {"chi2": chi2, "rrms_percent": float(mgr.inv.relrms()),
                "iterations": max(0, len(mgr.inv.chi2History) - 1), "n_used": int(sel.size),
                "ahead_m": ahead, "profile_ahead_m": a, "profile_log_rho": prof,
                "model_ohmm": model, "mesh": pd_mesh, "selected": sel,
                "data_ohmm": rhoa[sel], "response_ohmm": np.asarray(mgr.inv.response, float),
                "chi2_history": [float(v) for v in mgr.inv.chi2History]}


def run_section25d(drive: SyntheticDrive, settings: SectionInversionSettings | None = None, *,
                   reference: Any | None = None, label: str = "default",
                   error_floor: float = 0.0, inverter: SectionInverter | None = None
                   ) -> list[AdvanceRecord]:
    """Method ``section25d``: pyGIMLi 2.5D section inversion of ratio-corrected data.

    ``time_s`` is the wall time of each advance including the 3D homogeneous run of the ratio
    correction (cached per electrode geometry).
    """
    data = with_error_floor(drive.data, error_floor)
    inv = inverter or SectionInverter(drive.layout, settings, reference)
    out = []
    for adv in data:
        t0 = time.perf_counter()
        res = inv.fit(adv)
        t = time.perf_counter() - t0
        _LOG.info("section25d advance %d: chi2 %.2f, %.1f s", adv.advance, res["chi2"], t)
        out.append(_record("section25d", label, drive, adv, res["ahead_m"], res["chi2"],
                           res["rrms_percent"], res["iterations"], res["n_used"], t))
    return out


# ------------------------------------------------------------------------ comparison
@dataclass(frozen=True)
class MethodCase:
    """One run of the comparison: a method with a settings label and keyword arguments.

    ``kwargs`` go to the method's ``run_*`` function (``settings=``, ``error_floor=``, ...).
    """

    method: str
    label: str = "default"
    kwargs: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ValueError(f"unknown method {self.method!r}; expected one of "
                             f"{', '.join(METHODS)}")


_RUNNERS: dict[str, Callable[..., list[AdvanceRecord]]] = {
    "axisym": run_axisym, "region3d": run_region3d, "section25d": run_section25d}


def compare(drives: SyntheticDrive | Sequence[SyntheticDrive], cases: Sequence[MethodCase]
            ) -> pd.DataFrame:
    """Run every case on every drive; the comparison table (:data:`RECORD_COLUMNS`)."""
    if isinstance(drives, SyntheticDrive):
        drives = [drives]
    recs: list[AdvanceRecord] = []
    for drive in drives:
        for case in cases:
            _LOG.info("method %s (%s) on %s", case.method, case.label, drive.name)
            recs.extend(_RUNNERS[case.method](drive, label=case.label, **case.kwargs))
    return records_table(recs)


def plot_comparison(table: pd.DataFrame) -> Any:
    """Figure: distance error and chi2 per advance, time per advance, by method and settings.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 3, figsize=(13.0, 4.0), constrained_layout=True)
    groups = list(table.groupby(["method", "settings", "layout"], sort=False))
    markers = {"axisym": "o", "region3d": "s", "section25d": "^"}
    for (m, s, lay), g in groups:
        lab = f"{m} / {s} / {lay}"
        mk = markers.get(m, "x")
        axes[0].plot(g["face_chainage_m"], g["distance_error_m"], marker=mk, label=lab)
        axes[1].plot(g["face_chainage_m"], g["chi2"], marker=mk, label=lab)
    axes[0].axhline(0.0, color="0.5", lw=0.8)
    axes[0].set_xlabel("face chainage (m)")
    axes[0].set_ylabel("distance-to-contact error (m)")
    axes[1].axhspan(0.5, 2.0, color="0.9", zorder=0)
    axes[1].set_yscale("log")
    axes[1].set_xlabel("face chainage (m)")
    axes[1].set_ylabel("chi-squared (1)")
    summ = summary_table(table)
    names = [f"{r.method}\n{r.settings}\n{r.layout}" for r in summ.itertuples()]
    axes[2].barh(np.arange(len(summ)), summ["time_per_advance_s"], color="0.4")
    axes[2].set_yticks(np.arange(len(summ)), names, fontsize=7)
    axes[2].set_xlabel("time per advance (s)")
    axes[0].legend(fontsize=6, loc="best")
    fig.suptitle("Forward geometries compared on one synthetic drive (invented ground)")
    return fig


def save_comparison(table: pd.DataFrame, out_dir: str | Path, stem: str = "methods"
                    ) -> list[Path]:
    """Write the table (CSV), its summary (CSV) and the figure (PDF + PNG) into ``out_dir``."""
    import matplotlib.pyplot as plt

    from tbminv.figures import save_figure

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    p = out / f"{stem}.csv"
    table.to_csv(p, index=False)
    paths.append(p)
    p = out / f"{stem}_summary.csv"
    summary_table(table).to_csv(p, index=False)
    paths.append(p)
    fig = plot_comparison(table)
    paths.extend(save_figure(fig, out / stem))
    plt.close(fig)
    return paths


# ------------------------------------------------------------------------ simulation hooks
def _coarse3d_simulate(layout: Layout, scenario: Scenario, face_chainage_m: float,
                       cutterhead_deg: float, measurements: Sequence[tuple]) -> np.ndarray:
    """``simulate`` signature on pyGIMLi's 3D with the default mesh and P1 elements."""
    from tbminv.forward3d import ForwardSettings, forward3d

    return forward3d(layout, scenario, face_chainage_m, cutterhead_deg, measurements,
                     settings=ForwardSettings(p2=False))


def register_simulate_models() -> tuple[str, ...]:
    """Register ``3d-p1`` in :data:`tbminv.simulate.MODELS` (idempotent).

    ``3d-p1`` is the 3D model on its default mesh with linear elements (about 4 s per face
    instead of about 20 s with P2; a few percent less accurate in absolute terms, which the
    numeric geometric factors of every method absorb). ``section`` is registered by
    :mod:`tbminv.simulate` itself.

    Returns
    -------
    tuple of str
        The registered names.
    """
    from tbminv.simulate import register_model

    register_model("3d-p1", _coarse3d_simulate, replace=True)
    return ("3d-p1",)


__all__ = ["METHODS", "RECORD_COLUMNS", "SyntheticDrive", "compact_layout", "synthetic_drive",
           "first_contact_chainage", "with_error_floor", "drive_inverter", "AdvanceRecord",
           "records_table", "summary_table", "equivalent_contact", "image_contact", "slab_profile",
           "slab_contact",
           "run_axisym",
           "Region3DSettings", "RegionInverter", "RegionFit", "gauss_newton_log", "model_3d",
           "coarse_mesh_settings", "slab_scenario", "run_region3d", "SectionInversionSettings",
           "SectionInverter", "run_section25d", "MethodCase", "compare", "plot_comparison",
           "save_comparison", "register_simulate_models"]
