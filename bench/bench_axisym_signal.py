"""Benchmark: the contact signal ``R/R0 - 1`` of the axisymmetric model against pyGIMLi 3D.

A contact ahead changes the readings by a few per cent at 2-3 D (D the machine diameter); an
error of the absolute transfer resistance of that size would hide it. What the contact fit and
the reach use is the signal ``s = R(contact) / R(homogeneous) - 1`` of each reading. Here it is
computed with both models on the small test layout of ``tests/data`` (deep tunnel, steel
machine and bore in; cutterhead, shield and steel electrodes), for contacts x10 and x0.1 at
1, 2 and 3 D ahead of the face, with pyGIMLi's 3D model (P2, default mesh; within 0.1-0.4 % of
the closed forms, ``bench/results/forward3d.json``) as the reference:

* per scenario: the largest signal ``max |s_3d|``, the difference ``s_axisym - s_3d`` (RMS and
  largest over the readings) and that largest difference as a share of the largest signal;
* for both axisymmetric presets (``standard``, ``fast``).

Readings whose homogeneous response is below 5 % of the median |R| are near a null and left out
(their relative signal is not defined by the physics).

Writes ``bench/results/axisym_signal.json``. Run: ``nice -n 10 python bench/bench_axisym_signal.py``
(7 runs of the 3D model on 2 cores, about 5-10 min).
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

import numpy as np

from tbminv.forward.registry import make_model, model_options_for
from tbminv.ground import Contact, Scenario
from tbminv.layout import load_layout

ROOT = Path(__file__).resolve().parents[1]
LAYOUT = ROOT / "tests" / "data" / "fixture_layout.toml"
OUT = ROOT / "bench" / "results" / "axisym_signal.json"
RHO_OHMM = 50.0
FACE_M = 0.0
DIAMETER_M = 6.0
NULL_FRACTION = 0.05
PRESETS = ("standard", "fast")
CONTACTS = [(contrast, d) for contrast in (10.0, 0.1) for d in (1.0, 2.0, 3.0)]


def scenario(contrast: float, distance_d: float) -> Scenario:
    """Ground of ``RHO_OHMM`` with a contact ``distance_d`` diameters ahead of the face."""
    return Scenario(RHO_OHMM, contacts=(Contact(FACE_M + distance_d * DIAMETER_M,
                                                contrast * RHO_OHMM),))


def main() -> dict:
    """Run the benchmark and write the JSON file."""
    t0 = time.perf_counter()
    layout = load_layout(LAYOUT)
    m3 = make_model("3d", layout)
    axi = {p: make_model("axisym", layout, **model_options_for("axisym", p)) for p in PRESETS}
    hom = Scenario.homogeneous(RHO_OHMM)
    r3_0 = np.asarray(m3.response(hom, FACE_M), float)
    keep = np.abs(r3_0) >= NULL_FRACTION * np.median(np.abs(r3_0))
    ra_0 = {p: np.asarray(axi[p].response(hom, FACE_M), float) for p in PRESETS}
    rows = []
    for contrast, dist in CONTACTS:
        sc = scenario(contrast, dist)
        s3 = (np.asarray(m3.response(sc, FACE_M), float) / r3_0 - 1.0)[keep]
        for p in PRESETS:
            sa = (np.asarray(axi[p].response(sc, FACE_M), float) / ra_0[p] - 1.0)[keep]
            diff = sa - s3
            rows.append({
                "contrast": contrast, "distance_d": dist, "axisym_preset": p,
                "signal_3d_max_abs": float(np.max(np.abs(s3))),
                "signal_3d_median_abs": float(np.median(np.abs(s3))),
                "diff_rms": float(np.sqrt(np.mean(diff**2))),
                "diff_max_abs": float(np.max(np.abs(diff))),
                "diff_max_over_signal_max": float(np.max(np.abs(diff)) / np.max(np.abs(s3))),
                "signal_3d": [float(v) for v in s3],
                "signal_axisym": [float(v) for v in sa]})
    summary = {}
    for p in PRESETS:
        mine = [r for r in rows if r["axisym_preset"] == p]
        summary[p] = {
            "diff_max_abs": max(r["diff_max_abs"] for r in mine),
            "diff_rms_max": max(r["diff_rms"] for r in mine),
            "diff_max_over_signal_max": max(r["diff_max_over_signal_max"] for r in mine)}
    result = {
        "benchmark": "axisym_signal",
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "layout": "tests/data/fixture_layout.toml (deep, steel machine and bore in)",
        "reference": "pyGIMLi 3D, P2, default mesh",
        "quantity": "signal s = R(contact) / R(homogeneous) - 1 per reading, each model "
                    "against its own homogeneous run",
        "rho_ohmm": RHO_OHMM,
        "face_chainage_m": FACE_M,
        "diameter_m": DIAMETER_M,
        "readings": int(keep.sum()),
        "near_null_left_out": int((~keep).sum()),
        "rows": rows,
        "summary": summary,
        "cpu_count": os.cpu_count(),
        "seconds": round(time.perf_counter() - t0, 1),
    }
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(result, indent=1) + "\n", encoding="utf-8")
    return result


if __name__ == "__main__":
    res = main()
    for p, s in res["summary"].items():
        print(p, json.dumps(s))
