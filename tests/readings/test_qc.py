"""QC: reciprocal error, error-model fit, flags, settings, run_check outputs."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tbminv.gimli import ert, pg
from tbminv.jobs import run_check
from tbminv.layout import demo_layout_path, load_layout
from tbminv.readings.qc import (
    Flag,
    QCError,
    QCSettings,
    default_bin_count,
    find_reciprocal_pairs,
    fit_error_model,
    flag_names,
    reciprocal_error,
    run_qc,
)
from tbminv.readings.reader import read_readings

LAYOUT = load_layout(demo_layout_path())
# quadrupoles with four distinct electrodes on the machine (cutterhead dipoles)
DIPOLES = []
for _q in LAYOUT.measurements:
    if _q.b and _q.n and _q.b.startswith("T") and _q.n.startswith("T"):
        _key = frozenset([frozenset([_q.a, _q.b]), frozenset([_q.m, _q.n])])
        if _key not in {frozenset([frozenset([d.a, d.b]), frozenset([d.m, d.n])])
                        for d in DIPOLES}:
            DIPOLES.append(_q)  # one of each quadrupole / reciprocal couple

A_TRUE, B_TRUE = 0.002, 0.03  # ohm, fraction: the invented noise of the synthetic logs


def synthetic_log(path: Path, n_adv: int = 6, seed: int = 0, a_ohm: float = A_TRUE,
                  b: float = B_TRUE, reps: int = 8) -> Path:
    """Invented log: every dipole quadrupole and its reciprocal, ``reps`` times per advance
    at different cutterhead angles; |R| log-uniform about 1e-2..10 ohm; normal and reciprocal
    each get Gaussian noise of sd (a + b|R|)/sqrt(2), so |Rn| - |Rr| has sd a + b|R|."""
    rng = np.random.default_rng(seed)
    rows = []
    line_r = {q: 10 ** rng.uniform(-2, 1) for q in DIPOLES}
    for adv in range(1, n_adv + 1):
        ch = 1200.0 + adv
        for rep in range(reps):
            ang = (rep * 45.0 + adv) % 360
            for q in DIPOLES:
                r_true = line_r[q] * (1 + 0.01 * adv) * 10 ** rng.uniform(-0.3, 0.3)
                sd = (a_ohm + b * r_true) / np.sqrt(2)
                for (qa, qb, qm, qn), sign in (((q.a, q.b, q.m, q.n), 1.0),
                                               ((q.m, q.n, q.a, q.b), 1.0)):
                    cur = 0.5
                    r = sign * r_true + rng.normal(0, sd)
                    rows.append(dict(advance=adv, face_chainage_m=round(ch, 3), a=qa, b=qb,
                                     m=qm, n=qn, current_a=cur, voltage_v=r * cur,
                                     cutterhead_deg=ang, stack_n=4, voltage_std_v=0.0))
                ch += 1e-4
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def test_reciprocal_error_worked_example():
    # LaBrecque et al. 1996 (Geophysics 61(2):538-548): |Rn - Rr| / mean, signed readings
    assert reciprocal_error(95.0, 105.0) == pytest.approx(0.1)
    assert reciprocal_error(-105.0, -95.0) == pytest.approx(0.1)
    assert reciprocal_error(95.0, -105.0) == pytest.approx(2.0)   # opposite sign: reversal
    assert reciprocal_error(3.0, 3.0) == 0.0


def test_fit_recovers_known_envelope():
    """3000 pairs, |R| log-uniform 1e-3..10 ohm, sd(|Rn|-|Rr|) = a + b|R| with a = 2 mohm,
    b = 3 %: a and b recovered within 10 % (envelope model of Slater et al. 2000, binned
    after Koestel et al. 2008). Over 200 seeds the largest misfit seen was 8 % (a), 6 % (b)."""
    rng = np.random.default_rng(42)
    n = 3000
    r = 10 ** rng.uniform(-3, 1, n)
    dr = rng.normal(0.0, A_TRUE + B_TRUE * r)
    m = fit_error_model(r, dr)
    assert m.n_pairs == n and m.n_bins == default_bin_count(n) == 30
    assert m.a_ohm == pytest.approx(A_TRUE, rel=0.10)
    assert m.b == pytest.approx(B_TRUE, rel=0.10)
    np.testing.assert_allclose(m.error_ohm([0.0, 1.0]), [m.a_ohm, m.a_ohm + m.b])


def test_bin_rule_matches_pygimli():
    # pyGIMLi 1.6 fitReciprocalErrorModel: nBins = max(min(n // 30, 30), 4)
    for n in (10, 150, 899, 5000):
        assert default_bin_count(n) == max(min(n // 30, 30), 4)


def test_pairs_match_pygimli_reciprocal_indices(tmp_path):
    """Pairs found here equal pyGIMLi's reciprocalIndices(onlyOnce=True) on a container."""
    r = read_readings(synthetic_log(tmp_path / "log.csv", n_adv=1, reps=1), LAYOUT)
    t = r.table
    i_n, i_r = find_reciprocal_pairs(t)
    assert len(i_n) == len(DIPOLES)
    data = pg.DataContainerERT()
    for i, _ in enumerate(LAYOUT.labels):
        data.createSensor([float(i), 0.0, 0.0])
    data.resize(len(t))
    for c in "abmn":
        data.set(c, pg.Vector(t[c].cat.codes.to_numpy().astype(float)))
    f, b = ert.reciprocalIndices(data, onlyOnce=True)
    assert sorted(zip(np.minimum(f, b), np.maximum(f, b))) == \
        sorted(zip(np.minimum(i_n, i_r), np.maximum(i_n, i_r)))


