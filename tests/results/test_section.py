"""Moving section and its NetCDF store (hand-built, invented results: plumbing tests)."""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
import xarray as xr

from tbminv.inversion.outcome import AdvanceResult, ContactFit
from tbminv.results.section import (
    FLAG_MISFIT_HIGH,
    FLAG_NOT_CONVERGED,
    SectionError,
    axis_median_log10,
    build_section,
    clean_advances,
    shift_advances,
    world_view,
)
from tbminv.results.store import append_shift, open_section
from tests.helpers import (
    LAYOUT_TEXT,
    SETTINGS_TEXT,
    assert_cf_compliant,
    make_results,
    make_section,
)

ROOT = Path(__file__).resolve().parents[2]


def test_build_section_contract_variables_and_cf_attrs():
    ds = make_section(rho_beyond=12.0, flagged=(3,))
    assert dict(ds.sizes) | {} == {"advance": 5, "ahead": 69, "radius": 16, "iteration": 4,
                                   "contact_part": 1}
    assert ds["resistivity"].dims == ("advance", "ahead", "radius")
    # the store's variables (DEVELOPERS.md, file formats)
    for name in ("resistivity", "conductivity", "coverage", "chi2", "rrms", "iterations",
                 "lambda", "face_chainage_m", "contact_ahead_m", "contact_ahead_lo_m",
                 "contact_ahead_hi_m", "contact_chainage_m", "resistivity_beyond",
                 "contact_contrast", "contact_contrast_lo", "contact_contrast_hi",
                 "contact_at_bound", "contact_contrast_open", "contact_ambiguous",
                 "contact_part_lo_m",
                 "contact_part_hi_m", "contact_lr_statistic", "covered", "fit_flag", "shift"):
        assert name in ds, name
    assert ds.attrs["Conventions"] == "CF-1.8"
    units = {"resistivity": "ohm m", "conductivity": "S m-1", "face_chainage_m": "m",
             "contact_ahead_m": "m", "rrms": "percent", "ahead": "m", "radius": "m",
             "contact_contrast": "1", "contact_contrast_lo": "1", "contact_contrast_hi": "1",
             "contact_part_lo_m": "m"}
    for name, u in units.items():
        assert ds[name].attrs["units"] == u
        assert ds[name].attrs["long_name"]
    assert ds["time"].attrs["standard_name"] == "time"
    np.testing.assert_allclose(ds["conductivity"], 1.0 / ds["resistivity"])
    for key in ("layout_text", "settings_text", "inputs_sha256", "tbminv_version",
                "pygimli_version", "date_created"):
        assert ds.attrs[key], key
    assert ds.attrs["machine_diameter_m"] == 6.0
    # flags: advance 3 did not converge and has chi2 = 4
    flag = ds["fit_flag"].sel(advance=3).item()
    assert flag & FLAG_NOT_CONVERGED and flag & FLAG_MISFIT_HIGH
    assert ds["fit_flag"].sel(advance=2).item() == 0
    # contact chainage = face + ahead; NaN where no contact
    np.testing.assert_allclose(ds["contact_chainage_m"], 1230.0)
    far = make_section(rho_beyond=None)
    assert np.isnan(far["contact_ahead_m"]).all() and np.isnan(far["resistivity_beyond"]).all()
    # coverage mask: near cells covered, far corner not, machine interior not
    cov = ds["covered"].isel(advance=0)
    assert cov.sel(ahead=1.0, radius=0.25).item() == 1
    assert cov.sel(ahead=30.0, radius=7.75).item() == 0
    assert cov.sel(ahead=-2.0, radius=0.25).item() == 0


def test_doi_index_masks_cells():
    ds = build_section(make_results(range(2), doi=True), LAYOUT_TEXT, SETTINGS_TEXT, "x")
    # doi = ahead / 60 > 0.2 beyond 12 m ahead
    assert ds["covered"].isel(advance=0).sel(ahead=14.0, radius=0.25).item() == 0
    assert ds["covered"].isel(advance=0).sel(ahead=10.0, radius=0.25).item() == 1


