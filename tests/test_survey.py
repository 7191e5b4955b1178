"""Survey: pyGIMLi containers per advance, geometric factors, xarray view, NetCDF round trip."""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from tbminv.gimli import ert, pg
from tbminv.layout import demo_layout_path, load_layout
from tbminv.readings.qc import QCSettings, run_qc
from tbminv.readings.reader import read_readings
from tbminv.readings.survey import (
    ANALYTIC_FULL_SPACE,
    Survey,
    full_space_geometric_factor,
    open_survey_dataset,
    write_survey_dataset,
)

sys.path.insert(0, str(Path(__file__).parent))
from test_qc import synthetic_log  # noqa: E402

LAYOUT = load_layout(demo_layout_path())
NAN3 = np.full((1, 3), np.nan)


def test_full_space_factor_closed_forms():
    """Point source in a full space, V = rho I / (4 pi r) (Telford, Geldart & Sheriff 1990,
    Applied Geophysics, 2nd ed., ch. 8; section number not checked, from memory): Wenner
    spacing a -> k = 4 pi a; pole-pole -> 4 pi AM; pole-dipole -> 4 pi / (1/AM - 1/AN)."""
    a = 2.5
    p = [np.array([[x, 0.0, 0.0]]) for x in (0.0, a, 2 * a, 3 * a)]
    assert full_space_geometric_factor(p[0], p[3], p[1], p[2])[0] == pytest.approx(4 * math.pi * a)
    assert full_space_geometric_factor(p[0], NAN3, p[1], NAN3)[0] == pytest.approx(4 * math.pi * a)
    assert full_space_geometric_factor(p[0], NAN3, p[1], p[2])[0] == pytest.approx(
        4 * math.pi / (1 / a - 1 / (2 * a)))
    assert np.isnan(full_space_geometric_factor(NAN3, p[1], p[2], p[3])[0])


def test_full_space_factor_matches_pygimli_deep_limit():
    """pyGIMLi's geometricFactors for buried electrodes (half space with an image) tends to the
    full-space factor when the electrodes are deep: at 1e4 m depth they agree to 1e-3."""
    rng = np.random.default_rng(3)
    pts = rng.uniform(-3, 3, (4, 3)) + np.array([0.0, 0.0, -1e4])
    data = pg.DataContainerERT()
    for p in pts:
        data.createSensor(pg.Pos(*p))
    quads = [(0, 1, 2, 3), (0, -1, 2, 3), (0, -1, 1, -1), (1, 3, 0, 2)]
    data.resize(len(quads))
    for j, c in enumerate("abmn"):
        data.set(c, pg.Vector([float(q[j]) for q in quads]))
    ref = np.array(ert.geometricFactors(data, 3))

    def at(col):
        return np.array([pts[q[col]] if q[col] >= 0 else [np.nan] * 3 for q in quads])

    ours = full_space_geometric_factor(at(0), at(1), at(2), at(3))
    np.testing.assert_allclose(ours, ref, rtol=1e-3)


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    path = synthetic_log(tmp_path_factory.mktemp("s") / "log.csv", n_adv=3, reps=2, seed=2)
    qc = run_qc(read_readings(path, LAYOUT), QCSettings(min_pairs=10))
    return Survey(qc, LAYOUT, source=str(path))


def test_container_fields_and_positions(survey):
    s = survey.advance(2)
    d = s.data
    rows = survey.table[survey.table["advance"] == 2]
    assert d.size() == len(rows) and s.lines.tolist() == rows["line"].tolist()
    for c in ("a", "b", "m", "n", "r", "err", "k", "rhoa", "valid", "i", "u"):
        assert d.haveData(c), c
    r = np.array(d["r"])
    np.testing.assert_allclose(r, rows["voltage_v"] / rows["current_a"])
    np.testing.assert_allclose(np.array(d["rhoa"]), np.array(d["k"]) * r)
    np.testing.assert_allclose(np.array(d["err"]), rows["err_ohm"] / np.abs(rows["r_ohm"]))
    assert np.array(d["valid"]).astype(bool).tolist() == rows["valid"].tolist()
    # each sensor sits where the layout puts its electrode for that reading's face and angle
    pos = np.array([[p[0], p[1], p[2]] for p in d.sensorPositions()])
    a_idx = np.array(d["a"]).astype(int)
    fc = float(np.median(rows["face_chainage_m"]))   # default: the advance's face chainage
    assert s.face_chainage_m == fc
    for i in range(0, len(rows), 7):
        row = rows.iloc[i]
        want = LAYOUT.positions_world(fc, row["cutterhead_deg"])[row["a"]]
        np.testing.assert_allclose(pos[a_idx[i]], want, atol=1e-3)
        assert s.sensor_labels[a_idx[i]] == row["a"]
    assert s.attrs["geometric_factor"] == ANALYTIC_FULL_SPACE


def test_sensors_at_each_readings_face_chainage(survey):
    s = Survey(survey.qc, LAYOUT, face_chainage="reading").advance(2)
    rows = survey.table[survey.table["advance"] == 2]
    pos = np.array([[p[0], p[1], p[2]] for p in s.data.sensorPositions()])
    m_idx = np.array(s.data["m"]).astype(int)
    for i in range(0, len(rows), 5):
        row = rows.iloc[i]
        want = LAYOUT.positions_world(row["face_chainage_m"], row["cutterhead_deg"])[row["m"]]
        np.testing.assert_allclose(pos[m_idx[i]], want, atol=1.01e-3)  # pyGIMLi snaps at 1 mm
    with pytest.raises(ValueError, match="face_chainage"):
        Survey(survey.qc, LAYOUT, face_chainage="shift")


