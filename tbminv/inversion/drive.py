"""Inversion along the drive: one image per advance with the machine fixed, warm-started.

For every advance the checked readings (:mod:`tbminv.readings.qc`) become apparent resistivities
with numeric geometric factors (``k = rho_ref / R_hom`` from a homogeneous run of the same forward
model with the machine and tunnel in, so that homogeneous ground returns its resistivity; the
ratio method of Fox et al. 1980, Geophysics 45(1):75-93) and are inverted with pyGIMLi's
:class:`pygimli.Inversion` (log data, log-bounded model, smoothness regularisation on the
parameter mesh) through the axisymmetric forward operator (:mod:`tbminv.inversion.operator`
on :mod:`tbminv.forward.axisym`).

* The parameter mesh is a tensor grid of the ground in the machine frame, ``ahead`` x ``radius``,
  coarser than the forward mesh, built once per layout; its lines follow the machine and tunnel
  edges so the steel and the bore are left out (fixed regions, never inverted). It reaches the
  forward domain's edge with growing cells, so every forward ground cell belongs to one parameter.
* Every reading is modelled at its own logged cutterhead angle: readings of a quadrupole with
  an electrode turning with the cutterhead are kept per angle
  (:class:`tbminv.readings.advance.AngleRows`), the others stacked; the axisymmetric model
  serves all angles of an advance from one solve per harmonic, and each reading gets the
  geometric factor of its own angle. The surface correction uses the factors of the
  advance's median angle for every reading (a 3D run per angle is not made). The contact fit
  (one value per quadrupole, table at angle 0) takes each reading brought to angle 0 by the
  homogeneous ratio of its quadrupole, then stacked (:meth:`DriveInverter.contact_stacked`).
* Data weights come from the QC error model and a modelling-error floor. ``err_ohm`` of the QC
  estimates the root mean square of the normal-reciprocal difference, so one reading has
  ``err / sqrt(2)`` and the mean of a pair ``err / 2``; the relative floor
  ``[invert] model_error_floor`` (forward accuracy and surface-correction residual, measured in
  ``bench/bench_error_floor.py``) is added in quadrature per quadrupole in :meth:`prepare`.
  Readings without an error model are not inverted.
* lambda rules (``InversionSettings.lambda_rule``): ``cooling`` (default: start at ``lam``,
  multiply by ``lambda_factor`` each iteration, stop at chi-squared 1 — an Occam-style descent,
  Constable et al. 1987, Geophysics 52(3):289-300), ``fixed`` and ``lcurve`` (the corner of
  misfit vs roughness over ``lcurve_lams``, Hansen 1992, SIAM Review 34(4):561-580).
* Every inversion records chi-squared history, rrms, lambda, iterations, stop reason and time;
  a non-converged fit or chi-squared above ``chi2_flag`` is flagged in the section store.
* Coverage: log10 of the error-weighted cumulative absolute log-sensitivity per unit volume;
  optional depth-of-investigation index from two more inversions with references at
  ``0.5`` and ``2`` times the start model (Oldenburg & Li 1999, Geophysics 64(2):403-416).
* Along the drive each advance starts from the previous model shifted by the advance (the ground
  moves towards the machine), interpolated in log resistivity; ``cold=True`` starts every advance
  from the homogeneous median apparent resistivity.
* Across shifts: :meth:`DriveInverter.run` takes the stored drive before the new advances
  (:class:`tbminv.inversion.history.DriveHistory`); the first new advance warm-starts from its
  last model, the reference resistivity is the drive's, and the running contact fit puts the
  stored advances' readings into its window, so a drive logged shift by shift gives the same
  images and contact fits as one log. ``last_run`` holds the new advances' evidence to store.
* Robust drive run (:meth:`DriveInverter.run`): everything that can fail for the whole drive
  (reference resistivity, surface factors of every advance, the contact table and fitter and
  their use on the data) is built and checked before the first image; with a
  :class:`tbminv.inversion.journal.Journal` each image is on disk as soon as it is done and a
  rerun skips the advances journaled for the same inputs; a failing post-processing step
  (contact fit, DOI, resampling) is logged as a warning and recorded per advance
  (``AdvanceResult.postprocess_flag``), the images are kept.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from tbminv.cache import cache_key
from tbminv.forward.ratio import (
    geometric_factors_from_response,
    needs_correction,
    surface_factors,
)
from tbminv.forward.registry import make_model, model_options_for
from tbminv.forward.surfacetable import SurfaceTableSpec
from tbminv.inversion.contactfit import ContactFitter, build_response_table
from tbminv.inversion.grid import build_parameter_grid
from tbminv.inversion.history import DriveHistory, grid_signature
from tbminv.inversion.image import ImageResult, invert_image, row_angles, shift_model
from tbminv.inversion.journal import Journal
from tbminv.inversion.operator import DriveOperator
from tbminv.inversion.outcome import (
    POSTPROCESS_CONTACT_FIT_FAILED,
    POSTPROCESS_RESAMPLING_FAILED,
    AdvanceResult,
    ContactFit,
)
from tbminv.inversion.probefit import advance_penalties, probe_reference
from tbminv.inversion.settings import (
    SCHEDULER_NEEDS_COLD,
    TABLE_MIN_POSITIONS,
    InversionError,
    InversionSettings,
)
from tbminv.layout import Layout
from tbminv.readings.advance import AdvanceData, stack_rows
from tbminv.readings.errorfloor import with_error_floor
from tbminv.readings.probes import ProbeLog

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ drive
class DriveInverter:
    """Invert a drive advance by advance (mesh and operator built once per electrode set).

    Parameters
    ----------
    layout : Layout
    settings : InversionSettings, optional
    model : ForwardModel, optional
        An ``axisym`` model built for ``layout`` (default: built here).
    """

    def __init__(self, layout: Layout, settings: InversionSettings | None = None,
                 model: Any | None = None) -> None:
        self.layout = layout
        self.settings = settings or InversionSettings()
        if self.settings.model != "axisym" and model is None:
            raise InversionError(f"image inversion needs the axisym model, not "
                                 f"{self.settings.model!r}")
        if model is None:
            model = make_model("axisym", layout,
                               **model_options_for("axisym", self.settings.forward_settings))
        self.model = model
        self.grid = build_parameter_grid(layout, self.settings)
        self._ops: dict[tuple, DriveOperator] = {}
        self._k: dict[tuple, np.ndarray] = {}
        self.rho_ref_ohmm: float | None = None
        self._fitter: ContactFitter | None = None
        self.grid_sha256 = grid_signature(self.grid.x_nodes, self.grid.r_nodes, self.grid.keep)
        self.last_run: DriveHistory | None = None
        self.stage_seconds: dict[str, float] = {}
        """Wall time of the last :meth:`run` by stage, s (surface factors, images, ...)."""
        self.surface_method = "table" if self.settings.surface_method == "table" else "direct"
        self.probes: ProbeLog | None = None
        """Probe log constraining the contact fit and, where it gives resistivities, the
        images (:mod:`tbminv.inversion.probefit`)."""

    def _clock(self, stage: str, t0: float) -> None:
        self.stage_seconds[stage] = self.stage_seconds.get(stage, 0.0) + time.perf_counter() - t0

    def _op_key(self, face: float, ch: float) -> tuple:
        cyl = self.layout.positions_cylindrical(face, ch)
        return tuple(sorted((k, round(v[0], 6), round(v[1], 6)) for k, v in cyl.items()
                            if v is not None))

    def operator(self, face: float, ch: float) -> DriveOperator:
        """The (cached) operator for a face chainage and cutterhead angle."""
        key = self._op_key(face, ch)
        if key not in self._ops:
            if len(self._ops) > 6:
                self._ops.clear()
            self._ops[key] = DriveOperator(self.layout, self.grid, face, ch, self.model)
        return self._ops[key]

    def geometric_factors(self, face: float, ch: float, rho_ref: float) -> np.ndarray:
        """Numeric geometric factors k = rho_ref / R_hom per protocol quadrupole, m."""
        key = (*self._op_key(face, ch), round(ch, 6), rho_ref)
        if key not in self._k:
            op = self.operator(face, ch)
            r = op.response(np.full(self.grid.n_param, rho_ref), ch)
            self._k[key] = geometric_factors_from_response(r, rho_ref)
        return self._k[key]

    def row_geometric_factors(self, adv: AdvanceData, rho_ref: float) -> np.ndarray:
        """Numeric geometric factors per row of ``adv.angle_rows()``, m.

        Each reading's factor is that of its quadrupole at its own cutterhead angle; the
        homogeneous runs of all angles of the advance come from one solve.
        """
        rows = adv.angle_rows()
        angles, index = row_angles(rows)
        if len(angles) == 1:
            k = self.geometric_factors(adv.face_chainage_m, angles[0], rho_ref)
            return k[rows.quad]
        key = (*self._op_key(adv.face_chainage_m, adv.cutterhead_deg),
               tuple(round(a, 6) for a in angles), rho_ref)
        if key not in self._k:
            op = self.operator(adv.face_chainage_m, adv.cutterhead_deg)
            r = op.responses(np.full(self.grid.n_param, rho_ref), angles)
            self._k[key] = geometric_factors_from_response(r, rho_ref)
        return self._k[key][index, rows.quad]

    def contact_stacked(self, adv: AdvanceData) -> AdvanceData:
        """The advance with each quadrupole stacked at the contact table's cutterhead angle.

        The contact fit compares one value per quadrupole with a response table computed at
        cutterhead angle 0 (:func:`tbminv.inversion.contactfit.build_response_table`). Each
        reading of a quadrupole with a turning electrode, taken at angle ``a``, is first
        brought to angle 0 by the homogeneous ratio ``R_hom(0) / R_hom(a)`` of the same model
        (exact in homogeneous ground, first order with a contact, as the surface correction),
        then the readings are stacked (:func:`tbminv.readings.advance.stack_rows`). Unchanged
        when the advance has no rows or every turning reading is at angle 0.
        """
        rows = adv.rows
        if rows is None or not np.any(rows.turns & (np.mod(rows.angle_deg, 360.0) != 0.0)):
            return adv
        rho = self.reference_resistivity(adv)
        k_own = self.row_geometric_factors(adv, rho)
        k_table = self.geometric_factors(adv.face_chainage_m, 0.0, rho)[rows.quad]
        with np.errstate(invalid="ignore", divide="ignore"):
            factor = np.where(rows.turns, k_own / k_table, 1.0)
        r, e = stack_rows(rows, adv.r_ohm.size, factor)
        return dataclasses.replace(adv, r_ohm=r, rel_error=e)

    def contact_fitter(self, rho_ref: float) -> ContactFitter:
        """Contact fitter with a response table of this layout (built once, cached on disk).

        Readings of the machine-only layout that are null-coupled in homogeneous ground are
        left out of the fit with a logged reason (:meth:`ResponseTable.usable`).
        """
        if self._fitter is None:
            sub = self._machine_only_layout()
            opts = {"settings": getattr(self.model, "settings", None)}
            model = make_model("axisym", sub, **opts)
            table = build_response_table(sub, model, rho_ref_ohmm=rho_ref,
                                         settings=self.settings.contact, model_name="axisym",
                                         recipe=("axisym", sub, opts))
            self._fitter = ContactFitter(table, self.settings.contact,
                                         labels=self.contact_labels())
        return self._fitter

    def _machine_only_layout(self) -> Layout:
        """The layout restricted to readings between electrodes that travel with the machine."""
        moving = {e.label for e in self.layout.electrodes
                  if not e.fixed_in_ground}
        keep = tuple(q for q in self.layout.measurements
                     if all(x is None or x in moving for x in q.labels()))
        return dataclasses.replace(self.layout, explicit_measurements=keep, generators=())

    def reference_resistivity(self, adv: AdvanceData) -> float:
        """Reference resistivity of the drive (set once, from the first advance), ohm-m.

        The median apparent resistivity of the advance with factors for 100 ohm-m, rounded to
        two significant digits; the numeric geometric factors are computed for it.
        """
        if self.rho_ref_ohmm is None:
            k0 = self.geometric_factors(adv.face_chainage_m, adv.cutterhead_deg, 100.0)
            ra = k0 * adv.r_ohm
            ok = np.isfinite(ra) & (ra > 0)
            if not ok.any():
                raise InversionError(f"advance {adv.advance}: no reading gives a positive "
                                     "apparent resistivity")
            self.rho_ref_ohmm = float(_round_sig(np.median(ra[ok])))
        return self.rho_ref_ohmm

    def choose_surface_method(self, data: Sequence[AdvanceData]) -> str:
        """``[invert] surface_method``, with ``auto`` resolved for these advances (logged)."""
        method = self.settings.surface_method
        if method != "auto":
            return method
        spec = SurfaceTableSpec()
        positions = {(round(d.face_chainage_m, 3), round(d.cutterhead_deg % 360.0, 3))
                     for d in data}
        for d in data:   # every cutterhead angle a turning reading was modelled at
            if d.rows is not None:
                positions |= {(round(d.face_chainage_m, 3), round(float(a) % 360.0, 3))
                              for a in np.unique(d.rows.angle_deg[d.rows.turns])}
        fixed = any(e.fixed_in_ground for e in self.layout.electrodes)
        blocks = len({math.floor(d.face_chainage_m / spec.block_m) for d in data}) if fixed \
            else 1
        method = "table" if len(positions) >= TABLE_MIN_POSITIONS * blocks else "direct"
        _LOG.info("surface factors: %s (%d face/angle positions in %d block(s))", method,
                  len(positions), blocks)
        return method

    def surface_corrected(self, adv: AdvanceData) -> AdvanceData:
        """The advance's readings as the same ground would give them without the surface.

        Unchanged for a deep tunnel (infinite cover) or with ``surface_correction`` off; else
        divided by :func:`tbminv.forward.ratio.surface_factors` at the reference resistivity:
        the stacked values at the advance's median angle, each (quadrupole, angle) row of a
        turning quadrupole at its own angle.
        """
        if not (self.settings.surface_correction and needs_correction(self.layout)):
            return adv
        f = surface_factors(self.layout, adv.face_chainage_m, adv.cutterhead_deg,
                            rho_ohmm=self.reference_resistivity(adv),
                            method=self.surface_method)
        extra = {}
        if adv.rows is not None:   # every row at its own cutterhead angle
            rows = adv.rows
            f_rows = f[rows.quad]
            for ang in np.unique(rows.angle_deg[rows.turns]):
                at = rows.turns & (rows.angle_deg == ang)
                f_a = surface_factors(self.layout, adv.face_chainage_m, float(ang),
                                      rho_ohmm=self.reference_resistivity(adv),
                                      method=self.surface_method)
                f_rows[at] = f_a[rows.quad[at]]
            extra["rows"] = dataclasses.replace(rows, r_ohm=rows.r_ohm / f_rows)
        return dataclasses.replace(adv, r_ohm=adv.r_ohm / f, **extra)

    def invert_advance(self, adv: AdvanceData, start: np.ndarray | None = None,
                       reference: np.ndarray | None = None) -> ImageResult:
        """Image inversion of one advance (operator and factors from the caches)."""
        op = self.operator(adv.face_chainage_m, adv.cutterhead_deg)
        k = self.row_geometric_factors(adv, self.reference_resistivity(adv))
        cells = probe_reference(self.grid, self.probes, adv.face_chainage_m, adv.time)
        img = invert_image(op, adv, k, self.settings, start, reference, cells)
        _LOG.info("advance %d at %.2f m (%d cutterhead angles): chi2 %.2f after %d iterations "
                  "(%s), %.1f s", adv.advance, adv.face_chainage_m, max(adv.n_angles, 1),
                  img.chi2, img.iterations, img.stop_reason, img.time_s)
        return img

    def prepare(self, data: Sequence[AdvanceData], progress: bool = False
                ) -> list[AdvanceData]:
        """Build and check everything the drive needs before its first image.

        Sets the reference resistivity (from the first advance), applies the surface
        correction to every advance (3D runs, cached), with ``contact_fit`` restacks each
        quadrupole at the contact table's angle (:meth:`contact_stacked`), adds the
        modelling-error floor
        ``[invert] model_error_floor`` in quadrature to every reading's QC error
        (:func:`tbminv.readings.errorfloor.with_error_floor`; both the images and the contact
        fit see it) and, with ``contact_fit``, builds the contact table and fitter and checks
        that some advance has readings it can use.

        Parameters
        ----------
        data : sequence of AdvanceData
            Advances in drive order.
        progress : bool
            Show a progress bar of the surface correction (two 3D runs per advance).

        Returns
        -------
        list of AdvanceData
            The advances as the images and the contact fit see them (surface-corrected,
            error floor added).

        Raises
        ------
        InversionError
            Something that would fail the whole drive; the message says what to change.
        """
        from tqdm.auto import tqdm  # late: the progress-bar package is needed only here

        data = list(data)
        self.reference_resistivity(data[0])
        if self.settings.surface_correction and needs_correction(self.layout):
            t0 = time.perf_counter()
            self.surface_method = self.choose_surface_method(data)
            try:
                data = [self.surface_corrected(adv) for adv in
                        tqdm(data, disable=not progress, desc="surface correction (3D)",
                             unit="advance")]
            except (OSError, RuntimeError, ValueError) as exc:
                raise InversionError(f"surface correction (3D homogeneous factors) failed: "
                                     f"{exc}; set [invert] surface_correction = false to invert "
                                     "without it") from exc
            self._clock("surface factors", t0)
        if self.settings.contact_fit:
            data = [self.contact_stacked(adv) for adv in data]
        data = with_error_floor(data, self.settings.model_error_floor)
        if self.settings.contact_fit:
            t0 = time.perf_counter()
            try:
                fitter = self.contact_fitter(self.rho_ref_ohmm or 100.0)
            except (OSError, RuntimeError, ValueError) as exc:
                raise InversionError(f"contact fit cannot be set up: {exc}; set [invert] "
                                     "contact_fit = false to invert without it") from exc
            self._clock("contact table", t0)
            r, e, _ = self._contact_data(data)
            usable = [int(fitter.usable_readings(r[k], e[k]).sum()) for k in range(len(data))]
            if max(usable) < 3:
                raise InversionError(
                    "contact fit: no advance has 3 readings between electrodes on the machine "
                    f"that it can use (at most {max(usable)}); set [invert] contact_fit = false "
                    "to invert without it")
            short = [d.advance for d, n in zip(data, usable) if n < 3]
            if short:
                _LOG.warning("contact fit: advances %s have fewer than 3 usable readings; they "
                             "will be flagged contact_fit_failed", short)
        return data

    def run(self, data: Sequence[AdvanceData], *, cold: bool = False,
            progress: bool = False, client: Any | None = None,
            scheduler: str | None = None, journal: Journal | None = None,
            history: DriveHistory | None = None) -> list[AdvanceResult]:
        """Invert every advance; return :class:`tbminv.inversion.outcome.AdvanceResult` objects.

        Parameters
        ----------
        data : sequence of AdvanceData
            Advances in drive order.
        cold : bool
            Start every advance from a homogeneous model (advances become independent).
        progress : bool
            Show a progress bar per advance.
        client : dask.distributed.Client, optional
            Run the (cold, independent) image inversions on this client's workers.
        scheduler : str, optional
            Address of a dask scheduler to connect to instead of ``client``.
        journal : Journal, optional
            Write each advance's image there as soon as it is done, and take the advances it
            already holds from it instead of inverting them again (the warm start continues
            from the last journaled model).
        history : DriveHistory, optional
            The stored drive before ``data`` (another shift's advances): the drive's reference
            resistivity is taken from it, the first advance warm-starts from its last model
            (when on this parameter grid and not ``cold``) and the contact fit's window
            reaches back into its advances. Without it the drive starts here.

        Notes
        -----
        :meth:`prepare` runs first (everything that can fail for the whole drive). The contact
        fit runs over all advances at the end; a failure there, in the DOI or in resampling
        sets ``postprocess_flag`` on the advances concerned and is logged as a warning.
        """
        if not data:
            return []
        if self.settings.time_lapse and cold:
            raise InversionError("[invert] time_lapse = true regularises each advance towards "
                                 "the previous one: it cannot be combined with a cold start "
                                 "(--cold)")
        distributed = client is not None or bool(scheduler)
        if distributed and not cold:
            raise InversionError(SCHEDULER_NEEDS_COLD)
        if history is not None and history.n_advances:
            if self.rho_ref_ohmm is None and math.isfinite(history.reference_resistivity_ohmm):
                self.rho_ref_ohmm = float(history.reference_resistivity_ohmm)
            _LOG.info("continuing the drive from %d stored advances (last: advance %d at "
                      "%.2f m)", history.n_advances, int(history.advances[-1]),
                      float(history.faces_m[-1]))
        self.stage_seconds = {}
        data = self.prepare(data, progress)
        t0 = time.perf_counter()
        done = journal.load() if journal is not None else {}
        done = {a: img for a, img in done.items() if a in {d.advance for d in data}}
        if done:
            _LOG.warning("resuming from the journal %s: %d of %d advances already inverted",
                         journal.folder, len(done), len(data))

        def keep(adv: AdvanceData, img: ImageResult) -> None:
            if journal is not None:
                journal.write(adv.advance, img)

        if distributed:
            todo = [adv for adv in data if adv.advance not in done]
            imgs = self._run_distributed(todo, client, scheduler, progress, keep)
            by_adv = {**done, **{adv.advance: img for adv, img in zip(todo, imgs)}}
            images = [by_adv[adv.advance] for adv in data]
        else:
            start = None if cold or history is None else history.last_model(
                self.grid_sha256, self.grid.n_param)
            if history is not None and history.n_advances and not cold and start is None:
                _LOG.warning("the stored drive holds no model on this parameter grid (other "
                             "grid settings, or a store of an older version): the first "
                             "advance starts from a homogeneous model")
            images = self._run_serial(data, cold, progress, done, keep, start)
        self._clock("images", t0)
        t0 = time.perf_counter()
        contacts, failed = (self._contacts(data, history) if self.settings.contact_fit
                            else ([None] * len(data), [False] * len(data)))
        self._clock("contact fit", t0)
        t0 = time.perf_counter()
        self.last_run = self._history(data, images)
        out = [self._advance_result(adv, img, con, fail)
               for adv, img, con, fail in zip(data, images, contacts, failed)]
        self._clock("resampling", t0)
        return out

    def _run_serial(self, data: Sequence[AdvanceData], cold: bool, progress: bool,
                    done: dict[int, ImageResult],
                    keep: Callable[[AdvanceData, ImageResult], None],
                    start: tuple[np.ndarray, float] | None = None) -> list[ImageResult]:
        """Advances in order, each warm-started from the previous one (journaled or new).

        ``start`` is the model (ohm-m) and face chainage (m) of the advance before the first,
        e.g. the last stored one of the drive; None starts the first advance cold.
        """
        from tqdm.auto import tqdm  # late: the progress-bar package is needed only here

        imgs = []
        prev_model, prev_face = start if start is not None else (None, None)
        for adv in tqdm(data, disable=not progress, desc="advances", unit="advance"):
            img = done.get(adv.advance)
            if img is None:
                start = ref = None
                if not cold and prev_model is not None and (self.settings.warm_start
                                                            or self.settings.time_lapse):
                    start = shift_model(self.grid, prev_model, adv.face_chainage_m - prev_face)
                    ref = start if self.settings.time_lapse else None
                img = self.invert_advance(adv, start, ref)
                keep(adv, img)
            prev_model, prev_face = img.model_ohmm, adv.face_chainage_m
            imgs.append(img)
        return imgs

    def _run_distributed(self, data: Sequence[AdvanceData], client: Any | None,
                         scheduler: str | None, progress: bool,
                         keep: Callable[[AdvanceData, ImageResult], None]) -> list[ImageResult]:
        """Cold image inversions on dask workers (one inverter per worker process)."""
        # late: dask.distributed is an optional, heavy import needed only with --scheduler
        from dask.distributed import Client, as_completed
        from tqdm.auto import tqdm

        if not data:
            return []
        own = None
        if client is None:
            try:
                client = own = Client(scheduler, timeout="30s")
            except OSError as exc:
                raise InversionError(f"--scheduler {scheduler}: cannot connect ({exc})") from None
        try:
            futures = [client.submit(_remote_image, self.layout, self.settings,
                                     self.rho_ref_ohmm, adv, self.probes, pure=False)
                       for adv in data]
            index = {f.key: i for i, f in enumerate(futures)}
            out: list[Any] = [None] * len(data)
            for fut in tqdm(as_completed(futures), total=len(futures), disable=not progress,
                            desc="advances", unit="advance"):
                i = index[fut.key]
                out[i] = fut.result()
                keep(data[i], out[i])
            return out
        finally:
            if own is not None:
                own.close()

    def contact_labels(self) -> list[str]:
        """``a/b/m/n`` labels (``-`` for a pole) of the readings the contact fit uses."""
        return ["/".join(x or "-" for x in q.labels())
                for q in self._machine_only_layout().measurements]

    def contact_readings(self, data: Sequence[AdvanceData]
                         ) -> tuple[np.ndarray, np.ndarray, list[float]]:
        """What the contact fit uses: readings between electrodes on the machine, per advance.

        Returns ``(r_ohm, rel_error, faces_m)``: arrays (n_advances, n_contact_readings) in
        the order of :meth:`contact_labels`, and the face chainages.
        """
        return self._contact_data(data)

    def _contact_data(self, data: Sequence[AdvanceData]
                      ) -> tuple[np.ndarray, np.ndarray, list[float]]:
        """Readings of the machine-only layout per advance: r (ohm), rel. error, faces (m)."""
        full = {q: i for i, q in enumerate(self.layout.measurements)}
        sub = [full[q] for q in self._machine_only_layout().measurements]
        r = np.array([d.r_ohm[sub] for d in data]).reshape(len(data), len(sub))
        e = np.array([d.rel_error[sub] for d in data]).reshape(len(data), len(sub))
        return r, e, [d.face_chainage_m for d in data]

    def _history(self, data: Sequence[AdvanceData], images: Sequence[ImageResult]
                 ) -> DriveHistory:
        """The evidence of this run's advances, to be stored for the next shift."""
        r, e, faces = self._contact_data(data)
        models = np.array([np.asarray(img.model_ohmm, float) for img in images])
        return DriveHistory(
            advances=np.array([d.advance for d in data], int), faces_m=np.asarray(faces, float),
            contact_labels=tuple(self.contact_labels()), contact_r_ohm=r, contact_rel_error=e,
            models_ohmm=models.reshape(len(data), -1), grid_sha256=self.grid_sha256,
            reference_resistivity_ohmm=float(self.rho_ref_ohmm or math.nan))

    def _contacts(self, data: Sequence[AdvanceData], history: DriveHistory | None = None
                  ) -> tuple[list[ContactFit | None], list[bool]]:
        """Running joint contact fit; per advance the fit (or None) and whether it failed.

        With ``history`` the window of the first advances reaches back into the stored
        advances (the last ``window - 1`` of them, the most any window of the fit spans; all
        of them without a ``window`` setting), so each advance's fit is the one a single run
        over the whole drive gives it.
        """
        try:
            fitter = self.contact_fitter(self.rho_ref_ohmm or 100.0)
            r, e, faces = self._contact_data(data)
            n_prior = 0
            if history is not None and history.n_advances:
                span = getattr(self.settings.contact, "window", None)  # advances per window
                prior = history.tail(int(span) - 1) if span else history
                rp, ep = prior.contact_columns(self.contact_labels())
                n_prior = prior.n_advances
                r, e = np.vstack([rp, r]), np.vstack([ep, e])
                faces = [float(f) for f in prior.faces_m] + list(faces)
            penalties = [None] * n_prior + advance_penalties(self.probes,
                                                             [d.time for d in data])
            est = fitter.fit_drive(r, e, faces, skip_unusable=True,
                                   penalties=penalties)[n_prior:]
        except Exception as exc:  # noqa: BLE001 - degrade: the images stand without it
            _LOG.warning("contact fit failed for all %d advances (images kept): %s: %s",
                         len(data), type(exc).__name__, exc)
            return [None] * len(data), [True] * len(data)
        level = self.settings.contact.confidence
        out = [None if es is None else ContactFit.from_estimate(es, interval_level=level)
               for es in est]
        return out, [es is None for es in est]

    def _advance_result(self, adv: AdvanceData, img: ImageResult, contact: ContactFit | None,
                        contact_failed: bool = False) -> AdvanceResult:
        flag = img.postprocess_flag | (POSTPROCESS_CONTACT_FIT_FAILED if contact_failed else 0)
        try:
            ahead, radius, rho, cov, doi = self.resample(img)
        except Exception as exc:  # noqa: BLE001 - degrade: keep the advance's record
            _LOG.warning("advance %d: resampling to the output grid failed: %s: %s",
                         adv.advance, type(exc).__name__, exc)
            ahead, radius = self.output_grid()
            rho = cov = np.full((ahead.size, radius.size), np.nan)
            doi = None
            flag |= POSTPROCESS_RESAMPLING_FAILED
        return AdvanceResult(
            advance=adv.advance, face_chainage_m=adv.face_chainage_m, ahead_m=ahead,
            radius_m=radius, resistivity_ohmm=rho, coverage=cov, doi_index=doi,
            chi2=img.chi2, rrms_percent=img.rrms_percent, iterations=img.iterations,
            lambda_=img.lam, stop_reason=img.stop_reason, converged=img.converged,
            time_s=img.time_s, chi2_history=img.chi2_history, n_data=adv.n_readings,
            n_used=img.n_used, contact=contact, time=adv.time, postprocess_flag=flag)

    def output_grid(self) -> tuple[np.ndarray, np.ndarray]:
        """Cell centres (ahead, radius) of the regular output grid, m."""
        s = self.settings
        d = self.layout.machine.diameter_m
        ha = s.grid_ahead_step_m or d / 12.0
        hr = s.grid_radius_step_m or d / 12.0
        ahead = s.ahead_m or 5.0 * d
        behind = s.behind_m or (self.layout.machine.shield_length_m + d)
        rmax = s.radius_m or 2.5 * d
        na = int(round((ahead + behind) / ha))
        nr = int(round(rmax / hr))
        a = -behind + (np.arange(na) + 0.5) * (ahead + behind) / na
        r = (np.arange(nr) + 0.5) * rmax / nr
        return a, r

    def resample(self, img: ImageResult) -> tuple[np.ndarray, ...]:
        """Parameter model -> regular (ahead, radius) grid; NaN in the machine and bore."""
        a, r = self.output_grid()
        aa, rr = np.meshgrid(a, r, indexing="ij")
        idx = self.grid.locate(aa.ravel(), rr.ravel()).reshape(aa.shape)
        inside = self._solid(aa, rr)
        idx = np.where(inside, -1, idx)

        def take(v: np.ndarray | None) -> np.ndarray | None:
            if v is None:
                return None
            out = np.where(idx >= 0, np.asarray(v)[np.maximum(idx, 0)], np.nan)
            return out

        return a, r, take(img.model_ohmm), take(img.coverage), take(img.doi_index)

    def _solid(self, a: np.ndarray, r: np.ndarray) -> np.ndarray:
        lay = self.layout
        big_r, shield = lay.machine.radius_m, lay.machine.shield_length_m
        solid = np.zeros(a.shape, bool)
        if lay.machine.model_body:
            solid |= (a > -shield) & (a < 0) & (r < big_r)
        if lay.tunnel.model_cavity:
            tail = -shield if lay.machine.model_body else 0.0
            tl = lay.tunnel.length_m
            solid |= (a < tail) & ((a > tail - tl) if math.isfinite(tl) else True) & (r < big_r)
        return solid


_WORKER_INVERTERS: dict[str, DriveInverter] = {}


def _remote_image(layout: Layout, settings: InversionSettings, rho_ref_ohmm: float,
                  adv: AdvanceData, probes: ProbeLog | None = None) -> ImageResult:
    """Cold image inversion of one advance on a dask worker.

    The worker keeps one :class:`DriveInverter` per layout and settings, so its mesh, operator
    and factors are built once per worker, not once per advance.
    """
    key = cache_key({"layout": layout.to_dict(), "settings": settings.to_dict()})
    inv = _WORKER_INVERTERS.get(key)
    if inv is None:
        _WORKER_INVERTERS.clear()
        inv = _WORKER_INVERTERS[key] = DriveInverter(layout, settings)
    inv.rho_ref_ohmm = rho_ref_ohmm
    inv.probes = probes
    return inv.invert_advance(adv)


def _round_sig(v: float, sig: int = 2) -> float:
    if v <= 0 or not math.isfinite(v):
        return 100.0
    e = math.floor(math.log10(v)) - sig + 1
    return round(v / 10 ** e) * 10 ** e


__all__ = ["DriveInverter"]
