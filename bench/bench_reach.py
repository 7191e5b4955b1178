"""Reach benchmarks: diameter dependence of the reach, and a sweep serial vs dask LocalCluster.

Writes ``bench/results/reach_diameter.json`` (part ``diameter``) and ``bench/results/reach.json``
(part ``sweep``). Both use the demo layout with its explicit measurements only (machine-pole and
cutterhead-pole readings; no generated protocol), the steel machine and the tunnel in, the
axisymmetric model with :meth:`tbminv.forward.axisym.fields.AxisymSettings.fast`, 2 % relative
noise, k = 3. Each case reports both reaches (:mod:`tbminv.studies.reach`): ``reach_m`` (whole
reading set, resistivity around the machine fitted; likelihood ratio, false alarm 0.27 %,
detection probability 50 %) and ``reach_per_reading_m`` (best single reading, resistivity known).

Usage: ``python bench/bench_reach.py [diameter|sweep|all]``. Timings on a shared machine are noisy.
"""

from __future__ import annotations

import json
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.layout import Layout, demo_layout_path, load_layout
from tbminv.studies.reach import ReachSettings
from tbminv.studies.sweep import run_sweep

RESULTS = Path(__file__).resolve().parent / "results"
DIAMETERS = [4.0, 6.0, 8.0, 10.0]
CONTRASTS = [10.0, 0.1]
DIST_D = [float(x) for x in np.geomspace(0.25, 16.0, 49)]


def bench_layout() -> Layout:
    """Demo layout, explicit measurements only."""
    d = load_layout(demo_layout_path()).to_dict()
    d.pop("protocol", None)
    return Layout.from_dict(d, source="demo layout, explicit measurements")


def settings() -> ReachSettings:
    return ReachSettings(noise_rel=0.02, k=3.0, model="axisym",
                         model_options={"settings": AxisymSettings.fast()})


def _cluster(n: int):
    from dask.distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           dashboard_address=None,
                           env={"TBMINV_THREADS": "1", "OMP_NUM_THREADS": "1"})
    return cluster, Client(cluster)


def _labels(layout: Layout) -> list[str]:
    return [f"{q.a}-{q.b or 'inf'}/{q.m}-{q.n or 'inf'}" for q in layout.measurements]


def diameter_part() -> dict:
    layout = bench_layout()
    cluster, client = _cluster(2)
    out: dict = {"what": "reach vs machine diameter, steel machine and tunnel in",
                 "layout": "demo layout (tbminv/data/demo_layout.toml), explicit measurements",
                 "measurements": _labels(layout), "model": "axisym, AxisymSettings.fast()",
                 "noise_rel": 0.02, "noise_abs_v": 0.0, "k": 3.0,
                 "distances_in_diameters": "geomspace(0.25, 16, 49): one step is 9 %",
                 "notes": "reach_m: whole reading set, resistivity around the machine "
                          "unknown: distance where the minimum chi-squared of the homogeneous "
                          "model with a free resistivity against the noise-free contact data "
                          "falls to the threshold 9 (1 degree of freedom, false alarm 0.27 %, "
                          "detection probability 50 %). reach_per_reading_m: best single "
                          "reading, resistivity around known, |dR/R| >= 3 x 2 %. Both are "
                          "crossings interpolated in log-log between grid distances; "
                          "'at_grid_end' means the change is still seen at 16 D. The ground "
                          "surface (cover) is left out by the axisymmetric model (full space). "
                          "'fixed': shield length 9.5 m and every axial position stay, radii "
                          "scale (electrodes keep their offset from the skin). 'proportional': "
                          "shield length, cutterhead thickness, shield-electrode axial positions "
                          "and wall-electrode distances behind the face scale with D; the tunnel "
                          "length (60 m), the return R2 (250 m behind the face), the 5 cm "
                          "offsets of electrodes from the steel and the lining resistivity "
                          "stay, so the case is not fully similar.",
                 "cases": []}
    try:
        for length in ("fixed", "proportional"):
            t0 = time.perf_counter()
            ds = run_sweep(layout, {"diameter_m": DIAMETERS, "contrast": CONTRASTS}, settings(),
                           length=length, distances_in_diameters=DIST_D, client=client,
                           progress=False)
            wall = time.perf_counter() - t0
            for i, diam in enumerate(DIAMETERS):
                for j, c in enumerate(CONTRASTS):
                    det = ds.detectable_ahead_m.values[i, j]
                    rel = ds.relative_response.values[i, j]
                    dist_d = ds.distance_ahead.values[i, j] / diam
                    at1 = int(np.argmin(np.abs(dist_d - 1.0)))
                    at3 = int(np.argmin(np.abs(dist_d - 3.0)))
                    reach = float(ds.reach_m.values[i, j])
                    single = float(ds.reach_per_reading_m.values[i, j])
                    out["cases"].append({
                        "length_scaling": length, "diameter_m": diam, "contrast": c,
                        "shield_length_m": 9.5 * (diam / 6.2 if length == "proportional"
                                                  else 1.0),
                        "reach_m": round(reach, 2), "reach_D": round(reach / diam, 2),
                        "at_grid_end": bool(ds.reach_at_grid_end.values[i, j]),
                        "reach_per_reading_m": round(single, 2),
                        "reach_per_reading_D": round(single / diam, 2),
                        "reach_per_reading_at_grid_end": bool(
                            ds.reach_per_reading_at_grid_end.values[i, j]),
                        "detectable_ahead_D": {lab: round(float(v) / diam, 2)
                                               for lab, v in zip(out["measurements"], det)},
                        "response_at_1D": {lab: round(float(r[at1]), 4)
                                           for lab, r in zip(out["measurements"], rel)},
                        "response_at_3D": {lab: round(float(r[at3]), 4)
                                           for lab, r in zip(out["measurements"], rel)},
                    })
            out[f"wall_time_s_{length}"] = round(wall, 1)
        mp = out["measurements"][0]
        out["summary"] = [
            {"length_scaling": c["length_scaling"], "diameter_m": c["diameter_m"],
             "contrast": c["contrast"], "reach_m": c["reach_m"], "reach_D": c["reach_D"],
             "reach_per_reading_m": c["reach_per_reading_m"],
             "reach_per_reading_D": c["reach_per_reading_D"],
             f"{mp}_m": round(c["detectable_ahead_D"][mp] * c["diameter_m"], 2),
             f"{mp}_D": c["detectable_ahead_D"][mp]} for c in out["cases"]]
    finally:
        client.close()
        cluster.close()
    return out


