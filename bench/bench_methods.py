"""Time per advance, chi2 and distance error of each forward geometry on the demo-sized drive.

The same synthetic drive as notebooks/03_methods.ipynb (demo ground without its boulder, 4
advances 18 ... 6 m before the contact, compact protocol, 2 % noise, simulated on the 3D default
mesh with P1 elements) is inverted by each method at its default small settings. Writes
bench/results/methods.json and bench/results/methods.csv.

    python bench/bench_methods.py
"""

from __future__ import annotations

import dataclasses
import json
import logging
import platform
import time
from pathlib import Path

import numpy as np

from tbminv.forward.axisym.fields import AxisymSettings
from tbminv.forward.axisym.mesh import CylMeshSettings
from tbminv.forward.registry import make_model
from tbminv.ground import demo_ground_path, load_scenario
from tbminv.inversion.contactfit import ContactFitSettings
from tbminv.inversion.settings import InversionSettings
from tbminv.layout import demo_layout_path, load_layout
from tbminv.studies import methods

FACES_M = [1222.0, 1226.0, 1230.0, 1234.0]
OUT = Path(__file__).parent / "results"


def main() -> None:
    logging.basicConfig(level=logging.WARNING)
    logging.getLogger(__name__).setLevel(logging.ERROR)
    logging.getLogger("Core").setLevel(logging.WARNING)
    layout = methods.compact_layout(load_layout(demo_layout_path()))
    scenario = dataclasses.replace(load_scenario(demo_ground_path()), spheres=())
    t0 = time.perf_counter()
    drive = methods.synthetic_drive(layout, scenario, FACES_M, model=methods.model_3d_p1(layout),
                                    noise_rel=0.02, seed=7, name="machine+wall")
    t_sim = time.perf_counter() - t0
    axisym = make_model("axisym", layout, settings=AxisymSettings(
        mesh=CylMeshSettings(h_fine_m=0.05, growth=1.25, domain_m=1500.0), max_harmonics=20))
    contact = ContactFitSettings(contrasts=(0.1, 0.25, 0.5, 1.0, 2.0, 4.0),
                                 distances_in_diameters=tuple(np.round(np.geomspace(0.25, 8, 9),
                                                                       3)))
    recs = methods.run_axisym(drive, InversionSettings(max_iter=6, contact=contact),
                              model=axisym, label="cooling lam=100", distance="both")
    recs += methods.run_cartesian25d(drive, methods.Cartesian25DInversionSettings(),
                                   label="lam=2 cooling, floor 10%", error_floor=0.10)
    recs += methods.run_region3d(drive, methods.Region3DSettings(max_iter=4),
                                 label="4 slabs, smoothness 30")
    table = methods.records_table(recs)
    summary = methods.summary_table(table)
    OUT.mkdir(parents=True, exist_ok=True)
    table.to_csv(OUT / "methods.csv", index=False)
    result = {"machine": platform.platform(), "processor": platform.processor(),
              "simulation_s": t_sim, "faces_m": FACES_M,
              "n_readings_per_advance": len(layout.measurements),
              "summary": json.loads(summary.to_json(orient="records"))}
    (OUT / "methods.json").write_text(json.dumps(result, indent=2), encoding="utf-8")
    print(summary.to_string())


if __name__ == "__main__":
    main()