def test_cutterhead_turns_give_separate_sensors(survey):
    s = survey.advance(1)
    labels = list(s.sensor_labels)
    assert labels.count("C1") >= 2          # C1 read at two cutterhead angles
    pos = np.array([[p[0], p[1], p[2]] for p in s.data.sensorPositions()])
    c1 = pos[[i for i, lab in enumerate(labels) if lab == "C1"]]
    r = np.hypot(c1[:, 1], c1[:, 2])
    np.testing.assert_allclose(r, LAYOUT.electrode("C1").radius_m, atol=1e-9)
    assert np.ptp(np.arctan2(c1[:, 1], c1[:, 2])) > 0.01


def test_poles_and_machine_electrode(tmp_path):
    """R1 is a remote at infinity -> index -1; M0 (the steel body) -> a sensor on the axis at
    the face, k undefined."""
    path = tmp_path / "log.csv"
    path.write_text("advance,face_chainage_m,a,b,m,n,current_a,voltage_v,cutterhead_deg\n"
                    "1,1200.0,M0,R2,C1,R1,0.5,0.01,0\n"
                    "1,1200.0,C1,R1,C2,R1,0.5,0.02,0\n"
                    "1,1200.0,C1,,C3,,0.5,0.03,0\n")
    qc = run_qc(read_readings(path, LAYOUT), QCSettings(fallback_a_ohm=0.0, fallback_b=0.02))
    s = Survey(qc, LAYOUT).advance(1)
    d = s.data
    assert np.array(d["n"]).astype(int).tolist() == [-1, -1, -1]
    assert np.array(d["b"]).astype(int)[1:].tolist() == [-1, -1]
    m0 = s.sensor_labels.index("M0")
    p = d.sensorPosition(m0)
    assert (p[0], p[1], p[2]) == (1200.0, 0.0, 0.0)
    k = np.array(d["k"])
    assert k[0] == 0.0 and "M0" in s.attrs["machine_electrode"]
    pc1 = LAYOUT.positions_world(1200.0)["C1"]
    pc2 = LAYOUT.positions_world(1200.0)["C2"]
    assert k[1] == pytest.approx(4 * math.pi * np.linalg.norm(pc1 - pc2))   # pole-pole
    assert "SB" in s.attrs["on_steel"] and "M0" in s.attrs["on_steel"]


def test_geometric_factor_hook(survey):
    n = {a: survey.advance(a).data.size() for a in survey.advances}
    s2 = Survey(survey.qc, LAYOUT, geometric_factors={a: np.full(n[a], 7.0) for a in n},
                geometric_factor_method="numeric, homogeneous run with machine and tunnel")
    d = s2.advance(1).data
    np.testing.assert_allclose(np.array(d["k"]), 7.0)
    assert s2.advance(1).attrs["geometric_factor"].startswith("numeric")
    s3 = Survey(survey.qc, LAYOUT, geometric_factors=lambda data, adv: np.full(data.size(), adv))
    np.testing.assert_allclose(np.array(s3.advance(3).data["k"]), 3.0)
    ds = s3.to_xarray()
    assert ds.attrs["geometric_factor"] == "numeric (supplied)"
    bad = Survey(survey.qc, LAYOUT, geometric_factors={1: np.ones(2)})
    with pytest.raises(ValueError, match="geometric_factors"):
        bad.advance(1)


def test_valid_data_drops_flagged(survey):
    s = survey.advance(1)
    v = s.valid_data()
    assert v.size() == int(np.array(s.data["valid"]).sum())


def test_xarray_view_and_netcdf_round_trip(survey, tmp_path):
    ds = survey.to_xarray()
    assert ds.sizes["advance"] == 3 and ds.attrs["Conventions"] == "CF-1.8"
    assert set(ds["r_ohm"].dims) == {"reading", "advance"}
    for name, var in ds.data_vars.items():
        assert "long_name" in var.attrs, name
        assert "units" in var.attrs or "flag_meanings" in var.attrs, name
    assert ds["qc_flags"].attrs["flag_meanings"].split()[0] == "reciprocal"
    t = survey.table
    lines = ds["line"].values
    assert sorted(lines[lines >= 0].tolist()) == sorted(t["line"].tolist())
    # one cell against the table
    row = t.iloc[17]
    cell = ds.where(ds["line"] == row["line"], drop=True)
    assert float(cell["r_ohm"].item()) == pytest.approx(row["r_ohm"])
    assert str(cell["m"].item()) == row["m"]
    # write the dataset in hand: to_netcdf() rebuilds it, with a new time in its history
    out = write_survey_dataset(ds, tmp_path / "survey.nc")
    back = open_survey_dataset(out)
    xr.testing.assert_identical(ds, back)
    assert open_survey_dataset(survey.to_netcdf(tmp_path / "again.nc")).sizes == ds.sizes
    for key in ("pygimli_version", "tbminv_version", "qc_settings", "error_models", "layout"):
        assert key in back.attrs
