"""Probe logs as constraints of the contact fit: closed forms, then simulated drives.

Closed forms: a Gaussian prior on the contact chainage combined with a quadratic chi-squared
(the product of two Gaussians: Tarantola 2005, *Inverse Problem Theory*, SIAM, sec. 3.2; the
95 % quantile of chi-squared with one degree of freedom from scipy). Drives: the 3D-simulated
fixture log ``tests/data/drive_contact10_seed11.csv`` (no inverse crime) and an axisymmetric
drive made by ``tbminv simulate`` on ``tests/data/fixture_layout.toml``.
"""

from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest
from scipy.stats import chi2 as chi2_dist

from tbminv.forward.registry import make_model
from tbminv.inversion.contactfit import ContactFitSettings, ContactFitter, Likelihood
from tbminv.inversion.probefit import run_penalty
from tbminv.layout import Layout, load_layout
from tbminv.readings.probes import ProbeRun, read_probe_log
from tbminv.studies.probestudy import probe_study
from tests.helpers import DATA

Q95 = float(chi2_dist.ppf(0.95, 1))     # 3.841
Q99 = float(chi2_dist.ppf(0.99, 1))     # 6.635


@pytest.fixture(scope="module")
def fitter():
    # the closed-form tests need only the fit's grids: an analytic table (no machine)
    from tbminv.inversion.contactfit import build_response_table

    els = [{"label": f"T{i}", "kind": "cutterhead", "axial_m": 0.05, "radius_m": r,
            "angle_deg": 0.0} for i, r in enumerate((0.0, 1.5, 2.8))]
    els += [{"label": "R", "kind": "remote"}]
    layout = Layout.from_dict({"machine": {"diameter_m": 6.0, "shield_length_m": 9,
                                           "model_body": False},
                               "tunnel": {"model_cavity": False}, "electrode": els,
                               "protocol": {"generate": ["pole-pole"]}})
    table = build_response_table(layout, make_model("analytic", layout), rho_ref_ohmm=100.0,
                                 cache=False)
    return ContactFitter(table)


def well(fit, centre_m, curvature):
    """One advance at face 0 whose chi2 is ``curvature * (d - centre)^2`` for every contrast."""
    d = fit.fine_d
    chi2 = np.broadcast_to(curvature * (d - centre_m) ** 2, (fit.fine_c.size, d.size)).copy()
    return Likelihood(fit.fine_c, d, chi2, np.zeros_like(chi2), 1e4, 0.0, 200, 1.0)


def probe_at(x_m, s_m=0.5):
    return run_penalty([ProbeRun("P", 0.0, x_m, "clay", s_m), ProbeRun("P", x_m, 70.0, "sand",
                                                                         s_m)])


def test_penalty_is_zero_where_a_contact_may_lie_and_grows_inside_a_run():
    pen = probe_at(30.0, 0.5)
    x = np.array([-5.0, 0.0, 29.0, 30.0, 30.25, 69.0, 70.0, 80.0])
    np.testing.assert_allclose(pen(x), [0.0, 0.0, 4.0, 0.0, 0.25, 4.0, 0.0, 0.0])
    assert run_penalty([]) is None


@pytest.mark.parametrize("curvature", [0.05, 0.5])
def test_probe_at_the_contact_gives_the_combined_gaussian_interval(fitter, curvature):
    # chi2 = a (x - d1)^2 + (x - d1)^2 / s^2: 95 % half-width sqrt(q / (a + 1 / s^2))
    s, d1 = 0.5, 15.0
    free = fitter.estimate([well(fitter, d1, curvature)], [0.0])
    con = fitter.estimate([well(fitter, d1, curvature)], [0.0], probe_at(d1, s))
    def step(x):   # the fit's distance grid spacing near x (the interval ends lie on it)
        return float(np.interp(x, fitter.fine_d[1:], np.diff(fitter.fine_d)))

    for est, prec in ((free, curvature), (con, curvature + 1.0 / s**2)):
        half = math.sqrt(Q95 / prec)
        assert est.found and est.ahead_m == pytest.approx(d1, abs=step(d1))
        assert est.ahead_lo_m == pytest.approx(d1 - half, abs=step(d1 - half))
        assert est.ahead_hi_m == pytest.approx(d1 + half, abs=step(d1 + half))
    assert con.probe_constrained and not con.probe_contradicts
    assert con.probe_misfit_added == pytest.approx(0.0, abs=0.01)  # linear interpolation
    # the evidence against "no contact" is the readings' own
    assert con.lr_statistic == free.lr_statistic and con.p_false_alarm == free.p_false_alarm


