"""QC definitions: signed reciprocal errors, RMS in the bins, the stacking error, negative
apparent resistivities and the per-reading flags file."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from tbminv.forward.analytic import full_space_potential
from tbminv.ground import Scenario
from tbminv.jobs import run_check
from tbminv.readings.advance import prepare_advances
from tbminv.readings.flagfile import FLAGS_COLUMNS, FLAGS_FILE
from tbminv.readings.qc import (
    Flag,
    QCSettings,
    fit_error_model,
    reciprocal_error,
    reciprocal_orientation,
    run_qc,
)
from tbminv.studies.simulate import simulate_drive
from tests.helpers import DATA, fixture_layout

RHO_OHMM = 100.0
# four electrodes in a full space, m (invented positions)
POS = {"A": np.array([0.0, 0.0, 0.0]), "B": np.array([3.0, 0.0, 0.0]),
       "M": np.array([1.0, 1.0, 0.0]), "N": np.array([2.0, 2.5, 0.5])}


def _r_full_space(a: str, b: str, m: str, n: str) -> float:
    """Transfer resistance of current a -> b, voltage V(m) - V(n), full space, ohm.

    R = rho / (4 pi) (1/AM - 1/AN - 1/BM + 1/BN) (Telford, Geldart & Sheriff 1990, Applied
    Geophysics, 2nd ed., ch. 8; equation number from memory not given).
    """
    def v(src: str, rec: str) -> float:
        return float(full_space_potential(RHO_OHMM, POS[src], POS[rec][None, :])[0])
    return v(a, m) - v(a, n) - v(b, m) + v(b, n)


def _table(rows: list[tuple[str, str, str, str, float]]) -> pd.DataFrame:
    t = pd.DataFrame([dict(line=k + 2, advance=1, face_chainage_m=0.0, a=a, b=b, m=m, n=n,
                           current_a=1.0, voltage_v=r, cutterhead_deg=0.0, stack_n=np.nan,
                           voltage_std_v=np.nan, contact_ohm_a=np.nan, contact_ohm_m=np.nan)
                      for k, (a, b, m, n, r) in enumerate(rows)])
    for c in "abmn":
        t[c] = pd.Categorical(t[c], categories=list(POS))
    return t


def test_reciprocal_error_worked_examples():
    # LaBrecque et al. 1996, Geophysics 61(2):538-548: |Rn - Rr| over the mean of the pair
    assert reciprocal_error(95.0, 105.0) == pytest.approx(0.1)
    assert reciprocal_error(-95.0, -105.0) == pytest.approx(0.1)
    assert reciprocal_error(3.0, 3.0) == 0.0
    # a polarity reversal: equal magnitude, opposite sign -> |2R| / R = 2 (closed arithmetic)
    assert reciprocal_error(95.0, -95.0) == pytest.approx(2.0)


def test_reciprocity_holds_for_the_closed_form():
    # reciprocity: swapping current and potential pairs (A->B, M-N) <-> (M->N, A-B) leaves R
    # unchanged, sign included (Telford, Geldart & Sheriff 1990, Applied Geophysics 2nd ed.,
    # ch. 8; Parasnis 1988, Geophys. Prosp. 36:796-821 "Reciprocity theorems in geoelectric
    # and geoelectromagnetic work"; both cited from memory)
    assert _r_full_space("M", "N", "A", "B") == pytest.approx(_r_full_space("A", "B", "M", "N"),
                                                              rel=1e-12)
    assert _r_full_space("A", "B", "M", "N") != 0.0


def test_polarity_reversal_is_caught_and_orientation_respected():
    r = _r_full_space("A", "B", "M", "N")
    t = _table([
        ("A", "B", "M", "N", r),          # normal
        ("M", "N", "A", "B", -r),         # its reciprocal with the cables swapped: reversal
        ("A", "B", "M", "N", r),          # normal again ...
        ("N", "M", "A", "B", -r),         # ... reciprocal logged with N, M: -R is correct
        ("A", "B", "M", "N", r),
        ("N", "M", "B", "A", r),          # both dipoles reversed: +R is correct
    ])
    i_n = np.array([0, 2, 4])
    i_r = np.array([1, 3, 5])
    np.testing.assert_array_equal(reciprocal_orientation(t, i_n, i_r), [1.0, -1.0, 1.0])
    qc = run_qc(t, QCSettings(fallback_a_ohm=0.0, fallback_b=0.02, neighbour_advances=0))
    rec = qc.table["reciprocal_error"].to_numpy()
    # the reversed reading: 200 %; the consistent ones: 0 (reciprocity, see above)
    assert rec[0] == rec[1] == pytest.approx(2.0)
    np.testing.assert_allclose(rec[2:], 0.0, atol=1e-12)
    flags = qc.table["qc_flags"].to_numpy()
    assert flags[0] & Flag.RECIPROCAL and flags[1] & Flag.RECIPROCAL
    assert not (flags[2:] & Flag.RECIPROCAL).any()
    np.testing.assert_allclose(qc.table["reciprocal_diff_ohm"].to_numpy()[:2], 2 * r)


def test_bin_rms_keeps_a_systematic_offset():
    # every reciprocal reads c lower than its normal, with +-d alternating on top: the RMS of
    # the differences is sqrt(c^2 + d^2) in every bin, their standard deviation about d
    # (closed arithmetic)
    c, d = 0.004, 0.001
    n = 600
    r = np.linspace(0.1, 10.0, n)
    dr = c + d * np.where(np.arange(n) % 2 == 0, 1.0, -1.0)
    m = fit_error_model(r, dr)
    np.testing.assert_allclose(m.bin_std_ohm, math.hypot(c, d), rtol=1e-12)
    np.testing.assert_allclose(m.error_ohm(r), math.hypot(c, d), rtol=1e-6)
    assert m.b == pytest.approx(0.0, abs=1e-9)


def test_stacking_error_is_voltage_std_v_itself():
    # voltage_std_v is the standard error of the logged (stacked) voltage: stack_n does not
    # divide it again (closed arithmetic on the definition)
    t = _table([("A", "B", "M", "N", 0.5)])
    t["stack_n"] = 16.0
    t["voltage_std_v"] = 0.01
    qc = run_qc(t, QCSettings(fallback_a_ohm=0.0, fallback_b=0.02, neighbour_advances=0))
    assert qc.table["stack_error_v"].iloc[0] == pytest.approx(0.01)


class _FixedResponse:
    """A stand-in forward model: the same invented transfer resistances at every face."""

    def response(self, scenario, face_chainage_m, cutterhead_deg=0.0, measurements=None):
        return np.linspace(0.05, 2.0, len(measurements))


def test_simulated_voltage_std_v_is_the_spread_of_the_logged_voltage():
    """simulate logs voltage_std_v as the standard deviation of the logged voltage itself.

    The logged voltages minus the noise-free ones, divided by voltage_std_v, must have unit
    standard deviation: over n = 2016 readings the sample standard deviation of a unit normal
    has a standard error of 1 / sqrt(2 n) = 0.016 (Gaussian sampling theory, e.g. Kendall &
    Stuart, The Advanced Theory of Statistics, from memory); 0.06 is more than 3.5 of them.
    Dividing once more by sqrt(stack_n) = 2 would give 0.5.
    """
    layout = fixture_layout()
    faces = np.arange(0.0, 72.0, 1.5)
    model = _FixedResponse()          # the noise does not depend on the physics
    scen = Scenario.homogeneous(RHO_OHMM)
    clean = simulate_drive(layout, scen, faces, model=model, seed=1)
    noisy = simulate_drive(layout, scen, faces, model=model, noise_rel=0.03,
                           noise_abs_v=1e-4, seed=1, stack_n=4)
    z = (noisy["voltage_v"] - clean["voltage_v"]) / noisy["voltage_std_v"]
    assert len(z) >= 2000
    assert float(np.std(z)) == pytest.approx(1.0, abs=0.06)
    qc = run_qc(noisy.assign(line=np.arange(len(noisy)) + 2,
                             time=pd.to_datetime(noisy["time"])),
                QCSettings(fallback_a_ohm=0.0, fallback_b=0.02))
    np.testing.assert_allclose(qc.table["stack_error_v"], noisy["voltage_std_v"])


def _pole_pole_log(path, flip_line: int):
    """The first advance of the fixture drive (pole readings), one voltage sign flipped."""
    log = pd.read_csv(DATA / "drive_homogeneous_seed7.csv")
    log = log[log["advance"] == 1].reset_index(drop=True)
    log.loc[flip_line - 2, "voltage_v"] *= -1.0
    log.to_csv(path, index=False)
    return log


def test_negative_apparent_resistivity_counted_and_in_the_flags_file(tmp_path):
    # pole-pole and machine-pole readings: in a homogeneous ground R = rho / (4 pi r) > 0
    # for a pole pair (Telford, Geldart & Sheriff 1990, ch. 8), so every expected sign is +1
    layout = fixture_layout()
    log = _pole_pole_log(tmp_path / "log.csv", flip_line=7)
    n_q = len(layout.measurements)
    prep = prepare_advances(tmp_path / "log.csv", layout, QCSettings(error_model_group="log"),
                            out_dir=tmp_path / "out",
                            expected_sign=lambda face, angle: np.ones(n_q),
                            model_error_floor=0.04)
    assert prep.n_negative_rhoa == 1
    assert prep.qc.summary()["negative_apparent_resistivity"] == 1
    flags = pd.read_csv(prep.flags_path)
    assert prep.flags_path == tmp_path / "out" / FLAGS_FILE
    assert tuple(flags.columns) == FLAGS_COLUMNS and len(flags) == len(log)
    row = flags[flags["line"] == 7].iloc[0]
    assert row["negative_rhoa"] == 1 and not row["valid"]
    assert "negative_rhoa" in row["flags"].split(";")
    assert flags["negative_rhoa"].sum() == 1
    # floor in quadrature, per row (closed arithmetic)
    ok = flags["err_reading_rel"].notna()
    np.testing.assert_allclose(flags.loc[ok, "err_total_rel"],
                               np.hypot(flags.loc[ok, "err_reading_rel"], 0.04))
    assert (tmp_path / "out" / "quarantine.csv").exists()


def test_check_cli_writes_the_flags_file_and_counts_negatives(tmp_path, capsys):
    from tbminv.cli import main

    _pole_pole_log(tmp_path / "log.csv", flip_line=9)
    settings = tmp_path / "s.toml"
    settings.write_text('[qc]\nerror_model_group = "log"\n[invert]\nmodel_error_floor = 0.02\n')
    code = main(["check", str(tmp_path / "log.csv"), "--layout", str(DATA /
                 "fixture_layout.toml"), "--out", str(tmp_path / "out"), "--settings",
                 str(settings)])
    assert code == 0
    out = capsys.readouterr().out
    assert "1 readings with a negative apparent resistivity" in out
    flags = pd.read_csv(tmp_path / "out" / FLAGS_FILE)
    assert flags.loc[flags["line"] == 9, "negative_rhoa"].tolist() == [1]
    assert (flags["model_error_floor"] == 0.02).all()
    assert (tmp_path / "out" / "quarantine.csv").exists()
    summary = (tmp_path / "out" / "qc_summary.txt").read_text()
    assert "negative apparent resistivity" in summary


def test_run_check_sign_check_uses_the_model(tmp_path):
    # the same check with the axisymmetric model's homogeneous signs (pole readings: +1)
    _pole_pole_log(tmp_path / "log.csv", flip_line=5)
    res = run_check(tmp_path / "log.csv", fixture_layout(), tmp_path / "out",
                    QCSettings(error_model_group="log"))
    assert res.prepared.n_negative_rhoa == 1
    assert res.paths["qc_flags"].exists()


def test_without_a_sign_check_the_count_says_not_checked():
    r = _r_full_space("A", "B", "M", "N")
    qc = run_qc(_table([("A", "B", "M", "N", r), ("M", "N", "A", "B", r)]),
                QCSettings(fallback_a_ohm=0.0, fallback_b=0.02, neighbour_advances=0))
    assert qc.summary()["negative_apparent_resistivity"] is None    # not 0: never judged
