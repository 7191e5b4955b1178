"""Parametric contact fit: is there a planar change ahead, where, which way, how sure.

Model: ground of resistivity ``rho1`` and a plane square to the axis at chainage ``X`` with
``rho2 = c * rho1`` beyond it. The contrast is parametrised by the reflection coefficient
``k = (rho2 - rho1) / (rho2 + rho1)`` in (-1, 1) (Telford, Geldart & Sheriff 1990, Applied
Geophysics 2nd ed., sec. 8.3), so ``c = (1 + k) / (1 - k)``; the table runs from 1:1000 to
1000:1 (``k`` = -0.998 to 0.998; a perfectly conducting or insulating ground beyond the plane is
the limit ``k -> -1 / +1``), and the fit is continuous in ``k`` (cubic in ``k``; the image
solution is linear in ``k``). The forward physics is the one of the chosen forward model
(machine and tunnel in), tabulated once per layout as a response table ``R(c, d)`` for
``rho1 = rho_ref`` (:class:`ResponseTable`, cached on disk). Readings scale with ``rho1`` exactly
where the fixed regions scale with it (steel: yes, to within its cap; the tunnel lining: no).

Fit, per advance: for every (c, d) the best ``log rho1`` is a weighted mean (closed form) and
``chi2(c, d)`` follows (:meth:`ContactFitter.likelihood`).

Joint fit over a window of advances (:meth:`ContactFitter.estimate`): a real contact stays at
one chainage ``X`` while the face moves, so ``chi2(c, X) = sum_k chi2_k(c, X - face_k)``, with
one resistivity ``rho1`` shared by the window (its fitted value is the reported resistivity
around the machine). ``X`` runs from the first face of the window to the table's last distance
ahead of the current face: an advance whose face has passed ``X`` sits in the second medium
and is modelled as homogeneous ground of ``rho2`` (the face crossing is modelled, not forced
ahead); an advance for which ``X`` is beyond the table sees homogeneous ``rho1``. A contact
between the face and the first table distance is taken as at that distance. Limitation: an
advance whose electrodes straddle the contact (or lie just past it) is not homogeneous, so
once the face is more than about a shield length past the contact, the fitted chainage can
creep forward (measured with the image method in tests/inversion/test_contactfit.py: up to
5 m after 20 m); a tabulated response of contacts behind the face would remove this.

Answers (fields of :class:`ContactEstimate`; names are stable, fields are only added):

- ``ahead_m`` / ``chainage_m``: best point; negative ``ahead_m``: the face has passed it.
- ``ahead_lo_m`` / ``ahead_hi_m``: span of the profile-likelihood set
  ``{X : min_c chi2 <= chi2_min + delta}`` (``delta`` = chi-squared quantile of
  ``confidence`` for one parameter, times the reduced chi-squared of the best fit when above 1).
  The set may have several parts (``parts_m``, a list of ``[lo, hi]`` distances ahead);
  ``ambiguous`` is true when it has more than one. ``ahead_hi_m`` is NaN when the set reaches
  the table's last distance (open beyond reach).
- ``contrast`` (``rho2 / rho1``) with its profile interval ``contrast_lo`` / ``contrast_hi``.
- ``at_bound``: the best point is at a parameter bound (contrast at a table end, distance at
  the first or last grid point) or the distance set touches the first or last grid point; the
  results module caps such a result at the lowest level of concern.
- ``contrast_open``: the contrast interval reaches a table end (one-sided: "x5 or more"). The
  response saturates in ``k`` (10:1 is ``k`` = 0.82, 1000:1 is 0.998), so a strong contact two
  diameters ahead leaves this end open while its direction and lower limit are clear; such a
  result is reported one-sided and never as 'firm' (see :mod:`tbminv.results.ahead`).
- ``lr_statistic``: ``(chi2_homogeneous - chi2_min) / max(1, chi2_min / dof)``, the likelihood
  ratio against "no contact" in quasi-likelihood scaling. Its null distribution is not
  chi-squared (the distance is undefined without a contact: Davies 1987, Biometrika
  74(1):33-43), so ``p_false_alarm`` is its tail probability under "no contact" as measured by
  simulation on homogeneous drives (:mod:`tbminv.inversion.nullcal`). ``p_no_contact`` and
  ``p_homogeneous`` carry the same calibrated value (a p-value, not the probability that
  there is no contact).
- ``found``: ``p_false_alarm <= p_threshold`` and a contrast other than 1.

Use::

    fitter = ContactFitter(table, ContactFitSettings())
    estimates = fitter.fit_drive(r_obs, rel_error, faces_m, use, skip_unusable=True)
"""

