"""Shift report pages: page 1's fields, typeset tables (no dict or list repr), the synthetic
footer, the off-axis body and the per-advance CSV.

Invented sections (tests.helpers.make_section): plumbing tests of the report's wording and
layout, no physics. The PDF is rendered with poppler (pdftoppm, pdftotext: a general-purpose
reference reader of the PDF the site will print).
"""

from __future__ import annotations

import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest

from tbminv.report import answer, document, write_report
from tbminv.report.tables import ADVANCE_COLUMNS, BODY_VARIABLES
from tbminv.results.store import append_shift
from tbminv.studies.detectionlimit import DetectionLimit
from tests.helpers import DATA, make_section

pytestmark = pytest.mark.skipif(shutil.which("pdftotext") is None
                                or shutil.which("pdftoppm") is None,
                                reason="poppler-utils (pdftotext, pdftoppm) not installed")

# a Python dict or list repr as the old report printed them: {'key': ..., [0.0835, ...]
REPR = re.compile(r"\{\s*'[^']*'\s*:|\{\s*\"[^\"]*\"\s*:|\[\s*-?\d+(\.\d+)?(e-?\d+)?\s*,\s*-?\d"
                  r"|\w+=\w+\(|np\.float64|array\(")


def _limit(layout, noise_rel, **_kw):
    # stand-in for the reach study (tested in tests/studies/test_detectionlimit.py)
    return DetectionLimit(noise_rel, 5.0, 11.5, False, 2.0, 10.0, 3.2, False)


def _section(advances, shift, *, body=False, synthetic=False, **kw):
    ds = make_section(advances, shift, rho_beyond=12.0, noise_log10=0.01, **kw)
    n = ds.sizes["advance"]
    ds["qc_readings"] = ("advance", np.full(n, 384))
    ds["qc_valid"] = ("advance", np.full(n, 380))
    ds["qc_flagged"] = ("advance", np.full(n, 4))
    ds = ds.assign_coords(qc_flag=["reciprocal", "contact"])
    ds["qc_flag_count"] = (("advance", "qc_flag"), np.tile([1, 3], (n, 1)))
    for name, v in (("error_model_a_ohm", 1e-4), ("error_model_b", 0.021),
                    ("reciprocal_error_median", 0.019), ("reciprocal_error_p90", 0.046),
                    ("qc_rel_error_median", 0.021)):
        ds[name] = ("advance", np.full(n, v))
    ds["qc_synthetic"] = ("advance", np.full(n, int(synthetic)))
    ds.attrs["synthetic"] = int(synthetic)
    ds.attrs["layout_text"] = (DATA / "fixture_layout.toml").read_text().replace(
        'name = "', 'name = "Test drive 7 (invented), ', 1)
    if body:
        vals = {"body_ahead_m": 9.0, "body_ahead_lo_m": 7.5, "body_ahead_hi_m": 11.0,
                "body_bearing_deg": 95.0, "body_bearing_lo_deg": 70.0,
                "body_bearing_hi_deg": 120.0, "body_offset_m": 4.0, "body_p_none": 0.003}
        for name in BODY_VARIABLES:
            v = np.full(n, vals[name])
            v[:2] = np.nan          # not found in the first advances
            ds[name] = ("advance", v)
    return ds


def _pages_text(pdf, tmp_path):
    """Text of every page as pdftotext gives it (reading order), one string per page."""
    txt = tmp_path / "report.txt"
    subprocess.run(["pdftotext", "-layout", str(pdf), str(txt)], check=True, timeout=120)
    return [re.sub(r"[ \t]+", " ", p) for p in txt.read_text().split("\f") if p.strip()]


