"""Probe logs and the contact fit: interval widths with and without a probe, contradiction flag.

Drives (layout ``tests/data/fixture_layout.toml``, D = 6 m, deep, steel machine and 30 m of open
tunnel): the 3D-simulated fixture logs ``tests/data/drive_contact10_seed11.csv`` (10:1) and
``drive_contact01_seed13.csv`` (1:10), contact at chainage 30 m, faces 0-27 m every 1.5 m, 2 %
noise; and axisymmetric drives made with :func:`tbminv.studies.simulate.simulate_drive` (1:10 and
10:1 at 30 m, same faces, 2 % noise, seeds below). Probe cases: one probe drilled at 12:00 UTC
(the advance at face 12 m) from 12 to 42 m, with its change of material at the true contact
(``at``), and 10 m beyond it (``off``); depth resolution 0.5 m. For each drive and case the
running contact fit (:func:`tbminv.studies.probestudy.probe_study`) gives per advance the
interval and the probe's flag; summarised over the advances after the probe where the fit
reports a contact: median width, share of intervals that hold the truth, and per case the
advances flagged as contradicting (all; and where the true contact is within 2 D).

Usage (from the project root; a few minutes on 2 cores, the contact table is cached)::

    python bench/bench_probes.py            # -> bench/results/probes.json
"""

from __future__ import annotations

import json
import platform
import tempfile
import time
from pathlib import Path

from tbminv.ground import Contact, Scenario
from tbminv.layout import load_layout
from tbminv.readings.probes import read_probe_log
from tbminv.studies.probestudy import probe_study
from tbminv.studies.simulate import simulate_drive

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
RESULTS = Path(__file__).resolve().parent / "results"
TRUTH_M = 30.0
FACES = [1.5 * i for i in range(19)]


def probe_file(folder: Path, contact_m: float, name: str) -> Path:
    """A probe drilled from the face at 12 m to 42 m with a change of material at contact_m."""
    p = folder / f"probe_{name}.csv"
    p.write_text("probe_id,time,chainage_from_m,chainage_to_m,material\n"
                 f"P1,2026-01-05T12:00:00Z,12,{contact_m},clay\n"
                 f"P1,2026-01-05T12:00:00Z,{contact_m},42,sand\n", encoding="utf-8")
    return p


def summarise(study) -> dict:
    """Median widths, truth held, flags after the probe (advances at faces >= 12 m)."""
    out = {}
    after = study["face_chainage_m"] >= 12.0
    for case, g in study[after].groupby("case"):
        found = g[g["width_m"].notna()]
        near = g["true_ahead_m"] <= 12.0
        out[case] = {
            "advances_after_probe": int(len(g)), "advances_with_contact": int(len(found)),
            "median_width_m": float(found["width_m"].median()),
            "widths_m": [round(float(w), 2) for w in found["width_m"]],
            "share_holding_truth": float(found["holds_truth"].mean()),
            "advances_flagged": int(g["probe_contradicts"].sum()),
            "advances_flagged_within_2D": int(g["probe_contradicts"][near].sum()),
            "advances_within_2D": int(near.sum()),
            "probe_misfit_added": [round(float(v), 2) for v in g["probe_misfit_added"]],
        }
    out["width_ratio_at_over_free"] = (out["at"]["median_width_m"]
                                       / out["free"]["median_width_m"])
    return out


def main() -> None:
    layout = load_layout(DATA / "fixture_layout.toml")
    t0 = time.perf_counter()
    result: dict = {"layout": "tests/data/fixture_layout.toml", "truth_chainage_m": TRUTH_M,
                    "probe": "drilled at 12:00 UTC from 12 to 42 m; depth resolution 0.5 m",
                    "drives": {}}
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        probes = {"at": read_probe_log(probe_file(folder, TRUTH_M, "at")),
                  "off": read_probe_log(probe_file(folder, TRUTH_M + 10.0, "off"))}
        logs = {"3d_contact10_seed11": DATA / "drive_contact10_seed11.csv",
                "3d_contact01_seed13": DATA / "drive_contact01_seed13.csv"}
        for contrast, seed in ((0.1, 5), (10.0, 6)):
            df = simulate_drive(layout, Scenario(50.0, contacts=(Contact(TRUTH_M,
                                                                         50.0 * contrast),)),
                                FACES, model="axisym", noise_rel=0.02, seed=seed, current_a=1.0)
            path = folder / f"axisym_{contrast:g}_seed{seed}.csv"
            df.to_csv(path, index=False)
            logs[f"axisym_contact{contrast:g}_seed{seed}"] = path
        for name, path in logs.items():
            study = probe_study(path, layout, probes, truth_chainage_m=TRUTH_M)
            result["drives"][name] = summarise(study)
            s = result["drives"][name]
            print(f"{name}: median width free {s['free']['median_width_m']:.2f} m, probe at "
                  f"the contact {s['at']['median_width_m']:.2f} m (ratio "
                  f"{s['width_ratio_at_over_free']:.2f}; truth held "
                  f"{100 * s['at']['share_holding_truth']:.0f} %); probe 10 m off flagged at "
                  f"{s['off']['advances_flagged']} of {s['off']['advances_after_probe']} "
                  f"advances ({s['off']['advances_flagged_within_2D']} of "
                  f"{s['off']['advances_within_2D']} within 2 D); probe at the contact "
                  f"flagged at {s['at']['advances_flagged']}")
    result["wall_time_s"] = time.perf_counter() - t0
    result["machine"] = platform.platform()
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "probes.json").write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    print(f"-> {RESULTS / 'probes.json'}")


if __name__ == "__main__":
    main()
