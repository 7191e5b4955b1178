"""Change ahead on hand-built sections (invented data: plumbing and logic tests).

The synthetic sections come from tests/test_section.make_results: a smooth step at a fixed
chainage whose sharpness fades with distance ahead, coverage fading ahead and outward.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from tbminv.results.ahead import (
    LEVELS,
    AheadSettings,
    AheadSettingsError,
    Pick,
    _groups,
    _slope,
    detect_changes,
)
from tbminv.results.store import open_section
from tests.helpers import DATA, make_section


def test_stationary_contact_from_contact_fits_is_firm():
    s = detect_changes(make_section(range(8), rho_beyond=12.0))
    assert s.level == "firm"
    c = s.changes[0]
    assert c.chainage_m == pytest.approx(1230.0, abs=3.0)  # within 0.5 D (D = 6 m)
    assert c.direction == "less resistive" and c.contrast_factor > 3
    assert c.distance_ahead_m == pytest.approx(1230.0 - 1210.5, abs=3.0)
    # the level comes from the stored calibrated probability of the latest fit (0.001 here)
    assert c.p_false_alarm == pytest.approx(0.001) and not c.at_bound
    assert c.chainage_lo_m <= 1230.0 <= c.chainage_hi_m


@pytest.mark.parametrize("beyond, direction", [(12.0, "less resistive"),
                                               (800.0, "more resistive")])
def test_stationary_contact_from_section_profile(beyond, direction):
    s = detect_changes(make_section(range(10), rho_beyond=beyond, with_contact_fit=False,
                                    noise_log10=0.01))
    assert s.changes, s.describe()
    c = s.changes[0]
    # a section-profile step has no calibrated false-alarm rate: never above 'watch'
    assert c.level == "watch" and not np.isfinite(c.p_false_alarm)
    assert any("no calibrated statistic" in r or "latest contact fit" in r for r in c.reasons)
    assert c.direction == direction
    assert c.chainage_m == pytest.approx(1230.0, abs=3.0)
    assert abs(c.slope) < 0.35


def test_machine_locked_artefact_rejected():
    ds = make_section(range(8), artefact_ahead_m=8.0, artefact_shape="step",
                      with_contact_fit=False, noise_log10=0.01)
    s = detect_changes(ds)
    assert not s.changes, s.describe()
    assert s.rejected and s.rejected[0].slope == pytest.approx(1.0, abs=0.2)
    assert s.level == "none seen"
    assert any("rejected" in line for line in s.describe())


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_homogeneous_with_noise_reports_nothing(seed):
    ds = make_section(range(10), noise_log10=0.03, with_contact_fit=False, seed=seed)
    s = detect_changes(ds)
    assert s.level == LEVELS[0] and not s.changes and not s.picks
    assert s.reach_m > 10.0


def test_flagged_advances_are_left_out():
    ds = make_section(range(8), rho_beyond=12.0, flagged=(6, 7))
    s = detect_changes(ds)
    assert s.advances_flagged == [6, 7]
    assert 6 not in s.changes[0].advances


def test_settings_from_toml(tmp_path):
    p = tmp_path / "settings.toml"
    p.write_text("[ahead]\nmin_contrast = 3.0\nfirm_advances = 6\n")
    st = AheadSettings.from_toml(p)
    assert st.min_contrast == 3.0 and st.firm_advances == 6
    p.write_text("[ahead]\nmin_contrats = 3.0\n")
    with pytest.raises(AheadSettingsError, match=r"\[ahead\] min_contrats: unknown key"):
        AheadSettings.from_toml(p)
    p.write_text("[ahead]\nfirm_advances = 2.5\n")
    with pytest.raises(AheadSettingsError, match="firm_advances"):
        AheadSettings.from_toml(p)


def _drive(tmp_path, name):
    """Invert a synthetic drive (made with the 3D model by tests/data/make_drive_fixtures.py,
    no inverse crime) through the command line (``tbminv invert``) and open the section store."""
    data = DATA
    settings = tmp_path / "settings.toml"
    # 21 reciprocal pairs per advance: one error model for the whole log
    settings.write_text('[qc]\nerror_model_group = "log"\n'
                        '[invert]\nforward_settings = "fast"\nmax_iter = 6\n')
    store = tmp_path / "section.nc"
    out = subprocess.run([sys.executable, "-m", "tbminv", "invert",
                          str(data / f"drive_{name}.csv"), "--layout",
                          str(data / "fixture_layout.toml"), "--store", str(store),
                          "--settings", str(settings)],
                         capture_output=True, text=True, timeout=3600)
    assert out.returncode == 0, out.stderr[-3000:]
    return open_section(store)


@pytest.mark.slow
@pytest.mark.parametrize("name", ["contact10_seed11", "contact01_seed13"])
def test_end_to_end_contact_reported_two_diameters_ahead(tmp_path, name):
    # 10:1 and 1:10 contacts at chainage 30 m, 30 m ahead of the first face, faces every 1.5 m,
    # D = 6 m; 3D-simulated, 2 % noise, seeds 11 and 13
    ds = _drive(tmp_path, name)
    diam = float(ds.attrs["machine_diameter_m"])
    early = ds["advance"].values[ds["face_chainage_m"].values <= 30.0 - 2 * diam]
    s = detect_changes(ds.sel(advance=early))
    assert s.changes and s.changes[0].level in ("likely", "firm"), s.describe()
    assert s.changes[0].chainage_m == pytest.approx(30.0, abs=0.5 * diam)


@pytest.mark.slow
def test_end_to_end_homogeneous_drive_reports_nothing(tmp_path):
    # homogeneous 50 ohm-m, 3D-simulated, 3 % noise, seed 17
    ds = _drive(tmp_path, "homogeneous3pc_seed17")
    s = detect_changes(ds)
    assert not s.changes, s.describe()


def test_change_reached_by_the_face_is_not_ahead():
    # contact at 1204 m: the faces 1200-1210.5 m pass it; picks come from early advances only
    ds = make_section(range(8), rho_beyond=12.0, contact_chainage_m=1204.0)
    s = detect_changes(ds)
    assert not s.changes
    assert s.passed and s.passed[0].chainage_m == pytest.approx(1204.0, abs=1.0)
    assert any("reached by the face" in line for line in s.describe())


def test_contact_fit_without_around_value_uses_profile():
    ds = make_section(range(6), rho_beyond=12.0)
    ds["resistivity_around"][:] = float("nan")
    c = detect_changes(ds).changes[0]
    assert c.direction == "less resistive"
    assert c.resistivity_around_ohmm == pytest.approx(80.0, rel=0.05)


def test_pick_slope_is_weighted_least_squares():
    # reference: numpy.polyfit with weights 1/sigma (its documented convention for Gaussian
    # uncertainties) gives the same weighted slope
    faces = np.array([9.0, 10.5, 12.0, 13.5, 15.0, 16.5, 18.0])
    chain = np.array([31.1, 32.2, 26.2, 31.6, 25.7, 26.6, 28.5])
    half = np.array([14.2, 12.2, 9.9, 8.1, 7.2, 5.6, 4.2])      # 95 % half-widths, m
    picks = [Pick(i, f, c, c - h, c + h, -1.0, 50.0, 5.0, "contact fit")
             for i, (f, c, h) in enumerate(zip(faces, chain, half))]
    slope, se = _slope(picks)
    sigma = half / 1.959964
    assert slope == pytest.approx(np.polyfit(faces, chain, 1, w=1.0 / sigma)[0], rel=1e-9)
    assert abs(slope) < 0.35 < abs(np.polyfit(faces, chain, 1)[0])   # unweighted: -0.46
    assert se > 0


def test_far_wide_picks_do_not_hide_a_stationary_contact():
    # early far picks scatter within their wide intervals; the later sharp ones stay put
    faces = np.arange(7) * 1.5 + 9.0
    chain = np.array([31.0, 32.0, 26.5, 31.5, 26.0, 29.6, 30.1])
    half = np.array([14.0, 12.0, 10.0, 8.0, 7.0, 2.0, 1.5])
    picks = [Pick(i, f, c, c - h, c + h, -1.0, 50.0, 5.0, "contact fit")
             for i, (f, c, h) in enumerate(zip(faces, chain, half))]
    (g,) = _groups(picks, 3.0 * 2)
    assert abs(_slope(g)[0]) < 0.35


def test_contact_fit_at_a_bound_is_capped_at_the_lowest_level():
    # our own rule (tbminv.results.ahead): a fit whose contrast or distance touches a bound of
    # its parameters never goes above 'watch', however small its false-alarm probability
    ds = make_section(range(8), rho_beyond=12.0,
                      contact_extra={"at_bound": True, "contrast_lo": 0.001,
                                     "contrast_hi": 0.3})
    assert ds["contact_at_bound"].values.all()
    s = detect_changes(ds)
    assert s.level == "watch" and s.changes[0].at_bound, s.describe()
    text = " ".join(s.describe())
    assert "bound of the fit" in text and "or more" in text


def test_ambiguous_fit_lists_every_part_and_is_not_firm():
    # two parts of the distance set (a near-weak and a far-strong contact both fit): the
    # report lists both and the level stays below 'firm'
    parts = ((18.0, 19.5), (25.0, 28.0))
    ds = make_section(range(8), rho_beyond=12.0,
                      contact_extra={"ambiguous": True, "parts_m": parts})
    assert ds["contact_ambiguous"].values.all()
    np.testing.assert_allclose(ds["contact_part_hi_m"].values[-1], [19.5, 28.0])
    s = detect_changes(ds)
    c = s.changes[0]
    assert c.level == "likely" and c.ambiguous and len(c.parts) == 2
    face = float(ds["face_chainage_m"].values[-1])
    assert f"chainage {face + 18.0:.1f}-{face + 19.5:.1f} m" in c.describe()
    assert f"{face + 25.0:.1f}-{face + 28.0:.1f} m" in c.describe()


def test_uncalibrated_contact_fits_stay_at_watch():
    # a store written before the calibrated statistic (no contact_lr_statistic): its
    # 'p_none' is not a calibrated rate, so no level above 'watch'
    ds = make_section(range(8), rho_beyond=12.0).drop_vars("contact_lr_statistic")
    s = detect_changes(ds)
    assert s.level == "watch" and not np.isfinite(s.changes[0].p_false_alarm)


def test_one_sided_contrast_is_never_firm():
    # our own rule (tbminv.results.ahead): a contrast interval that reaches the fit's table
    # end is reported one-sided ("by a factor of ... or more") and stays below 'firm'
    ds = make_section(range(8), rho_beyond=12.0,
                      contact_extra={"contrast_open": True, "contrast_lo": 0.001,
                                     "contrast_hi": 0.25})
    c = detect_changes(ds).changes[0]
    assert c.level == "likely" and c.contrast_open
    assert "by a factor of 4 or more" in c.describe()