def test_pairs_only_within_one_advance(tmp_path):
    r = read_readings(synthetic_log(tmp_path / "log.csv", n_adv=3, reps=1), LAYOUT)
    t = r.table
    i_n, i_r = find_reciprocal_pairs(t)
    adv = t["advance"].to_numpy()
    assert (adv[i_n] == adv[i_r]).all()
    assert len(i_n) == 3 * len(DIPOLES)


def test_error_model_per_advance_from_log(tmp_path):
    """Whole chain on a synthetic log: 1 advance of len(DIPOLES) x 40 pairs: the
    per-advance fit recovers a and b within 10 % (invented data)."""
    path = synthetic_log(tmp_path / "log.csv", n_adv=1, reps=40, seed=5)
    qc = run_qc(read_readings(path, LAYOUT), QCSettings(voltage_floor_v=0.0))
    (m,) = qc.error_models.values()
    assert m.source == "reciprocal fit" and m.n_pairs == len(DIPOLES) * 40 >= 600
    assert m.a_ohm == pytest.approx(A_TRUE, rel=0.10)
    assert m.b == pytest.approx(B_TRUE, rel=0.10)
    t = qc.table
    np.testing.assert_allclose(t["err_ohm"], m.a_ohm + m.b * np.abs(t["r_ohm"]))
    assert set(t["qc_flags"].unique()) <= {0, int(Flag.RECIPROCAL)}
    # pairs above reciprocal_max are flagged (excluded from inversion) but still in the fit
    assert (t["qc_flags"] != 0).sum() == (t["reciprocal_error"] > 0.1).sum() > 0
    assert qc.pairs["used_in_fit"].all()


def _one_advance_table(n: int = 40) -> pd.DataFrame:
    """Advances 1..5 of the same dipole readings, no reciprocals."""
    rows = []
    for adv in range(1, 6):
        for k, q in enumerate(DIPOLES[:n]):
            rows.append(dict(line=len(rows) + 2, advance=adv, face_chainage_m=1200.0 + adv,
                             a=q.a, b=q.b, m=q.m, n=q.n, current_a=0.5,
                             voltage_v=0.5 * (1.0 + 0.1 * k), cutterhead_deg=0.0, stack_n=4.0,
                             voltage_std_v=1e-4, contact_ohm_a=1000.0, contact_ohm_m=1000.0,
                             time=pd.Timestamp("2026-12-01T06:00Z") + pd.Timedelta(minutes=adv)))
    t = pd.DataFrame(rows)
    for c in "abmn":
        t[c] = pd.Categorical(t[c], categories=list(LAYOUT.labels))
    return t


def test_flags_each_kind_kept_not_dropped():
    t = _one_advance_table()
    sel = (t["advance"] == 3).to_numpy()
    idx = np.nonzero(sel)[0]
    t.loc[idx[0], "contact_ohm_a"] = 50_000.0          # contact: tens of kohm (common practice)
    t.loc[idx[1], "voltage_v"] = 5e-5                   # below the 1e-4 V floor
    t.loc[idx[2], "voltage_std_v"] = 0.2                # stack error 0.1 V on 0.6 V
    t.loc[idx[3], "voltage_v"] = -t.loc[idx[3], "voltage_v"]   # sign flip
    t.loc[idx[4], "voltage_v"] = 3.0 * t.loc[idx[4], "voltage_v"]  # outlier
    s = QCSettings(fallback_a_ohm=0.001, fallback_b=0.02)
    qc = run_qc(t, s)
    f = qc.table["qc_flags"].to_numpy()
    assert f[idx[0]] & Flag.CONTACT
    assert f[idx[1]] & Flag.LOW_VOLTAGE
    assert f[idx[2]] & Flag.STACKING
    assert flag_names(f[idx[3]]) == ["sign"]
    assert flag_names(f[idx[4]]) == ["outlier"]
    assert len(qc.table) == len(t)                      # kept with their flags
    assert (~qc.table["valid"]).sum() == 5
    assert (f[~np.isin(np.arange(len(t)), idx[:5])] == 0).all()
    counts = qc.flag_counts()
    assert counts["contact"] == counts["sign"] == 1
    assert counts["outlier"] == counts["stacking"] == 2  # the near-zero voltage is both too
    assert f[idx[1]] & Flag.OUTLIER
    per = qc.flags_per_electrode()
    assert per.to_numpy().sum() >= 5 * 3   # every flagged reading counted for each electrode