from __future__ import annotations

import dataclasses
import io
import json
import logging
import math
import os
import pickle
import subprocess
import sys
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy.interpolate import RegularGridInterpolator
from scipy.stats import chi2 as chi2_dist

from tbminv.cache import atomic_path, cache_dir, cache_key
from tbminv.ground import Contact, Scenario
from tbminv.inversion.nullcal import NullCalibration, load_calibration
from tbminv.layout import Layout

_LOG = logging.getLogger(__name__)


@dataclass(frozen=True)
class ContactFitSettings:
    """Settings of the contact fit.

    Attributes
    ----------
    contrasts : tuple of float
        Tabulated contrasts rho2/rho1 (1 is added if missing); their ends are the bounds of
        the fit (a result there is flagged ``at_bound``).
    distances_in_diameters : tuple of float
        Tabulated distances ahead in machine diameters.
    confidence : float
        Confidence of the distance interval (profile likelihood).
    p_threshold : float
        A contact is reported when the calibrated false-alarm probability of the
        likelihood-ratio statistic (:mod:`tbminv.inversion.nullcal`) is at or below this.
    window : int
        Advances combined in the running joint fit (including the current one).
    fine_distances : int
        Points of the interpolated distance grid.
    fine_contrasts : int
        Points of the interpolated contrast grid (uniform in the reflection coefficient k).
    shared_resistivity : bool
        One resistivity around the machine for all advances of the window (the machine moves
        through the same ground until it reaches the contact). With the steel in, every pole
        reading responds alike to a contact ahead, so one advance alone cannot tell a contact
        from a change of the ground around the machine; a shared value breaks that trade-off.
    null_fraction : float
        A reading whose homogeneous response ``|r0|`` is at or below this fraction of the
        median ``|r0|`` of the table is null-coupled (e.g. a cutterhead dipole symmetric about
        its potential electrodes in axisymmetric ground: 0 up to round-off, about 1e-16 of the
        median): its relative response ``r / r0`` is undefined or round-off, so it is left out
        of the contact fit (with a logged reason; it stays in the image inversion). Our default
        1e-6 takes only numerical zeros: near-null readings above it respond strongly to a
        contact ahead and stay in (the demo drive has 8 of 120 at 6e-5 to 8e-4 of the median;
        leaving them out at 1e-3 moved its fitted distances by up to 3 m).
    probe_contradiction_level : float
        A chainage constraint (probe log, :mod:`tbminv.inversion.probefit`) contradicts the
        readings when the chi-squared it adds to the best fit, scaled by the reduced
        chi-squared of the free fit, exceeds the chi-squared quantile of this level for one
        parameter (0.99: 6.63); it is then flagged and not applied.
    """

    contrasts: tuple[float, ...] = (0.001, 0.01, 0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 4.0, 10.0, 20.0,
                                   100.0, 1000.0)
    distances_in_diameters: tuple[float, ...] = tuple(
        float(x) for x in np.round(np.geomspace(0.1, 12.0, 15), 4))
    confidence: float = 0.95
    p_threshold: float = 0.01
    window: int = 30
    fine_distances: int = 240
    fine_contrasts: int = 121
    shared_resistivity: bool = True
    null_fraction: float = 1e-6
    probe_contradiction_level: float = 0.99