def test_bad_results_rejected_with_clear_message():
    r = make_results(range(1))[0]
    with pytest.raises(SectionError, match="coverage: shape"):
        AdvanceResult(advance=0, face_chainage_m=0.0, ahead_m=r.ahead_m, radius_m=r.radius_m,
                      resistivity_ohmm=r.resistivity_ohmm, coverage=r.coverage[:-1])
    with pytest.raises(SectionError, match="repeated"):
        build_section(make_results([1, 1]), LAYOUT_TEXT, SETTINGS_TEXT, "x")


def test_other_grid_is_resampled():
    res = make_results(range(2))
    r = res[1]
    res[1] = AdvanceResult(advance=1, face_chainage_m=r.face_chainage_m,
                           ahead_m=r.ahead_m[::2], radius_m=r.radius_m[::2],
                           resistivity_ohmm=r.resistivity_ohmm[::2, ::2],
                           coverage=r.coverage[::2, ::2])
    ds = build_section(res, LAYOUT_TEXT, SETTINGS_TEXT, "x")
    np.testing.assert_allclose(ds["resistivity"].sel(advance=1, ahead=10.5, radius=1.25), 80.0)


def test_vertical_section_uses_z(tmp_path):
    res = make_results(range(3), rho_beyond=12.0)
    z = np.concatenate([-res[0].radius_m[::-1], res[0].radius_m])
    vert = [AdvanceResult(advance=r.advance, face_chainage_m=r.face_chainage_m, ahead_m=r.ahead_m,
                          radius_m=None, z_m=z,
                          resistivity_ohmm=np.concatenate([r.resistivity_ohmm[:, ::-1],
                                                           r.resistivity_ohmm], axis=1),
                          coverage=np.concatenate([r.coverage[:, ::-1], r.coverage], axis=1),
                          chi2=1.0, converged=True, contact=r.contact)
            for r in res]
    ds = build_section(vert, LAYOUT_TEXT, SETTINGS_TEXT, "x")
    assert ds["resistivity"].dims == ("advance", "ahead", "z")
    assert ds["z"].attrs["long_name"] == "height above the tunnel axis"
    w = world_view(ds)
    assert w["resistivity_latest"].dims == ("x", "z")
    append_shift(tmp_path / "v.nc", ds, shift="A")
    with pytest.raises(SectionError, match="section"):
        append_shift(tmp_path / "v.nc", make_section(range(5, 6)), shift="B")
    with pytest.raises(SectionError, match="exactly one"):
        AdvanceResult(advance=0, face_chainage_m=0.0, ahead_m=res[0].ahead_m, radius_m=None,
                      resistivity_ohmm=res[0].resistivity_ohmm, coverage=res[0].coverage)


def test_world_view_puts_contact_at_its_chainage():
    ds = make_section(range(6), rho_beyond=12.0)
    w = world_view(ds)
    assert set(w["resistivity_latest"].dims) == {"x", "radius"}
    prof = w["resistivity_latest"].sel(radius=0.25)
    assert prof.sel(x=1222.0, method="nearest").item() == pytest.approx(80.0, rel=0.05)
    assert prof.sel(x=1228.0, method="nearest").item() > 40.0
    assert prof.sel(x=1232.0, method="nearest").item() < 25.0
    # each advance's window is face + ahead
    a0 = w["resistivity"].sel(advance=0, radius=0.25)
    assert np.isnan(a0.sel(x=1195.0, method="nearest"))
    assert np.isfinite(a0.sel(x=1229.0, method="nearest"))


def test_clean_advances_from_fit_flag():
    ds = make_section(flagged=(3,))
    assert clean_advances(ds).tolist() == [True, True, True, False, True]
    assert clean_advances(ds.drop_vars("fit_flag")).all()   # no flags stored: all clean


