"""The workflows the command line and the notebooks call: check, invert, report, reach."""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tbminv.cache import atomic_path, atomic_write_text
from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.settings import (
    SCHEDULER_NEEDS_COLD,
    InversionError,
    InversionSettings,
    load_settings,
)
from tbminv.layout import Layout, load_layout
from tbminv.materials import load_material_table
from tbminv.plots.qc import write_figure
from tbminv.plots.reach import plot_reach_map, plot_response_vs_distance
from tbminv.plots.section import save_figure
from tbminv.readings.advance import AdvanceData, advance_data
from tbminv.readings.qc import QCResult, QCSettings, _json, run_qc, summary_text
from tbminv.readings.reader import Readings, read_readings
from tbminv.report import write_report
from tbminv.results.ahead import AheadSettings
from tbminv.results.section import build_section
from tbminv.results.store import append_shift
from tbminv.studies.reach import (
    ReachSettings,
    best_measurements,
    load_sweep,
    model_options_for,
    reach_study,
)
from tbminv.studies.sweep import run_sweep

_LOG = logging.getLogger(__name__)


# ------------------------------------------------------------------------ files, CLI
def file_sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def run_drive(readings_path: str | Path, layout: Layout, store_path: str | Path, *,
              settings: InversionSettings | None = None, qc_settings: Any | None = None,
              out_dir: str | Path | None = None, cold: bool = False, shift: str | None = None,
              layout_path: str | Path | None = None, progress: bool = False,
              scheduler: str | None = None, client: Any | None = None) -> Any:
    """Check, invert and store a readings log (one shift) in the section store.

    ``scheduler`` (a dask scheduler address) or ``client`` run the cold-started advances on
    dask workers (``cold`` must be set).

    Returns
    -------
    xarray.Dataset
        The section of this run (also appended to ``store_path``).
    """
    settings = settings or InversionSettings()
    readings = read_readings(readings_path, layout)
    if out_dir is not None:
        readings.write_quarantine(out_dir)
    qc = run_qc(readings, qc_settings or QCSettings())
    data = advance_data(qc.table, layout)
    data = [d for d in data if np.isfinite(d.r_ohm).sum() >= 3]
    if not data:
        raise InversionError(f"{readings_path}: no advance has three or more valid readings "
                             "with an error model (see `tbminv check`)")
    inverter = DriveInverter(layout, settings)
    results = inverter.run(data, cold=cold, progress=progress, scheduler=scheduler,
                           client=client)
    layout_text = (Path(layout_path).read_text(encoding="utf-8") if layout_path
                   else _layout_text(layout))
    settings_text = repr(settings.to_dict())
    ds = build_section(results, layout_text, settings_text, file_sha256(readings_path))
    label = shift or _shift_label(data)
    append_shift(store_path, ds, shift=label)
    return ds


def _layout_text(layout: Layout) -> str:
    import tomli_w

    return tomli_w.dumps(layout.to_dict())


def _shift_label(data: Sequence[AdvanceData]) -> str:
    t = next((d.time for d in data if d.time), None)
    if t:
        return f"shift-{pd.Timestamp(t).strftime('%Y%m%dT%H%M')}"
    return f"advances-{data[0].advance}-{data[-1].advance}"


