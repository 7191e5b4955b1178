"""Benchmark of the 3D forward model: time, peak memory and accuracy vs mesh size, P1 / P2.

For each mesh level and element order, two runs of a 24-quadrupole protocol (cutterhead,
shield and wall electrodes, pole and four-electrode readings), each in its own process so
that the peak resident memory is that run's:

* accuracy: homogeneous full space, body and cavity out, against the closed form
  V = rho I/(4 pi)(1/AM - 1/AN - 1/BM + 1/BN) (median and maximum relative error over the
  readings whose value exceeds 5 % of the sum of their pole terms; near-null readings excluded);
* time: the same protocol with body and cavity in (the production case), mesh built from
  scratch (no cache), i.e. the cost of one advance; its accuracy is given as the difference
  to the finest P2 run (self-convergence; no closed form exists with the steel in).

Writes ``bench/results/forward3d.json``. Target: <= 10 s per advance at <= 1 % error.
Run: ``python bench/bench_forward3d.py`` (2 cores, TBMINV_THREADS as set).
"""

from __future__ import annotations

import itertools
import json
import math
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

LEVELS = {
    "coarse": dict(electrode_size_m=0.2, face_size_m=1.0, growth=1.7, refine_ahead_m=15.0),
    "default": {},
    "fine": dict(electrode_size_m=0.05, face_size_m=0.3, growth=1.4, quality=1.2),
    "default-24seg": dict(n_segments=24),
    "fine-24seg": dict(n_segments=24, electrode_size_m=0.05, face_size_m=0.3, growth=1.4,
                       quality=1.2),
}
CASES = [("coarse", "P1"), ("coarse", "P2"), ("default", "P1"), ("default", "P2"),
         ("fine", "P1"), ("fine", "P2"), ("default-24seg", "P2"), ("fine-24seg", "P2")]
FACE = 500.0
LABELS = ["T1", "T2", "T3", "S1", "S2", "W1"]


