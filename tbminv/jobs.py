"""The workflows the command line and the notebooks call: check, invert, report, reach."""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import logging
import math
import os
import shutil
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import tomli_w
import xarray as xr

import tbminv
from tbminv.cache import atomic_path, atomic_write_text
from tbminv.forward.ratio import homogeneous_response
from tbminv.forward.registry import make_model, model_options_for
from tbminv.gimli import versions
from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.journal import Journal, journal_root
from tbminv.inversion.outcome import (
    POSTPROCESS_MASKS,
    POSTPROCESS_MEANINGS,
    POSTPROCESS_RESAMPLING_FAILED,
    SectionError,
)
from tbminv.inversion.settings import (
    SCHEDULER_NEEDS_COLD,
    InversionError,
    InversionSettings,
    load_settings,
)
from tbminv.layout import Layout, load_layout
from tbminv.materials import load_material_table, save_material_table
from tbminv.plots.qc import write_figure
from tbminv.plots.reach import plot_reach_map, plot_response_vs_distance
from tbminv.plots.section import save_figure
from tbminv.readings.advance import (
    AdvanceData,
    ExpectedSign,
    PreparedReadings,
    prepare_advances,
)
from tbminv.readings.probes import ProbeLog, read_probe_log
from tbminv.readings.qc import QCResult, QCSettings, _json, summary_text
from tbminv.readings.qcadvance import qc_per_advance
from tbminv.readings.reader import Readings
from tbminv.report import write_report
from tbminv.results.ahead import AheadSettings
from tbminv.results.drivestate import add_history, read_history, repeated_advances
from tbminv.results.probecheck import site_material_table
from tbminv.results.section import build_section
from tbminv.results.store import append_shift, check_appendable, open_section
from tbminv.studies.reach import ReachSettings, best_measurements, load_sweep, reach_study
from tbminv.studies.sweep import run_sweep

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ files, CLI
SIGN_NULL_FRACTION = 1e-3
"""A homogeneous response below this fraction of the median |response| has no reliable sign:
such quadrupoles are not checked for a negative apparent resistivity."""


def homogeneous_sign(response: Callable[[float, float], np.ndarray]) -> ExpectedSign:
    """Sign of each protocol quadrupole's response in a homogeneous ground, per face and angle.

    Parameters
    ----------
    response : callable
        ``(face_chainage_m, cutterhead_deg) ->`` the homogeneous response per protocol
        quadrupole (transfer resistances or ``1 / k``: only the sign is used, and it does not
        depend on the resistivity), e.g. :func:`model_homogeneous`.

    Returns
    -------
    callable
        :data:`tbminv.readings.advance.ExpectedSign`. Responses within
        :data:`SIGN_NULL_FRACTION` of the median magnitude are near a null: sign 0 (unknown).
    """
    def sign(face_chainage_m: float, cutterhead_deg: float) -> np.ndarray:
        r = np.asarray(response(face_chainage_m, cutterhead_deg), float)
        mag = np.abs(r[np.isfinite(r)])
        ref = float(np.median(mag)) if mag.size else 0.0
        out = np.sign(r)
        out[~np.isfinite(r) | (np.abs(r) <= SIGN_NULL_FRACTION * ref)] = 0.0
        return out

    return sign


def model_homogeneous(model: Any) -> Callable[[float, float], np.ndarray]:
    """A model's homogeneous response at 100 ohm-m per face and angle (cached on disk)."""
    def response(face_chainage_m: float, cutterhead_deg: float) -> np.ndarray:
        return homogeneous_response(model, 100.0, face_chainage_m, cutterhead_deg)

    return response


def qc_folder(store_path: str | Path, readings_path: str | Path) -> Path:
    """Folder of ``quarantine.csv`` and ``qc_flags.csv`` of an ``invert`` run.

    ``<store>.qc/<readings log name without suffix>/`` beside the store.
    """
    store = Path(store_path)
    return store.with_name(store.name + ".qc") / Path(readings_path).stem