def invert_job(readings_path: str | Path, layout_path: str | Path, store_path: str | Path, *,
               settings_path: str | Path | None = None, cold: bool = False,
               scheduler: str | None = None, progress: bool = True,
               echo: Callable[[str], None] | None = None) -> int:
    """Check, invert and store one readings log; say what was done (``tbminv invert``).

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

    Returns
    -------
    int
        0 on success.
    """
    echo = echo or _LOG.info
    if scheduler and not cold:
        raise InversionError(SCHEDULER_NEEDS_COLD)
    layout = load_layout(layout_path)
    settings, qc = load_settings(settings_path)
    ds = run_drive(readings_path, layout, store_path, settings=settings, qc_settings=qc,
                   cold=cold, layout_path=layout_path, progress=progress, scheduler=scheduler)
    n = ds.sizes["advance"]
    flagged = int((ds["fit_flag"].values != 0).sum()) if "fit_flag" in ds else 0
    echo(f"inverted {n} advances ({flagged} flagged) -> {store_path}")
    if "contact_ahead_m" in ds:
        last = ds.isel(advance=-1)
        d = float(last["contact_ahead_m"])
        if math.isfinite(d):
            echo(f"last advance: contact fitted {d:.1f} m ahead "
                 f"[{float(last['contact_ahead_lo_m']):.1f}, "
                 f"{float(last['contact_ahead_hi_m']):.1f}] m")
        else:
            echo("last advance: no contact found within reach")
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
        Output name -> path (``quarantine``, ``summary_txt``, ``summary_json``, ``figure_png``,
        ``figure_pdf``).
    summary : dict
        The content of qc_summary.json.
    readings : Readings
        The checked readings.
    qc : QCResult
        QC result.
    """

    usable: bool
    n_read: int
    n_kept: int
    n_quarantined: int
    n_valid: int
    paths: dict[str, Path]
    summary: dict[str, Any]
    readings: Readings = field(repr=False)
    qc: QCResult = field(repr=False)

    def describe(self) -> list[str]:
        """A few lines for the command line: counts, error models, files written, verdict."""
        q = self.summary["qc"]
        out = [f"{self.n_read} rows read, {self.n_kept} kept, {self.n_quarantined} quarantined",
               f"{self.n_valid} readings valid for inversion, {q['flagged']} flagged (kept)"]
        flags = ", ".join(f"{k} {v}" for k, v in q["flags"].items() if v)
        if flags:
            out.append(f"flags: {flags}")
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


def run_check(readings_path: str | os.PathLike[str], layout: Any,
              out_dir: str | os.PathLike[str], settings: QCSettings | None = None
              ) -> CheckResult:
    """Read, check and QC a readings log; write the quarantine, summary and figure.

    Writes into ``out_dir``: ``quarantine.csv``, ``qc_summary.txt``, ``qc_summary.json``,
    ``qc.png`` and ``qc.pdf`` (each written atomically).

    Parameters
    ----------
    readings_path : path-like
        The readings log (CSV or Parquet).
    layout : Layout
        Electrode labels and positions.
    out_dir : path-like
        Output folder (created if missing).
    settings : QCSettings, optional
        Defaults: :class:`QCSettings`.

    Returns
    -------
    CheckResult
        ``usable`` is False when no valid reading remains.

    Raises
    ------
    tbminv.readings.ReadingsError
        When the log cannot be read at all (nothing is written then).
    """
    settings = settings or QCSettings()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    readings = read_readings(readings_path, layout)
    qc = run_qc(readings, settings)
    paths = {"quarantine": readings.write_quarantine(out)}
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
                       paths=paths, summary=summary, readings=readings, qc=qc)


def reach_job(layout_path: str | Path, out_dir: str | Path, *, contrast: float = 10.0,
              noise_rel: float = 0.02, noise_abs_v: float = 0.0, k: float = 3.0,
              model: str = "axisym", model_settings: str = "fast", target: str = "contact",
              sweep_path: str | Path | None = None, workers: int | None = None,
              scheduler: str | None = None, echo: Callable[[str], None] | None = None) -> int:
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
        Detection threshold in standard deviations.
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
                             model=model, k=float(k), target=target)
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
    reach = float(ds["reach_m"])
    bound = ">= " if bool(ds["reach_at_grid_end"]) else ""
    echo(f"reach of {layout.name or layout_path}: {bound}{reach:.1f} m ahead "
          f"({bound}{reach / layout.machine.diameter_m:.1f} D) for contrast "
          f"{settings.contrast:g} at {100 * settings.noise_rel:g} % noise, k = {settings.k:g} "
          f"({model}, {choice} settings)")
    if bound:
        echo("  (the change is still seen at the last distance of the grid)")
    for b in best_measurements(ds, 5):
        echo(f"  {b['a']} {b['b']} {b['m']} {b['n']}: {b['detectable_ahead_m']:.1f} m")
    echo(f"dataset -> {path}")
    for p in save_figure(plot_response_vs_distance(ds), out / "reach"):
        echo(f"figure -> {p}")
    return 0


def report_job(store_path: str | Path, out_dir: str | Path, *,
               settings_path: str | Path | None = None,
               materials_path: str | Path | None = None, shift: str | None = None,
               echo: Callable[[str], None] | None = None) -> int:
    """``tbminv report STORE --out DIR [--settings S] [--materials T] [--shift L]``.

    Writes the report and says where each output went. ``settings_path`` gives the ``[ahead]``
    thresholds, ``materials_path`` a site-calibrated material table. A store that cannot be read
    raises :class:`FileNotFoundError` or :class:`~tbminv.inversion.outcome.SectionError`,
    which the command line reports with exit code 2.

    Returns
    -------
    int
        0 on success.
    """
    echo = echo or _LOG.info
    ahead = AheadSettings.from_toml(settings_path) if settings_path else None
    table = load_material_table(materials_path) if materials_path else None
    for p in write_report(store_path, out_dir, shift=shift, material_table=table,
                          ahead_settings=ahead):
        echo(f"wrote {p}")
    return 0


__all__ = ["file_sha256", "run_drive", "invert_job", "CheckResult", "run_check",
           "reach_job", "report_job"]