def _layout(body: bool):
    from tbminv.layout import Layout

    els = [
        {"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.5, "angle_deg": 0},
        {"label": "T2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.0, "angle_deg": 90},
        {"label": "T3", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.8,
         "angle_deg": 200},
        {"label": "S1", "kind": "shield", "axial_m": -2.0, "radius_m": 3.1, "angle_deg": 0},
        {"label": "S2", "kind": "shield", "axial_m": -7.0, "radius_m": 3.1, "angle_deg": 180},
        {"label": "W1", "kind": "wall", "chainage_m": FACE - 20.0, "radius_m": 3.1,
         "angle_deg": 90},
        {"label": "R1", "kind": "remote"}]
    return Layout.from_dict({
        "machine": {"diameter_m": 6.0, "shield_length_m": 10.0, "cutterhead_thickness_m": 1.0,
                    "model_body": body},
        "tunnel": {"model_cavity": body, "length_m": 30.0},
        "electrode": els,
        "measurement": [{"a": "T1", "b": "R1", "m": "T2", "n": "R1"}]}, source="<bench>")


def _quads():
    four = [(a, b, m, n) for a, b, m, n in itertools.permutations(LABELS, 4)
            if a < b and m < n and len({a, b, m, n}) == 4]
    poles = [(a, "R1", m, "R1") for a, m in itertools.permutations(LABELS, 2)]
    return four[::5][:14] + poles[::3][:10]


def run_case(level: str, p2: bool, body: bool) -> dict:
    import numpy as np

    from tbminv.forward.fem3d.mesh import MeshSettings, electrode_points
    from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D
    from tbminv.ground import Scenario

    os.environ["TBMINV_CACHE_DIR"] = os.environ.get("TBMINV_BENCH_CACHE", "/tmp/tbminv-bench")
    lay = _layout(body)
    quads = _quads()
    ms = MeshSettings(**LEVELS[level])
    fw = Forward3D(lay, Fem3DSettings(p2=p2, mesh=ms, cache_meshes=False))
    t = time.perf_counter()
    res = fw.run(Scenario.homogeneous(100.0), FACE, 0.0, quads)
    wall = time.perf_counter() - t
    out = {"level": level, "order": "P2" if p2 else "P1", "body": body,
           "n_readings": len(quads), "p1_nodes": res.tmesh.mesh.nodeCount(),
           "cells": res.tmesh.mesh.cellCount(), "unknowns": res.n_nodes,
           "seconds_total": wall, "seconds": res.seconds,
           "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
           "r_ohm": [float(v) for v in res.r_ohm]}
    if not body:
        pts, _ = electrode_points(lay, FACE)

        def g(p, q):
            if pts.get(p) is None or pts.get(q) is None:
                return 0.0
            return 100.0 / (4 * math.pi * np.linalg.norm(pts[p] - pts[q]))
        terms = np.array([[g(a, m), -g(a, n), -g(b, m), g(b, n)] for a, b, m, n in quads])
        ana, scale = terms.sum(1), np.abs(terms).sum(1)
        ok = np.abs(ana) >= 0.05 * scale
        rel = np.abs(res.r_ohm[ok] / ana[ok] - 1)
        out.update(err_median_pct=100 * float(np.median(rel)), err_max_pct=100 * float(rel.max()),
                   n_compared=int(ok.sum()))
    return out


def main() -> None:
    if len(sys.argv) == 5 and sys.argv[1] == "--case":
        print(json.dumps(run_case(sys.argv[2], sys.argv[3] == "P2", sys.argv[4] == "body")))
        return
    root = Path(__file__).resolve().parent
    env = {**os.environ, "PYTHONPATH": str(root.parent) + os.pathsep
           + os.environ.get("PYTHONPATH", "")}
    rows = []
    for level, order in CASES:
        if True:
            for body in ("nobody", "body"):
                proc = subprocess.run([sys.executable, __file__, "--case", level, order, body],
                                      capture_output=True, text=True, env=env)
                line = [s for s in proc.stdout.splitlines() if s.startswith("{")]
                if proc.returncode != 0 or not line:
                    rows.append({"level": level, "order": order, "body": body == "body",
                                 "error": proc.stderr[-500:]})
                else:
                    rows.append(json.loads(line[-1]))
                print(json.dumps(rows[-1]), flush=True)
    # with the body there is no closed form: compare with the fine P2 run of the same cylinder
    # polygon (discretisation convergence; the polygon itself moves the steel surface by
    # R (1 - cos(pi/n)) between vertices, a geometry effect shown by the 24-segment rows)
    import numpy as np

    for ref_level, members in (("fine", ("coarse", "default")),
                               ("fine-24seg", ("default-24seg", "fine", "default"))):
        ref = next((r for r in rows if r.get("level") == ref_level and r.get("order") == "P2"
                    and r.get("body") is True and "r_ohm" in r), None)
        if ref is None:
            continue
        rr = np.array(ref["r_ohm"])
        poles = np.array([q[1] == "R1" for q in _quads()])
        for r in rows:
            if r.get("body") is True and "r_ohm" in r and r.get("level") in members:
                rel = np.abs(np.array(r["r_ohm"]) / rr - 1)
                tag = f"vs_{ref_level}_p2"
                r[f"diff_{tag}_pole_max_pct"] = 100 * float(rel[poles].max())
                r[f"diff_{tag}_dipole_median_pct"] = 100 * float(np.median(rel[~poles]))
                r[f"diff_{tag}_dipole_max_pct"] = 100 * float(rel[~poles].max())
                scale = float(np.max(np.abs(rr)))
                r[f"diff_{tag}_max_abs_pct_of_largest"] = 100 * float(
                    np.max(np.abs(np.array(r["r_ohm"]) - rr)) / scale)
    try:
        from tbminv.gimli import versions
        vers = versions()
    except Exception:  # pragma: no cover
        vers = {}
    result = {"benchmark": "forward3d", "created": time.strftime("%Y-%m-%dT%H:%M:%SZ",
                                                                 time.gmtime()),
              "cpu_count": os.cpu_count(), "threads": os.environ.get("TBMINV_THREADS", "1"),
              "versions": vers, "target": "<= 10 s per advance at <= 1 % error, 24 readings",
              "levels": LEVELS, "rows": rows}
    from tbminv.cache import atomic_write_text

    atomic_write_text(root / "results" / "forward3d.json", json.dumps(result, indent=1))


if __name__ == "__main__":
    main()