def test_no_silent_default_error_model():
    t = _one_advance_table()
    qc = run_qc(t, QCSettings())                       # no pairs, no fallback
    assert {m.source for m in qc.error_models.values()} == {"none"}
    assert (qc.table["qc_flags"].to_numpy() & int(Flag.NO_ERROR_MODEL)).all()
    assert not qc.table["valid"].any() and qc.table["err_ohm"].isna().all()
    assert "fallback_a_ohm" in next(iter(qc.error_models.values())).note
    qc = run_qc(t, QCSettings(fallback_a_ohm=0.001, fallback_b=0.02))
    assert {m.source for m in qc.error_models.values()} == {"fallback"}
    np.testing.assert_allclose(qc.table["err_ohm"], 0.001 + 0.02 * qc.table["r_ohm"].abs())
    with pytest.raises(QCError, match="fallback"):
        QCSettings(error_model="fixed")
    with pytest.raises(QCError, match="both"):
        QCSettings(fallback_a_ohm=0.01)


def test_error_model_groups_shift_and_log():
    t = _one_advance_table()
    s = QCSettings(error_model_group="shift", fallback_a_ohm=0.0, fallback_b=0.05)
    qc = run_qc(t, s)
    assert list(qc.error_models) == ["2026-12-01T06:00Z"]
    assert list(run_qc(t, QCSettings(error_model_group="log", fallback_a_ohm=0.0,
                                     fallback_b=0.05)).error_models) == ["log"]
    t2 = t.copy()
    t2["time"] = pd.NaT
    with pytest.raises(QCError, match="time"):
        run_qc(t2, s)


def test_settings_from_toml(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text("[qc]\nreciprocal_max = 0.05\nfallback_a_ohm = 0.001\nfallback_b = 0.03\n"
                 "error_model_group = 'log'\n")
    s = QCSettings.from_toml(p)
    assert s.reciprocal_max == 0.05 and s.has_fallback and s.error_model_group == "log"
    assert QCSettings.from_dict(s.to_dict()) == s
    p.write_text("[qc]\nreciprocal_maximum = 0.05\n")
    with pytest.raises(QCError, match="reciprocal_maximum"):
        QCSettings.from_toml(p)
    p.write_text("[qc]\nerror_model_group = 'week'\n")
    with pytest.raises(QCError, match=str(p)):
        QCSettings.from_toml(p)
    (tmp_path / "none.toml").write_text("[other]\nx = 1\n")
    assert QCSettings.from_toml(tmp_path / "none.toml") == QCSettings()


def test_run_check_outputs(tmp_path):
    path = synthetic_log(tmp_path / "log.csv", n_adv=3, reps=2, seed=1)
    text = path.read_text().splitlines()
    text[5] = text[5].replace(",0.5,", ",-0.5,", 1)   # negative current -> quarantine
    path.write_text("\n".join(text) + "\n")
    out = tmp_path / "out"
    # invented readings (no physics): no sign check against a forward model
    res = run_check(path, LAYOUT, out, QCSettings(min_pairs=10), sign_check=False)
    assert res.usable and res.n_valid > 0
    assert res.n_read == res.n_kept + res.n_quarantined and res.n_quarantined == 1
    for name in ("quarantine.csv", "qc_flags.csv", "qc_summary.txt", "qc_summary.json",
                 "qc.png", "qc.pdf"):
        assert (out / name).stat().st_size > 0, name
    q = pd.read_csv(out / "quarantine.csv")
    assert q["line"].tolist() == [6] and q["reason"].tolist() == ["zero or negative current"]
    summary = json.loads((out / "qc_summary.json").read_text())
    assert summary["usable"] is True
    assert summary["readings_log"]["rows_quarantined"] == 1
    assert summary["qc"]["reciprocal_pairs"] > 0
    assert "usable data remain" in (out / "qc_summary.txt").read_text()
    assert (out / "qc.pdf").read_bytes().startswith(b"%PDF")
    assert (out / "qc.png").read_bytes().startswith(b"\x89PNG")


def test_run_check_nothing_usable(tmp_path):
    path = synthetic_log(tmp_path / "log.csv", n_adv=1, reps=1)
    res = run_check(path, LAYOUT, tmp_path / "out", QCSettings(voltage_floor_v=1e6),
                    sign_check=False)
    assert not res.usable and res.n_valid == 0
    assert "NO usable data remain" in (tmp_path / "out" / "qc_summary.txt").read_text()


def test_describe_says_what_to_set(tmp_path):
    path = tmp_path / "log.csv"
    path.write_text("advance,face_chainage_m,a,b,m,n,current_a,voltage_v\n"
                    "1,1200.0,T1,,T2,,0.5,0.1\n")
    res = run_check(path, LAYOUT, tmp_path / "out", sign_check=False)  # no pairs, no fallback
    text = "\n".join(res.describe())
    assert not res.usable and "fallback_a_ohm" in text and "quarantine" in text
    res = run_check(path, LAYOUT, tmp_path / "out2",
                    QCSettings(fallback_a_ohm=1e-4, fallback_b=0.02), sign_check=False)
    assert res.usable and "NOT USABLE" not in "\n".join(res.describe())
