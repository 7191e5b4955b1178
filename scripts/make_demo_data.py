"""Make the bundled demo readings log (an invented drive) from the demo layout and ground.

The log is simulated with the 3D forward model (a different model from the axisymmetric one the
inversion uses: no inverse crime), with reciprocal readings, 2 % relative + 0.1 mV absolute
Gaussian noise and a fixed seed. A few bad rows and bad contacts are then mixed in on purpose, so
that the whole chain meets realistic input:

* line-level faults: text in a number, a zero current, an unknown electrode label, a missing
  voltage, an angle outside [0, 360), a duplicated reading with a different value;
* a failing contact: electrode T6 reads 80 kOhm contact resistance in two advances;
* one spike: a reading 3x off in one advance.

Run from the project root::

    python scripts/make_demo_data.py [--faces 1219:1232.5:1.5] [--out tbminv/data/demo_readings.csv]
"""

from __future__ import annotations

import argparse
import logging
from pathlib import Path

import numpy as np
import pandas as pd

from tbminv.cli import parse_faces
from tbminv.ground import demo_ground_path, load_scenario
from tbminv.layout import demo_layout_path, load_layout
from tbminv.studies.simulate import simulate_drive, write_readings

SEED = 20260314
FACES = "1219:1232.5:1.5"


def corrupt(df: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    """Mix the documented faults into a clean simulated log (returns a new frame of text)."""
    out = df.astype(object).copy()
    n = len(out)
    pick = rng.choice(n, size=8, replace=False)
    out.loc[pick[0], "voltage_v"] = "1.2e-3V"                  # text in a number
    out.loc[pick[1], "current_a"] = 0.0                         # zero current
    out.loc[pick[2], "m"] = "C9"                                # unknown electrode label
    out.loc[pick[3], "voltage_v"] = ""                          # missing field
    out.loc[pick[4], "cutterhead_deg"] = 361.0                  # angle outside [0, 360)
    dup = out.loc[[pick[5]]].copy()
    dup["voltage_v"] = float(df.loc[pick[5], "voltage_v"]) * 1.5  # duplicate, other value
    out = pd.concat([out, dup], ignore_index=True)
    spike = pick[6]
    out.loc[spike, "voltage_v"] = float(df.loc[spike, "voltage_v"]) * 3.0
    bad = (out["advance"].isin([3, 4])) & ((out["a"] == "T6") | (out["m"] == "T6"))
    out.loc[bad & (out["a"] == "T6"), "contact_ohm_a"] = 80_000.0
    out.loc[bad & (out["m"] == "T6"), "contact_ohm_m"] = 80_000.0
    return out


def main() -> int:
    """Write the demo readings log."""
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--faces", default=FACES)
    p.add_argument("--out", default=str(Path("tbminv") / "data" / "demo_readings.csv"))
    p.add_argument("--model", default="3d")
    args = p.parse_args()
    logging.basicConfig(level=logging.INFO, format="%(levelname)s %(name)s: %(message)s")
    layout = load_layout(demo_layout_path())
    ground = load_scenario(demo_ground_path())
    faces = parse_faces(args.faces)
    rng = np.random.default_rng(SEED)
    angles = rng.uniform(0.0, 360.0, size=len(faces)).round(1)
    df = simulate_drive(layout, ground, faces, model=args.model, noise_rel=0.02,
                        noise_abs_v=1e-4, seed=SEED, current_a=2.0, cutterhead_deg=angles,
                        start_time="2026-03-14T06:00:00+00:00")
    out = write_readings(corrupt(df, rng), args.out)
    print(f"{len(faces)} advances, {len(df)} readings (+ faults) -> {out} "
          f"({out.stat().st_size / 1e6:.2f} MB)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