@dataclass
class ResponseTable:
    """Transfer resistances for a contact at distance d ahead with contrast c, rho1 = rho_ref.

    Attributes
    ----------
    contrasts : ndarray (nc,)
    distances_m : ndarray (nd,)
    r_ohm : ndarray (nc, nd, nq)
        Transfer resistances, ohm, in ``layout.measurements`` order.
    r0_ohm : ndarray (nq,)
        Homogeneous ground of ``rho_ref_ohmm``.
    rho_ref_ohmm : float
    model : str
    """

    contrasts: np.ndarray
    distances_m: np.ndarray
    r_ohm: np.ndarray
    r0_ohm: np.ndarray
    rho_ref_ohmm: float
    model: str

    def save(self, path: Path) -> Path:
        """Write to ``.npz`` (atomic; no pickled objects)."""
        with atomic_path(path) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, contrasts=self.contrasts, distances_m=self.distances_m,
                         r_ohm=self.r_ohm, r0_ohm=self.r0_ohm,
                         meta=np.array(json.dumps({"rho_ref_ohmm": self.rho_ref_ohmm,
                                                   "model": self.model})))
        return path

    def usable(self, null_fraction: float) -> tuple[np.ndarray, dict[int, str]]:
        """Readings whose relative response ``r / r0`` is defined, and why the others are not.

        Parameters
        ----------
        null_fraction : float
            A reading with ``|r0|`` below this fraction of the median ``|r0|`` (over the
            finite, non-zero ones) is null-coupled.

        Returns
        -------
        (ndarray of bool (nq,), dict)
            The mask, and a reason per left-out reading index.
        """
        r0 = np.asarray(self.r0_ohm, float)
        mag = np.abs(r0)
        finite = np.isfinite(r0) & np.all(np.isfinite(self.r_ohm), axis=(0, 1))
        nonzero = finite & (mag > 0)
        ref = float(np.median(mag[nonzero])) if nonzero.any() else 0.0
        floor = null_fraction * ref
        reasons: dict[int, str] = {}
        for i in range(r0.size):
            if not finite[i]:
                reasons[i] = "response not finite in the contact table"
            elif not mag[i] > floor:
                reasons[i] = (f"null-coupled: homogeneous response |r0| = {mag[i]:.3g} ohm is at "
                              f"or below {null_fraction:g} x the median |r0| ({ref:.3g} ohm)")
        use = np.ones(r0.size, bool)
        use[list(reasons)] = False
        return use, reasons

    @classmethod
    def load(cls, path: Path) -> ResponseTable:
        """Read a table written by :meth:`save`."""
        with np.load(path, allow_pickle=False) as z:
            meta = json.loads(str(z["meta"]))
            return cls(contrasts=z["contrasts"], distances_m=z["distances_m"], r_ohm=z["r_ohm"],
                       r0_ohm=z["r0_ohm"], rho_ref_ohmm=float(meta["rho_ref_ohmm"]),
                       model=str(meta["model"]))


def _contact_scenario(rho_ref_ohmm: float, contrast: float, face_chainage_m: float,
                      ahead_m: float) -> Scenario:
    return Scenario(background_resistivity_ohmm=rho_ref_ohmm,
                    contacts=(Contact(chainage_m=face_chainage_m + ahead_m,
                                      resistivity_ohmm=rho_ref_ohmm * contrast),))


def _table_part(recipe: tuple[str, Layout, dict[str, Any]], rho_ref_ohmm: float,
                face_chainage_m: float, cases: list[tuple[float, float]]) -> np.ndarray:
    """Responses of some (contrast, ahead) cases, in a worker process (model built there)."""
    from tbminv.forward.registry import make_model

    name, layout, opts = recipe
    model = make_model(name, layout, **opts)
    return np.array([np.asarray(model.response(_contact_scenario(rho_ref_ohmm, c, face_chainage_m,
                                                                 d), face_chainage_m), float)
                     for c, d in cases])


def _table_worker_main() -> None:
    """Entry of a table worker process: arguments pickled on stdin, ``.npy`` on stdout."""
    recipe, rho, face, cases = pickle.loads(sys.stdin.buffer.read())
    np.save(sys.stdout.buffer, _table_part(recipe, rho, face, cases))
    sys.stdout.flush()


def _table_parts_in_processes(recipe: tuple[str, Layout, dict[str, Any]], rho_ref_ohmm: float,
                              face_chainage_m: float, parts: list[list[tuple[float, float]]]
                              ) -> list[np.ndarray]:
    """Run :func:`_table_part` for each part in its own fresh Python process, concurrently.

    Fresh interpreters (``python -c``), not forked or multiprocessing-spawned children: a fork
    deadlocked next to pyGIMLi's threads, and a spawned child re-runs the caller's script.
    """
    code = "import tbminv.inversion.contactfit as c; c._table_worker_main()"
    procs = []
    for part in parts:
        err = tempfile.TemporaryFile()
        p = subprocess.Popen([sys.executable, "-c", code], stdin=subprocess.PIPE,
                             stdout=subprocess.PIPE, stderr=err)
        procs.append((p, err))
        assert p.stdin is not None
        p.stdin.write(pickle.dumps((recipe, rho_ref_ohmm, face_chainage_m, part)))
        p.stdin.close()
    out = []
    for p, err in procs:
        assert p.stdout is not None
        data = p.stdout.read()
        p.wait()
        err.seek(0)
        tail = err.read().decode("utf-8", "replace")[-2000:]
        err.close()
        if p.returncode != 0:
            raise RuntimeError(f"contact table worker failed (exit {p.returncode}): {tail}")
        out.append(np.load(io.BytesIO(data)))
    return out


def table_workers() -> int:
    """Worker processes for a new contact table: ``TBMINV_TABLE_WORKERS``, else up to 2 CPUs."""
    env = os.environ.get("TBMINV_TABLE_WORKERS", "").strip()
    if env:
        return max(1, int(env))
    return max(1, min(2, os.cpu_count() or 1))


