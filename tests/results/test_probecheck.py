"""Site material table from probes, probes against the contact fit, the report's probe page.

Invented sections (tests/helpers.make_section: 80 ohm-m, 400 ohm-m beyond a contact at chainage
1230 m): plumbing checks. The handbook table (Reynolds 2011, table 7.1, ranges from memory, see
tbminv.materials) is the outside reference for "the site table narrows the candidates".
"""

from __future__ import annotations

import pytest
from pypdf import PdfReader

from tbminv.materials import (
    HANDBOOK_TABLE,
    candidates,
    load_material_table,
    save_material_table,
)
from tbminv.readings.probes import read_probe_log
from tbminv.report import write_report
from tbminv.results.ahead import detect_changes
from tbminv.results.probecheck import (
    check_probe_contacts,
    fitted_stretch_resistivity,
    probe_materials_beyond,
    site_material_table,
)
from tbminv.results.store import append_shift, open_section
from tests.helpers import make_section

HEADER = "probe_id,time,chainage_from_m,chainage_to_m,material,resistivity_ohmm\n"


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    path = tmp_path_factory.mktemp("probes") / "section.nc"
    append_shift(path, make_section(range(0, 10), rho_around=80.0, rho_beyond=400.0), "day-1")
    return path


def probes(tmp_path, contact_m, rho=("", ""), time="2026-03-01T07:00:00Z", name="p.csv"):
    p = tmp_path / name
    p.write_text(HEADER + f"P1,{time},1200,{contact_m},silty clay,{rho[0]}\n"
                 f"P1,{time},{contact_m},1260,gravelly sand,{rho[1]}\n", encoding="utf-8")
    return read_probe_log(p)


def test_measured_site_table_narrows_the_candidates_to_the_probed_materials(tmp_path):
    # the handbook's ranges overlap: 60 and 500 ohm-m each name several classes
    log = probes(tmp_path, 1230.0, rho=("55", "520"))
    site = site_material_table(log)
    assert {c.name for c in site.classes} == {"silty clay", "gravelly sand"}
    assert len(candidates(55.0, HANDBOOK_TABLE)) >= 5 and len(candidates(520.0)) >= 5
    assert [c.name for c in candidates(55.0, site)] == ["silty clay"]
    assert [c.name for c in candidates(520.0, site)] == ["gravelly sand"]
    assert "replaces the handbook" in site.source and "2 row(s) measured" in site.source
    again = load_material_table(save_material_table(site, tmp_path / "site.toml"))
    assert again == site


def test_fitted_site_table_takes_the_section_over_each_stretch(store, tmp_path):
    ds = open_section(store)
    log = probes(tmp_path, 1230.0)
    clay, sand = log.rows
    near = fitted_stretch_resistivity(ds, clay)
    assert near and all(70.0 <= v <= 95.0 for v in near)       # 80 ohm-m around
    far = fitted_stretch_resistivity(ds, sand)
    assert far and all(v >= 200.0 for v in far)                # 400 beyond, smeared
    site = site_material_table(log, ds)
    assert "2 row(s) from the section" in site.source
    assert [c.name for c in candidates(78.0, site, hi_ohmm=82.0)] == ["silty clay"]


def test_probe_at_the_fitted_contact_agrees_and_names_the_material_beyond(store, tmp_path):
    ds = open_section(store)
    (a,) = check_probe_contacts(probes(tmp_path, 1230.0), ds)
    assert a.verdict == "agrees" and "agrees" in a.text
    lines = probe_materials_beyond([a], detect_changes(ds))
    assert len(lines) == 1 and "gravelly sand" in lines[0] and "1230.0" in lines[0]


def test_probe_away_from_the_fitted_contact_contradicts_and_names_nothing(store, tmp_path):
    ds = open_section(store)
    (a,) = check_probe_contacts(probes(tmp_path, 1240.0), ds)
    assert a.verdict == "contradicts" and "not here" in a.text
    assert probe_materials_beyond([a], detect_changes(ds)) == []


def test_probe_drilled_after_the_last_advance_is_not_yet_checked(store, tmp_path):
    (a,) = check_probe_contacts(probes(tmp_path, 1230.0, time="2027-01-01T00:00:00Z"),
                                open_section(store))
    assert a.verdict == "not yet checked"


def test_report_with_probes_has_their_page_and_the_site_table(store, tmp_path):
    log = probes(tmp_path, 1230.0)
    site = site_material_table(log, open_section(store))
    paths = write_report(store, tmp_path / "out", material_table=site, probes=log)
    text = " ".join(page.extract_text() for page in PdfReader(paths[0]).pages)
    assert "Face probes" in text and "silty clay" in text and "agrees" in text
    assert "replaces the handbook" in text
    assert "a probe sees a line, not the face" in text.lower()
    assert any(p.name.endswith("_section.png") for p in paths)
