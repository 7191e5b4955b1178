"""Research comparison of forward geometries on one synthetic drive.

Each method turns the same per-advance data (:class:`tbminv.readings.advance.AdvanceData`) into
one record per advance with the same fields (:data:`RECORD_COLUMNS`): the fitted distance from the
face to the contact, its error against the known synthetic contact, chi-squared of the data fit
and the wall time per advance. Methods (names in :data:`METHODS`):

``axisym``
    The toolkit's main chain: axisymmetric image inversion on the parameter grid, the machine and
    tunnel fixed, warm-started, followed by the parametric contact fit over a window of advances
    (:class:`tbminv.inversion.drive.DriveInverter`). Distance: the contact fit.
``region3d``
    Coarse region-wise 3D: the ground ahead of the face split into a few slabs square to the axis
    plus the ground around the machine, one resistivity each, fitted by damped Gauss-Newton
    (Levenberg-Marquardt; Marquardt 1963, J. SIAM 11(2):431-441) in log resistivity, with a
    smoothness term between neighbouring regions, and a finite-difference Jacobian on pyGIMLi's
    3D forward (:mod:`tbminv.forward.fem3d.model`, a small P1 mesh, the same for every
    parameter vector; slab boundaries are filled by cell centres, as
    facets across the whole box would multiply the nodes five-fold). Distance: the
    equivalent sharp contact of the slab profile (:func:`equivalent_contact`). Resolution is
    bounded by the slab thickness.
``section25d``
    A vertical Cartesian 2.5D section through the axis on pyGIMLi's own 2.5D ERT
    (:class:`tbminv.forward.cartesian25d.Cartesian25DModel` meshes,
    :class:`pygimli.physics.ert.ERTManager`):
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
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from tbminv.forward.registry import ForwardModel
from tbminv.ground import Scenario
from tbminv.layout import Layout, Measurement
from tbminv.readings.advance import AdvanceData, prepare_advances
from tbminv.readings.errorfloor import with_error_floor
from tbminv.readings.qc import QCSettings
from tbminv.studies.simulate import simulate_drive

_LOG = logging.getLogger(__name__)

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
        The simulated readings log (:data:`tbminv.studies.simulate.COLUMNS`).
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


COMPACT_EXTRA = (("BODY", "R1", "T1", "R1"), ("BODY", "R1", "T4", "R1"), ("BODY", "R1", "S1", "R1"),
                 ("T1", "R1", "S1", "R1"), ("T1", "R1", "S3", "R1"), ("T1", "R1", "S5", "R1"),
                 ("T1", "R1", "W1", "R1"), ("T1", "R1", "W3", "R1"), ("BODY", "R1", "W2", "R1"),
                 ("BODY", "R1", "W4", "R1"), ("BODY", "R1", "S6", "R1"))
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
        infinity becomes a plain pole (None), as :func:`tbminv.readings.advance.advance_data`
        matches readings to the protocol with poles as None.
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


def _qc_data(readings: pd.DataFrame, layout: Layout, qc_settings: QCSettings | None
             ) -> list[AdvanceData]:
    """Readings log -> checked (reader, quarantine), QC'd, per-advance data."""
    qs = qc_settings or QCSettings(error_model_group="log", min_pairs=8)
    prepared = prepare_advances(readings, layout, qs, label="<simulated readings>")
    return prepared.advances


def synthetic_drive(layout: Layout, scenario: Scenario, faces_m: Sequence[float], *,
                    model: str | ForwardModel = "3d", noise_rel: float = 0.02,
                    noise_abs_v: float = 1e-6, seed: int = 7,
                    qc_settings: QCSettings | None = None, name: str = "layout"
                    ) -> SyntheticDrive:
    """Simulate a drive (:func:`tbminv.studies.simulate.simulate_drive`), QC it, group it.

    Parameters
    ----------
    layout, scenario : Layout, Scenario
    faces_m : sequence of float
        Face chainages, m.
    model : str or ForwardModel
        Simulation model: a registry name (``3d``, ``axisym``, ``section``, ``analytic``) or a
        model built for ``layout`` (e.g. :func:`tbminv.studies.methods.compare.model_3d_p1`).
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
    readings = simulate_drive(layout, scenario, faces_m, model=model, noise_rel=noise_rel,
                              noise_abs_v=noise_abs_v, seed=seed)
    data = _qc_data(readings, layout, qc_settings)
    return SyntheticDrive(layout, scenario, readings, data,
                          first_contact_chainage(scenario, float(min(faces_m))), name)


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


__all__ = ["METHODS", "RECORD_COLUMNS", "SyntheticDrive", "COMPACT_EXTRA", "compact_layout",
           "first_contact_chainage", "synthetic_drive", "with_error_floor", "AdvanceRecord",
           "records_table", "summary_table", "equivalent_contact", "slab_profile", "slab_contact"]
