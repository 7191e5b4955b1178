"""Readings log reader: quarantine reasons, whole-file errors, corruption (property-based).

The log format and the quarantine columns are the contract in DEVELOPERS.md ("File formats").
"""

from __future__ import annotations

import hashlib
import math
import random
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tbminv.layout import demo_layout_path, load_layout
from tbminv.readings.advance import advance_data, prepare_advances
from tbminv.readings.qc import QCSettings
from tbminv.readings.reader import (
    FRAME_LABEL,
    QUARANTINE_COLUMNS,
    REASONS,
    REQUIRED_COLUMNS,
    ROW_FIELD,
    ReadingsError,
    quarantine_reasons,
    read_readings,
)

LAYOUT = load_layout(demo_layout_path())
COLUMNS = ["advance", "face_chainage_m", "a", "b", "m", "n", "current_a", "voltage_v", "time",
           "cutterhead_deg", "stack_n", "voltage_std_v", "contact_ohm_a", "contact_ohm_m",
           "crew_note"]
NUMERIC = ["advance", "face_chainage_m", "current_a", "voltage_v", "cutterhead_deg", "stack_n",
           "voltage_std_v", "contact_ohm_a", "contact_ohm_m"]


def valid_rows(n: int, seed: int = 0) -> list[dict[str, str]]:
    """An invented, valid log of ``n`` readings (every reading distinct)."""
    rng = random.Random(seed)
    quads = LAYOUT.measurements
    rows = []
    for i in range(n):
        q = quads[i % len(quads)]
        rows.append({
            "advance": str(i // 6 + 1),
            "face_chainage_m": f"{1200.0 + 0.01 * i:.2f}",
            "a": q.a, "b": q.b or "", "m": q.m, "n": q.n or "",
            "current_a": repr(round(rng.uniform(0.1, 2.0), 4)),
            "voltage_v": repr(round(rng.uniform(-0.5, 0.5), 6) or 0.001),
            "time": f"2026-12-01T06:{i // 60:02d}:{i % 60:02d}Z",
            "cutterhead_deg": repr(round(rng.uniform(0, 359.9), 1)),
            "stack_n": "4",
            "voltage_std_v": "1e-05",
            "contact_ohm_a": "1500",
            "contact_ohm_m": "2200",
            "crew_note": rng.choice(["", "ok", "shift B"]),
        })
    return rows


def write_log(path: Path, rows: list[dict[str, str]], columns: list[str] = COLUMNS,
              newline: str = "\n", bom: bool = False, trailing_newline: bool = True) -> Path:
    lines = [",".join(columns)] + [",".join(r[c] for c in columns) for r in rows]
    text = newline.join(lines) + (newline if trailing_newline else "")
    data = text.encode("utf-8")
    if bom:
        data = b"\xef\xbb\xbf" + data
    path.write_bytes(data)
    return path


def one_bad(tmp_path: Path, **changes: str) -> tuple[set[str], pd.DataFrame]:
    """Log of 12 good rows with row 5 (line 6) changed; return its reasons and the kept table."""
    rows = valid_rows(12)
    rows[4].update(changes)
    r = read_readings(write_log(tmp_path / "log.csv", rows), LAYOUT)
    reasons = quarantine_reasons(r)
    assert set(reasons) <= {6}, r.quarantine
    assert r.summary.rows_kept + r.summary.rows_quarantined == r.summary.rows_read == 12
    return reasons.get(6, set()), r.table


def test_valid_log_reads_completely(tmp_path):
    rows = valid_rows(40)
    r = read_readings(write_log(tmp_path / "log.csv", rows), LAYOUT)
    assert r.summary.rows_read == r.summary.rows_kept == 40
    assert r.quarantine.empty and list(r.quarantine.columns) == list(QUARANTINE_COLUMNS)
    assert r.table["line"].tolist() == list(range(2, 42))
    assert r.extra_columns == ("crew_note",)
    np.testing.assert_allclose(r.table["voltage_v"], [float(x["voltage_v"]) for x in rows])
    assert r.table["b"].isna().sum() == sum(1 for x in rows if not x["b"])  # poles kept as NaN
    assert str(r.table["time"].dtype) .startswith("datetime64")
    assert [int(a) for a, _ in r.by_advance()] == sorted({int(x["advance"]) for x in rows})


# each promised quarantine reason (contract: DEVELOPERS.md file formats; the reasons are ours)
@pytest.mark.parametrize("changes, reason", [
    ({"voltage_v": ""}, "missing field"),
    ({"a": ""}, "missing field"),
    ({"current_a": "0.5A"}, "non-numeric"),
    ({"voltage_std_v": "high"}, "non-numeric"),
    ({"voltage_v": "nan"}, "NaN or inf"),
    ({"voltage_v": "inf"}, "NaN or inf"),
    ({"face_chainage_m": "-Infinity"}, "NaN or inf"),
    ({"current_a": "0"}, "zero or negative current"),
    ({"current_a": "-0.2"}, "zero or negative current"),
    ({"m": "C99"}, "unknown electrode label"),
    ({"b": "nowhere"}, "unknown electrode label"),
    ({"a": "T1", "m": "T1"}, "A = M"),
    ({"a": "T1", "b": "T1"}, "A = B"),
    ({"m": "T2", "n": "T2"}, "M = N"),
    ({"b": "R2", "n": "R2"}, "B = N"),  # R2 is a remote at a position: not shared
    ({"cutterhead_deg": "360"}, "cutterhead angle outside [0, 360)"),
    ({"cutterhead_deg": "-0.5"}, "cutterhead angle outside [0, 360)"),
    ({"advance": "1.5"}, "not an integer"),
    ({"stack_n": "2.5"}, "stack count not a positive integer"),
    ({"contact_ohm_a": "-3"}, "negative value"),
    ({"time": "yesterday"}, "not an ISO 8601 time"),
])
def test_each_reason(tmp_path, changes, reason):
    reasons, _ = one_bad(tmp_path, **changes)
    assert reason in reasons


def test_cutterhead_angle_edges_accepted(tmp_path):
    reasons, _ = one_bad(tmp_path, cutterhead_deg="0")
    assert not reasons
    reasons, _ = one_bad(tmp_path, cutterhead_deg="359.999")
    assert not reasons


def test_optional_cells_may_be_empty(tmp_path):
    reasons, table = one_bad(tmp_path, stack_n="", voltage_std_v="nan", contact_ohm_m="",
                             time="", cutterhead_deg="")
    assert not reasons
    assert np.isnan(table["stack_n"].iloc[4]) and pd.isna(table["time"].iloc[4])


def test_face_chainage_backwards_within_advance(tmp_path):
    rows = valid_rows(12)  # advance 1 = rows 0..5
    rows[3]["face_chainage_m"] = "1199.5"
    r = read_readings(write_log(tmp_path / "log.csv", rows), LAYOUT)
    q = r.quarantine
    assert q["line"].tolist() == [5]
    assert q["reason"].tolist() == ["face chainage going backwards within one advance"]
    assert q["field"].tolist() == ["face_chainage_m"] and q["value"].tolist() == ["1199.5"]
    # a new advance may start anywhere: only within one advance is order checked
    rows = valid_rows(12)
    rows[6]["face_chainage_m"] = "1100.0"  # first row of advance 2
    r = read_readings(write_log(tmp_path / "log2.csv", rows), LAYOUT)
    assert r.quarantine.empty


def test_duplicates_exact_and_conflicting(tmp_path):
    rows = valid_rows(10)
    rows.insert(3, dict(rows[2]))                              # exact repeat of line 4 -> line 5
    rows.insert(8, dict(rows[7], voltage_v="0.987654"))        # same reading, other voltage
    r = read_readings(write_log(tmp_path / "log.csv", rows), LAYOUT)
    reasons = quarantine_reasons(r)
    assert reasons[5] == {"duplicated reading"}
    assert r.quarantine.loc[r.quarantine["line"] == 5, "value"].item() == "same as line 4"
    assert reasons[9] == reasons[10] == {"duplicated reading with different values"}
    assert set(reasons) == {5, 9, 10}
    conflict = r.quarantine[r.quarantine["line"].isin([9, 10])]
    assert set(conflict["field"]) == {"voltage_v"}
    assert 4 in r.table["line"].tolist()


def test_wrong_field_count_and_blank_lines(tmp_path):
    path = write_log(tmp_path / "log.csv", valid_rows(5))
    text = path.read_text().splitlines()
    text.insert(2, "")                       # blank line (line 3): skipped, counted
    text[4] = text[4] + ",extra"             # one field too many (line 5)
    text.append("1,1200.9,T1")               # too few (line 8)
    path.write_text("\n".join(text) + "\n")
    r = read_readings(path, LAYOUT)
    assert r.summary.blank_lines == 1
    q = r.quarantine
    assert q["line"].tolist() == [5, 8]
    assert set(q["reason"]) == {"wrong number of fields"} and set(q["field"]) == {ROW_FIELD}
    assert r.table["line"].tolist() == [2, 4, 6, 7]


def test_bad_utf8_line_quarantined(tmp_path):
    path = write_log(tmp_path / "log.csv", valid_rows(6))
    lines = path.read_bytes().split(b"\n")
    lines[3] = lines[3].replace(b"shift B", b"caf\xe9").replace(b",ok", b",caf\xe9")
    if b"\xe9" not in lines[3]:
        lines[3] = lines[3] + b"\xe9"
    path.write_bytes(b"\n".join(lines))
    r = read_readings(path, LAYOUT)
    assert quarantine_reasons(r)[4] & {"not UTF-8 text", "wrong number of fields"}
    assert r.summary.rows_kept == 5


# whole-file failures: one ReadingsError naming the file and what was expected
@pytest.mark.parametrize("content, words", [
    (b"", "no header"),
    (b"\n1,2,3\n", "no header"),
    (b"advance;face_chainage_m;a;b;m;n;current_a;voltage_v\n1;1200;T1;;T2;;0.5;0.1\n"
, "semicolon"),
    (b"advance\tface_chainage_m\ta\tb\tm\tn\tcurrent_a\tvoltage_v\n", "tab"),
    (b"advance,face_chainage_m,a,b,m,n,current_a\n1,1200,T1,,T2,,0.5\n", "voltage_v"),
    (b"1,1200,T1,,T2,,0.5,0.1\n2,1201,T1,,T2,,0.5,0.1\n", "no header line"),
    ("advance,face_chainage_m,a,b,m,n,current_a,voltage_v\n".encode("utf-16"), "UTF-16"),
    ("advance,face_chainage_m,a,b,m,n,current_a,voltage_v,B\u00e9\n".encode("latin-1"), "UTF-8"),
    (b"advance,face_chainage_m,a,b,m,n,current_a,voltage_v,a\n", "named twice"),
])
def test_whole_file_errors(tmp_path, content, words):
    path = tmp_path / "bad.csv"
    path.write_bytes(content)
    with pytest.raises(ReadingsError) as exc:
        read_readings(path, LAYOUT)
    msg = str(exc.value)
    assert str(path) in msg and words in msg
    assert "comma-separated" in msg or "expected" in msg


def test_missing_file(tmp_path):
    with pytest.raises(ReadingsError, match="no such readings log"):
        read_readings(tmp_path / "nope.csv", LAYOUT)


def test_input_never_modified_and_quarantine_written(tmp_path):
    rows = valid_rows(20)
    rows[3]["current_a"] = "-1"
    path = write_log(tmp_path / "log.csv", rows)
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    r = read_readings(path, LAYOUT)
    out = r.write_quarantine(tmp_path / "out")
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before
    q = pd.read_csv(out)
    assert list(q.columns) == list(QUARANTINE_COLUMNS)
    assert q.to_dict("records") == [{"file": str(path), "line": 5, "field": "current_a",
                                     "value": -1, "reason": "zero or negative current"}]
    assert not list((tmp_path / "out").glob(".*tmp*"))  # no temporary left behind


def test_chunked_equals_whole(tmp_path):
    """State across chunks (chainage order, duplicates) gives the same answer as one chunk."""
    rows = valid_rows(300, seed=3)
    rows.insert(150, dict(rows[20]))                 # repeat far from its original
    rows[100]["face_chainage_m"] = "1199.0"
    rows[250]["voltage_v"] = "x"
    path = write_log(tmp_path / "log.csv", rows)
    whole = read_readings(path, LAYOUT)
    small = read_readings(path, LAYOUT, chunk_bytes=500)
    pd.testing.assert_frame_equal(whole.table, small.table)
    pd.testing.assert_frame_equal(whole.quarantine, small.quarantine)
    assert whole.summary.to_dict() == small.summary.to_dict()
    assert whole.summary.rows_quarantined == 3


def test_parquet_same_as_csv(tmp_path):
    rows = valid_rows(30)
    rows[7]["current_a"] = "0"
    csv_path = write_log(tmp_path / "log.csv", rows)
    frame = pd.read_csv(csv_path, dtype=str, keep_default_na=False)
    for c in ("advance", "stack_n"):
        frame[c] = frame[c].astype("int64")
    for c in ("face_chainage_m", "current_a", "voltage_v", "cutterhead_deg", "voltage_std_v",
              "contact_ohm_a", "contact_ohm_m"):
        frame[c] = frame[c].astype(float)
    pq_path = tmp_path / "log.parquet"
    frame.to_parquet(pq_path, index=False)
    a = read_readings(csv_path, LAYOUT)
    b = read_readings(pq_path, LAYOUT)
    assert b.summary.format == "parquet"
    assert b.quarantine["line"].tolist() == a.quarantine["line"].tolist() == [9]
    cols = ["line", "advance", "face_chainage_m", "current_a", "voltage_v", "stack_n"]
    pd.testing.assert_frame_equal(a.table[cols], b.table[cols])
    assert (a.table["m"].astype(str) == b.table["m"].astype(str)).all()
    (tmp_path / "junk.parquet").write_bytes(b"not parquet at all")
    with pytest.raises(ReadingsError, match="Parquet"):
        read_readings(tmp_path / "junk.parquet", LAYOUT)


def typed_frame(rows: list[dict[str, str]]) -> pd.DataFrame:
    """The log as a pandas DataFrame with numeric columns as numbers (as a program holds it)."""
    frame = pd.DataFrame(rows, columns=COLUMNS)
    for c in NUMERIC:
        frame[c] = pd.to_numeric(frame[c], errors="coerce")
    return frame


def test_dataframe_reads_like_the_file(tmp_path):
    rows = valid_rows(30)
    rows[7]["current_a"] = "0"                     # row 7 of the frame, line 9 of the file
    rows[12]["a"] = "NOPE"                         # row 12, line 14
    csv_path = write_log(tmp_path / "log.csv", rows)
    from_file = read_readings(csv_path, LAYOUT)
    frame = typed_frame(rows)
    frame.loc[20, "voltage_v"] = np.nan            # NaN is an empty cell: row 20, line 22
    from_frame = read_readings(frame, LAYOUT)
    assert from_frame.summary.format == "dataframe" and from_frame.source == FRAME_LABEL
    assert quarantine_reasons(from_frame) == {7: {"zero or negative current"},
                                              12: {"unknown electrode label"},
                                              20: {"missing field"}}
    assert set(from_frame.quarantine["file"]) == {FRAME_LABEL}
    assert from_frame.quarantine.loc[from_frame.quarantine["line"] == 20, "field"].item() \
        == "voltage_v"
    # the frame's rows are its positions: file line - 2 for the rows both keep
    kept = from_file.table[from_file.table["line"] != 22].reset_index(drop=True)
    assert from_frame.table["line"].tolist() == (kept["line"] - 2).tolist()
    cols = ["advance", "face_chainage_m", "current_a", "voltage_v", "cutterhead_deg",
            "stack_n", "time", "a", "b", "m", "n", "crew_note"]
    pd.testing.assert_frame_equal(from_frame.table[cols], kept[cols])
    assert read_readings(frame, LAYOUT, label="shift B").quarantine["file"].iloc[0] == "shift B"


def test_dataframe_bad_columns_raise_naming_the_frame():
    frame = typed_frame(valid_rows(5)).drop(columns=["voltage_v"])
    with pytest.raises(ReadingsError, match="<DataFrame>.*voltage_v"):
        read_readings(frame, LAYOUT)
    twice = pd.concat([typed_frame(valid_rows(5)), typed_frame(valid_rows(5))[["a"]]], axis=1)
    with pytest.raises(ReadingsError, match="named twice"):
        read_readings(twice, LAYOUT)


def test_prepare_advances_same_for_file_and_frame(tmp_path):
    rows = valid_rows(120, seed=3)
    rows[5]["current_a"] = "-1"
    path = write_log(tmp_path / "log.csv", rows)
    qs = QCSettings(fallback_a_ohm=1e-3, fallback_b=0.02)   # few reciprocals: fallback model
    a = prepare_advances(path, LAYOUT, qs, out_dir=tmp_path / "out")
    b = prepare_advances(typed_frame(rows), LAYOUT, qs)
    assert a.source == str(path) and b.source == FRAME_LABEL
    assert a.quarantine_path == tmp_path / "out" / "quarantine.csv"
    assert pd.read_csv(a.quarantine_path)["line"].tolist() == [7]
    assert b.quarantine_path is None and b.readings.quarantine["line"].tolist() == [5]
    assert [d.advance for d in a.advances] == [d.advance for d in b.advances]
    assert a.advances and all(np.isfinite(d.r_ohm).any() for d in a.advances)
    for x, y in zip(a.advances, b.advances):
        np.testing.assert_allclose(x.r_ohm, y.r_ohm, rtol=1e-12, equal_nan=True)


def test_advance_data_weights_readings_by_their_error():
    # inverse-variance weighting of repeated readings: common practice, no source; the error
    # of one reading is the model's (pair-difference) error / sqrt(2)
    quads = [q.labels() for q in LAYOUT.measurements]
    i = quads.index(("T1", "R1", "T2", "R1"))        # R1: remote at infinity (a pole)
    j = quads.index(("BODY", "R2", "T1", "R1"))
    rows = [  # advance, a, b, m, n, r_ohm, err_ohm, valid
        (1, "T1", None, "T2", None, 2.0, 0.1, True),
        (1, "T2", "R1", "T1", "R1", 4.0, 0.2, True),    # its reciprocal, R1 written out
        (1, "T1", None, "T2", None, 99.0, 0.1, False),  # flagged: left out
        (1, "BODY", "R2", "T1", None, 5.0, np.nan, True),  # no error model: left out
        (1, "W1", "W2", "W3", "W4", 1.0, 0.1, True),    # not in the protocol: left out
        (2, "BODY", "R2", "T1", None, 3.0, 0.3, True),
    ]
    t = pd.DataFrame(rows, columns=["advance", "a", "b", "m", "n", "r_ohm", "err_ohm", "valid"])
    t["face_chainage_m"] = [10.0, 10.0, 10.0, 10.0, 10.0, 11.5]
    t["cutterhead_deg"] = [np.nan, 30.0, 50.0, np.nan, np.nan, np.nan]
    t["time"] = pd.to_datetime([None, "2026-01-05T06:00:00Z", None, None, None, None], utc=True)
    first, second = advance_data(t, LAYOUT)
    w1, w2 = 2.0 / 0.1**2, 2.0 / 0.2**2
    assert first.r_ohm[i] == pytest.approx((w1 * 2.0 + w2 * 4.0) / (w1 + w2))
    assert first.rel_error[i] == pytest.approx(1.0 / math.sqrt(w1 + w2) / first.r_ohm[i])
    assert np.isnan(first.r_ohm[j]) and np.isfinite(first.r_ohm).sum() == 1
    assert (first.n_readings, first.n_valid, first.cutterhead_deg) == (5, 2, 40.0)
    assert first.time == "2026-01-05T06:00:00+00:00"
    assert second.r_ohm[j] == 3.0 and second.rel_error[j] == pytest.approx(0.1 / math.sqrt(2))
    assert (second.face_chainage_m, second.cutterhead_deg, second.time) == (11.5, 0.0, None)


# ------------------------------------------------------------------ property-based
REMOVED = object()  # marks a cell taken out of a row
LABELS_FOR_SWAP = ["a", "m"]
NUMS_FOR_SWAP = ["current_a", "voltage_v", "face_chainage_m"]


@st.composite
def corrupted_logs(draw):
    n = draw(st.integers(8, 30))
    seed = draw(st.integers(0, 1000))
    rows = valid_rows(n, seed)
    kinds = st.sampled_from(["delete", "remove", "text", "swap", "duplicate"])
    ops = draw(st.dictionaries(st.integers(0, n - 1), kinds, max_size=n // 2))
    entries = []  # (row dict, good?)
    for i, row in enumerate(rows):
        op = ops.get(i)
        if op is None:
            entries.append((row, True))
        elif op == "delete":  # cell emptied
            col = draw(st.sampled_from([c for c in REQUIRED_COLUMNS if c not in ("b", "n")]))
            entries.append((dict(row, **{col: ""}), False))
        elif op == "remove":  # cell removed with its comma: the fields shift
            col = draw(st.sampled_from(COLUMNS))
            entries.append((dict(row, **{col: REMOVED}), False))
        elif op == "text":
            col = draw(st.sampled_from(NUMERIC))
            junk = draw(st.sampled_from(["abc", "1.2.3", "12 V", "--", "0x", "e5"]))
            entries.append((dict(row, **{col: junk}), False))
        elif op == "swap":
            c1, c2 = draw(st.sampled_from(LABELS_FOR_SWAP)), draw(st.sampled_from(NUMS_FOR_SWAP))
            entries.append((dict(row, **{c1: row[c2], c2: row[c1]}), False))
        else:  # duplicate: the original stays good, the repeat right after it is bad
            entries.append((row, True))
            entries.append((dict(row), False))
    columns = list(COLUMNS)
    if draw(st.booleans()):
        columns = draw(st.permutations(COLUMNS))  # whole columns swapped, header with them
    newline = draw(st.sampled_from(["\n", "\r\n"]))
    bom = draw(st.booleans())
    truncate = draw(st.booleans())
    cut = draw(st.floats(0.0, 1.0))
    return entries, list(columns), newline, bom, truncate, cut


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture])
@given(case=corrupted_logs())
def test_corruption_never_loses_good_rows(tmp_path, case):
    entries, columns, newline, bom, truncate, cut = case
    lines = [",".join(columns)] + [",".join(r[c] for c in columns if r[c] is not REMOVED)
                                   for r, _ in entries]
    good = [ok for _, ok in entries]
    if truncate:  # cut the last line before its last comma: it loses at least one field
        last = lines[-1]
        k = max(1, int(cut * last.rfind(",")))
        lines[-1] = last[:k]
        good[-1] = False
    text = newline.join(lines) + ("" if truncate else newline)
    data = (b"\xef\xbb\xbf" if bom else b"") + text.encode("utf-8")
    path = tmp_path / "corrupt.csv"
    path.write_bytes(data)

    r = read_readings(path, LAYOUT)  # must not raise

    good_lines = [i + 2 for i, ok in enumerate(good) if ok]
    bad_lines = {i + 2 for i, ok in enumerate(good) if not ok}
    assert r.table["line"].tolist() == good_lines               # no good row lost
    reasons = quarantine_reasons(r)
    assert set(reasons) == bad_lines                            # every bad row, nothing else
    assert all(rs and rs <= set(REASONS) for rs in reasons.values())
    assert r.summary.rows_read == len(entries)
    assert r.summary.rows_kept + r.summary.rows_quarantined == r.summary.rows_read
    # kept values are the original ones
    originals = {i + 2: e[0] for i, e in enumerate(entries)}
    got = r.table.set_index("line")
    for line in good_lines[:5]:
        assert got.at[line, "voltage_v"] == float(originals[line]["voltage_v"])
        assert str(got.at[line, "m"]) == originals[line]["m"]


def test_quoted_fields_and_no_layout(tmp_path):
    path = tmp_path / "q.csv"
    path.write_text('advance,face_chainage_m,a,b,m,n,current_a,voltage_v,crew_note\n'
                    '1,1200.0,"T1",,"T2",,0.5,0.1,"cutter change, ring 41"\n'
                    '1,1200.1,T1,,T3,,0.5,0.2,plain\n'
                    '1,1200.2,T1,,T3,,0.5,0.3,"unbalanced, quote\n')
    r = read_readings(path, LAYOUT)
    assert r.table["line"].tolist() == [2, 3]
    assert r.table["crew_note"].tolist() == ["cutter change, ring 41", "plain"]
    assert str(r.table["m"].iloc[0]) == "T2"
    assert quarantine_reasons(r) == {4: {"bad quoting"}}
    free = read_readings(path)  # no layout: labels not checked, categories from the log
    assert free.summary.rows_kept == 2 and list(free.table["a"].cat.categories) == ["T1", "T2",
                                                                                      "T3"]


def test_summary_counts_per_reason(tmp_path):
    rows = valid_rows(20)
    rows[2]["current_a"] = "0"
    rows[3]["current_a"] = "-1"
    rows[4]["m"] = "Q7"
    rows[4]["voltage_v"] = "x"
    r = read_readings(write_log(tmp_path / "log.csv", rows), LAYOUT)
    s = r.summary
    assert (s.rows_read, s.rows_kept, s.rows_quarantined) == (20, 17, 3)
    assert s.by_reason == {"zero or negative current": 2, "unknown electrode label": 1,
                           "non-numeric": 1}
    assert len(r.quarantine) == 4      # one row per failing field
    text = s.to_text()
    assert "rows quarantined: 3" in text and "zero or negative current" in text
    assert s.to_dict()["quarantined_by_reason"] == s.by_reason


def test_parquet_nulls_and_nan(tmp_path):
    frame = pd.DataFrame({"advance": [1, 1, 1], "face_chainage_m": [1200.0, 1200.1, 1200.2],
                          "a": ["T1", "T1", "T1"], "b": [None, None, None],
                          "m": ["T2", "T3", "T4"], "n": [None, None, None],
                          "current_a": [0.5, 0.5, 0.5], "voltage_v": [0.1, None, float("nan")],
                          "stack_n": [4, None, 4]})
    path = tmp_path / "log.parquet"
    frame.to_parquet(path, index=False)
    r = read_readings(path, LAYOUT)
    # pandas writes NaN as a Parquet null: both are a missing field
    assert quarantine_reasons(r) == {3: {"missing field"}, 4: {"missing field"}}
    assert r.table["line"].tolist() == [2] and r.table["b"].isna().all()
