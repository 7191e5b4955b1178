"""Reach sweeps over layouts and noise on a dask cluster."""

from __future__ import annotations

import dataclasses
import itertools
import logging
import os
import time
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import xarray as xr

from tbminv.layout import Layout
from tbminv.studies.reach import (
    SWEEP_PARAMETERS,
    ReachSettings,
    _settings_attrs,
    default_face_chainage,
    reach_study,
)

_LOG = logging.getLogger(__name__)
# ----------------------------------------------------------------------------- sweeps
def scale_layout(layout: Layout, diameter_m: float, *, length: str = "fixed",
                 face_chainage_m: float | None = None) -> Layout:
    """The layout for another machine diameter.

    Radial positions scale with the diameter (shield and wall electrodes keep their offset from
    the skin). With ``length = "proportional"`` the shield length and every axial distance behind
    the face scale too; with ``"fixed"`` they stay. Cutterhead electrodes keep their axial
    position (a few cm into the ground ahead of the steel).

    Parameters
    ----------
    layout : Layout
    diameter_m : float
        New machine diameter, m.
    length : {"fixed", "proportional"}
    face_chainage_m : float, optional
        Face chainage about which wall electrodes are scaled, m (default:
        :func:`default_face_chainage` of ``layout``). Run the scaled layout at this same face.
    """
    if length not in ("fixed", "proportional"):
        raise ValueError(f"length = {length!r}: expected 'fixed' or 'proportional'")
    s = diameter_m / layout.machine.diameter_m
    r_old = layout.machine.radius_m
    r_new = 0.5 * diameter_m
    ax = s if length == "proportional" else 1.0
    face = default_face_chainage(layout) if face_chainage_m is None else float(face_chainage_m)
    machine = dataclasses.replace(layout.machine, diameter_m=diameter_m,
                                  shield_length_m=layout.machine.shield_length_m * ax,
                                  cutterhead_thickness_m=layout.machine.cutterhead_thickness_m
                                  * ax)
    els = []
    for e in layout.electrodes:
        if e.kind == "cutterhead":
            els.append(dataclasses.replace(e, radius_m=e.radius_m * s))
        elif e.kind == "shield":
            els.append(dataclasses.replace(e, radius_m=r_new + (e.radius_m - r_old),
                                           axial_m=e.axial_m * ax))
        elif e.kind == "wall":
            els.append(dataclasses.replace(e, radius_m=r_new + (e.radius_m - r_old),
                                           chainage_m=face + (e.chainage_m - face) * ax))
        else:
            els.append(e)
    return dataclasses.replace(layout, machine=machine, electrodes=tuple(els))


def _task(config: dict[str, Any]) -> dict[str, Any]:
    """One sweep case, from plain data (runs in a dask worker or serially)."""
    os.environ.setdefault("TBMINV_THREADS", "1")
    layout = Layout.from_dict(config["layout"], source="sweep")
    case = config["case"]
    base = ReachSettings(**config["settings"])
    # one face chainage for every case: wall electrodes are scaled about it
    face = base.face_chainage_m
    if face is None:
        face = default_face_chainage(layout)
    if "diameter_m" in case:
        layout = scale_layout(layout, float(case["diameter_m"]), length=config["length"],
                              face_chainage_m=face)
    if "shield_length_m" in case:
        layout = dataclasses.replace(layout, machine=dataclasses.replace(
            layout.machine, shield_length_m=float(case["shield_length_m"])))
    if "cover_m" in case:
        layout = dataclasses.replace(layout, tunnel=dataclasses.replace(
            layout.tunnel, cover_m=float(case["cover_m"])))
    over = {k: float(v) for k, v in case.items() if k in ("contrast", "noise_rel", "noise_abs_v")}
    settings = dataclasses.replace(base, face_chainage_m=face, **over)
    if config.get("distances_in_diameters"):
        settings = dataclasses.replace(settings, distances_m=tuple(
            float(x) * layout.machine.diameter_m for x in config["distances_in_diameters"]))
    t0 = time.perf_counter()
    ds = reach_study(layout, settings)
    return {"case": case, "relative_response": ds["relative_response"].values,
            "detectable_ahead_m": ds["detectable_ahead_m"].values,
            "reach_m": float(ds["reach_m"]), "distance_ahead": ds["distance_ahead"].values,
            "reach_at_grid_end": bool(ds["reach_at_grid_end"]),
            "reach_per_reading_m": float(ds["reach_per_reading_m"]),
            "reach_per_reading_at_grid_end": bool(ds["reach_per_reading_at_grid_end"]),
            "task_s": time.perf_counter() - t0, "pid": os.getpid(),
            "peak_rss_mb": _peak_rss_mb()}


