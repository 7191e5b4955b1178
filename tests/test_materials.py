"""Candidate materials and Archie's law.

Handbook checks: Reynolds 2011, An Introduction to Applied and Environmental Geophysics,
2nd ed., table 7.1 (after Telford et al. 1990). The built-in ranges were written from memory of
that table and must be checked against the book; the checks below are the ones the table is
known for (clay spans ~10 ohm-m, granite does not; sand and silt overlap over 10-200 ohm-m).
Archie's law: Archie 1942, Trans. AIME 146:54-62 (the worked numbers follow from the formula).
"""

from __future__ import annotations

import pytest

from tbminv.materials import (
    HANDBOOK_TABLE,
    MaterialTableError,
    archie_porosity,
    archie_resistivity,
    archie_saturation,
    archie_water_resistivity,
    candidates,
    describe_candidates,
    formation_factor,
    load_material_table,
)


def names(rho, **kw):
    return [c.name for c in candidates(rho, **kw)]


def test_handbook_source_named_and_flagged_from_memory():
    assert "Reynolds 2011" in HANDBOOK_TABLE.source and "table 7.1" in HANDBOOK_TABLE.source
    assert "memory" in HANDBOOK_TABLE.source


def test_10_ohmm_includes_clay_excludes_granite():
    # Reynolds 2011 table 7.1 (from memory): clay 1-100, granite from ~300 ohm-m up
    found = names(10.0)
    assert "clay" in found
    assert "granite" not in found


def test_60_ohmm_is_ambiguous_sand_and_silt():
    # Reynolds 2011 table 7.1 (from memory): sand 10-1000 (low end saturated), silt 10-200 ohm-m
    found = names(60.0)
    assert "sand" in found and "silt" in found
    assert "granite" not in found
    assert "ranges overlap" in describe_candidates(60.0)


def test_interval_query_overlaps_and_positions():
    found = candidates(200.0, hi_ohmm=400.0)
    assert "granite" in [c.name for c in found] and "clay" not in [c.name for c in found]
    assert all(0.0 <= c.position <= 1.0 for c in found)
    with pytest.raises(ValueError):
        candidates(-1.0)


def test_site_table_toml_replaces_handbook(tmp_path):
    p = tmp_path / "site.toml"
    p.write_text('source = "face probes, invented"\n'
                 '[[material]]\nname = "grey clay"\nlow_ohmm = 8.0\nhigh_ohmm = 20.0\n'
                 '[[material]]\nname = "sandy till"\nlow_ohmm = 60.0\nhigh_ohmm = 300.0\n')
    t = load_material_table(p)
    assert t.source == "face probes, invented"
    assert names(10.0, table=t) == ["grey clay"]
    assert names(100.0, table=t) == ["sandy till"]
    assert names(40.0, table=t) == []


def test_site_table_csv_and_errors(tmp_path):
    p = tmp_path / "site.csv"
    p.write_text("# source: borehole logs, invented\nname,low_ohmm,high_ohmm\nclay,5,30\n"
                 "gravel,200,900\n")
    t = load_material_table(p)
    assert t.source == "borehole logs, invented" and t.names() == ["clay", "gravel"]
    bad = tmp_path / "bad.csv"
    bad.write_text("name,low_ohmm,high_ohmm\nclay,5,30\nsand,abc,900\n")
    with pytest.raises(MaterialTableError, match=r"bad.csv: line 3: field 'low_ohmm'"):
        load_material_table(bad)
    bad2 = tmp_path / "bad.toml"
    bad2.write_text('[[material]]\nname = "x"\nlow_ohmm = 50.0\nhigh_ohmm = 5.0\n')
    with pytest.raises(MaterialTableError, match=r"\[\[material\]\] 1: low_ohmm"):
        load_material_table(bad2)


def test_archie_worked_example():
    # Archie 1942: F = a / phi^m; rho = F rho_w Sw^-n
    assert formation_factor(0.3, a=1.0, m=2.0) == pytest.approx(11.11, abs=0.005)
    assert archie_resistivity(0.3, 10.0, 1.0, a=1, m=2, n=2) == pytest.approx(111.1, abs=0.05)
    rho = archie_resistivity(0.3, 10.0, 0.5, a=1, m=2, n=2)
    assert rho == pytest.approx(444.4, abs=0.05)
    # the reverse gives the inputs back
    assert archie_porosity(rho, 10.0, 0.5) == pytest.approx(0.3)
    assert archie_saturation(rho, 10.0, 0.3) == pytest.approx(0.5)
    assert archie_water_resistivity(rho, 0.3, 0.5) == pytest.approx(10.0)
    with pytest.raises(ValueError, match="porosity"):
        formation_factor(1.5)