def test_axis_median_log10_of_homogeneous_and_step_ground():
    # invented ground: 80 ohm-m around, 800 ohm-m beyond chainage 1210 m (face 1200 m)
    ds = make_section(advances=[0], rho_beyond=800.0, contact_chainage_m=1210.0)
    ahead = ds["ahead"].values
    covered = axis_median_log10(ds, 0, 3.0)
    every = axis_median_log10(ds, 0, 3.0, covered_only=False)
    near = (ahead >= 0) & (ahead <= 5)
    np.testing.assert_allclose(every[near], math.log10(80.0), atol=0.01)
    np.testing.assert_allclose(every[ahead >= 20], math.log10(800.0), atol=0.01)
    assert np.isnan(every[ahead < 0]).all()            # inside the machine: no value
    inside = ds["radius"].values <= 3.0
    none_covered = ~ds["covered"].isel(advance=0).values[:, inside].astype(bool).any(axis=1)
    assert none_covered.any() and np.isnan(covered[none_covered]).all()
    np.testing.assert_allclose(covered[near & ~none_covered], math.log10(80.0), atol=0.01)


def test_store_append_replace_and_reopen(tmp_path):
    store = tmp_path / "section.nc"
    append_shift(store, make_section(range(0, 4)), shift="day-1")
    append_shift(store, make_section(range(4, 8)), shift="night-1")
    ds = open_section(store)
    assert ds["advance"].values.tolist() == list(range(8))
    assert shift_advances(ds, "day-1").tolist() == [0, 1, 2, 3]
    assert ds.attrs["Conventions"] == "CF-1.8"
    assert ds["resistivity"].attrs["units"] == "ohm m"
    # the file is closed: it can be replaced (re-run of night-1 with fewer advances)
    append_shift(store, make_section(range(4, 7), rho_around=50.0), shift="night-1")
    ds2 = open_section(store)
    assert ds2["advance"].values.tolist() == list(range(7))
    np.testing.assert_allclose(ds2["resistivity"].sel(advance=5, ahead=5.0), 50.0)
    np.testing.assert_allclose(ds2["resistivity"].sel(advance=2, ahead=5.0), 80.0)
    assert sorted(ds2.attrs["shifts"].split()) == ["day-1", "night-1"]
    assert "shift night-1 written" in ds2.attrs["history"]
    # an advance number owned by another shift is refused, store unchanged
    before = store.read_bytes()
    with pytest.raises(SectionError, match="already stored under shift"):
        append_shift(store, make_section(range(3, 5)), shift="day-2")
    assert store.read_bytes() == before


def test_rerun_with_fewer_advances_shrinks_the_store(tmp_path):
    store = tmp_path / "s.nc"
    append_shift(store, make_section(range(10)), shift="A")
    append_shift(store, make_section(range(2)), shift="A")
    assert open_section(store)["advance"].values.tolist() == [0, 1]


def test_store_roundtrip_values(tmp_path):
    ds = make_section(range(3), rho_beyond=12.0)
    append_shift(tmp_path / "s.nc", ds, shift="A")
    back = open_section(tmp_path / "s.nc")
    np.testing.assert_allclose(back["resistivity"], ds["resistivity"])
    np.testing.assert_allclose(back["contact_ahead_m"], ds["contact_ahead_m"])
    assert back["stop_reason"].values.tolist() == ["chi2 reached"] * 3
    assert back["fit_flag"].dtype == np.int8
    assert back.attrs["layout_text"] == LAYOUT_TEXT


KILL_SCRIPT = """
import sys, time
from pathlib import Path
import tbminv.results.store as section
from tests.helpers import make_section

marker = Path({marker!r})
original = section._write_dataset

def slow_write(ds, path):
    # write the first half of the file, announce, then hang: the test kills us here
    original(ds, path)
    data = Path(path).read_bytes()
    Path(path).write_bytes(data[: len(data) // 2])
    marker.write_text(str(path))
    time.sleep(120)

section._write_dataset = slow_write
section.append_shift({store!r}, make_section(range(8, 12)), shift="day-2")
"""


