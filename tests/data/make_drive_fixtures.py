"""Make the synthetic drive logs the inversion tests use (3D forward model: no inverse crime).

Small layout (three cutterhead, three shield electrodes, the steel as a current electrode, a
remote at infinity; pole-pole and machine-pole protocol with reciprocals), D = 6 m, deep tunnel.
Drives: homogeneous 50 ohm-m (faces 0..12 m), and a contact square to the axis 30 m ahead of the
first face with rho2/rho1 = 10 and 0.1 (faces 0..27 m every 1.5 m). One more drive has a ground
surface 12 m above the crown (layout fixture_layout_cover12.toml): contact 1:10 at 30 m, faces
6..27 m every 3 m. 2 % relative noise (and a
homogeneous drive with 3 %), seeds
named in the file names. Run from the project root::

    python tests/data/make_drive_fixtures.py
"""

from __future__ import annotations

import dataclasses
import logging
import sys
from pathlib import Path

import numpy as np

from tbminv.ground import Contact, Scenario
from tbminv.layout import Layout
from tbminv.studies.simulate import simulate_drive, write_readings

HERE = Path(__file__).parent
D = 6.0


def fixture_layout() -> Layout:
    """The small test layout."""
    els = [{"label": f"T{i}", "kind": "cutterhead", "axial_m": 0.05, "radius_m": r,
            "angle_deg": a} for i, (r, a) in enumerate([(0.3, 0.0), (1.5, 90.0), (2.6, 200.0)])]
    els += [{"label": f"S{i}", "kind": "shield", "axial_m": x, "radius_m": 3.05,
             "angle_deg": a} for i, (x, a) in enumerate([(-2.0, 0.0), (-5.0, 120.0),
                                                         (-8.0, 240.0)])]
    els += [{"label": "BODY", "kind": "machine"}, {"label": "R", "kind": "remote"}]
    return Layout.from_dict({
        "name": "inversion test layout",
        "machine": {"diameter_m": D, "shield_length_m": 9.0, "cutterhead_thickness_m": 1.0},
        "tunnel": {"length_m": 30.0, "lining_resistivity_ohmm": 300.0},
        "electrode": els,
        "protocol": {"generate": ["pole-pole", "machine-pole"]},
    }, source="fixture")


def main() -> None:
    logging.basicConfig(level=logging.INFO)
    layout = fixture_layout()
    layout.to_toml(HERE / "fixture_layout.toml")
    drives = {
        "homogeneous_seed7": (Scenario.homogeneous(50.0), np.arange(0.0, 12.01, 1.5), 7, 0.02),
        "homogeneous3pc_seed17": (Scenario.homogeneous(50.0), np.arange(0.0, 12.01, 1.5), 17,
                                  0.03),
        "contact10_seed11": (Scenario(50.0, contacts=(Contact(30.0, 500.0),)),
                             np.arange(0.0, 27.01, 1.5), 11, 0.02),
        "contact01_seed13": (Scenario(50.0, contacts=(Contact(30.0, 5.0),)),
                             np.arange(0.0, 27.01, 1.5), 13, 0.02),
    }
    only = set(sys.argv[1:])
    shallow = dataclasses.replace(layout, tunnel=dataclasses.replace(layout.tunnel,
                                                                     cover_m=12.0))
    shallow.to_toml(HERE / "fixture_layout_cover12.toml")
    drives["cover12_contact01_seed19"] = (Scenario(50.0, contacts=(Contact(30.0, 5.0),)),
                                          np.arange(6.0, 27.01, 3.0), 19, 0.02)
    for name, (sc, faces, seed, noise) in drives.items():
        if only and name not in only:
            continue
        lay = shallow if name.startswith("cover12") else layout
        df = simulate_drive(lay, sc, faces, model="3d", noise_rel=noise, noise_abs_v=0.0,
                            seed=seed, current_a=1.0)
        write_readings(df, HERE / f"drive_{name}.csv")
        print(name, len(df))


if __name__ == "__main__":
    main()