@pytest.mark.parametrize(("curvature", "offset_m"), [(0.05, 10.0), (0.5, 10.0), (0.5, 3.0),
                                                     (0.5, 4.0)])
def test_misfit_added_by_an_offset_probe_and_its_flag(fitter, curvature, offset_m):
    # min over x of a (x - d1)^2 + (x - xp)^2 / s^2 = (xp - d1)^2 / (1 / a + s^2), flagged
    # above the 99 % quantile of chi-squared(1); a flagged probe is not applied
    s, d1 = 0.5, 15.0
    lik = well(fitter, d1, curvature)
    est = fitter.estimate([lik], [0.0], probe_at(d1 + offset_m, s))
    added = offset_m**2 / (1.0 / curvature + s**2)
    assert est.probe_misfit_added == pytest.approx(added, rel=0.05, abs=0.05)
    assert est.probe_contradicts == (added > Q99)
    free = fitter.estimate([lik], [0.0])
    if est.probe_contradicts:
        assert not est.probe_constrained and "contradicts" in est.note
        # the readings' own answer (on the grid refined at the probe: within a grid step)
        assert [est.ahead_m, est.ahead_lo_m, est.ahead_hi_m] == pytest.approx(
            [free.ahead_m, free.ahead_lo_m, free.ahead_hi_m], abs=0.6)
    else:
        centre = (curvature * d1 + (d1 + offset_m) / s**2) / (curvature + 1.0 / s**2)
        assert est.ahead_m == pytest.approx(centre, abs=0.5)


def test_contradiction_level_is_read_from_the_settings_file(tmp_path):
    from tbminv.inversion.settings import load_settings

    p = tmp_path / "s.toml"
    p.write_text("[contact]\nprobe_contradiction_level = 0.999\n")
    settings, _ = load_settings(p)
    assert settings.contact == ContactFitSettings(probe_contradiction_level=0.999)


# ----------------------------------------------------------------------- simulated drives
def _probe_file(tmp_path, contact_m, name):
    """A probe drilled from the face at 12 m (advance 9, 12:00 UTC) to 42 m."""
    p = tmp_path / f"{name}.csv"
    p.write_text("probe_id,time,chainage_from_m,chainage_to_m,material\n"
                 f"P1,2026-01-05T12:00:00Z,12,{contact_m},clay\n"
                 f"P1,2026-01-05T12:00:00Z,{contact_m},42,sand\n", encoding="utf-8")
    return read_probe_log(p)


def _drive_study(log_path, tmp_path):
    """Running contact fits of a drive: free, probe at the contact (30 m), probe at 40 m."""
    layout = load_layout(DATA / "fixture_layout.toml")
    return probe_study(log_path, layout, {"at": _probe_file(tmp_path, 30.0, "at"),
                                          "off": _probe_file(tmp_path, 40.0, "off")},
                       truth_chainage_m=30.0)


def _check_drive(study, diameter_m=6.0):
    """Probe at the contact: widths at most half (median), truth held; probe 10 m off: flagged."""
    case = {name: g.set_index("advance") for name, g in study.groupby("case")}
    free, at, off = case["free"], case["at"], case["off"]
    after = free["face_chainage_m"] >= 12.0                 # advances drilled after the probe
    both = after & free["width_m"].notna() & at["width_m"].notna()
    assert both.sum() >= 8
    ratio = float(at["width_m"][both].median() / free["width_m"][both].median())
    assert ratio <= 0.5, (ratio, free["width_m"][both].tolist(), at["width_m"][both].tolist())
    assert at["holds_truth"][both].all() and at["probe_constrained"][both].all()
    assert not at["probe_contradicts"].any()
    near = after & (free["true_ahead_m"] <= 2 * diameter_m)
    assert near.sum() >= 3 and off["probe_contradicts"][near].all()
    assert off["probe_misfit_added"][~after].isna().all()        # no probe drilled yet
    return ratio


@pytest.mark.slow
def test_probe_narrows_and_flags_on_the_3d_fixture_drive(tmp_path):
    _check_drive(_drive_study(DATA / "drive_contact10_seed11.csv", tmp_path))


@pytest.mark.slow
def test_probe_narrows_and_flags_on_an_axisym_simulated_drive(tmp_path):
    ground = tmp_path / "ground.toml"
    ground.write_text("background_resistivity_ohmm = 50.0\n[[contact]]\nchainage_m = 30.0\n"
                      "resistivity_ohmm = 5.0\n", encoding="utf-8")
    log = tmp_path / "drive.csv"
    out = subprocess.run([sys.executable, "-m", "tbminv", "simulate", "--layout",
                          str(DATA / "fixture_layout.toml"), "--ground", str(ground), "--faces",
                          "0:27:1.5", "--noise-rel", "0.02", "--seed", "5", "--out", str(log)],
                         capture_output=True, text=True, timeout=900)
    assert out.returncode == 0, out.stderr[-2000:]
    _check_drive(_drive_study(log, tmp_path))