def build_response_table(layout: Layout, model: Any, *, rho_ref_ohmm: float,
                         settings: ContactFitSettings = ContactFitSettings(),
                         model_name: str = "", face_chainage_m: float = 0.0,
                         cache: bool = True, progress: bool = False,
                         recipe: tuple[str, Layout, dict[str, Any]] | None = None
                         ) -> ResponseTable:
    """Tabulate the forward response for contacts ahead (cached per layout and settings).

    Parameters
    ----------
    layout : Layout
    model : ForwardModel
        Built for ``layout`` (see :mod:`tbminv.forward.registry`).
    rho_ref_ohmm : float
        Resistivity around the machine for the table, ohm-m.
    face_chainage_m : float
        Face chainage used for the table (matters only for electrodes fixed in the ground).
    recipe : (name, layout, options), optional
        How to build ``model`` again (:func:`tbminv.forward.registry.make_model`): a new table
        is then computed in :func:`table_workers` fresh Python processes, each building the
        model once.
    """
    contrasts = np.array(sorted(set(settings.contrasts) | {1.0}), float)
    d = np.array(settings.distances_in_diameters, float) * layout.machine.diameter_m
    key = cache_key({"layout": layout.to_dict(), "model": model_name or type(model).__name__,
                     "model_settings": repr(getattr(model, "settings", None)),
                     "rho": rho_ref_ohmm, "c": contrasts, "d": d, "face": face_chainage_m})
    path = cache_dir("contact-tables") / f"{key}.npz"
    if cache and path.exists():
        return ResponseTable.load(path)
    from tqdm.auto import tqdm  # late: the progress-bar package is needed only for a new table

    r0 = np.asarray(model.response(Scenario.homogeneous(rho_ref_ohmm), face_chainage_m), float)
    r = np.empty((contrasts.size, d.size, r0.size))
    cases = [(i, j) for i in range(contrasts.size) for j in range(d.size)
             if contrasts[i] != 1.0]
    for j in range(d.size):
        r[contrasts == 1.0, j] = r0
    workers = table_workers() if recipe is not None else 1
    if workers > 1:
        parts = [cases[w::workers] for w in range(workers)]
        rows = _table_parts_in_processes(
            recipe, rho_ref_ohmm, face_chainage_m,
            [[(float(contrasts[i]), float(d[j])) for i, j in part] for part in parts])
        for part, got in zip(parts, rows):
            for (i, j), row in zip(part, got):
                r[i, j] = row
    else:
        for i, j in tqdm(cases, disable=not progress, desc="contact table"):
            r[i, j] = np.asarray(model.response(
                _contact_scenario(rho_ref_ohmm, float(contrasts[i]), face_chainage_m,
                                  float(d[j])), face_chainage_m), float)
    table = ResponseTable(contrasts=contrasts, distances_m=d, r_ohm=r, r0_ohm=r0,
                          rho_ref_ohmm=rho_ref_ohmm, model=model_name or type(model).__name__)
    if cache:
        table.save(path)
    return table


def contrast_to_k(contrast: np.ndarray | float) -> np.ndarray:
    """Reflection coefficient ``k = (c - 1) / (c + 1)`` of a contrast ``c = rho2 / rho1``."""
    c = np.asarray(contrast, float)
    return (c - 1.0) / (c + 1.0)


def k_to_contrast(k: np.ndarray | float) -> np.ndarray:
    """Contrast ``c = (1 + k) / (1 - k)`` of a reflection coefficient ``k`` in (-1, 1)."""
    k = np.asarray(k, float)
    return (1.0 + k) / (1.0 - k)


@dataclass
class Likelihood:
    """chi2 over the fine (contrast, distance) grid of one advance."""

    contrasts: np.ndarray
    distances_m: np.ndarray
    chi2: np.ndarray          # (nc, nd)
    log_rho1: np.ndarray      # (nc, nd) best log(rho1) per cell
    chi2_homogeneous: float
    log_rho1_homogeneous: float
    n_data: int
    weight: float = 0.0       # sum of the data weights: chi2 grows by weight * (dlog rho1)^2


