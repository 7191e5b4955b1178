"""Contact fit: the estimator on closed-form data (image method, no machine).

Table and data both come from the image method here (Telford, Geldart & Sheriff 1990, Applied
Geophysics 2nd ed., sec. 8.3), so this checks the estimator and its intervals, not the forward
physics; the drive tests with the machine in use the numerical models.
"""

from __future__ import annotations

import numpy as np
import pytest

from tbminv.forward.registry import make_model
from tbminv.ground import Contact, Scenario
from tbminv.inversion.contactfit import ContactFitter, ResponseTable, build_response_table
from tbminv.layout import Layout

D = 6.0


@pytest.fixture(scope="module")
def setup():
    els = [{"label": f"C{i}", "kind": "cutterhead", "axial_m": 0.05, "radius_m": r,
            "angle_deg": a} for i, (r, a) in enumerate([(0, 0), (1.5, 90), (2.8, 200)])]
    els += [{"label": f"S{i}", "kind": "shield", "axial_m": x, "radius_m": 3.05,
             "angle_deg": 0} for i, x in enumerate([-2, -5, -8])]
    els += [{"label": "R", "kind": "remote"}]
    layout = Layout.from_dict({"machine": {"diameter_m": D, "shield_length_m": 9,
                                           "model_body": False},
                               "tunnel": {"model_cavity": False}, "electrode": els,
                               "protocol": {"generate": ["pole-pole"]}})
    model = make_model("analytic", layout)
    table = build_response_table(layout, model, rho_ref_ohmm=100.0, cache=False)
    return layout, model, table


def drive(model, contrast, seed, faces, x_contact=30.0, noise=0.02):
    rng = np.random.default_rng(seed)
    out = []
    for f in faces:
        sc = Scenario(100.0, contacts=(Contact(x_contact, 100.0 * contrast),))
        r = model.response(sc, f)
        out.append(r * (1 + noise * rng.standard_normal(r.size)))
    return np.array(out)


@pytest.mark.parametrize("contrast", [10.0, 0.1])
def test_contact_drive_coverage_and_accuracy(setup, contrast):
    _, model, table = setup
    fit = ContactFitter(table)
    faces = np.arange(0.0, 30.0 - 0.5 * D, 1.5)
    hits = n = 0
    errs = []
    for seed in range(6):  # seeds 0..5, 2 % Gaussian noise
        r = drive(model, contrast, seed, faces)
        for f, e in zip(faces, fit.fit_drive(r, np.full_like(r, 0.02), faces)):
            true = 30.0 - f
            if true <= 2 * D + 1e-9:
                n += 1
                hi = e.ahead_hi_m if np.isfinite(e.ahead_hi_m) else np.inf
                hits += bool(e.found and e.ahead_lo_m <= true <= hi)
                errs.append(abs(e.ahead_m - true))
                assert (e.contrast > 1) == (contrast > 1)  # which way
    assert hits / n >= 0.9
    assert np.median(errs) <= 0.5 * D


def test_homogeneous_reports_no_contact(setup):
    _, model, table = setup
    fit = ContactFitter(table)
    faces = np.arange(0.0, 20.0, 1.5)
    rng = np.random.default_rng(7)
    r = np.array([model.response(Scenario.homogeneous(100.0), f) for f in faces])
    r = r * (1 + 0.03 * rng.standard_normal(r.shape))
    est = fit.fit_drive(r, np.full_like(r, 0.03), faces)
    assert sum(e.found for e in est) == 0


def test_table_round_trip(setup, tmp_path):
    _, _, table = setup
    again = ResponseTable.load(table.save(tmp_path / "t.npz"))
    np.testing.assert_array_equal(again.r_ohm, table.r_ohm)
    assert again.rho_ref_ohmm == table.rho_ref_ohmm


def test_null_coupled_and_failed_readings_are_left_out_and_the_fit_runs(setup):
    # a reading with zero homogeneous response (a dipole symmetric about its potential
    # electrodes) and one whose table has a failed (NaN) forward run: the relative response
    # r / r0 of both is undefined; they are left out, the rest fits as without them
    _, model, table = setup
    r_tab, r0 = table.r_ohm.copy(), table.r0_ohm.copy()
    r_tab[..., 0], r0[0] = 0.0, 0.0
    r_tab[2, 3, 1] = np.nan
    bad = ResponseTable(table.contrasts, table.distances_m, r_tab, r0, table.rho_ref_ohmm,
                        table.model)
    fit = ContactFitter(bad)
    assert sorted(fit.left_out) == [0, 1]
    assert "null-coupled" in fit.left_out[0] and "not finite" in fit.left_out[1]
    faces = np.arange(0.0, 30.0 - 0.5 * D, 1.5)
    r = drive(model, 10.0, 0, faces)
    err = np.full_like(r, 0.02)
    got = fit.fit_drive(r, err, faces)
    use = np.ones_like(r, bool)
    use[:, :2] = False
    ref = ContactFitter(table).fit_drive(r, err, faces, use=use)
    assert [g.found for g in got] == [e.found for e in ref] and any(g.found for g in got)
    for g, e in zip(got, ref):
        np.testing.assert_allclose([g.ahead_m, g.chi2, g.p_homogeneous],
                                   [e.ahead_m, e.chi2, e.p_homogeneous], rtol=1e-9)


def test_table_without_any_usable_reading_is_refused(setup):
    _, _, table = setup
    zero = ResponseTable(table.contrasts, table.distances_m, np.zeros_like(table.r_ohm),
                         np.zeros_like(table.r0_ohm), table.rho_ref_ohmm, table.model)
    with pytest.raises(ValueError, match="none of its .* readings"):
        ContactFitter(zero)
