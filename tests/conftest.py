"""Shared test set-up: a private cache folder, headless matplotlib, small drive builders."""

from __future__ import annotations

import dataclasses
import os
import tempfile
from pathlib import Path

import pytest

os.environ.setdefault("MPLBACKEND", "Agg")
os.environ.setdefault("TBMINV_CACHE_DIR", tempfile.mkdtemp(prefix="tbminv-test-cache-"))
# tbminv is imported inside the builders below: the cache folder is set before any import


# ------------------------------------------------------------------ shared drive builders
#: Settings of the small drives below: fast forward model, coarse parameter cells, a short
#: contact table (4+ points per axis for the cubic interpolation), QC error model per log.
SMALL_DRIVE_SETTINGS = """\
[qc]
error_model_group = "log"

[invert]
forward_settings = "fast"
max_iter = 4
cell_m = 1.5

[contact]
contrasts = [0.1, 0.3, 1.0, 3.0, 10.0]
distances_in_diameters = [0.25, 0.5, 1.0, 2.0, 4.0, 8.0]
"""


def symmetric_dipole_layout():
    """Tools at 0/120/240 degrees on one ring with dipoles between them, plus machine-pole.

    Each dipole ``T1-T2`` measured at ``T3`` against the centre tool ``T0`` is null-coupled in
    axisymmetric ground (``T3`` and ``T0`` are equidistant from ``T1`` and ``T2``): the
    homogeneous response is 0 and the relative response of the contact fit undefined.
    """
    from tbminv.layout import Layout

    els = [{"label": "T0", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 0.0,
            "angle_deg": 0.0}]
    els += [{"label": f"T{i + 1}", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 2.0,
             "angle_deg": a} for i, a in enumerate((0.0, 120.0, 240.0))]
    els += [{"label": "S1", "kind": "shield", "axial_m": -2.0, "radius_m": 3.05,
             "angle_deg": 0.0},
            {"label": "S2", "kind": "shield", "axial_m": -6.0, "radius_m": 3.05,
             "angle_deg": 180.0},
            {"label": "BODY", "kind": "machine"}, {"label": "R", "kind": "remote"}]
    dipoles = [{"a": a, "b": b, "m": m, "n": "T0"}
               for a, b, m in (("T1", "T2", "T3"), ("T2", "T3", "T1"), ("T3", "T1", "T2"))]
    return Layout.from_dict({
        "name": "symmetric cutterhead dipoles (test)",
        "machine": {"diameter_m": 6.0, "shield_length_m": 9.0, "cutterhead_thickness_m": 1.0},
        "tunnel": {"cover_m": "inf", "lining_resistivity_ohmm": 300.0, "length_m": 30.0},
        "electrode": els, "protocol": {"generate": ["machine-pole", "pole-pole"]},
        "measurement": dipoles}, source="<symmetric dipole layout>")


@dataclasses.dataclass(frozen=True)
class SmallDrive:
    """Files of a small synthetic drive: layout, readings log, settings."""

    layout: Path
    readings: Path
    settings: Path
    n_advances: int


@pytest.fixture(scope="session")
def symmetric_dipole_drive(tmp_path_factory) -> SmallDrive:
    """Three advances towards a contact (10x more resistive, 30 m chainage), axisym, 1 % noise."""
    from tbminv.ground import Contact, Scenario
    from tbminv.studies.simulate import simulate_drive

    folder = tmp_path_factory.mktemp("symmetric-drive")
    layout = symmetric_dipole_layout()
    layout.to_toml(folder / "layout.toml")
    scenario = Scenario(background_resistivity_ohmm=100.0,
                        contacts=(Contact(chainage_m=30.0, resistivity_ohmm=1000.0),))
    faces = [10.0, 12.0, 14.0]
    log = simulate_drive(layout, scenario, faces, model="axisym", noise_rel=0.01,
                         noise_abs_v=1e-5, seed=3)
    log.to_csv(folder / "readings.csv", index=False)
    (folder / "settings.toml").write_text(SMALL_DRIVE_SETTINGS)
    return SmallDrive(folder / "layout.toml", folder / "readings.csv",
                      folder / "settings.toml", len(faces))
