"""Per-advance image time with readings at their own cutterhead angle.

Fixture layout (tests/data/fixture_layout.toml: machine, bore, 3 cutterhead tools, 3 shield
electrodes, 21 quadrupoles) and settings as in the drive tests (QC error model per log,
contact fit off). Cases, each the first 4 advances, warm-started:

* ``fixture one angle``: the stored 3D-simulated drive tests/data/drive_contact10_seed11.csv
  (one cutterhead angle per advance: rows = protocol, the same data as before);
* ``8 angles, rows``: an axisymmetric drive (100 ohm-m, 10 ohm-m beyond 20 m, 2 % noise, seed
  5) read at 0:315:45 degrees, every reading modelled at its own angle;
* ``8 angles, stacked``: the same readings stacked per quadrupole and modelled at the median
  angle (what the inversion did before).

Second part (``ratio``): the contact fit brings every reading to the table's angle 0 by the
homogeneous ratio ``R_hom(0) / R_hom(a)`` (``DriveInverter.contact_stacked``); how far that is
from the true ``R(contact, 0) / R(contact, a)`` for contacts x10 and x0.1 at 1 and 2 diameters,
angles 22.5 to 180 degrees, on the demo and fixture layouts (axisymmetric, ``fast``; turning
quadrupoles that are not null-coupled).

Writes bench/results/angles.json (seconds per advance, chi-squared, readings used; largest
ratio error). ``python bench/bench_angles.py [timing|ratio]`` runs one part and keeps the other.
"""

from __future__ import annotations

import dataclasses
import json
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.forward.axisym.layout import AxisymModel
from tbminv.ground import Contact, Scenario
from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.image import shift_model
from tbminv.inversion.settings import InversionSettings
from tbminv.layout import demo_layout_path, load_layout
from tbminv.readings.advance import prepare_advances, turning_quadrupoles
from tbminv.readings.qc import QCSettings
from tbminv.studies.simulate import angle_range, simulate_drive

ROOT = Path(__file__).resolve().parents[1]
DATA = ROOT / "tests" / "data"
OUT = Path(__file__).parent / "results" / "angles.json"
QC = QCSettings(error_model_group="log")


def run(layout, data, stacked: bool) -> list[dict]:
    inv = DriveInverter(layout, InversionSettings(contact_fit=False))
    data = inv.prepare(data)
    if stacked:
        data = [dataclasses.replace(d, rows=None) for d in data]
    out, start = [], None
    for i, adv in enumerate(data):
        t0 = time.perf_counter()
        img = inv.invert_advance(adv, start)
        out.append({"advance": adv.advance, "seconds": round(time.perf_counter() - t0, 2),
                    "chi2": round(img.chi2, 3), "n_used": img.n_used,
                    "angles": max(adv.n_angles, 1) if not stacked else 1})
        print(out[-1], flush=True)
        start = img.model_ohmm
        if i + 1 < len(data):
            start = shift_model(inv.grid, start, data[i + 1].face_chainage_m
                                - adv.face_chainage_m)
    return out


def ratio_errors() -> dict:
    """Largest relative error of the homogeneous-ratio angle transfer, per layout and case."""
    out = {}
    for name, path in (("demo", demo_layout_path()), ("fixture", DATA / "fixture_layout.toml")):
        lay = load_layout(path)
        diameter = lay.machine.diameter_m
        model = AxisymModel(lay, AxisymSettings.fast())
        angles = [0.0, 22.5, 45.0, 90.0, 180.0]
        turns = turning_quadrupoles(lay)
        r0 = model.response_angles(Scenario(100.0), 1200.0, angles)
        live = turns & (np.abs(r0[0]) > 1e-3 * np.median(np.abs(r0[0])))
        cases = []
        for contrast in (10.0, 0.1):
            for dist in (1.0, 2.0):
                sc = Scenario(100.0, contacts=(Contact(1200.0 + dist * diameter,
                                                       100.0 * contrast),))
                rc = model.response_angles(sc, 1200.0, angles)
                approx = rc[0][None] * r0 / r0[0][None]
                err = np.abs(approx / rc - 1.0)[:, live]
                cases.append({"contrast": contrast, "ahead_diameters": dist,
                              "max_ratio_error": float(err.max()),
                              "max_response": float(np.abs(rc / r0 - 1.0)[:, live].max())})
                print(name, cases[-1], flush=True)
        out[name] = {"angles_deg": angles, "turning_readings": int(live.sum()),
                     "cases": cases}
    return out


def main() -> None:
    part = sys.argv[1] if len(sys.argv) > 1 else "all"
    old = json.loads(OUT.read_text()) if OUT.exists() else {}
    out = {"what": "image inversion seconds per advance, readings at their own cutterhead "
                   "angle vs stacked at the median angle; error of the contact fit's angle "
                   "transfer (see the script's docstring)",
           "cpu_count": os.cpu_count(), "machine": platform.machine(),
           "python": platform.python_version()}
    for key in ("summary", "cases", "contact_ratio"):
        if key in old:
            out[key] = old[key]
    if part in ("all", "timing"):
        out.update(timing())
    if part in ("all", "ratio"):
        out["contact_ratio"] = ratio_errors()
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps(out, indent=2))


def timing() -> dict:
    """The three timing cases."""
    lay = load_layout(DATA / "fixture_layout.toml")
    one = prepare_advances(DATA / "drive_contact10_seed11.csv", lay, QC).advances[:4]
    sc = Scenario(100.0, contacts=(Contact(20.0, 10.0),))
    log = simulate_drive(lay, sc, [0.0, 1.5, 3.0, 4.5], noise_rel=0.02, seed=5,
                         cutterhead_angles_deg=angle_range(0.0, 315.0, 45.0))
    eight = prepare_advances(log, lay, QC).advances
    cases = {"fixture one angle": run(lay, one, False),
             "8 angles, rows": run(lay, eight, False),
             "8 angles, stacked": run(lay, eight, True)}
    summary = {k: {"median_seconds": float(np.median([r["seconds"] for r in v])),
                   "median_chi2": float(np.median([r["chi2"] for r in v]))}
               for k, v in cases.items()}
    return {"summary": summary, "cases": cases}


if __name__ == "__main__":
    main()