@dataclass
class ContactEstimate:
    """Result of a contact fit (distances ahead of the current face, m; see the module text).

    Fields up to ``note`` are the original ones; later fields were added with defaults.
    ``contrast`` is ``rho2 / rho1`` (resistivity beyond over the shared resistivity around);
    ``parts_m`` lists the parts ``[lo, hi]`` of the distance set (``hi`` NaN: open beyond the
    table); ``p_false_alarm`` is the calibrated tail probability of ``lr_statistic`` under "no
    contact" (``p_no_contact`` and ``p_homogeneous`` hold the same value).
    """

    found: bool
    ahead_m: float
    ahead_lo_m: float
    ahead_hi_m: float
    chainage_m: float
    contrast: float
    resistivity_around_ohmm: float
    resistivity_beyond_ohmm: float
    chi2: float
    chi2_homogeneous: float
    p_homogeneous: float
    p_no_contact: float
    n_data: int
    n_advances: int
    note: str = ""
    contrast_lo: float = math.nan
    contrast_hi: float = math.nan
    at_bound: bool = False
    ambiguous: bool = False
    parts_m: list[list[float]] = dataclasses.field(default_factory=list)
    lr_statistic: float = math.nan
    p_false_alarm: float = math.nan
    reflection_k: float = math.nan
    contrast_open: bool = False
    probe_constrained: bool = False
    probe_misfit_added: float = math.nan
    probe_contradicts: bool = False

    def as_dict(self) -> dict[str, Any]:
        """Plain dictionary."""
        return dataclasses.asdict(self)


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Index ranges ``(first, last)`` of the runs of True in a 1-D mask."""
    m = np.concatenate([[False], np.asarray(mask, bool), [False]])
    edges = np.flatnonzero(np.diff(m.astype(np.int8)))
    return [(int(a), int(b) - 1) for a, b in zip(edges[::2], edges[1::2])]


class ContactFitter:
    """Fit contacts to per-advance data with a response table.

    Parameters
    ----------
    table : ResponseTable
    settings : ContactFitSettings
    labels : sequence of str, optional
        A name per reading of the table (for the log of left-out readings).
    calibration : NullCalibration, optional
        Null distribution of the likelihood-ratio statistic (default: the package's table).

    Attributes
    ----------
    usable : ndarray of bool (nq,)
        Readings of the table with a defined relative response; the others (null-coupled or
        not finite, see :meth:`ResponseTable.usable`) are never used by the fit.
    left_out : dict
        Reading index -> why it was left out.
    fine_k, fine_c : ndarray
        The fit's grid in the reflection coefficient and the matching contrasts.

    Raises
    ------
    ValueError
        No reading of the table has a usable homogeneous response.
    """

    def __init__(self, table: ResponseTable, settings: ContactFitSettings = ContactFitSettings(),
                 labels: Sequence[str] | None = None,
                 calibration: NullCalibration | None = None):
        self.table = table
        self.settings = settings
        self.calibration = calibration or load_calibration()
        c, d = table.contrasts, table.distances_m
        self.usable, self.left_out = table.usable(settings.null_fraction)
        use = self.usable
        if not use.any():
            raise ValueError(f"contact table: none of its {use.size} readings has a usable "
                             "homogeneous response (all null-coupled or not finite)")
        if self.left_out:
            names = list(labels) if labels is not None else [f"#{i}" for i in range(use.size)]
            _LOG.warning("contact fit: %d of %d readings left out of the relative-response "
                         "table (they stay in the image inversion): %s", len(self.left_out),
                         use.size, "; ".join(f"{names[i]}: {why}"
                                             for i, why in self.left_out.items()))
        rel = table.r_ohm[..., use] / table.r0_ohm[None, None, use]
        # interpolate the relative response in (k, log d): the image response is linear in k
        k_tab = contrast_to_k(c)
        self._interp = RegularGridInterpolator((k_tab, np.log(d)), rel, method="cubic"
                                               if min(c.size, d.size) >= 4 else "linear")
        fk = np.linspace(k_tab[0], k_tab[-1], settings.fine_contrasts)
        if not np.any(np.isclose(fk, 0.0, atol=1e-12)):
            fk = np.sort(np.append(fk, 0.0))
        fk[np.argmin(np.abs(fk))] = 0.0
        self.fine_k = fk
        self.fine_c = k_to_contrast(fk)
        self.fine_d = np.exp(np.linspace(np.log(d[0]), np.log(d[-1]), settings.fine_distances))
        kk, ld = np.meshgrid(fk, np.log(self.fine_d), indexing="ij")
        pts = np.stack([kk.ravel(), ld.ravel()], axis=-1)
        self.fine_rel = np.full(kk.shape + (use.size,), np.nan)
        self.fine_rel[..., use] = self._interp(pts).reshape(kk.shape + (int(use.sum()),))
        self.fine_rel[self.fine_k == 0.0] = 1.0
        with np.errstate(divide="ignore", invalid="ignore"):
            g = np.log(np.abs(self.fine_rel))
        self._log_rel = np.where(np.isfinite(g), g, 0.0)       # (nc, nd, nq)

    def usable_readings(self, r_obs_ohm: np.ndarray, rel_error: np.ndarray,
                        use: np.ndarray | None = None) -> np.ndarray:
        """Readings of one advance the fit uses, bool (nq,).

        Finite, with a positive error, of the sign of the table's homogeneous reading, not
        left out of the table (null-coupled), and in ``use`` if given.
        """
        ok = np.isfinite(r_obs_ohm) & np.isfinite(rel_error) & (rel_error > 0)
        ok &= np.sign(r_obs_ohm) == np.sign(self.table.r0_ohm)
        ok &= self.usable
        if use is not None:
            ok &= use
        return ok

    def likelihood(self, r_obs_ohm: np.ndarray, rel_error: np.ndarray,
                   use: np.ndarray | None = None) -> Likelihood:
        """chi2 of one advance's readings over the (contrast, distance) grid.

        Parameters
        ----------
        r_obs_ohm : ndarray (nq,)
            Observed transfer resistances in protocol order, ohm (NaN where missing).
        rel_error : ndarray (nq,)
            Relative standard errors (fraction).
        use : ndarray of bool, optional
            Readings to use (default: finite, same sign as the table's homogeneous reading,
            not left out of the table).

        Raises
        ------
        ValueError
            Fewer than 3 usable readings.
        """
        r0 = self.table.r0_ohm
        ok = self.usable_readings(r_obs_ohm, rel_error, use)
        if ok.sum() < 3:
            raise ValueError(f"contact fit needs at least 3 usable readings, got {int(ok.sum())}")
        # data: log of apparent resistivity against the table's homogeneous response
        y = np.log(np.abs(r_obs_ohm[ok]) / np.abs(r0[ok]) * self.table.rho_ref_ohmm)
        w = 1.0 / rel_error[ok] ** 2
        big_w = float(w.sum())
        lr0 = float((y * w).sum() / big_w)
        yc = y - lr0                                    # centred: no cancellation below
        chi2_0 = float((w * yc ** 2).sum())
        g = self._log_rel[..., ok]                      # (nc, nd, n)
        s_g = g @ w
        s_gg = (g * g) @ w
        s_yg = g @ (w * yc)
        mean = -s_g / big_w                             # best log rho1 - lr0 per cell
        chi2 = np.maximum(chi2_0 - 2.0 * s_yg + s_gg - big_w * mean ** 2, 0.0)
        return Likelihood(self.fine_c, self.fine_d, chi2, mean + lr0, chi2_0, lr0,
                          int(ok.sum()), big_w)

    def chainage_grid(self, faces_m: Sequence[float]) -> np.ndarray:
        """Candidate contact chainages of a window, m.

        From the window's first face (behind the current face) to the table's last distance
        ahead of the current face.
        """
        faces = np.asarray(faces_m, float)
        cur, first = float(faces[-1]), float(faces.min())
        ahead = cur + self.fine_d
        step = 0.5 * float(self.fine_d[0])
        if cur - first <= step:
            return ahead
        behind = np.arange(first, cur - 0.5 * step, step)
        return np.concatenate([behind, ahead])

    def joint_chi2(self, likelihoods: Sequence[Likelihood], faces_m: Sequence[float],
                   extra_chainages_m: np.ndarray | None = None
                   ) -> tuple[np.ndarray, np.ndarray, float, float, np.ndarray]:
        """chi2 of the window over (contrast, chainage) and of the homogeneous model.

        ``extra_chainages_m`` are added to :meth:`chainage_grid` where they lie inside it
        (e.g. the knots of a chainage constraint, so that it is resolved finer than the grid).

        Returns
        -------
        (x_grid, total, total0, log_rho0, log_rho)
            Chainages (nx,), m; chi2 (nc, nx); homogeneous chi2; its log resistivity; the
            fitted log ``rho1`` per cell (nc, nx): shared by the window or, without
            ``shared_resistivity``, the current advance's.
        """
        faces = np.asarray(faces_m, float)
        d = self.fine_d
        dmin, dmax = d[0], d[-1]
        x_grid = self.chainage_grid(faces)
        if extra_chainages_m is not None:
            extra = np.asarray(extra_chainages_m, float)
            extra = extra[(extra > x_grid[0]) & (extra < x_grid[-1])]
            x_grid = np.unique(np.concatenate([x_grid, extra]))
        nc = self.fine_c.size
        log_c = np.log(self.fine_c)[:, None]
        total = np.zeros((nc, x_grid.size))
        total0 = 0.0
        acc_w = np.zeros_like(total)
        acc_wl = np.zeros_like(total)
        acc_wll = np.zeros_like(total)
        w0 = wl0 = wll0 = 0.0
        lrho = total
        for lik, f in zip(likelihoods, faces):
            dist = x_grid - f                         # distance ahead of that advance's face
            total0 += lik.chi2_homogeneous
            # contact right at the face (0 <= dist < dmin): as at the first table distance
            idx = np.interp(np.log(np.clip(dist, dmin, dmax)), np.log(d), np.arange(d.size))
            lo = np.floor(idx).astype(int)
            hi = np.minimum(lo + 1, d.size - 1)
            t = idx - lo
            vals = lik.chi2[:, lo] * (1 - t) + lik.chi2[:, hi] * t
            lrho = lik.log_rho1[:, lo] * (1 - t) + lik.log_rho1[:, hi] * t
            far = dist > dmax                         # beyond the table: not seen
            vals[:, far] = lik.chi2_homogeneous
            lrho[:, far] = lik.log_rho1_homogeneous
            behind = dist < 0                         # face past the contact: all in rho2
            vals[:, behind] = lik.chi2_homogeneous
            lrho[:, behind] = lik.log_rho1_homogeneous - log_c
            total += vals
            acc_w += lik.weight
            acc_wl += lik.weight * lrho
            acc_wll += lik.weight * lrho ** 2
            w0 += lik.weight
            wl0 += lik.weight * lik.log_rho1_homogeneous
            wll0 += lik.weight * lik.log_rho1_homogeneous ** 2
        log_rho0 = likelihoods[-1].log_rho1_homogeneous
        if self.settings.shared_resistivity:
            # one resistivity around the machine for the whole window: add the spread of the
            # per-advance best values, sum_k W_k (L_k - L*)^2 with L* their weighted mean
            with np.errstate(invalid="ignore", divide="ignore"):
                total += np.maximum(acc_wll - acc_wl ** 2 / acc_w, 0.0)
                lrho = acc_wl / acc_w
            total0 += max(wll0 - wl0 ** 2 / w0, 0.0) if w0 > 0 else 0.0
            log_rho0 = wl0 / w0 if w0 > 0 else log_rho0
        total = np.where(np.isfinite(total), total, np.inf)
        c1 = int(np.flatnonzero(self.fine_k == 0.0)[0])
        total[c1, :] = total0
        lrho = np.array(lrho, float)
        lrho[c1, :] = log_rho0
        return x_grid, total, float(total0), float(log_rho0), lrho

    def estimate(self, likelihoods: Sequence[Likelihood], faces_m: Sequence[float],
                 penalty: Callable[[np.ndarray], np.ndarray] | None = None) -> ContactEstimate:
        """Joint estimate over advances (the last one is the current face); see the module.

        ``penalty`` (optional) maps contact chainages (m) to a chi-squared added to the fit: a
        constraint from outside the readings (a probe log); its ``knots_m`` attribute, if any,
        adds chainages to the fit's grid. The evidence measures
        (``lr_statistic``, ``p_false_alarm``, ``found``) stay those of the readings alone; the
        best point and intervals come from the constrained fit unless the constraint
        contradicts the readings (``probe_contradicts``, see
        ``ContactFitSettings.probe_contradiction_level``), when the readings' own answer is
        kept. ``probe_misfit_added`` is the chi-squared the constraint adds, scaled.
        """
        s = self.settings
        faces = np.asarray(faces_m, float)
        cur = float(faces[-1])
        x_grid, total, total0, log_rho0, lrho = self.joint_chi2(
            likelihoods, faces, getattr(penalty, "knots_m", None))
        n_data = int(sum(lik.n_data for lik in likelihoods))
        chi2_free = float(total.min())
        n_par = 3 + (0 if s.shared_resistivity else len(likelihoods) - 1)
        dof = max(1, n_data - n_par)
        scale = max(1.0, chi2_free / dof)
        probe: dict[str, Any] = {}
        if penalty is not None:
            constrained = total + np.asarray(penalty(x_grid), float)[None, :]
            added = (float(constrained.min()) - chi2_free) / scale
            contradicts = bool(added > chi2_dist.ppf(s.probe_contradiction_level, 1))
            probe = dict(probe_constrained=not contradicts, probe_misfit_added=added,
                         probe_contradicts=contradicts)
            if not contradicts:
                total = constrained
        ci, bj = np.unravel_index(int(np.argmin(total)), total.shape)
        chi2_min = float(total[ci, bj])
        delta = float(chi2_dist.ppf(s.confidence, 1)) * scale
        level = chi2_min + delta
        # distance: every part of the profile-likelihood set
        prof_x = total.min(axis=0)
        parts = _runs(prof_x <= level)
        last = x_grid.size - 1
        parts_m = [[float(x_grid[a] - cur), math.nan if b == last else float(x_grid[b] - cur)]
                   for a, b in parts]
        # contrast: profile over the chainage
        prof_c = total.min(axis=1)
        in_c = np.flatnonzero(prof_c <= level)
        c_lo, c_hi = float(self.fine_c[in_c[0]]), float(self.fine_c[in_c[-1]])
        nc_last = self.fine_c.size - 1
        at_bound = bool(parts[0][0] == 0 or parts[-1][1] == last or ci in (0, nc_last)
                        or bj in (0, last))
        contrast_open = bool(in_c[0] == 0 or in_c[-1] == nc_last)
        ambiguous = len(parts) > 1
        stat = max(0.0, (total0 - chi2_free) / scale)
        p_fa = self.calibration.p_false_alarm(stat, len(likelihoods))
        contrast = float(self.fine_c[ci])
        found = bool(p_fa <= s.p_threshold and self.fine_k[ci] != 0.0)
        notes = []
        if scale > 1.0:
            notes.append(f"interval widened by the reduced chi-squared {scale:.2f} of the best fit")
        if at_bound:
            notes.append("result at a bound of the fit (best contrast at a table end, or the "
                         "distance or its interval at the first or last grid point)")
        if contrast_open:
            notes.append("contrast interval open: it reaches a table end of the contrast")
        if ambiguous:
            notes.append(f"{len(parts)} separate distance ranges fit the data")
        if probe.get("probe_contradicts"):
            notes.append(f"probe constraint contradicts the readings (adds chi-squared "
                         f"{probe['probe_misfit_added']:.1f}): not applied")
        common = dict(note="; ".join(notes), contrast_lo=c_lo, contrast_hi=c_hi,
                      at_bound=at_bound, ambiguous=ambiguous, lr_statistic=stat,
                      p_false_alarm=p_fa, contrast_open=contrast_open, **probe)
        if not found:
            rho0 = float(math.exp(log_rho0))
            return ContactEstimate(False, math.nan, math.nan, math.nan, math.nan, 1.0, rho0,
                                   rho0, chi2_min, total0, p_fa, p_fa, n_data,
                                   len(likelihoods), parts_m=[], reflection_k=0.0, **common)
        rho1 = float(math.exp(lrho[ci, bj]))
        return ContactEstimate(True, float(x_grid[bj] - cur), parts_m[0][0], parts_m[-1][1],
                               float(x_grid[bj]), contrast, rho1, rho1 * contrast, chi2_min,
                               total0, p_fa, p_fa, n_data, len(likelihoods), parts_m=parts_m,
                               reflection_k=float(self.fine_k[ci]), **common)

    def fit_drive(self, r_obs: np.ndarray, rel_error: np.ndarray, faces_m: Sequence[float],
                  use: np.ndarray | None = None, *, skip_unusable: bool = False,
                  penalties: Sequence[Callable[[np.ndarray], np.ndarray] | None] | None = None
                  ) -> list[ContactEstimate | None]:
        """Running joint fit along a drive.

        Parameters
        ----------
        r_obs : ndarray (n_advances, nq)
            Observed transfer resistances, ohm (NaN where missing).
        rel_error : ndarray (n_advances, nq)
        faces_m : sequence of float (n_advances,)
        use : ndarray of bool (n_advances, nq), optional
        skip_unusable : bool
            An advance with fewer than 3 usable readings gets ``None`` and is left out of the
            windows of the others (default: :class:`ValueError`).
        penalties : sequence, optional
            Per advance, a chainage constraint for its joint fit or None (see
            :meth:`estimate`).
        """
        liks: list[Likelihood | None] = []
        for k in range(len(faces_m)):
            try:
                liks.append(self.likelihood(r_obs[k], rel_error[k],
                                            None if use is None else use[k]))
            except ValueError as exc:
                if not skip_unusable:
                    raise
                _LOG.warning("contact fit: advance %d of the drive left out: %s", k, exc)
                liks.append(None)
        out: list[ContactEstimate | None] = []
        for k in range(len(faces_m)):
            if liks[k] is None:
                out.append(None)
                continue
            k0 = max(0, k - self.settings.window + 1)
            win = [(lik, f) for lik, f in zip(liks[k0:k + 1], faces_m[k0:k + 1])
                   if lik is not None]
            out.append(self.estimate([w[0] for w in win], [w[1] for w in win],
                                     None if penalties is None else penalties[k]))
        return out


__all__ = ["ContactFitSettings", "ResponseTable", "build_response_table", "ContactFitter",
           "ContactEstimate", "Likelihood", "contrast_to_k", "k_to_contrast"]
