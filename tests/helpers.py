"""Builders shared by several test modules (import as ``from tests.helpers import ...``).

Hand-built, invented inversion results for the section, store, report and widget tests: plumbing
checks, no physics.
"""

from __future__ import annotations

import dataclasses
import math
import textwrap
from pathlib import Path

import numpy as np

from tbminv.inversion.outcome import AdvanceResult, ContactFit
from tbminv.layout import Layout, load_layout
from tbminv.results.section import build_section

ROOT = Path(__file__).resolve().parents[1]
DATA = Path(__file__).resolve().parent / "data"


def fixture_layout() -> Layout:
    """The small layout of the stored test drives (tests/data/fixture_layout.toml)."""
    return load_layout(DATA / "fixture_layout.toml")


LAYOUT_TEXT = textwrap.dedent("""\
    [machine]
    diameter_m = 6.0
    shield_length_m = 9.0
    cutterhead_thickness_m = 1.0
    """)
SETTINGS_TEXT = "[invert]\nlambda = 20.0\n"


def make_results(advances=range(5), *, first_face_m=1200.0, step_m=1.5, rho_around=80.0,
                 rho_beyond=None, contact_chainage_m=1230.0, artefact_ahead_m=None,
                 artefact_factor=5.0, artefact_shape="bump", noise_log10=0.0, seed=0,
                 with_contact_fit=True, flagged=(), radius_m=3.0, doi=False, contact_extra=None):
    """Invented per-advance results: smooth step at a fixed chainage, coverage fading ahead.

    rho_beyond=None: homogeneous ground. artefact_ahead_m: a blob that travels with the
    machine at that distance ahead (what an artefact looks like). contact_extra: fields
    replaced in the contact fits that find the contact (e.g. ``{"at_bound": True}``).
    """
    rng = np.random.default_rng(seed)
    ahead = np.arange(-4.0, 30.01, 0.5)
    radius = np.arange(0.25, 8.0, 0.5)
    out = []
    for adv in advances:
        face = first_face_m + step_m * adv
        aa, rr = np.meshgrid(ahead, radius, indexing="ij")
        lrho = np.full(aa.shape, math.log10(rho_around))
        if rho_beyond is not None:
            d = contact_chainage_m - face
            width = 0.5 + 0.08 * max(d, 0.0)  # resolution fades with distance
            lrho += (math.log10(rho_beyond) - math.log10(rho_around)) * 0.5 * (
                1 + np.tanh((aa - d) / width))
        if artefact_ahead_m is not None and artefact_shape == "bump":
            lrho += math.log10(artefact_factor) * np.exp(
                -((aa - artefact_ahead_m) ** 2 + rr**2) / 4.0)
        elif artefact_ahead_m is not None:  # a step that sits at a fixed distance ahead
            lrho += math.log10(artefact_factor) * 0.5 * (1 + np.tanh(aa - artefact_ahead_m))
        lrho += noise_log10 * rng.standard_normal(aa.shape)
        rho = 10.0**lrho
        rho[(aa < 0) & (rr < radius_m)] = np.nan  # inside the machine
        cov = -0.12 * np.abs(aa) - 0.25 * rr
        contact = None
        if with_contact_fit:
            if rho_beyond is not None and contact_chainage_m - face > 0:
                d = contact_chainage_m - face
                half = 0.3 + 0.05 * d
                ratio = rho_beyond / rho_around
                contact = ContactFit(ahead_m=d, ahead_lo_m=d - half, ahead_hi_m=d + half,
                                     resistivity_around_ohmm=rho_around,
                                     resistivity_beyond_ohmm=rho_beyond, p_no_contact=0.001,
                                     p_homogeneous=0.001, contrast=ratio,
                                     contrast_lo=ratio / 1.5, contrast_hi=ratio * 1.5,
                                     parts_m=((d - half, d + half),), lr_statistic=40.0)
                if contact_extra:
                    contact = dataclasses.replace(contact, **contact_extra)
            else:
                contact = ContactFit(math.nan, math.nan, math.nan,
                                     resistivity_around_ohmm=rho_around, p_no_contact=0.95,
                                     p_homogeneous=0.95, lr_statistic=1.0)
        bad = adv in flagged
        out.append(AdvanceResult(
            advance=int(adv), face_chainage_m=face, ahead_m=ahead, radius_m=radius,
            resistivity_ohmm=rho, coverage=cov,
            doi_index=np.clip(aa / 60.0, 0, 1) if doi else None,
            chi2=4.0 if bad else 1.0 + 0.05 * rng.standard_normal(),
            rrms_percent=2.0, iterations=4, lambda_=20.0,
            stop_reason="max iterations" if bad else "chi2 reached", converged=not bad,
            time_s=3.2, chi2_history=[30.0, 6.0, 2.0, 1.0], n_data=120, n_used=118,
            contact=contact, time=f"2026-03-0{1 + adv % 9}T08:00:00Z"))
    return out


def make_section(advances=range(5), shift="A", **kw):
    return build_section(make_results(advances, **kw), LAYOUT_TEXT, SETTINGS_TEXT,
                         inputs_sha256="0" * 64, shift=shift)




def assert_cf_compliant(store: Path, tmp_path: Path) -> None:
    """The store passes the IOOS compliance checker's CF-1.8 suite (a general-purpose reference
    implementation of the CF conventions); skips when the checker is not installed."""
    import pytest  # late: helpers is imported by test modules only

    runner = pytest.importorskip("compliance_checker.runner")
    runner.CheckSuite.load_all_available_checkers()
    report = tmp_path / "cf.json"
    passed, errors = runner.ComplianceChecker.run_checker(
        str(store), ["cf:1.8"], verbose=0, criteria="normal", output_filename=str(report),
        output_format="json")
    assert not errors
    assert passed, report.read_text()


def full_space_layout(electrodes: list[dict], measurements: list[dict], name: str,
                      body: bool = False, cavity: bool = False) -> Layout:
    """A deep D = 6 m layout of the given electrodes and quadrupoles; steel and bore optional
    (both out: a full space, for closed forms)."""
    return Layout.from_dict({
        "name": name,
        "machine": {"diameter_m": 6.0, "shield_length_m": 9.0, "cutterhead_thickness_m": 1.0,
                    "model_body": body},
        "tunnel": {"cover_m": "inf", "lining_resistivity_ohmm": 300.0, "length_m": 30.0,
                   "model_cavity": cavity},
        "electrode": electrodes, "measurement": measurements}, source=f"<{name}>")