@pytest.fixture(scope="module")
def synthetic_report(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("synthetic")
    path = tmp / "section.nc"
    append_shift(path, _section(range(0, 6), "day-1", synthetic=True), "day-1")
    append_shift(path, _section(range(6, 12), "night-1", synthetic=True, body=True,
                                flagged=(8, 9)), "night-1")
    mp = pytest.MonkeyPatch()
    mp.setattr(document, "detection_limit", _limit)
    try:
        paths = write_report(path, tmp / "out")
    finally:
        mp.undo()
    return path, paths


def test_page_one_holds_the_answer(synthetic_report, tmp_path):
    _, paths = synthetic_report
    pages = _pages_text(paths[0], tmp_path)
    p1 = re.sub(r"\s+", " ", pages[0])
    # drive, shift, face chainage range, data quality
    assert "drive: Test drive 7 (invented), " in p1
    assert "shift night-1: advances 6-11 (6), face chainage 1209.0 to 1216.5 m" in p1
    assert ("data quality: 2280 of 2304 readings valid, 24 flagged (contact 18, reciprocal 6); "
            "reciprocal error median 1.9 % over the advances; 2 advance(s) flagged for their "
            "data fit") in p1
    # the headline: level, what changes, where (chainage, distance ahead, interval), how sure
    assert "level of concern: FIRM" in p1
    assert re.search(r"less resistive ground by a factor of [\d.]+ \(interval [\d.]+ to [\d.]+\)"
                     r", a contact across the tunnel, at chainage 1230\.0 m \(interval "
                     r"[\d.]+ to [\d.]+ m\): 13\.5 m ahead of the last face \(interval "
                     r"[\d.]+ to [\d.]+ m\)", p1), p1
    assert "how sure: 'firm' (calibrated: false-alarm rate at most 0.002" in p1
    # the off-axis body: which side, bearing with its interval
    assert ("off-axis body 9.0 m ahead (interval 7.5 to 11.0 m), chainage 1225.5 m; right "
            "side, bearing 95° clockwise from the crown looking ahead (interval 70 to 120°)") \
        in p1
    # the detection limit at this shift's noise and what would narrow the answer
    assert ("detection limit at this shift's noise (median error 2.1 % per reading), at "
            "best: a 1:5 contact across the tunnel is seen from 11.5 m ahead, a 2 m body of x10 "
            "on the axis from 3.2 m ahead; smaller, farther or off-axis changes can be missed. "
            "These are upper bounds, not assurances") in p1
    assert re.search(r"what would narrow this \(decision support, under the cautions\): "
                     r"probing ahead between chainages [\d.]+ and [\d.]+ m", p1)
    # the key figure's axes are on page 1 (vector text, not a picture)
    assert "distance ahead of the face (m)" in p1 and "face chainage (m)" in p1


def test_no_page_holds_a_dict_or_list_repr(synthetic_report, tmp_path):
    _, paths = synthetic_report
    pages = _pages_text(paths[0], tmp_path)
    assert len(pages) >= 10
    for i, text in enumerate(pages, start=1):
        m = REPR.search(text)
        assert m is None, f"page {i}: {text[max(0, m.start() - 80):m.end() + 80]!r}"
    # the pattern does catch what the old report printed
    assert REPR.search("error_models: {'1': {'a_ohm': 0.1, 'bin_r_ohm': [0.0835, 0.1]")
    assert REPR.search("settings: {\"lam\": 20}")


def test_every_page_says_synthetic_data_and_renders(synthetic_report, tmp_path):
    _, paths = synthetic_report
    pages = _pages_text(paths[0], tmp_path)
    for i, text in enumerate(pages, start=1):
        assert "SYNTHETIC DATA" in text, f"page {i} lacks the synthetic-data footer"
        assert f"page {i} of {len(pages)}" in text
    subprocess.run(["pdftoppm", "-r", "30", "-png", str(paths[0]), str(tmp_path / "pg")],
                   check=True, capture_output=True, timeout=120)
    assert len(list(tmp_path.glob("pg-*.png"))) == len(pages)
    allt = re.sub(r"\s+", " ", " ".join(pages))
    for words in ("Electrical safety", "local electrical codes", "tbminv designs no hardware",
                  "'None seen' is not 'all clear'", "What the certainty words mean",
                  "set them per site"):
        assert words in allt


def test_per_advance_csv_beside_the_pdf(synthetic_report):
    path, paths = synthetic_report
    csv = [p for p in paths if p.suffix == ".csv"]
    assert len(csv) == 1 and csv[0].parent == paths[0].parent
    t = pd.read_csv(csv[0])
    assert tuple(t.columns) == ADVANCE_COLUMNS
    assert t["advance"].tolist() == list(range(6, 12))
    assert t["body_bearing_deg"].isna().tolist() == [True, True, False, False, False, False]
    assert (t["synthetic"] == 1).all()
    assert t["qc_flagged_by_reason"].iloc[0] == "reciprocal 1; contact 3"


def test_measured_store_has_no_synthetic_footer_and_says_bearing_not_analysed(tmp_path,
                                                                              monkeypatch):
    path = tmp_path / "section.nc"
    append_shift(path, _section(range(0, 6), "day-1"), "day-1")
    monkeypatch.setattr(document, "detection_limit", _limit)
    pdf = write_report(path, tmp_path / "out")[0]
    pages = _pages_text(pdf, tmp_path)
    assert not any("SYNTHETIC" in p.upper() for p in pages)
    assert "off-axis body: bearing not analysed" in re.sub(r"\s+", " ", pages[0])


def test_none_seen_says_it_is_not_all_clear(tmp_path, monkeypatch):
    path = tmp_path / "section.nc"
    append_shift(path, make_section(range(6), "A", rho_beyond=None, noise_log10=0.01,
                                    with_contact_fit=False), "A")
    monkeypatch.setattr(document, "detection_limit", _limit)
    pdf = write_report(path, tmp_path / "out")[0]
    p1 = re.sub(r"\s+", " ", _pages_text(pdf, tmp_path)[0])
    assert "level of concern: NONE SEEN" in p1
    assert "None seen is not all clear." in p1


@pytest.mark.parametrize("bearing, words", [(0.0, "above (crown)"), (90.0, "right side"),
                                            (180.0, "below (invert)"), (270.0, "left side"),
                                            (350.0, "above (crown)"), (-45.0, "upper left")])
def test_side_words_follow_the_bearing_convention(bearing, words):
    # our convention (DEVELOPERS.md, section store): clockwise from the crown looking ahead,
    # so 90 degrees is the right-hand side
    assert answer.side_words(bearing) == words


def test_machine_outline_is_read_from_layout_text_with_semicolon_pairs():
    # the demo layout writes quadrupoles as `a = "BODY"; b = "R2"; ...` (not strict TOML);
    # the section's machine attributes (drawn in every section figure) must still be read
    from tbminv.layout import demo_layout_path, load_layout
    from tbminv.results.section import machine_attrs

    text = demo_layout_path().read_text()
    lay = load_layout(demo_layout_path())
    assert machine_attrs(text) == {"machine_diameter_m": lay.machine.diameter_m,
                                   "machine_shield_length_m": lay.machine.shield_length_m}