def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def run_drive(readings: str | Path | pd.DataFrame | PreparedReadings, layout: Layout,
              store_path: str | Path,
              *, settings: InversionSettings | None = None,
              qc_settings: QCSettings | None = None, out_dir: str | Path | None = None,
              cold: bool = False, shift: str | None = None,
              layout_path: str | Path | None = None, progress: bool = False,
              scheduler: str | None = None, client: Any | None = None,
              resume: bool = True, probes: ProbeLog | None = None) -> xr.Dataset:
    """Check, invert and store a readings log (one shift) in the section store.

    Parameters
    ----------
    readings : path, pandas.DataFrame or PreparedReadings
        The readings log (CSV or Parquet file, or its columns as a DataFrame; read,
        quarantined and QC'd here with ``qc_settings``), or the same already prepared by
        :func:`tbminv.readings.advance.prepare_advances` (e.g. ``run_check(...).prepared``:
        the log is not read twice).
    layout : Layout
    store_path : path
        Section store (NetCDF), created or appended to; its journal lives beside it.
    settings, qc_settings : optional
        Inversion and QC settings (QC only when ``readings`` is a path).
    out_dir : path, optional
        Folder for ``quarantine.csv`` and ``qc_flags.csv`` (when ``readings`` is a path or a
        DataFrame; ``tbminv invert`` uses :func:`qc_folder`). Readings are checked for a
        negative apparent resistivity against the sign of the images' geometric factors.
    cold : bool
        Start every advance from a homogeneous model.
    shift : str, optional
        Shift label (default: from the time of the first advance not yet stored, else the
        advance numbers); one the store holds for other advances is an error.
    layout_path : path, optional
        The layout file, kept as text in the store (default: the layout written as TOML).
    progress : bool
        Show progress bars.
    scheduler, client : optional
        A dask scheduler address or client: run the cold-started advances on its workers
        (``cold`` must be set).
    resume : bool
        Take the advances journaled by an earlier run of the same inputs and settings from the
        journal (default); False starts again (the old journal is replaced).
    probes : ProbeLog, optional
        Probe log constraining the contact fit (:mod:`tbminv.inversion.probefit`); a
        constraint that contradicts the readings is flagged per advance
        (``probe_contradicts``) and not applied.

    Returns
    -------
    xarray.Dataset
        The section of this run (also appended to ``store_path``; no advances when every
        advance of the log is already stored). ``postprocess_flag`` is
        non-zero for advances where the contact fit, DOI or resampling failed (images kept).

    Notes
    -----
    Order of work: the readings are checked against the layout's protocol, the store is
    checked (a probe file written beside it; grid, layout and advance numbers against what
    it holds) and :meth:`DriveInverter.prepare` builds the reference resistivity, surface
    factors and contact fitter -- all before the first image, so a run that must fail fails
    at once. Each image then goes to the journal ``<store>.journal/<key>/`` the moment it is
    done (:class:`tbminv.inversion.journal.Journal`); a crash or kill loses at most the
    advance in progress and the same call again resumes. The journal is removed once the
    shift is in the store.

    Appending a shift continues the drive the store holds (:mod:`tbminv.results.drivestate`):
    advances the store already holds at the same face chainage are skipped with a logged
    message, never inverted again (an advance number stored at another face is an error; so is
    a shift label the store already holds for other advances);
    the first new advance warm-starts from the last stored model, shifted by the advance; the
    drive's reference resistivity is kept; and the contact fit's window reaches back into the
    stored advances' readings, so the shifts give the images and contact fits of one log.
    To invert stored advances again (other settings), start a new store.
    """
    settings = settings or InversionSettings()
    inverter = DriveInverter(layout, settings)
    t_start = time.perf_counter()
    inverter.probes = probes
    if isinstance(readings, PreparedReadings):
        prepared = readings
    else:
        def inverse_k(face_m: float, angle_deg: float) -> np.ndarray:   # sign of the image's k
            return 1.0 / inverter.geometric_factors(face_m, angle_deg, 100.0)

        prepared = prepare_advances(readings, layout, qc_settings or QCSettings(),
                                    out_dir=out_dir, expected_sign=homogeneous_sign(inverse_k),
                                    model_error_floor=settings.model_error_floor)
    source = prepared.source
    t_readings = time.perf_counter() - t_start
    _check_protocol(prepared, layout)
    data = [d for d in prepared.advances if np.isfinite(d.r_ohm).sum() >= 3]
    if not data:
        raise InversionError(f"{source}: no advance has three or more valid readings "
                             "with an error model (see `tbminv check`)")
    layout_text = (Path(layout_path).read_text(encoding="utf-8") if layout_path
                   else _layout_text(layout))
    # the log's bytes when it is a file; else (a DataFrame) the advance data made from it
    readings_sha = file_sha256(source) if Path(source).is_file() else _advances_sha256(data)
    ahead, radius = inverter.output_grid()
    layout_sha = hashlib.sha256(layout_text.encode("utf-8")).hexdigest()
    check_appendable(store_path, shift=shift or "", advances=np.array([], int), ahead=ahead,
                     transverse=radius, layout_sha256=layout_sha)
    stored = open_section(store_path) if Path(store_path).exists() else None
    repeated = repeated_advances(stored, advances=np.array([d.advance for d in data]),
                                 faces_m=np.array([d.face_chainage_m for d in data]),
                                 source=str(source))
    if repeated.size:
        _LOG.warning("%s: advances %s are already in the store %s (same face chainage); they "
                     "are skipped, not inverted again", source, _ranges(repeated), store_path)
        data = [d for d in data if d.advance not in set(repeated.tolist())]
    if not data:
        _LOG.warning("%s: every advance of the log is already in the store; nothing to invert",
                     source)
        _remove_journals_of(store_path, readings_sha)
        return _empty_section(stored)
    label = shift or _shift_label(data)
    if stored is not None and label in set(stored["shift"].values.astype(str)):
        raise SectionError(f"{store_path}: a shift labelled {label!r} is already stored (other "
                           "advances); give this shift another label")
    history = read_history(stored, before_advance=data[0].advance)
    del stored
    journal = Journal(store_path, {
        "readings_sha256": readings_sha, "advances_sha256": _advances_sha256(data),
        "layout": layout.to_dict(), "settings": settings.to_dict(), "cold": bool(cold),
        "continues_from": history.signature() if history is not None else None,
        "probes": None if probes is None else probes.to_frame().to_csv(index=False),
        "tbminv_version": tbminv.__version__, "versions": versions()})
    if not resume:
        journal.remove()
    for other in journal.others():
        _LOG.warning("%s: a journal of another run of this store (other inputs or settings) "
                     "is kept; rerun that run to resume it, or delete the folder", other)
    results = inverter.run(data, cold=cold, progress=progress, scheduler=scheduler,
                           client=client, journal=journal, history=history)
    t0 = time.perf_counter()
    ds = build_section(results, layout_text, repr(settings.to_dict()), readings_sha)
    ds = add_history(ds, inverter.last_run)
    synthetic = prepared.readings.synthetic
    qc_vars = qc_per_advance(prepared.qc, model_error_floor=settings.model_error_floor,
                             synthetic=synthetic)
    ds = ds.merge(qc_vars.reindex(advance=ds["advance"].values), combine_attrs="drop_conflicts")
    ds.attrs["synthetic"] = int(synthetic)
    append_shift(store_path, ds, shift=label)
    stages = {"readings and QC": t_readings, **inverter.stage_seconds,
              "store": time.perf_counter() - t0}
    ds.attrs["stage_seconds"] = json.dumps({k: round(v, 2) for k, v in stages.items()})
    if any(r.postprocess_flag & POSTPROCESS_RESAMPLING_FAILED for r in results):
        _LOG.warning("journal %s kept: an advance could not be resampled to the output grid "
                     "(its image is in the journal)", journal.folder)
    else:
        journal.remove()
    return ds