def test_kill_during_append_leaves_store_intact(tmp_path):
    store = tmp_path / "section.nc"
    append_shift(store, make_section(range(0, 4)), shift="day-1")
    append_shift(store, make_section(range(4, 8)), shift="night-1")
    before = store.read_bytes()
    marker = tmp_path / "writing"
    script = KILL_SCRIPT.format(tests=str(ROOT / "tests"), marker=str(marker), store=str(store))
    proc = subprocess.Popen([sys.executable, "-c", script], cwd=ROOT,
                            env={**os.environ, "PYTHONPATH": str(ROOT)})
    try:
        t0 = time.monotonic()
        while not marker.exists():
            assert proc.poll() is None, "writer exited before reaching the write"
            assert time.monotonic() - t0 < 60, "writer never reached the write"
            time.sleep(0.05)
        tmp_file = Path(marker.read_text())
        assert tmp_file.exists() and tmp_file != store
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
    assert proc.returncode == -signal.SIGKILL
    assert store.read_bytes() == before
    ds = open_section(store)
    assert ds["advance"].values.tolist() == list(range(8))
    assert sorted(set(ds["shift"].values.astype(str))) == ["day-1", "night-1"]
    # the store still takes appends after the crash (the lock died with the process), and
    # the dead append's temporary is cleared
    assert tmp_file.exists()
    append_shift(store, make_section(range(8, 12)), shift="day-2")
    assert open_section(store).sizes["advance"] == 12
    assert not tmp_file.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["section.nc", "section.nc.lock",
                                                         "writing"]


def test_contact_fit_from_estimate_duck_typed():
    est = SimpleNamespace(found=True, ahead_m=12.0, ahead_lo_m=10.5, ahead_hi_m=math.nan,
                          chainage_m=1230.0, resistivity_around_ohmm=80.0,
                          resistivity_beyond_ohmm=12.0, p_no_contact=0.001, p_homogeneous=1e-5)
    c = ContactFit.from_estimate(est)
    assert c.found and c.chainage_m == 1230.0 and math.isnan(c.ahead_hi_m)
    none = ContactFit.from_estimate(SimpleNamespace(found=False, ahead_m=3.0, p_no_contact=0.9))
    assert not none.found and none.p_no_contact == 0.9 and none.chainage_m is None


def test_store_readable_by_netcdf4_library(tmp_path):
    pytest.importorskip("netCDF4")
    append_shift(tmp_path / "s.nc", make_section(range(3), rho_beyond=12.0), shift="A")
    with xr.open_dataset(tmp_path / "s.nc", engine="netcdf4") as ds:
        assert ds.attrs["Conventions"] == "CF-1.8"
        assert ds["resistivity"].attrs["units"] == "ohm m"
        assert str(ds["shift"].values[0]) == "A"
        assert ds["time"].dtype.kind == "M"


@pytest.mark.filterwarnings("ignore::DeprecationWarning")
def test_store_passes_cf_checker(tmp_path):
    # the IOOS compliance checker (optional: pip install compliance-checker) on the CF-1.8 suite
    store = tmp_path / "s.nc"
    append_shift(store, make_section(range(3), rho_beyond=12.0, doi=True), shift="A")
    append_shift(store, make_section(range(3, 5), rho_beyond=12.0), shift="B")
    assert_cf_compliant(store, tmp_path)


def test_contact_parts_of_different_shifts_share_the_store(tmp_path):
    # one part per advance in the first shift, two in the second: the store pads with NaN
    store = tmp_path / "s.nc"
    append_shift(store, make_section(range(3), rho_beyond=12.0), shift="A")
    two = {"parts_m": ((1.0, 2.0), (3.0, 4.0)), "ambiguous": True}
    append_shift(store, make_section(range(3, 6), rho_beyond=12.0, contact_extra=two),
                 shift="B")
    ds = open_section(store)
    assert ds.sizes["contact_part"] == 2
    np.testing.assert_allclose(ds["contact_part_lo_m"].values[4], [1.0, 3.0])
    assert np.isnan(ds["contact_part_lo_m"].values[0, 1])
    assert ds["contact_ambiguous"].dtype == np.int8
    assert ds["contact_ambiguous"].values.tolist() == [0, 0, 0, 1, 1, 1]
    assert ds["contact_contrast"].attrs["units"] == "1"
