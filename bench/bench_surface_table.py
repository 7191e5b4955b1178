"""Benchmark: surface factors from the block table against per-face, per-angle 3D solves.

:func:`tbminv.forward.ratio.surface_factors` interpolates the factor ``R_3D(hom, surface) /
R_3D(hom, no surface)`` from one table per block of faces (:mod:`tbminv.forward.surfacetable`:
every cutterhead angle node and every face node in one mesh with the surface and its twin
without). This benchmark measures, for a layout,

* the time to build the table (cold: meshes and solves; the on-disk caches are bypassed), and
  the time of one direct face/angle (two 3D solves) for comparison;
* the relative difference ``f_table / f_direct - 1`` per reading at faces and angles between
  the nodes, where the interpolation is worst, and on the nodes, where only the meshes differ
  (the table's mesh holds more electrode nodes). Readings whose homogeneous response is below
  5 % of the median |R| (near a null: the ratio of two small numbers) are counted and left out,
  as in ``bench/bench_error_floor.py``.

Goal: the table within 0.1 % of the direct factor (the surface correction is a per-advance
scale of 1-8 % on these layouts; 0.1 % is a sixth of the modelling-error floor).

Writes ``bench/results/surface_table.json``. Run: ``nice python bench/bench_surface_table.py``
(demo layout and the 2 D cover test layout; about 10-20 min on 2 cores).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D
from tbminv.forward.ratio import surface_factors
from tbminv.forward.surfacetable import SurfaceTableSpec, clear_memory_cache, surface_table
from tbminv.ground import Scenario
from tbminv.layout import load_layout

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "bench" / "results" / "surface_table.json"
NULL_FRACTION = 0.05
RHO_OHMM = 80.0

CASES = {
    # layout file, faces (m) and angles (deg) to check: on nodes and between them
    "demo layout (wall electrodes, 32 m cover)": (
        ROOT / "tbminv" / "data" / "demo_layout.toml",
        [(1224.0, 0.0), (1219.0, 167.6), (1225.0, 15.0), (1231.0, 99.6), (1227.3, 250.0)]),
    "test layout, 2 D cover (machine electrodes only)": (
        ROOT / "tests" / "data" / "fixture_layout_cover12.toml",
        [(0.0, 0.0), (0.0, 15.0), (0.0, 137.0), (10.0, 301.0)]),
}


def _direct(layout, settings, face, angle):
    """Direct factor and the deep homogeneous response (for the null test)."""
    import dataclasses
    deep = dataclasses.replace(layout, tunnel=dataclasses.replace(layout.tunnel,
                                                                  cover_m=math.inf))
    sc = Scenario.homogeneous(RHO_OHMM)
    r_top = Forward3D(layout, settings).run(sc, face, angle).r_ohm
    r_deep = Forward3D(deep, settings).run(sc, face, angle).r_ohm
    return r_top / r_deep, r_deep


def run_case(name: str, path: Path, points: list[tuple[float, float]]) -> dict:
    layout = load_layout(path)
    settings = Fem3DSettings()
    spec = SurfaceTableSpec()
    clear_memory_cache()
    blocks: dict[float, float] = {}
    shape: list[int] = []
    for face, _ in points:   # build every block once (cold: the cache directory is new)
        t0 = time.perf_counter()
        start, top, _deep = surface_table(layout, face, rho_ohmm=RHO_OHMM, settings=settings,
                                          spec=spec)
        if start not in blocks:
            blocks[start] = time.perf_counter() - t0
            shape = list(top.shape)
    rows = []
    for face, angle in points:
        t0 = time.perf_counter()
        f_dir, r_deep = _direct(layout, settings, face, angle)
        t_dir = time.perf_counter() - t0
        f_tab = surface_factors(layout, face, angle, rho_ohmm=RHO_OHMM, settings=settings,
                                spec=spec)
        ok = np.abs(r_deep) >= NULL_FRACTION * np.median(np.abs(r_deep))
        d = f_tab[ok] / f_dir[ok] - 1.0
        step = 360.0 / spec.angle_nodes
        rows.append({"face_m": face, "cutterhead_deg": angle,
                     "on_face_node": bool(abs(face / spec.face_step_m
                                              - round(face / spec.face_step_m)) < 1e-9),
                     "on_angle_node": bool(abs(angle / step - round(angle / step)) < 1e-9),
                     "n_readings": int(ok.size), "n_near_null": int((~ok).sum()),
                     "surface_effect_max": float(np.max(np.abs(f_dir[ok] - 1.0))),
                     "max_abs_diff": float(np.max(np.abs(d))),
                     "p95_abs_diff": float(np.percentile(np.abs(d), 95)),
                     "rms_diff": float(np.sqrt(np.mean(d ** 2))),
                     "direct_s": round(t_dir, 1)})
        print(f"{name}: face {face} angle {angle}: max |diff| {rows[-1]['max_abs_diff']:.2e} "
              f"(surface effect up to {rows[-1]['surface_effect_max']:.3f}), "
              f"direct {t_dir:.0f} s", flush=True)
    worst = max(r["max_abs_diff"] for r in rows)
    return {"layout": str(path.relative_to(ROOT)), "table_shape": shape,
            "table_build_s": {f"{k:g}": round(v, 1) for k, v in blocks.items()},
            "points": rows, "max_abs_diff": worst, "goal_met": bool(worst <= 1e-3)}


def point_layout_case() -> dict:
    """Table and direct factors against the image method (no machine, no bore: points).

    Image method: one image source mirrored in the insulating surface (Telford, Geldart &
    Sheriff 1990, Applied Geophysics, sec. 8.3), :func:`tbminv.forward.analytic.layout_response`.
    """
    import dataclasses

    from tbminv.forward.analytic import layout_response
    from tbminv.layout import Layout

    els = [{"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.5,
            "angle_deg": 0},
           {"label": "T2", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.0,
            "angle_deg": 90},
           {"label": "S1", "kind": "shield", "axial_m": -3.0, "radius_m": 3.1, "angle_deg": 0},
           {"label": "S2", "kind": "shield", "axial_m": -8.0, "radius_m": 3.1,
            "angle_deg": 180},
           {"label": "W1", "kind": "wall", "chainage_m": 480.0, "radius_m": 3.1,
            "angle_deg": 0},
           {"label": "R1", "kind": "remote"}]
    meas = [{"a": a, "b": "R1", "m": m, "n": "R1"}
            for a in ("T1", "S1") for m in ("T2", "S2", "W1")]
    meas += [{"a": "T1", "b": "S2", "m": "T2", "n": "S1"},
             {"a": "S1", "b": "W1", "m": "T1", "n": "S2"}]
    lay = Layout.from_dict({
        "machine": {"diameter_m": 6.0, "shield_length_m": 10.0, "cutterhead_thickness_m": 1.0,
                    "model_body": False},
        "tunnel": {"cover_m": 12.0, "model_cavity": False, "length_m": 30.0},
        "electrode": els, "measurement": meas}, source="<point layout>")
    deep = dataclasses.replace(lay, tunnel=dataclasses.replace(lay.tunnel, cover_m=math.inf))
    sc = Scenario.homogeneous(RHO_OHMM)
    settings, spec = Fem3DSettings(), SurfaceTableSpec()
    rows = []
    for face, angle in [(496.0, 0.0), (501.3, 37.0), (507.9, 203.0)]:
        want = layout_response(lay, sc, face, angle) / layout_response(deep, sc, face, angle)
        tab = surface_factors(lay, face, angle, rho_ohmm=RHO_OHMM, settings=settings, spec=spec)
        dire = surface_factors(lay, face, angle, rho_ohmm=RHO_OHMM, settings=settings,
                               method="direct")
        rows.append({"face_m": face, "cutterhead_deg": angle,
                     "surface_effect_max": float(np.max(np.abs(want - 1))),
                     "table_vs_closed_form_max": float(np.max(np.abs(tab / want - 1))),
                     "direct_vs_closed_form_max": float(np.max(np.abs(dire / want - 1))),
                     "table_vs_direct_max": float(np.max(np.abs(tab / dire - 1)))})
        print("point layout:", rows[-1], flush=True)
    return {"what": "no machine, no bore, cover 12 m: the image method is exact",
            "points": rows}


def main() -> None:
    os.environ.setdefault("TBMINV_CACHE_DIR", tempfile.mkdtemp(prefix="tbminv-bench-surface-"))
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--case", choices=[*CASES, "point"], action="append")
    args = ap.parse_args()
    results = {}
    if not args.case or "point" in args.case:
        results["point layout against the image method"] = point_layout_case()
    for name in [c for c in (args.case or list(CASES)) if c != "point"]:
        path, points = CASES[name]
        results[name] = run_case(name, path, points)
    out = {"what": __doc__.split("\n")[0], "rho_ohmm": RHO_OHMM, "spec": vars(SurfaceTableSpec()),
           "null_fraction": NULL_FRACTION, "cpu_count": os.cpu_count(), "cases": results}
    if args.case and OUT.exists():   # a partial run keeps the other cases of the file
        kept = json.loads(OUT.read_text()).get("cases", {})
        out["cases"] = {**{k: v for k, v in kept.items() if k not in results}, **results}
    OUT.write_text(json.dumps(out, indent=1) + "\n")
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