def _ranges(values: np.ndarray) -> str:
    """Advance numbers as runs: ``1-3, 7``."""
    out: list[str] = []
    vals = sorted(int(v) for v in values)
    start = prev = vals[0]
    for v in vals[1:] + [None]:
        if v is not None and v == prev + 1:
            prev = v
            continue
        out.append(f"{start}-{prev}" if prev > start else f"{start}")
        if v is not None:
            start = prev = v
    return ", ".join(out)


def _remove_journals_of(store_path: str | Path, readings_sha: str) -> None:
    """Delete journals of runs of this readings log (every advance of it is stored).

    Left when a run is stopped between storing its shift and removing its journal.
    """
    root = journal_root(store_path)
    if not root.is_dir():
        return
    for folder in sorted(p for p in root.iterdir() if p.is_dir()):
        try:
            inputs = json.loads((folder / "inputs.json").read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        if inputs.get("readings_sha256") == readings_sha:
            _LOG.info("removing %s: a journal of this log, whose advances are all stored", folder)
            shutil.rmtree(folder, ignore_errors=True)
    with contextlib.suppress(OSError):
        root.rmdir()


def _empty_section(stored: xr.Dataset | None) -> xr.Dataset:
    """A section without advances (a log whose advances are all stored already)."""
    if stored is None:
        return xr.Dataset(coords={"advance": np.array([], np.int32)})
    return stored.isel(advance=slice(0, 0))


def _check_protocol(prepared: PreparedReadings, layout: Layout) -> None:
    """Fail when no valid reading of the log is a quadrupole of the layout's protocol."""
    table = prepared.qc.table
    valid = table["valid"].to_numpy(bool) & np.isfinite(table["err_ohm"].to_numpy(float))
    n_valid = int(valid.sum())
    n_matched = sum(d.n_valid for d in prepared.advances)
    if n_valid and not n_matched:
        raise InversionError(f"{prepared.source}: none of its {n_valid} valid readings is a "
                             f"quadrupole of the protocol of {layout.source} (in either "
                             "direction); check the layout's [protocol]")
    if n_matched < n_valid:
        _LOG.warning("%s: %d of %d valid readings are not in the layout's protocol and are not "
                     "inverted", prepared.source, n_valid - n_matched, n_valid)
    measured = np.zeros(len(layout.measurements), bool)
    for d in prepared.advances:
        measured |= np.isfinite(d.r_ohm)
    if not measured.all():
        _LOG.info("%s: %d of the protocol's %d quadrupoles have no valid reading in any "
                  "advance", prepared.source, int((~measured).sum()), measured.size)


def _advances_sha256(data: Sequence[AdvanceData]) -> str:
    """SHA-256 of the advance data the inversion sees (numbers, faces, readings, errors)."""
    h = hashlib.sha256()
    for d in data:
        h.update(np.array([d.advance, d.face_chainage_m, d.cutterhead_deg], float).tobytes())
        h.update(np.ascontiguousarray(d.r_ohm, float).tobytes())
        h.update(np.ascontiguousarray(d.rel_error, float).tobytes())
    return h.hexdigest()


def _layout_text(layout: Layout) -> str:
    return tomli_w.dumps(layout.to_dict())


def _shift_label(data: Sequence[AdvanceData]) -> str:
    t = next((d.time for d in data if d.time), None)
    if t:
        return f"shift-{pd.Timestamp(t).strftime('%Y%m%dT%H%M')}"
    return f"advances-{data[0].advance}-{data[-1].advance}"


def stage_times_line(ds: xr.Dataset) -> str:
    """``time by stage: ...`` of a :func:`run_drive` result (its ``stage_seconds`` attribute)."""
    stages = json.loads(ds.attrs.get("stage_seconds", "{}"))
    if not stages:
        return "time by stage: not recorded"
    parts = [f"{k} {v:.0f} s" if v >= 1 else f"{k} {v:.1f} s" for k, v in stages.items()]
    return f"time by stage: {', '.join(parts)} (total {sum(stages.values()):.0f} s)"


#: Exit code of ``tbminv invert`` when the images are stored but a post-processing step failed.
EXIT_PARTIAL = 3


def invert_job(readings_path: str | Path, layout_path: str | Path, store_path: str | Path, *,
               settings_path: str | Path | None = None, cold: bool = False,
               scheduler: str | None = None, progress: bool = True,
               echo: Callable[[str], None] | None = None,
               probes_path: str | Path | None = None) -> int:
    """Check, invert and store one readings log; say what was done (``tbminv invert``).

    Each advance's image is journaled beside the store as soon as it is done; after a crash or
    a kill the same command resumes (see :func:`run_drive`).

    Parameters
    ----------
    readings_path, layout_path, store_path : path
        Readings log (CSV or Parquet), layout (TOML) and section store (NetCDF).
    settings_path : path, optional
        Settings file (``[invert]``, ``[contact]``, ``[qc]``).
    cold : bool
        Start every advance from a homogeneous model.
    scheduler : str, optional
        Address of a dask scheduler for the cold-started advances.
    progress : bool
        Show progress bars.
    echo : callable, optional
        Where the lines for the user go (the command line passes ``print``).
    probes_path : path, optional
        Probe log (CSV, :mod:`tbminv.readings.probes`) constraining the contact fit; its bad
        rows go to ``quarantine.csv`` in :func:`qc_folder` of the probe log.

    The quarantine and the per-reading QC flags go to :func:`qc_folder`.

    Returns
    -------
    int
        0 on success; 3 (:data:`EXIT_PARTIAL`): partial -- the images are stored, but a
        post-processing step (contact fit, depth of investigation or resampling) failed for
        some advances; the store's ``postprocess_flag`` says which and what, the log says why.
        Bad input raises (the command line turns it into exit code 2).
    """
    echo = echo or _LOG.info
    if scheduler and not cold:
        raise InversionError(SCHEDULER_NEEDS_COLD)
    layout = load_layout(layout_path)
    settings, qc = load_settings(settings_path)
    folder = qc_folder(store_path, readings_path)
    probes = read_probe_log(probes_path) if probes_path else None
    if probes is not None:
        pq = probes.write_quarantine(qc_folder(store_path, probes_path) / "quarantine.csv")
        echo(f"probe log {probes_path}: {len(probes.rows)} of {probes.rows_read} rows kept, "
             f"{len(probes.contacts())} contact(s); quarantine -> {pq}")
    ds = run_drive(readings_path, layout, store_path, settings=settings, qc_settings=qc,
                   out_dir=folder, cold=cold, layout_path=layout_path, progress=progress,
                   scheduler=scheduler, probes=probes)
    echo(f"quarantine and per-reading QC flags -> {folder}")
    if probes is not None and "probe_contradicts" in ds:
        bad = ds["advance"].values[ds["probe_contradicts"].values.astype(bool)]
        echo(f"probe constraint contradicts the readings at {bad.size} advance(s)"
             + (f" ({_ranges(bad)}): flagged, not applied" if bad.size else ""))
    n = ds.sizes["advance"]
    if n == 0:
        echo(f"nothing to invert: every advance of {readings_path} is already in {store_path}")
        return 0
    flagged = int((ds["fit_flag"].values != 0).sum()) if "fit_flag" in ds else 0
    echo(f"inverted {n} advances ({flagged} flagged) -> {store_path}")
    echo(stage_times_line(ds))
    if "contact_ahead_m" in ds:
        last = ds.isel(advance=-1)
        d = float(last["contact_ahead_m"])
        if math.isfinite(d):
            echo(f"last advance: contact fitted {d:.1f} m ahead "
                 f"[{float(last['contact_ahead_lo_m']):.1f}, "
                 f"{float(last['contact_ahead_hi_m']):.1f}] m")
        else:
            echo("last advance: no contact found within reach")
    post = ds["postprocess_flag"].values if "postprocess_flag" in ds else np.zeros(n, int)
    if np.any(post != 0):
        meanings = POSTPROCESS_MEANINGS.split()
        what = {m for bit, m in zip(POSTPROCESS_MASKS, meanings) if np.any(post & bit)}
        echo(f"partial: images stored, a post-processing step failed for "
             f"{int((post != 0).sum())} of {n} advances ({', '.join(sorted(what))}; see the "
             "warnings above and postprocess_flag in the store)")
        return EXIT_PARTIAL
    return 0


# ---------------------------------------------------------------------- run_check
@dataclass
class CheckResult:
    """Outcome of :func:`run_check`.

    Attributes
    ----------
    usable : bool
        True if at least one valid reading remains for inversion.
    n_read, n_kept, n_quarantined, n_valid : int
        Rows read, kept by the reader, quarantined, and valid after QC.
    paths : dict
        Output name -> path (``quarantine``, ``qc_flags``, ``summary_txt``, ``summary_json``,
        ``figure_png``, ``figure_pdf``).
    summary : dict
        The content of qc_summary.json.
    prepared : PreparedReadings
        The checked, QC'd readings grouped by advance (hand it on to the inversion).
    """

    usable: bool
    n_read: int
    n_kept: int
    n_quarantined: int
    n_valid: int
    paths: dict[str, Path]
    summary: dict[str, Any]
    prepared: PreparedReadings = field(repr=False)

    @property
    def readings(self) -> Readings:
        """The checked readings (kept rows, quarantine, counts)."""
        return self.prepared.readings

    @property
    def qc(self) -> QCResult:
        """The QC result."""
        return self.prepared.qc

    def describe(self) -> list[str]:
        """A few lines for the command line: counts, error models, files written, verdict."""
        q = self.summary["qc"]
        out = [f"{self.n_read} rows read, {self.n_kept} kept, {self.n_quarantined} quarantined",
               f"{self.n_valid} readings valid for inversion, {q['flagged']} flagged (kept)"]
        flags = ", ".join(f"{k} {v}" for k, v in q["flags"].items() if v)
        if flags:
            out.append(f"flags: {flags}")
        if self.prepared.n_negative_rhoa is not None:
            out.append(f"{self.prepared.n_negative_rhoa} readings with a negative apparent "
                       "resistivity (flagged negative_rhoa: kept in qc_flags.csv, left out of "
                       "the image and the contact fit)")
        src = ", ".join(f"{k} {v}" for k, v in q["error_models_by_source"].items())
        out.append(f"error models per {q['error_model_group']}: {src or 'none'}")
        for name, path in self.paths.items():
            out.append(f"wrote {name}: {path}")
        if not self.usable:
            why = "no valid readings remain"
            if q["flags"].get("no_error_model"):
                why += ("; readings without an error model: too few reciprocal pairs and no "
                        "fallback set (set fallback_a_ohm and fallback_b in the [qc] table)")
            out.append(f"NOT USABLE: {why}")
        return out


def run_check(readings_path: str | os.PathLike[str] | pd.DataFrame, layout: Layout,
              out_dir: str | os.PathLike[str], settings: QCSettings | None = None, *,
              model_error_floor: float | None = None, sign_check: bool = True,
              forward_settings: str = "fast") -> CheckResult:
    """Read, check and QC a readings log; write the quarantine, flags, summary and figure.

    Writes into ``out_dir``: ``quarantine.csv``, ``qc_flags.csv`` (one row per reading: error
    components and flags), ``qc_summary.txt``, ``qc_summary.json``, ``qc.png`` and ``qc.pdf``
    (each written atomically).

    Parameters
    ----------
    readings_path : path-like or pandas.DataFrame
        The readings log (CSV or Parquet file, or its columns as a DataFrame).
    layout : Layout
        Electrode labels and positions.
    out_dir : path-like
        Output folder (created if missing).
    settings : QCSettings, optional
        Defaults: :class:`QCSettings`.
    model_error_floor : float, optional
        Relative modelling-error floor shown in ``qc_flags.csv`` (``[invert]
        model_error_floor``, which the inversion adds; default: its default).
    sign_check : bool
        Flag readings with a negative apparent resistivity, against the sign of the
        axisymmetric model's homogeneous response (one cached forward run per face when
        electrodes are fixed in the ground, else one).
    forward_settings : str
        Preset of that model (``fast`` or ``standard``).

    Returns
    -------
    CheckResult
        ``usable`` is False when no valid reading remains.

    Raises
    ------
    tbminv.readings.reader.ReadingsError
        When the log cannot be read at all (nothing is written then).
    """
    settings = settings or QCSettings()
    floor = (InversionSettings().model_error_floor if model_error_floor is None
             else model_error_floor)
    out = Path(out_dir)
    sign = None
    if sign_check:
        sign = homogeneous_sign(model_homogeneous(make_model(
            "axisym", layout, **model_options_for("axisym", forward_settings))))
    prepared = prepare_advances(readings_path, layout, settings, out_dir=out,
                                expected_sign=sign, model_error_floor=floor)
    readings, qc = prepared.readings, prepared.qc
    paths = {"quarantine": prepared.quarantine_path, "qc_flags": prepared.flags_path}
    summary = {"readings_log": readings.summary.to_dict(), "qc": qc.summary()}
    n_valid = summary["qc"]["valid"]
    summary["usable"] = bool(n_valid > 0)
    paths["summary_json"] = atomic_write_text(out / "qc_summary.json",
                                              json.dumps(summary, indent=2, default=_json) + "\n")
    paths["summary_txt"] = atomic_write_text(out / "qc_summary.txt", summary_text(readings, qc))
    paths.update(write_figure(qc, out))
    return CheckResult(usable=bool(n_valid > 0), n_read=readings.summary.rows_read,
                       n_kept=readings.summary.rows_kept,
                       n_quarantined=readings.summary.rows_quarantined, n_valid=int(n_valid),
                       paths=paths, summary=summary, prepared=prepared)


def reach_job(layout_path: str | Path, out_dir: str | Path, *, contrast: float = 10.0,
              noise_rel: float = 0.02, noise_abs_v: float = 0.0, k: float = 3.0,
              model: str = "axisym", model_settings: str = "fast", target: str = "contact",
              sweep_path: str | Path | None = None, workers: int | None = None,
              scheduler: str | None = None, echo: Callable[[str], None] | None = None,
              false_alarm: float | None = None, detection_probability: float = 0.5) -> int:
    """``tbminv reach``: one layout (``DIR/reach.nc`` + figures) or a sweep (``DIR/sweep.nc``).

    Parameters
    ----------
    layout_path, out_dir : path
        Layout file (TOML) and output folder.
    contrast : float
        Resistivity beyond / around the contact (dimensionless).
    noise_rel : float
        Relative noise (fraction); ``noise_abs_v`` absolute noise, V.
    k : float
        Detection threshold of one reading in standard deviations; also sets the whole-set
        false alarm probability ``2 Phi(-k)`` unless ``false_alarm`` is given.
    false_alarm, detection_probability : float, optional
        Criterion of the whole-set reach ``reach_m`` (:class:`tbminv.studies.reach.ReachSettings`).
    model, model_settings : str
        Forward model name and its preset (``fast`` / ``standard``, see
        :func:`tbminv.forward.registry.model_options_for`).
    target : str
        ``contact`` or ``sphere``.
    sweep_path : path, optional
        Sweep file (TOML): run the sweep instead of one layout.
    workers : int, optional
        Size of a local dask cluster for sweeps; ``scheduler`` an existing scheduler's address.
    echo : callable, optional
        Where the lines for the user go.

    Returns
    -------
    int
        0 on success.
    """
    echo = echo or _LOG.info
    layout = load_layout(layout_path)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    choice = model_settings
    settings = ReachSettings(contrast=contrast, noise_rel=noise_rel, noise_abs_v=noise_abs_v,
                             model=model, k=float(k), target=target, false_alarm=false_alarm,
                             detection_probability=float(detection_probability))
    if sweep_path:
        sweep, opts = load_sweep(sweep_path)
        known = ("k", "model", "target", "background_ohmm", "length", "distances_in_diameters",
                 "model_settings", "sphere_radius_m")
        for key in opts:
            if key not in known:
                raise ValueError(f"{sweep_path}: [options] {key}: unknown option; expected one "
                                 f"of {', '.join(known)}")
        settings = dataclasses.replace(settings, **{k: opts[k] for k in
                                                    ("k", "model", "target", "background_ohmm",
                                                     "sphere_radius_m")
                                                    if k in opts})
        choice = str(opts.get("model_settings", choice))
        settings = dataclasses.replace(settings,
                                       model_options=model_options_for(settings.model, choice))
        client = None
        own: list[Any] = []
        if workers and not scheduler:
            # late: dask.distributed is a heavy import needed only for a local cluster
            from dask.distributed import Client, LocalCluster

            cluster = LocalCluster(n_workers=int(workers), threads_per_worker=1, processes=True,
                                   dashboard_address=None,
                                   env={"TBMINV_THREADS": "1", "OMP_NUM_THREADS": "1"})
            client = Client(cluster)
            own = [client, cluster]
        try:
            ds = run_sweep(layout, sweep, settings, length=opts.get("length", "fixed"),
                           distances_in_diameters=opts.get("distances_in_diameters"),
                           scheduler=scheduler, client=client)
        finally:
            for obj in own:
                obj.close()
        ds.attrs["model_settings"] = choice
        path = out / "sweep.nc"
        with atomic_path(path) as tmp:
            ds.to_netcdf(tmp, engine="h5netcdf")
        echo(f"sweep of {int(np.prod([ds.sizes[d] for d in ds['reach_m'].dims]))} cases "
              f"({settings.model}, {choice} settings) in {ds.attrs['wall_time_s']:.0f} s "
              f"-> {path}")
        for p in save_figure(plot_reach_map(ds), out / "reach_map"):
            echo(f"figure -> {p}")
        return 0
    settings = dataclasses.replace(settings, model_options=model_options_for(model, choice))
    ds = reach_study(layout, settings)
    ds.attrs["model_settings"] = choice
    path = out / "reach.nc"
    with atomic_path(path) as tmp:
        ds.to_netcdf(tmp, engine="h5netcdf")
    diam = layout.machine.diameter_m

    def _fmt(value: float, at_end: bool) -> str:
        bound = ">= " if at_end else ""
        return f"{bound}{value:.1f} m ({bound}{value / diam:.1f} D)"

    reach_end = bool(ds["reach_at_grid_end"])
    single_end = bool(ds["reach_per_reading_at_grid_end"])
    echo(f"reach of {layout.name or layout_path} for contrast {settings.contrast:g} at "
         f"{100 * settings.noise_rel:g} % noise ({model}, {choice} settings):")
    echo(f"  reach_m {_fmt(float(ds['reach_m']), reach_end)} ahead: whole reading set, "
         f"resistivity around the machine unknown (likelihood ratio, false alarm "
         f"{100 * ds.attrs['false_alarm']:.2g} %, detection probability "
         f"{100 * ds.attrs['detection_probability']:.0f} %)")
    echo(f"  reach_per_reading_m {_fmt(float(ds['reach_per_reading_m']), single_end)} ahead: "
         f"best single reading, resistivity around the machine known, |dR/R| >= "
         f"{settings.k:g} sigma (optimistic)")
    if reach_end or single_end:
        echo("  (>=: the change is still seen at the last distance of the grid)")
    echo("  a planning figure at the stated noise: a contact beyond the reach can be present and "
         "unseen ('none seen' is not 'all clear')")
    echo("  detectable distance of single readings (resistivity around known):")
    for b in best_measurements(ds, 5):
        echo(f"  {b['a']} {b['b']} {b['m']} {b['n']}: {b['detectable_ahead_m']:.1f} m")
    echo(f"dataset -> {path}")
    for p in save_figure(plot_response_vs_distance(ds), out / "reach"):
        echo(f"figure -> {p}")
    return 0


def report_job(store_path: str | Path, out_dir: str | Path, *,
               settings_path: str | Path | None = None,
               materials_path: str | Path | None = None, shift: str | None = None,
               echo: Callable[[str], None] | None = None,
               probes_path: str | Path | None = None) -> int:
    """``tbminv report STORE --out DIR [--settings S] [--materials T] [--shift L]``.

    Writes the report and says where each output went. ``settings_path`` gives the ``[ahead]``
    thresholds, ``materials_path`` a site-calibrated material table. A store that cannot be read
    raises :class:`FileNotFoundError` or :class:`~tbminv.inversion.outcome.SectionError`,
    which the command line reports with exit code 2. ``probes_path`` adds a probe log (drawn,
    listed, checked against the contact fit); without ``materials_path`` its site table
    (:func:`tbminv.results.probecheck.site_material_table`) replaces the handbook ranges and
    is written to ``DIR/site_materials.toml`` (reusable with ``--materials``).

    Returns
    -------
    int
        0 on success.
    """
    echo = echo or _LOG.info
    ahead = AheadSettings.from_toml(settings_path) if settings_path else None
    table = load_material_table(materials_path) if materials_path else None
    probes = read_probe_log(probes_path) if probes_path else None
    if probes is not None and table is None:
        table = site_material_table(probes, open_section(store_path))
        if table is not None:
            Path(out_dir).mkdir(parents=True, exist_ok=True)
            saved = save_material_table(table, Path(out_dir) / "site_materials.toml")
            echo(f"site material table from {probes_path} -> {saved} (replaces the handbook "
                 "ranges in this report)")
    for p in write_report(store_path, out_dir, shift=shift, material_table=table,
                          ahead_settings=ahead, probes=probes):
        echo(f"wrote {p}")
    return 0


__all__ = ["EXIT_PARTIAL", "SIGN_NULL_FRACTION", "homogeneous_sign", "model_homogeneous",
           "qc_folder", "file_sha256", "run_drive", "invert_job", "CheckResult", "run_check",
           "reach_job", "report_job"]