@pytest.mark.slow
def test_image_takes_probed_resistivities_where_the_readings_are_silent(tmp_path):
    # 3D-simulated drive, 50 ohm-m and 500 ohm-m beyond chainage 30 m; the advance at face 18 m
    # sees the ground 12-24 m ahead only weakly. A probe (18-42 m) with the true resistivities
    # at 10 % relative error: the image takes them there (within twice that error) and fits
    # the readings as well as without them; without the probe it stays near 50 ohm-m there.
    from tbminv.inversion.drive import DriveInverter
    from tbminv.inversion.settings import InversionSettings
    from tbminv.readings.advance import prepare_advances
    from tbminv.readings.qc import QCSettings

    layout = load_layout(DATA / "fixture_layout.toml")
    inv = DriveInverter(layout, InversionSettings(forward_settings="fast", max_iter=4,
                                                  cell_m=1.5, contact_fit=False))
    data = inv.prepare(prepare_advances(DATA / "drive_contact10_seed11.csv", layout,
                                        QCSettings(error_model_group="log")).advances)
    adv = next(d for d in data if d.face_chainage_m == 18.0)
    p = tmp_path / "probe.csv"
    p.write_text("chainage_from_m,chainage_to_m,material,resistivity_ohmm,resistivity_rel_error\n"
                 "18,30,clay,50,0.1\n30,42,sand,500,0.1\n", encoding="utf-8")
    free = inv.invert_advance(adv)
    inv.probes = read_probe_log(p)
    ref = inv.invert_advance(adv)
    c = inv.grid.centers
    # chainage 31.5-42 m: one parameter cell (1.5 m) clear of the contact, where the smoothness
    # constraint blends the two references (measured with this project's model: 339 ohm-m in
    # the cell at the contact)
    far = (c[:, 0] >= 13.5) & (c[:, 0] < 24.0) & (c[:, 1] < 1.0)
    assert far.sum() >= 4

    def misfit(img):
        return float(np.sqrt(np.mean(((np.log(img.data_ohmm) - np.log(img.response_ohmm))
                                      / img.rel_error) ** 2)))

    assert np.all(np.abs(np.log(ref.model_ohmm[far] / 500.0)) <= 2 * 0.1 + 0.05), \
        ref.model_ohmm[far]
    assert np.all(free.model_ohmm[far] < 100.0)
    assert misfit(ref) <= 1.1 * misfit(free)


@pytest.mark.slow   # one inversion of three advances and a report by the command line
def test_invert_and_report_with_probes_end_to_end(symmetric_dipole_drive, tmp_path):
    import pandas as pd

    from tbminv.jobs import qc_folder
    from tbminv.materials import load_material_table
    from tbminv.results.store import open_section

    d = symmetric_dipole_drive            # contact 10x more resistive at chainage 30 m
    probes = tmp_path / "probes.csv"
    probes.write_text("probe_id,time,chainage_from_m,chainage_to_m,material,resistivity_ohmm\n"
                      "P1,2026-01-05T06:00:00Z,10,30,silt,100\n"
                      "P1,2026-01-05T06:00:00Z,30,40,gravel,1000\n"
                      "P1,2026-01-05T06:00:00Z,40,38,gravel,\n", encoding="utf-8")
    store = tmp_path / "section.nc"

    def run(*args):
        return subprocess.run([sys.executable, "-m", "tbminv", *args], capture_output=True,
                              text=True, timeout=1800)

    out = run("invert", str(d.readings), "--layout", str(d.layout), "--store", str(store),
              "--settings", str(d.settings), "--probes", str(probes))
    assert out.returncode == 0, out.stderr[-3000:]
    assert "2 of 3 rows kept" in out.stdout and "contradicts the readings at 0" in out.stdout
    quarantine = pd.read_csv(qc_folder(store, probes) / "quarantine.csv")
    assert quarantine["line"].tolist() == [4] and quarantine["field"].tolist() == [
        "chainage_to_m"]
    ds = open_section(store)
    assert np.isfinite(ds["probe_misfit_added"].values).all()
    assert not ds["probe_contradicts"].values.any()
    rep = run("report", str(store), "--out", str(tmp_path / "report"), "--probes", str(probes))
    assert rep.returncode == 0, rep.stderr[-3000:]
    site = load_material_table(tmp_path / "report" / "site_materials.toml")
    assert {c.name for c in site.classes} == {"silt", "gravel"}
