"""Drive inversion on synthetic drives made with the 3D model (no inverse crime).

The drives (tests/data/drive_*.csv, made by tests/data/make_drive_fixtures.py with the 3D forward
model, 2 % Gaussian noise, seeds in the file names) are inverted with the axisymmetric model.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tbminv.inversion.drive import DriveInverter
from tbminv.inversion.grid import build_parameter_grid
from tbminv.inversion.image import shift_model
from tbminv.inversion.settings import InversionSettings
from tbminv.jobs import run_drive
from tbminv.layout import load_layout
from tbminv.readings.advance import prepare_advances
from tbminv.readings.qc import QCSettings
from tests.helpers import DATA

D = 6.0
# 21 reciprocal pairs per advance are too few for a model per advance: one for the whole log
QC = QCSettings(error_model_group="log")


@pytest.fixture(scope="module")
def layout():
    return load_layout(DATA / "fixture_layout.toml")


def drive_data(name: str, layout):
    return prepare_advances(DATA / f"drive_{name}.csv", layout, QC).advances


def test_parameter_grid_leaves_steel_and_bore_out(layout):
    grid = build_parameter_grid(layout, InversionSettings())
    c = grid.centers
    inside_machine = (c[:, 0] > -9.0) & (c[:, 0] < 0.0) & (c[:, 1] < 3.0)
    inside_bore = (c[:, 0] < -9.0) & (c[:, 0] > -39.0) & (c[:, 1] < 3.0)
    assert not inside_machine.any() and not inside_bore.any()
    assert grid.n_param == grid.mesh.cellCount()


def test_warm_start_shift_moves_ground_towards_machine(layout):
    grid = build_parameter_grid(layout, InversionSettings())
    c = grid.centers
    model = np.where(c[:, 0] > 10.0, 10.0, 100.0)   # a contact 10 m ahead
    moved = shift_model(grid, model, 1.5)
    near = (np.abs(c[:, 1] - 1.0) < 0.5)
    x8 = near & (np.abs(c[:, 0] - 8.9) < 0.3)
    x7 = near & (np.abs(c[:, 0] - 7.9) < 0.3)
    # after 1.5 m of advance the contact is 8.5 m ahead
    assert np.all(moved[x8] < 15.0) and np.all(moved[x7] > 90.0)


@pytest.mark.slow
def test_homogeneous_drive_recovers_ground_and_reports_no_contact(layout, tmp_path):
    store = tmp_path / "section.nc"
    ds = run_drive(DATA / "drive_homogeneous_seed7.csv", layout, store,
                   settings=InversionSettings(max_iter=8), qc_settings=QC)
    # 21 readings per advance: chi-squared per datum of one advance scatters by sqrt(2/21) = 0.3
    # even with a perfect model, so the drive's mean is held to [0.7, 1.5], each advance to
    # [0.3, 2.5] (the axisym model is within 0.6 % of the 3D model that made the data)
    chi2 = ds["chi2"].values
    assert 0.7 <= chi2.mean() <= 1.5, chi2
    assert np.all((chi2 >= 0.3) & (chi2 <= 2.5)), chi2
    rho = ds["resistivity"].values
    covered = ds["covered"].values.astype(bool)
    err = np.abs(rho[covered] / 50.0 - 1.0)
    # 95 % of the covered cells within 5 %, none beyond 8 % (the cells next to electrodes carry
    # the largest model error of the axisym-vs-3D comparison; measured max 5.7 %)
    assert np.nanpercentile(err, 95) <= 0.05, np.nanpercentile(err, 95)
    assert np.nanmax(err) <= 0.08, np.nanmax(err)
    assert np.all(np.isnan(ds["contact_ahead_m"].values))


def test_operator_jacobian_is_not_zero(layout):
    # the symptom of a zero Jacobian is a chi-squared that never moves
    inv = DriveInverter(layout, InversionSettings())
    op = inv.operator(0.0, 0.0)
    r, jac = op.jacobian(np.full(inv.grid.n_param, 50.0))
    assert np.all(np.isfinite(r)) and np.count_nonzero(jac) > 0.5 * jac.size
    # each row's sum is dR / d ln(lambda) for every parameter scaled by lambda: checked against
    # a central difference of the response (the derivative's definition; truncation error
    # about eps^2 / 6 = 2e-7, measured 1.6e-7 with this project's model; allowed 1e-6)
    rho = np.full(inv.grid.n_param, 50.0)
    eps = 1e-3
    fd = (op.response(rho * math.exp(eps)) - op.response(rho * math.exp(-eps))) / (2 * eps)
    np.testing.assert_allclose(jac.sum(axis=1), fd, rtol=1e-6)
    # homogeneous ground: d ln R / d ln rho would sum to 1 over all cells if every region
    # scaled with rho (Euler's theorem for a response homogeneous of degree 1); the lining's
    # fixed 300 ohm-m takes a share, measured 1.2 % at 50 ohm-m with this project's model
    # (this test); allowed 2 %
    total = jac.sum(axis=1) / r
    assert np.all(np.abs(total - 1.0) < 0.02), total


@pytest.mark.slow
@pytest.mark.parametrize(("name", "contrast"), [("contact10_seed11", 10.0),
                                                ("contact01_seed13", 0.1)])
def test_contact_fit_along_the_drive(layout, name, contrast):
    data = drive_data(name, layout)
    inv = DriveInverter(layout, InversionSettings())
    k = inv.geometric_factors(data[0].face_chainage_m, 0.0, 100.0)
    ra = k * data[0].r_ohm
    fitter = inv.contact_fitter(float(np.median(ra[np.isfinite(ra) & (ra > 0)])))
    r = np.array([d.r_ohm for d in data])
    e = np.array([d.rel_error for d in data])
    faces = [d.face_chainage_m for d in data]
    est = fitter.fit_drive(r, e, faces)
    hits = n = contrast_hits = 0
    for f, es in zip(faces, est):
        true = 30.0 - f
        if true > 2 * D + 1e-9:
            continue
        n += 1
        assert es.found, (f, es)
        assert abs(es.ahead_m - true) <= 0.5 * D, (true, es.ahead_m)
        assert (es.contrast > 1) == (contrast > 1)
        hi = es.ahead_hi_m if math.isfinite(es.ahead_hi_m) else np.inf
        hits += bool(es.ahead_lo_m <= true <= hi)
        # how much: the 95 % interval of the contrast holds the truth; where it is closed (not
        # reaching a table end) the fitted contrast is within a factor 2 of it. Measured with
        # this project's model (this test): 7 of 7 intervals hold the truth for each drive;
        # closed at 3-4.5 m (x10) and 3-4.5 m (x0.1), |log10(fitted / true)| at most 0.19.
        contrast_hits += bool(es.contrast_lo <= contrast <= es.contrast_hi)
        if not es.contrast_open:
            assert abs(math.log10(es.contrast / contrast)) <= 0.3, (true, es.contrast)
    assert n >= 6
    assert hits / n >= 0.9, (hits, n)
    assert contrast_hits / n >= 0.9, (contrast_hits, n)


@pytest.mark.slow
def test_warm_start_matches_cold_in_fewer_iterations(layout):
    # a property of our own scheme, not of the physics: the starting model changes the path,
    # not the regularised solution, in the well-covered zone; the 5 % bound is common
    # practice, no source
    data = drive_data("contact10_seed11", layout)[8:11]
    settings = InversionSettings(contact_fit=False)
    warm = DriveInverter(layout, settings).run(data)
    cold = DriveInverter(layout, settings).run(data, cold=True)
    for w, c in zip(warm[1:], cold[1:]):
        cov = w.coverage
        ok = np.isfinite(cov) & (cov >= np.nanmax(cov) - 2.0)
        ok &= np.isfinite(w.resistivity_ohmm) & np.isfinite(c.resistivity_ohmm)
        rel = np.abs(w.resistivity_ohmm[ok] / c.resistivity_ohmm[ok] - 1.0)
        assert np.nanmax(rel) <= 0.05, np.nanmax(rel)
    assert sum(w.iterations for w in warm[1:]) <= sum(c.iterations for c in cold[1:])


def test_time_lapse_needs_consecutive_advances(layout):
    from tbminv.inversion.settings import InversionError

    data = drive_data("homogeneous_seed7", layout)[:2]
    inv = DriveInverter(layout, InversionSettings(time_lapse=True))
    with pytest.raises(InversionError, match="time_lapse.*--cold"):
        inv.run(data, cold=True)


def test_scheduler_without_cold_is_refused_before_any_work(tmp_path):
    import subprocess
    import sys

    store = tmp_path / "section.nc"
    out = subprocess.run([sys.executable, "-m", "tbminv", "invert",
                          str(DATA / "drive_homogeneous_seed7.csv"), "--layout",
                          str(DATA / "fixture_layout.toml"), "--store", str(store),
                          "--scheduler", "tcp://127.0.0.1:9"], capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 2, out.stderr[-2000:]
    assert "--cold" in out.stderr and not store.exists()


@pytest.mark.slow
def test_cold_advances_on_dask_workers_equal_serial_run(layout, tmp_path):
    # the same cold inversions in this process and on two worker processes of a dask cluster
    # reached through the command line's --scheduler
    import subprocess
    import sys

    from dask.distributed import LocalCluster

    from tbminv.results.store import open_section

    settings = tmp_path / "settings.toml"
    settings.write_text('[qc]\nerror_model_group = "log"\n'
                        '[invert]\nforward_settings = "fast"\nmax_iter = 4\ncontact_fit = false\n')
    small = tmp_path / "drive.csv"
    lines = (DATA / "drive_homogeneous_seed7.csv").read_text().splitlines()
    small.write_text("\n".join([lines[0]] + [ln for ln in lines[1:]
                                             if ln.split(",")[0] in ("1", "2", "3")]) + "\n")
    stores = {}
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None,
                      env={"TBMINV_THREADS": "1", "OMP_NUM_THREADS": "1"}) as cluster:
        for mode, extra in (("serial", []), ("dask", ["--scheduler", cluster.scheduler_address])):
            stores[mode] = tmp_path / f"{mode}.nc"
            out = subprocess.run([sys.executable, "-m", "tbminv", "invert", str(small),
                                  "--layout", str(DATA / "fixture_layout.toml"), "--store",
                                  str(stores[mode]), "--settings", str(settings), "--cold",
                                  *extra], capture_output=True, text=True, timeout=1800)
            assert out.returncode == 0, out.stderr[-3000:]
    a, b = open_section(stores["serial"]), open_section(stores["dask"])
    assert a.sizes["advance"] == b.sizes["advance"] == 3
    np.testing.assert_allclose(a["resistivity"].values, b["resistivity"].values, rtol=1e-6)
    np.testing.assert_allclose(a["chi2"].values, b["chi2"].values, rtol=1e-6)


@pytest.mark.slow
def test_time_lapse_fits_the_data_and_agrees_with_warm_start(layout):
    # time-lapse regularisation (difference to the shifted previous model) must fit as well as
    # the independent warm-started inversion and stay within 5 % of it in the covered zone
    data = drive_data("contact10_seed11", layout)[8:11]
    warm = DriveInverter(layout, InversionSettings(contact_fit=False,
                                                   forward_settings="fast")).run(data)
    tl = DriveInverter(layout, InversionSettings(contact_fit=False, forward_settings="fast",
                                                 time_lapse=True)).run(data)
    for w, t in zip(warm, tl):
        assert t.chi2 <= max(1.5, 1.2 * w.chi2), (t.chi2, w.chi2)
        cov = w.coverage
        ok = np.isfinite(cov) & (cov >= np.nanmax(cov) - 2.0)
        ok &= np.isfinite(w.resistivity_ohmm) & np.isfinite(t.resistivity_ohmm)
        assert np.nanmax(np.abs(t.resistivity_ohmm[ok] / w.resistivity_ohmm[ok] - 1.0)) <= 0.05
