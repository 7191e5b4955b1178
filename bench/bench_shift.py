"""Benchmark: one shift from log to report, as a new user runs it on a 2-core machine.

Cases, each in a child process (its wall time and peak RSS are its own, ``os.wait4``):

``demo, empty cache``
    ``tbminv demo`` with a new, empty cache folder (``TBMINV_CACHE_DIR``): 3D meshes, surface
    factor tables, the contact table and every inversion from scratch.
``demo, cache filled``
    The same command again with that cache (a new output folder).
``25-advance shift, cache filled``
    ``tbminv simulate`` (axisymmetric model, 2 % noise, the demo layout and ground, 25 advances
    1.5 m apart) then ``tbminv invert`` of that log twice into new stores: the first run fills
    the cache, the second is timed.
``stock chain``
    pyGIMLi's stock ERT manager, re-meshed and cold-started per advance, against our inversion
    on the same advances of the 3D test drive (``bench/bench_invert.py``: same readings, error
    model, iteration cap), as a per-advance time ratio at their chi-squared.

The time by stage comes from the ``time by stage`` line that ``tbminv invert`` and
``tbminv demo`` print (readings and QC, surface factors, images, contact fit, resampling,
store); the demo's check and report are the rest of its wall time.

Goals (2 cores): demo from an empty cache <= 3 min, with the cache filled <= 1 min; 25-advance
shift with the cache filled <= 2 min; >= 20x the stock chain per advance; peak RSS <= 1.5 GB.

Writes ``bench/results/shift.json``. Run: ``python bench/bench_shift.py`` (``--skip-stock``
leaves out the stock chain, which needs about 12 GB and several minutes).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "bench" / "results" / "shift.json"
GOALS = {"demo_empty_cache_s": 180.0, "demo_cache_filled_s": 60.0,
         "shift25_cache_filled_s": 120.0, "stock_ratio_min": 20.0, "peak_rss_mb": 1536.0}


def run(cmd: list[str], env: dict[str, str]) -> dict:
    """Run a command in a child process: wall time (s), peak RSS (MB), stdout, exit code."""
    t0 = time.perf_counter()
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                         env=env, cwd=ROOT)
    out = p.stdout.read() if p.stdout else ""
    _pid, status, usage = os.wait4(p.pid, 0)
    wall = time.perf_counter() - t0
    code = os.waitstatus_to_exitcode(status)
    stages = {}
    m = re.findall(r"time by stage: (.*?) \(total", out)
    if m:
        for part in m[-1].split(", "):
            name, val = part.rsplit(" ", 2)[0], part.rsplit(" ", 2)[1]
            stages[name] = float(val)
    return {"cmd": " ".join(cmd[2:]) if cmd[:2] == [sys.executable, "-m"] else " ".join(cmd),
            "wall_s": round(wall, 1), "peak_rss_mb": round(usage.ru_maxrss / 1024.0, 1),
            "exit_code": code, "stages_s": stages, "tail": out[-1500:] if code else ""}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--skip-stock", action="store_true")
    ap.add_argument("--skip-demo", action="store_true")
    args = ap.parse_args()
    work = Path(tempfile.mkdtemp(prefix="tbminv-bench-shift-"))
    env = {**os.environ, "TBMINV_CACHE_DIR": str(work / "cache"), "MPLBACKEND": "Agg"}
    tb = [sys.executable, "-m", "tbminv"]
    res: dict = {"machine": platform.platform(), "python": platform.python_version(),
                 "cpu_count": os.cpu_count(), "goals": GOALS, "cases": {}}
    cases = res["cases"]
    if not args.skip_demo:
        cases["demo, empty cache"] = run(tb + ["demo", "--out", str(work / "demo1")], env)
        print(cases["demo, empty cache"], flush=True)
        cases["demo, cache filled"] = run(tb + ["demo", "--out", str(work / "demo2")], env)
        print(cases["demo, cache filled"], flush=True)
    data = ROOT / "tbminv" / "data"
    log = work / "shift25.csv"
    cases["simulate 25 advances"] = run(
        tb + ["simulate", "--layout", str(data / "demo_layout.toml"),
              "--ground", str(data / "demo_ground.toml"), "--faces", "1219:1255:1.5",
              "--model", "axisym", "--noise-rel", "0.02", "--seed", "3", "--out", str(log)],
        env)
    for name in ("25-advance shift, filling the cache", "25-advance shift, cache filled"):
        store = work / f"shift25-{len(cases)}.nc"
        cases[name] = run(tb + ["invert", str(log), "--layout", str(data / "demo_layout.toml"),
                                "--store", str(store),
                                "--settings", str(data / "demo_settings.toml")], env)
        print(name, cases[name], flush=True)
        if store.exists():   # does an advance cost more when more advances came before it?
            import numpy as np
            import xarray as xr

            with xr.open_dataset(store) as ds:
                t = np.asarray(ds["inversion_time_s"].values, float)
                it = np.asarray(ds["iterations"].values, float) if "iterations" in ds else None
            k = np.arange(t.size)
            slope = float(np.polyfit(k, t, 1)[0]) if t.size > 2 else float("nan")
            cases[name]["per_advance_s"] = [round(float(v), 2) for v in t]
            cases[name]["iterations"] = None if it is None else [int(v) for v in it]
            cases[name]["per_advance_slope_s_per_advance"] = round(slope, 3)
    if not args.skip_stock:
        sys.path.insert(0, str(Path(__file__).parent))
        import bench_invert  # noqa: E402 - the stock-chain runner of the per-advance benchmark

        ours = bench_invert._summary(bench_invert._spawn("ours", "6,7"))
        stock = bench_invert._summary(bench_invert._spawn("stock", "6,7"))
        cases["stock chain"] = {
            "drive": bench_invert.DRIVE, "advances": "6,7", "ours": ours, "stock": stock,
            "ratio_per_advance": stock["mean_time_per_advance_s"]
            / ours["mean_time_per_advance_s"]}
    get = cases.get
    res["summary"] = {
        "demo_empty_cache_s": get("demo, empty cache", {}).get("wall_s"),
        "demo_cache_filled_s": get("demo, cache filled", {}).get("wall_s"),
        "shift25_cache_filled_s": get("25-advance shift, cache filled", {}).get("wall_s"),
        "stock_ratio": get("stock chain", {}).get("ratio_per_advance"),
        "peak_rss_mb": max((c.get("peak_rss_mb", 0) for c in cases.values()
                            if isinstance(c, dict) and "peak_rss_mb" in c), default=None)}
    OUT.write_text(json.dumps(res, indent=1) + "\n")
    print(json.dumps(res["summary"], indent=1))
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
