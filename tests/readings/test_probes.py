"""Probe log reader: contacts and runs, quarantine of bad rows, whole-file errors, exit code 2.

The format is the contract in DEVELOPERS.md ("File formats"); invented logs, plumbing checks.
"""

from __future__ import annotations

import subprocess
import sys

import pandas as pd
import pytest

from tbminv.readings.logformat import QUARANTINE_COLUMNS
from tbminv.readings.probes import (
    DEFAULT_DEPTH_RESOLUTION_M,
    P_BEARING,
    P_MISSING,
    P_NON_NUMERIC,
    P_ORDER,
    P_OVERLAP,
    P_POSITIVE,
    P_TIME,
    ProbeLogError,
    read_probe_log,
)
from tests.helpers import DATA

HEADER = ("probe_id,time,chainage_from_m,chainage_to_m,material,resistivity_ohmm,offset_m,"
          "bearing_deg,note\n")


def write(tmp_path, body, header=HEADER, name="probes.csv"):
    p = tmp_path / name
    p.write_text(header + body, encoding="utf-8")
    return p


def test_contacts_and_runs_of_a_valid_log(tmp_path):
    log = read_probe_log(write(tmp_path, (
        "P1,2026-01-05T12:00:00Z,12,20,clay,50,0,,\n"
        "P1,2026-01-05T12:00:00Z,20,30,Clay,,0,,\n"      # same material (case): one run
        "P1,2026-01-05T12:00:00Z,30,36,sand,480,0,,wet\n"
        "P1,2026-01-05T12:00:00Z,38,42,sand,,0,,\n"       # a gap 36-38 of unlogged ground
        "B7,,25,27,silt,,4.5,90,borehole\n")))
    assert log.rows_read == 5 and len(log.rows) == 5 and log.quarantine.empty
    assert log.probe_ids == ["P1", "B7"]
    (c,) = log.contacts()
    assert (c.probe_id, c.lo_m, c.hi_m, c.material_before, c.material_after) == (
        "P1", 30.0, 30.0, "Clay", "sand")
    assert c.depth_resolution_m == DEFAULT_DEPTH_RESOLUTION_M
    runs = [(r.probe_id, r.lo_m, r.hi_m, r.material) for r in log.runs()]
    assert runs == [("P1", 12.0, 30.0, "clay"), ("P1", 30.0, 36.0, "sand"),
                    ("P1", 38.0, 42.0, "sand"), ("B7", 25.0, 27.0, "silt")]
    assert log.rows[0].time == pd.Timestamp("2026-01-05T12:00:00Z")


def test_rows_known_at_a_time(tmp_path):
    log = read_probe_log(write(tmp_path, (
        "P1,2026-01-05T12:00:00,12,30,clay,,,,\n"          # no zone: UTC
        "P1,2026-01-05T14:00:00+01:00,30,42,sand,,,,\n"    # 13:00 UTC
        "P2,,0,5,clay,,,,\n")))
    assert len(log.known_at("2026-01-05T11:59:00Z").rows) == 1          # P2 (no time) only
    assert len(log.known_at("2026-01-05T12:30:00Z").rows) == 2
    assert len(log.known_at("2026-01-05T13:00:00Z").rows) == 3
    assert len(log.known_at(None).rows) == 3


@pytest.mark.parametrize(("row", "field", "reason"), [
    ("P1,,12,,clay,,,,", "chainage_to_m", P_MISSING),
    ("P1,,12,x,clay,,,,", "chainage_to_m", P_NON_NUMERIC),
    ("P1,,12,10,clay,,,,", "chainage_to_m", P_ORDER),
    ("P1,,12,14,,,,,", "material", P_MISSING),
    ("P1,,12,14,clay,-5,,,", "resistivity_ohmm", P_POSITIVE),
    ("P1,,12,14,clay,,,360,", "bearing_deg", P_BEARING),
    ("P1,yesterday,12,14,clay,,,,", "time", P_TIME),
])
def test_a_bad_row_is_quarantined_with_file_line_and_field(tmp_path, row, field, reason,
                                                           caplog):
    path = write(tmp_path, "P1,,0,12,clay,,,,\n" + row + "\n")
    log = read_probe_log(path)
    assert len(log.rows) == 1 and log.rows_read == 2
    q = log.quarantine
    assert list(q.columns) == list(QUARANTINE_COLUMNS)
    assert q.to_dict("records")[0] | {"value": None} == {
        "file": str(path), "line": 3, "field": field, "value": None, "reason": reason}
    assert any(str(path) in m and "line 3" in m and field in m for m in caplog.messages)
    written = pd.read_csv(log.write_quarantine(tmp_path / "q" / "quarantine.csv"))
    assert written["line"].tolist() == [3] and written["field"].tolist() == [field]


def test_overlapping_and_short_rows_are_quarantined_not_lost(tmp_path):
    path = write(tmp_path, "P1,,0,12,clay,,,,\nP1,,10,20,sand,,,,\nP1,,20,25\n")
    log = read_probe_log(path)
    assert [(r.chainage_from_m, r.material) for r in log.rows] == [(0.0, "clay")]
    reasons = dict(zip(log.quarantine["line"], log.quarantine["reason"]))
    assert reasons[3].startswith(P_OVERLAP) and "line 2" in reasons[3]
    assert reasons[4].startswith("wrong number of fields")


@pytest.mark.parametrize(("content", "needle"), [
    (b"", "no header"),
    (b"chainage_from_m,material\n1,clay\n", "missing column(s) ['chainage_to_m']"),
    (b"chainage_from_m,chainage_to_m,material,material\n", "named twice"),
    (b"chainage_from_m,chainage_to_m,material\n1,2,\xff\xfe\n", "not UTF-8"),
    (b"chainage_from_m,chainage_to_m,material\n5,2,clay\n", "no usable row"),
])
def test_a_log_that_cannot_be_read_raises_one_error_naming_the_file(tmp_path, content, needle):
    path = tmp_path / "bad.csv"
    path.write_bytes(content)
    with pytest.raises(ProbeLogError, match="bad.csv") as err:
        read_probe_log(path)
    assert needle in str(err.value)


def test_invert_with_a_bad_probe_log_exits_2_before_any_work(tmp_path):
    bad = write(tmp_path, "", header="chainage_from_m,material\n")
    store = tmp_path / "section.nc"
    out = subprocess.run([sys.executable, "-m", "tbminv", "invert",
                          str(DATA / "drive_homogeneous_seed7.csv"), "--layout",
                          str(DATA / "fixture_layout.toml"), "--store", str(store), "--probes",
                          str(bad)], capture_output=True, text=True, timeout=300)
    assert out.returncode == 2, out.stderr[-2000:]
    errors = [ln for ln in out.stderr.splitlines() if "error:" in ln]
    assert len(errors) == 1 and str(bad) in errors[0] and "chainage_to_m" in errors[0]
    assert "Traceback" not in out.stderr and not store.exists()
