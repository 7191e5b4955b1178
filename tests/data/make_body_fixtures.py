"""Make the 3D-simulated advances the body-fit tests use (pyGIMLi 3D: no inverse crime).

The demo layout with the ground surface removed (deep tunnel), steel and bore in, D = 6.2 m,
face at chainage 1000 m, background 100 ohm-m, cutterhead angles 0, 45, ..., 315 degrees, the
demo protocol at every angle, noise-free (the tests add 2 % noise with a fixed seed). Bodies
(spheres of radius 2 m, invented):

- ``cond``: 10 ohm-m, centre 4.5 m ahead, 3.5 m off the axis, bearing 60 deg;
- ``res``: 1000 ohm-m, centre 4.0 m ahead, 3.0 m off the axis, bearing 220 deg;
- ``hom``: no body.

Run from the project root (about 5 min per case on 2 cores)::

    python tests/data/make_body_fixtures.py [cond res hom]
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np

from tbminv.forward.fem3d.mesh import MeshSettings
from tbminv.forward.fem3d.model import Fem3DSettings, Forward3D
from tbminv.ground import Scenario, Sphere
from tbminv.layout import Layout, demo_layout_path, load_layout

HERE = Path(__file__).parent
FACE = 1000.0
ANGLES = np.arange(0.0, 360.0, 45.0)
#: case -> (sphere resistivity ohm-m or None, ahead m, offset m, bearing deg)
CASES = {"cond": (10.0, 4.5, 3.5, 60.0), "res": (1000.0, 4.0, 3.0, 220.0),
         "hom": (None, math.nan, math.nan, math.nan)}
RADIUS_M = 2.0
BACKGROUND_OHMM = 100.0
MESH = MeshSettings(box_m=150.0, n_segments=12, face_size_m=0.5, growth=1.4,
                    refine_ahead_m=15.0, electrode_size_m=0.15)


def deep_demo_layout() -> Layout:
    """The demo layout without its ground surface."""
    d = load_layout(demo_layout_path()).to_dict()
    d["tunnel"]["cover_m"] = "inf"
    return Layout.from_dict(d, source="demo layout, deep")


def scenario(case: str) -> Scenario:
    """The ground of a case."""
    rho, ahead, off, bearing = CASES[case]
    if rho is None:
        return Scenario.homogeneous(BACKGROUND_OHMM)
    t = math.radians(bearing)
    return Scenario(BACKGROUND_OHMM, spheres=(Sphere(FACE + ahead, RADIUS_M, rho,
                                                     -off * math.sin(t), off * math.cos(t)),))


def write_csv(path: Path, quads: list, results: dict[float, np.ndarray]) -> None:
    """One row per reading: a, b, m, n, cutterhead_deg, r_ohm."""
    with open(path, "w") as fh:
        fh.write("a,b,m,n,cutterhead_deg,r_ohm\n")
        for ang, r in results.items():
            for q, v in zip(quads, r):
                labs = ["" if x is None else x for x in q]
                fh.write(f"{labs[0]},{labs[1]},{labs[2]},{labs[3]},{ang:g},{v:.10e}\n")


def main(cases: list[str]) -> None:
    lay = deep_demo_layout()
    fw = Forward3D(lay, Fem3DSettings(mesh=MESH))
    quads = [q.labels() for q in lay.measurements]
    for case in cases:
        res = {float(a): fw.run(scenario(case), FACE, float(a)).r_ohm for a in ANGLES}
        write_csv(HERE / f"body_{case}_3d.csv", quads, res)


if __name__ == "__main__":
    main(sys.argv[1:] or list(CASES))