def sweep_part() -> dict:
    layout = bench_layout()
    sweep = {"diameter_m": [4.0, 5.0, 6.0, 7.0, 8.0, 10.0],
             "contrast": [0.1, 0.2, 0.5, 2.0, 5.0, 10.0], "noise_rel": [0.01, 0.02, 0.05]}
    n_cases = int(np.prod([len(v) for v in sweep.values()]))
    dist_d = [float(x) for x in np.geomspace(0.25, 12.0, 33)]
    kw = {"length": "fixed", "distances_in_diameters": dist_d, "progress": False}
    load_before = os.getloadavg()[0]
    t0 = time.perf_counter()
    serial = run_sweep(layout, sweep, settings(), serial=True, **kw)
    t_serial = time.perf_counter() - t0
    t0 = time.perf_counter()
    cluster, client = _cluster(2)
    t_start = time.perf_counter() - t0
    try:
        t1 = time.perf_counter()
        par = run_sweep(layout, sweep, settings(), client=client, **kw)
        t_par = time.perf_counter() - t1
        worker_mem = {str(k): round(v["metrics"]["memory"] / 2**20, 1)
                      for k, v in client.scheduler_info()["workers"].items()}
    finally:
        client.close()
        cluster.close()
    pids = par.worker_pid.values.ravel()
    rss = par.worker_peak_rss_mb.values.ravel()
    peak = {str(int(p)): round(float(rss[pids == p].max()), 1) for p in np.unique(pids)}
    return {
        "what": "reach sweep serial vs dask LocalCluster(2 workers, threads_per_worker=1)",
        "cases": n_cases, "sweep": sweep, "length_scaling": "fixed",
        "layout": "demo layout, explicit measurements (6 quadrupoles)",
        "model": "axisym, AxisymSettings.fast() (h_fine 0.1 m, growth 1.3, harmonic factor 1.5)",
        "distances": "33 per case, geomspace(0.25, 12) D",
        "forward_solves": n_cases * 34,
        "serial_s": round(t_serial, 1), "cluster_start_s": round(t_start, 1),
        "dask_2_workers_s": round(t_par, 1), "speedup": round(t_serial / t_par, 2),
        "mean_task_s_dask": round(float(par.task_time_s.mean()), 3),
        "mean_task_s_serial": round(float(serial.task_time_s.mean()), 3),
        "identical_results": bool(np.array_equal(serial.relative_response.values,
                                                 par.relative_response.values)),
        "worker_peak_rss_mb": peak, "worker_memory_mb_at_end": worker_mem,
        "serial_process_peak_rss_mb": round(float(serial.worker_peak_rss_mb.max()), 1),
        "cpu_count": os.cpu_count(), "machine": platform.machine(),
        "python": platform.python_version(),
        "load_average_1min": [round(load_before, 2), round(os.getloadavg()[0], 2)],
        "note": "shared machine: other jobs were running, timings are noisy",
    }


def main(argv: list[str]) -> int:
    part = argv[0] if argv else "all"
    RESULTS.mkdir(parents=True, exist_ok=True)
    if part in ("diameter", "all"):
        res = diameter_part()
        (RESULTS / "reach_diameter.json").write_text(json.dumps(res, indent=2))
        for c in res["cases"]:
            print(f"{c['length_scaling']:>12} D={c['diameter_m']:4.1f} contrast={c['contrast']:5g}"
                  f"  reach {c['reach_m']:6.1f} m = {c['reach_D']:5.2f} D"
                  f"{' (grid end)' if c['at_grid_end'] else ''}; best single reading "
                  f"{c['reach_per_reading_m']:6.1f} m = {c['reach_per_reading_D']:5.2f} D"
                  f"{' (grid end)' if c['reach_per_reading_at_grid_end'] else ''}")
    if part in ("sweep", "all"):
        res = sweep_part()
        (RESULTS / "reach.json").write_text(json.dumps(res, indent=2))
        print(json.dumps({k: res[k] for k in ("cases", "serial_s", "dask_2_workers_s",
                                              "speedup", "worker_peak_rss_mb")}))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