def _peak_rss_mb() -> float:
    """Peak resident memory of this process, MB (NaN where unknown)."""
    try:  # POSIX only: imported where it is used
        import resource
    except ImportError:  # pragma: no cover - not on POSIX
        return float("nan")
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def run_sweep(layout: Layout, sweep: Mapping[str, Sequence[float]], settings: ReachSettings, *,
              length: str = "fixed", distances_in_diameters: Sequence[float] | None = None,
              client: Any | None = None, scheduler: str | None = None, serial: bool = False,
              progress: bool = True) -> xr.Dataset:
    """Reach over the product of swept parameters, as independent dask tasks.

    Parameters
    ----------
    layout : Layout
        Base layout.
    sweep : mapping name -> values
        Swept parameters from :data:`SWEEP_PARAMETERS`.
    settings : ReachSettings
        Base settings (swept values override).
    length : {"fixed", "proportional"}
        How the machine length follows the diameter.
    distances_in_diameters : sequence of float, optional
        Distance grid in units of D (so cases of different D share a grid in D).
    client : dask.distributed.Client, optional
        Existing client; else ``scheduler`` address; else a LocalCluster sized to the machine.
    serial : bool
        Run in this process (no dask).

    Returns
    -------
    xarray.Dataset
        ``reach_m`` and ``reach_per_reading_m`` over the swept dims, ``detectable_ahead_m``
        (swept dims, measurement) and ``relative_response`` (swept dims, measurement, step).
    """
    for k in sweep:
        if k not in SWEEP_PARAMETERS:
            raise ValueError(f"sweep parameter {k!r}: expected one of "
                             f"{', '.join(SWEEP_PARAMETERS)}")
    names = list(sweep)
    values = [list(map(float, sweep[k])) for k in names]
    cases = [dict(zip(names, combo)) for combo in itertools.product(*values)]
    base = {f.name: getattr(settings, f.name) for f in dataclasses.fields(settings)}
    base["model_options"] = dict(base["model_options"])
    base["distances_m"] = tuple(base["distances_m"])
    configs = [{"layout": layout.to_dict(), "case": c, "settings": base, "length": length,
                "distances_in_diameters": list(distances_in_diameters or [])} for c in cases]
    t0 = time.perf_counter()
    results = _run_tasks(configs, client=client, scheduler=scheduler, serial=serial,
                         progress=progress)
    _LOG.info("sweep of %d cases in %.1f s", len(cases), time.perf_counter() - t0)
    shape = [len(v) for v in values]
    nq = len(layout.measurements)
    nd = results[0]["distance_ahead"].size
    reach = np.empty(len(cases))
    det = np.empty((len(cases), nq))
    rel = np.empty((len(cases), nq, nd))
    dist = np.empty((len(cases), nd))
    at_end = np.empty(len(cases), bool)
    single = np.empty(len(cases))
    single_end = np.empty(len(cases), bool)
    task_s = np.empty(len(cases))
    rss = np.empty(len(cases))
    pid = np.empty(len(cases), np.int64)
    for i, r in enumerate(results):
        reach[i], det[i], rel[i], dist[i] = (r["reach_m"], r["detectable_ahead_m"],
                                             r["relative_response"], r["distance_ahead"])
        at_end[i], task_s[i], rss[i], pid[i] = (r["reach_at_grid_end"], r["task_s"],
                                                r["peak_rss_mb"], r["pid"])
        single[i], single_end[i] = r["reach_per_reading_m"], r["reach_per_reading_at_grid_end"]
    coords = {k: (k, np.asarray(v), {"units": _unit(k)}) for k, v in zip(names, values)}
    coords["measurement"] = np.arange(nq)
    ds = xr.Dataset(
        {
            "reach_m": (names, reach.reshape(shape),
                        {"units": "m", "long_name": "look-ahead reach: whole reading set, "
                                                    "resistivity around the machine unknown"}),
            "reach_per_reading_m": (names, single.reshape(shape),
                                    {"units": "m", "long_name": "best single reading, "
                                                                "resistivity around the machine "
                                                                "known"}),
            "reach_per_reading_at_grid_end": (names, single_end.reshape(shape),
                                              {"long_name": "reach_per_reading_m is the grid's "
                                                            "last distance (lower bound)"}),
            "detectable_ahead_m": ((*names, "measurement"), det.reshape(*shape, nq),
                                   {"units": "m"}),
            "relative_response": ((*names, "measurement", "step"),
                                  rel.reshape(*shape, nq, nd), {"units": "1"}),
            "distance_ahead": ((*names, "step"), dist.reshape(*shape, nd), {"units": "m"}),
            "reach_at_grid_end": (names, at_end.reshape(shape),
                                  {"long_name": "reach is the grid's last distance (lower "
                                                "bound)"}),
            "task_time_s": (names, task_s.reshape(shape), {"units": "s"}),
            "worker_peak_rss_mb": (names, rss.reshape(shape),
                                   {"units": "MB", "long_name": "peak resident memory of the "
                                                                "process that ran the case"}),
            "worker_pid": (names, pid.reshape(shape)),
        },
        coords=coords,
    )
    ds.attrs.update(_settings_attrs(settings))
    ds.attrs["length_scaling"] = length
    ds.attrs["wall_time_s"] = time.perf_counter() - t0
    return ds


def _unit(name: str) -> str:
    return {"contrast": "1", "noise_rel": "1", "noise_abs_v": "V"}.get(name, "m")


def _run_tasks(configs: list[dict[str, Any]], *, client: Any | None, scheduler: str | None,
               serial: bool, progress: bool) -> list[dict[str, Any]]:
    # late: the progress bar and dask.distributed (heavy, a cluster) load only for a sweep
    from tqdm.auto import tqdm

    if serial:
        return [_task(c) for c in tqdm(configs, disable=not progress, desc="reach sweep")]
    from dask.distributed import Client, LocalCluster, as_completed

    own: list[Any] = []
    if client is None:
        if scheduler:
            client = Client(scheduler)
        else:
            n = max(1, os.cpu_count() or 1)
            cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                   dashboard_address=None,
                                   env={"TBMINV_THREADS": "1", "OMP_NUM_THREADS": "1"})
            client = Client(cluster)
            own = [client, cluster]
        if scheduler:
            own = [client]
    try:
        futures = client.map(_task, configs, pure=False)
        index = {f.key: i for i, f in enumerate(futures)}
        out: list[Any] = [None] * len(configs)
        for fut in tqdm(as_completed(futures), total=len(futures), disable=not progress,
                        desc="reach sweep"):
            out[index[fut.key]] = fut.result()
        return out
    finally:
        for obj in own:
            obj.close()


__all__ = ["scale_layout", "run_sweep"]
