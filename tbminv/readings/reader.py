"""Readings log: read, validate, quarantine (format: DEVELOPERS.md, "File formats").

A readings log has one row per reading. Required columns: ``advance``, ``face_chainage_m``,
``a``, ``b``, ``m``, ``n`` (electrode labels of the layout; ``b`` or ``n`` empty for a pole),
``current_a``, ``voltage_v``. Optional: ``time`` (ISO 8601; a time without zone is taken as
UTC), ``cutterhead_deg``, ``stack_n``, ``voltage_std_v``, ``contact_ohm_a``,
``contact_ohm_m``, ``synthetic`` (1: simulated readings; :attr:`Readings.synthetic`). Unknown
columns are kept as text and passed through.

Every row that fails validation goes to the quarantine table, one row per failing field, with
the columns ``file, line, field, value, reason``; ``line`` is the 1-based line in the file
(header = line 1). For Parquet logs ``line`` is the row number + 1, so that the first data row
is line 2 as in a CSV file; for a pandas DataFrame ``line`` is the 0-based position of the row
in the frame. A problem with a whole row (wrong number of fields, bad quoting,
not UTF-8, an exact repeat of an earlier row) has the field ``(row)``. The good rows go on;
nothing is dropped silently; the input file is only ever opened for reading.

A file that cannot be read at all (empty, not UTF-8 in its header, UTF-16, no header line, a
delimiter other than the comma, a required column missing, a column named twice) raises one
:class:`ReadingsError` naming the file and what was expected.

CSV logs are read in chunks of lines (``chunk_bytes``), parsed with pyarrow's CSV reader and
checked column-wise, so memory is bounded by the chunk plus the kept readings (stored compactly:
labels as categoricals, numbers as float64) plus 24 bytes per kept row for duplicate detection.
"""

from __future__ import annotations

import csv
import io
import logging
import math
import os
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from tbminv.cache import atomic_path
from tbminv.readings.logformat import (
    LABEL_COLUMNS,
    OPTIONAL_COLUMNS,
    OPTIONAL_NUMERIC_COLUMNS,
    QUARANTINE_COLUMNS,
    R_ANGLE,
    R_CHAINAGE_BACK,
    R_CURRENT,
    R_DUPLICATE,
    R_DUPLICATE_CONFLICT,
    R_ENCODING,
    R_FIELD_COUNT,
    R_MISSING,
    R_NEGATIVE,
    R_NON_NUMERIC,
    R_NOT_FINITE,
    R_NOT_INTEGER,
    R_QUOTING,
    R_SAME,
    R_STACK,
    R_TIME,
    R_UNKNOWN_LABEL,
    REASONS,
    REQUIRED_COLUMNS,
    ROW_FIELD,
    SYNTHETIC_COLUMN,
    SYNTHETIC_TRUE,
    ReadingsError,
    ReadSummary,
)

_LOG = logging.getLogger(__name__)

_NAN_TEXT = frozenset({"nan", "+nan", "-nan"})
_VALUE_MAX_CHARS = 200


# --------------------------------------------------------------------------- results
@dataclass
class Readings:
    """Checked readings of one log.

    Attributes
    ----------
    source : str
        The log read.
    table : pandas.DataFrame
        Kept rows in file order: ``line`` (int64), ``advance`` (int64), ``face_chainage_m``,
        ``current_a``, ``voltage_v`` and the optional numeric columns (float64, NaN where not
        logged; every optional column is present), ``time`` (UTC, NaT where not logged),
        ``a``, ``b``, ``m``, ``n`` (categoricals over the layout labels; missing ``b`` / ``n``
        is a pole), then any unknown columns as text.
    quarantine : pandas.DataFrame
        ``file, line, field, value, reason``, sorted by line.
    summary : ReadSummary
        Counts.
    extra_columns : tuple of str
        Unknown columns passed through.
    columns_present : tuple of str
        Columns of the file, in file order.
    """

    source: str
    table: pd.DataFrame
    quarantine: pd.DataFrame
    summary: ReadSummary
    extra_columns: tuple[str, ...] = ()
    columns_present: tuple[str, ...] = ()

    @property
    def synthetic(self) -> bool:
        """True when the log says its readings were simulated (column ``synthetic``)."""
        if SYNTHETIC_COLUMN not in self.table:
            return False
        vals = self.table[SYNTHETIC_COLUMN].dropna().astype(str).str.strip().str.lower()
        return bool(vals.isin(SYNTHETIC_TRUE).any())

    @property
    def advances(self) -> np.ndarray:
        """Advance numbers present among the kept rows, sorted."""
        return np.unique(self.table["advance"].to_numpy())

    def by_advance(self) -> Iterator[tuple[int, pd.DataFrame]]:
        """Kept rows grouped by advance, in increasing advance order."""
        for adv, grp in self.table.groupby("advance", sort=True, observed=True):
            yield int(adv), grp

    def write_quarantine(self, out_dir: str | os.PathLike[str],
                         name: str = "quarantine.csv") -> Path:
        """Write the quarantine table atomically into ``out_dir``; return its path."""
        return write_quarantine(self.quarantine, Path(out_dir) / name)


def write_quarantine(quarantine: pd.DataFrame, path: str | os.PathLike[str]) -> Path:
    """Write a quarantine table as CSV (columns ``file, line, field, value, reason``).

    The file is written beside its final name and renamed into place, so a crash never
    leaves a half-written file. An empty table gives a header-only file.
    """
    path = Path(path)
    table = quarantine.reindex(columns=list(QUARANTINE_COLUMNS))
    with atomic_path(path) as tmp:
        table.to_csv(tmp, index=False, lineterminator="\n")
    return path


# --------------------------------------------------------------------------- reading
def _label_set(layout: Any) -> tuple[tuple[str, ...] | None, frozenset[str]]:
    """Labels of the layout and those of remote electrodes at infinity."""
    if layout is None:
        return None, frozenset()
    labels = tuple(str(x) for x in getattr(layout, "labels", layout))
    at_inf: set[str] = set()
    if hasattr(layout, "electrode"):
        at_inf = {x for x in labels if getattr(layout.electrode(x), "at_infinity", False)}
    return labels, frozenset(at_inf)


FRAME_LABEL = "<DataFrame>"
"""File label of readings handed over as a pandas DataFrame (quarantine ``file`` column)."""


def read_readings(path: str | os.PathLike[str] | pd.DataFrame, layout: Any = None, *,
                  chunk_bytes: int = 8 << 20, chunk_rows: int = 200_000,
                  label: str = FRAME_LABEL) -> Readings:
    """Read and check a readings log (CSV, Parquet or a pandas DataFrame).

    Parameters
    ----------
    path : path-like or pandas.DataFrame
        The log. ``.parquet`` / ``.pq`` files are read as Parquet, anything else as CSV
        (UTF-8, comma-separated, header line first; a UTF-8 byte-order mark and CRLF line
        ends are accepted). A DataFrame (columns as in a log file) gets the same checks and
        quarantine; its ``line`` is the 0-based position of the row in the frame
        (``frame.iloc[line]``) and NaN or None is an empty cell.
    layout : Layout or iterable of str, optional
        Electrode labels are checked against ``layout.labels``; None skips that check.
    chunk_bytes : int
        Bytes of CSV read per chunk (bounds the working memory).
    chunk_rows : int
        Rows per Parquet batch or DataFrame slice.
    label : str
        Name of a DataFrame in the quarantine and the summary (files are named by their
        path).

    Returns
    -------
    Readings
        Kept rows, quarantine and summary.

    Raises
    ------
    ReadingsError
        When the file (or frame) cannot be read at all.
    """
    labels, at_inf = _label_set(layout)
    if isinstance(path, pd.DataFrame):
        checker = _Checker(label, "dataframe", labels, at_inf)
        for raw, lines in _frame_chunks(path, label, chunk_rows, checker):
            checker.check_chunk(raw, lines)
        pa.default_memory_pool().release_unused()
        return checker.finish()
    path = Path(path)
    src = str(path)
    if not path.is_file():
        raise ReadingsError(f"{src}: no such readings log (expected a CSV or Parquet file)")
    fmt = "parquet" if path.suffix.lower() in (".parquet", ".pq") else "csv"
    checker = _Checker(src, fmt, labels, at_inf)
    if fmt == "parquet":
        chunks = _parquet_chunks(path, chunk_rows, checker)
    else:
        chunks = _csv_chunks(path, chunk_bytes, checker)
    for raw, lines in chunks:
        checker.check_chunk(raw, lines)
    pa.default_memory_pool().release_unused()  # hand the chunk buffers back
    return checker.finish()


# ----------------------------------------------------------------------- CSV chunks
def _header_error(src: str, what: str) -> ReadingsError:
    expected = ", ".join(REQUIRED_COLUMNS)
    return ReadingsError(f"{src}: {what}; expected a UTF-8, comma-separated readings log whose "
                         f"first line names the columns (required: {expected})")


def _parse_header(src: str, first: bytes) -> list[str]:
    if not first.strip():
        raise _header_error(src, "empty file or empty first line (no header)")
    if first.startswith((b"\xff\xfe", b"\xfe\xff")) or b"\x00" in first:
        raise _header_error(src, "file looks UTF-16/binary encoded")
    if first.startswith(b"\xef\xbb\xbf"):
        first = first[3:]
    try:
        text = first.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _header_error(src, f"header line is not UTF-8 text ({exc.reason} at byte "
                                 f"{exc.start})") from None
    text = text.rstrip("\r\n")
    names = [c.strip() for c in next(csv.reader([text]))]
    missing = [c for c in REQUIRED_COLUMNS if c not in names]
    if missing:
        for delim, word in ((";", "semicolon"), ("\t", "tab"), ("|", "vertical bar")):
            alt = [c.strip() for c in text.split(delim)]
            if delim in text and all(c in alt for c in REQUIRED_COLUMNS):
                raise _header_error(src, f"columns are separated by a {word} ({delim!r}), "
                                         "not by commas")
        looks_numeric = any(_is_number(c) for c in names if c)
        hint = " (the first line looks like data: no header line?)" if looks_numeric else ""
        raise _header_error(src, f"required column(s) {', '.join(missing)} missing from the "
                                 f"header {names!r}{hint}")
    seen: set[str] = set()
    for i, c in enumerate(names):
        if not c:
            raise _header_error(src, f"column {i + 1} of the header has no name")
        if c in seen:
            raise _header_error(src, f"column {c!r} is named twice in the header")
        seen.add(c)
    return names


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _csv_chunks(path: Path, chunk_bytes: int,
                checker: _Checker) -> Iterator[tuple[dict[str, pa.Array], np.ndarray]]:
    src = str(path)
    with open(path, "rb") as fh:
        first = fh.readline()
        names = _parse_header(src, first)
        checker.set_columns(names)
        ncol = len(names)
        line_no = 1
        while True:
            lines = fh.readlines(max(1, chunk_bytes))
            if not lines:
                break
            start = line_no + 1
            line_no += len(lines)
            yield from _parse_lines(lines, start, names, ncol, checker)


def _parse_lines(lines: list[bytes], start: int, names: list[str], ncol: int,
                 checker: _Checker) -> Iterator[tuple[dict[str, pa.Array], np.ndarray]]:
    """Split raw lines into good ones (parsed) and whole-row failures (quarantined)."""
    blob = b"".join(lines)
    counts = np.fromiter((ln.count(b",") for ln in lines), dtype=np.int64, count=len(lines))
    ok = counts == ncol - 1
    quoted = b'"' in blob
    if quoted:
        has_q = np.fromiter((b'"' in ln for ln in lines), dtype=bool, count=len(lines))
        ok &= ~has_q
    if ok.all() and blob.endswith(b"\n"):
        good, nos = None, np.arange(start, start + len(lines), dtype=np.int64)
    else:
        good = []
        for i in np.nonzero(~ok)[0].tolist():
            no = start + i
            body = lines[i].rstrip(b"\r\n")
            if not body.strip():
                checker.blank_lines += 1
                continue
            if b'"' in body:
                try:
                    count = len(next(csv.reader([body.decode("utf-8")], strict=True)))
                except UnicodeDecodeError:
                    checker.row_failure(no, _shown(body), R_ENCODING)
                    continue
                except csv.Error:
                    checker.row_failure(no, _shown(body), R_QUOTING)
                    continue
            else:
                count = body.count(b",") + 1
            if count != ncol:
                checker.row_failure(no, f"expected {ncol} fields, found {count}", R_FIELD_COUNT)
                continue
            ok[i] = True  # a quoted line with the right count
        idx = np.nonzero(ok)[0]
        if len(idx) == 0:
            return
        good = [lines[i].rstrip(b"\r\n") for i in idx.tolist()]
        nos = (idx + start).astype(np.int64)
        blob = b"\n".join(good) + b"\n"
    table = _arrow_parse(blob, names)
    if table is None or table.num_rows != len(nos):
        # invalid UTF-8 somewhere or quoting pyarrow rejects: go line by line
        if good is None:
            good = [ln.rstrip(b"\r\n") for ln in lines]
        yield from _python_parse(good, nos, names, ncol, checker)
        return
    yield _columns_from_arrow(table, names), nos


def _shown(body: bytes) -> str:
    text = body.decode("utf-8", errors="replace")
    return text if len(text) <= _VALUE_MAX_CHARS else text[:_VALUE_MAX_CHARS] + "..."


def _arrow_parse(blob: bytes, names: list[str]) -> pa.Table | None:
    try:
        return pacsv.read_csv(
            io.BytesIO(blob),
            read_options=pacsv.ReadOptions(column_names=names, use_threads=True,
                                           block_size=max(1 << 20, min(len(blob) + 1, 64 << 20))),
            parse_options=pacsv.ParseOptions(newlines_in_values=False, ignore_empty_lines=False),
            convert_options=pacsv.ConvertOptions(
                column_types={c: pa.string() for c in names},
                strings_can_be_null=False, quoted_strings_can_be_null=False))
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        return None


def _columns_from_arrow(table: pa.Table, names: list[str]) -> dict[str, pa.Array]:
    return {c: pc.utf8_trim_whitespace(table.column(c).combine_chunks()) for c in names}


def _python_parse(good: list[bytes], nos: np.ndarray, names: list[str], ncol: int,
                  checker: _Checker) -> Iterator[tuple[dict[str, pa.Array], np.ndarray]]:
    rows: list[list[str]] = []
    keep: list[int] = []
    for body, no in zip(good, nos.tolist()):
        try:
            text = body.decode("utf-8")
        except UnicodeDecodeError:
            checker.row_failure(no, _shown(body), R_ENCODING)
            continue
        try:
            fields = next(csv.reader([text], strict=True))
        except csv.Error:
            checker.row_failure(no, _shown(body), R_QUOTING)
            continue
        if len(fields) != ncol:
            checker.row_failure(no, f"expected {ncol} fields, found {len(fields)}",
                                R_FIELD_COUNT)
            continue
        rows.append([f.strip() for f in fields])
        keep.append(no)
    if not rows:
        return
    cols = list(zip(*rows))
    yield ({c: pa.array(list(cols[j]), type=pa.string()) for j, c in enumerate(names)},
           np.asarray(keep, dtype=np.int64))


# ------------------------------------------------------------------- Parquet chunks
def _parquet_chunks(path: Path, chunk_rows: int,
                    checker: _Checker) -> Iterator[tuple[dict[str, pa.Array], np.ndarray]]:
    src = str(path)
    try:
        pf = pq.ParquetFile(path)
    except Exception as exc:  # pyarrow raises several types for a non-Parquet file
        raise ReadingsError(f"{src}: not a readable Parquet file ({exc}); expected a Parquet "
                            f"readings log with columns {', '.join(REQUIRED_COLUMNS)}") from None
    names = [str(n) for n in pf.schema_arrow.names]
    missing = [c for c in REQUIRED_COLUMNS if c not in names]
    if missing:
        raise ReadingsError(f"{src}: required column(s) {', '.join(missing)} missing (found "
                            f"{names!r}); expected columns {', '.join(REQUIRED_COLUMNS)}")
    checker.set_columns(names)
    row0 = 0
    for batch in pf.iter_batches(batch_size=max(1, chunk_rows)):
        n = batch.num_rows
        nos = np.arange(row0 + 2, row0 + 2 + n, dtype=np.int64)
        row0 += n
        yield {c: _as_text(batch.column(c)) for c in names}, nos


def _as_text(arr: pa.Array) -> pa.Array:
    """A typed column as the text a CSV cell would hold (null: empty cell)."""
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
        text = pc.utf8_trim_whitespace(arr.cast(pa.string()))
    elif pa.types.is_floating(arr.type) or pa.types.is_integer(arr.type):
        text = pc.cast(arr, pa.string())  # shortest round-trip text; nan, inf kept
    elif pa.types.is_timestamp(arr.type):
        text = pa.array([("" if v is None else v.isoformat()) for v in arr.to_pylist()],
                        type=pa.string())
    else:
        text = pa.array([("" if v is None else str(v).strip()) for v in arr.to_pylist()],
                        type=pa.string())
    return text.fill_null("")


# ------------------------------------------------------------------ DataFrame chunks
def _frame_column(series: pd.Series) -> pa.Array:
    """One DataFrame column as Arrow (mixed Python objects fall back to their text)."""
    try:
        return pa.Array.from_pandas(series)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError):
        return pa.array([None if v is None or (isinstance(v, float) and math.isnan(v))
                         else str(v) for v in series.tolist()], type=pa.string())


def _frame_chunks(frame: pd.DataFrame, src: str, chunk_rows: int,
                  checker: _Checker) -> Iterator[tuple[dict[str, pa.Array], np.ndarray]]:
    names = [str(c) for c in frame.columns]
    twice = sorted({c for c in names if names.count(c) > 1})
    if twice:
        raise ReadingsError(f"{src}: column(s) {', '.join(twice)} named twice; expected one "
                            f"column each of {', '.join(REQUIRED_COLUMNS)}")
    missing = [c for c in REQUIRED_COLUMNS if c not in names]
    if missing:
        raise ReadingsError(f"{src}: required column(s) {', '.join(missing)} missing (found "
                            f"{names!r}); expected columns {', '.join(REQUIRED_COLUMNS)}")
    checker.set_columns(names)
    step = max(1, chunk_rows)
    for row0 in range(0, len(frame), step):
        part = frame.iloc[row0:row0 + step]
        nos = np.arange(row0, row0 + len(part), dtype=np.int64)
        yield {c: _as_text(_frame_column(part.iloc[:, j])) for j, c in enumerate(names)}, nos


# ----------------------------------------------------------------------- the checks
class _Checker:
    """Column-wise checks of chunks; keeps state across chunks."""

    def __init__(self, src: str, fmt: str, labels: tuple[str, ...] | None,
                 at_infinity: frozenset[str] = frozenset()) -> None:
        self.src = src
        self.at_infinity = sorted(at_infinity)
        self.fmt = fmt
        self.labels = labels
        self._label_array = None if labels is None else pa.array(list(labels), type=pa.string())
        self.names: list[str] = []
        self.extra: list[str] = []
        self.blank_lines = 0
        self.rows_read = 0
        self._q: list[pd.DataFrame] = []
        self._q_rows: list[tuple[int, str, str, str]] = []
        self._kept: list[pd.DataFrame] = []
        self._max_chainage: dict[int, float] = {}

    def set_columns(self, names: list[str]) -> None:
        self.names = list(names)
        known = set(REQUIRED_COLUMNS) | set(OPTIONAL_COLUMNS)
        self.extra = [c for c in names if c not in known and c != "line"]
        if "line" in names:
            _LOG.warning("%s: a column named 'line' is ignored (tbminv numbers lines itself)",
                         self.src)

    # -- quarantine records
    def row_failure(self, line: int, value: str, reason: str) -> None:
        self.rows_read += 1
        self._q_rows.append((int(line), ROW_FIELD, value, reason))

    def _add(self, lines: np.ndarray, fieldname: str, values: Any, reason: str) -> None:
        if len(lines) == 0:
            return
        self._q.append(pd.DataFrame({"line": lines, "field": fieldname,
                                     "value": pd.Series(values, dtype=object).astype(str),
                                     "reason": reason}))

    # -- one chunk
    def check_chunk(self, raw: dict[str, pa.Array], lines: np.ndarray) -> None:
        n = len(lines)
        self.rows_read += n
        bad = np.zeros(n, dtype=bool)
        out: dict[str, Any] = {"line": lines}

        def flag(mask: np.ndarray, fieldname: str, reason: str) -> None:
            nonlocal bad
            mask = np.asarray(mask, dtype=bool)
            if mask.any():
                values = raw[fieldname].filter(pa.array(mask)).to_pylist()
                self._add(lines[mask], fieldname, values, reason)
                bad |= mask

        def is_empty(col: str) -> np.ndarray:
            return pc.equal(raw[col], "").to_numpy(zero_copy_only=False)

        def number(col: str, required: bool) -> np.ndarray:
            arr = raw[col]
            empty = is_empty(col)
            try:
                num = pc.cast(pc.if_else(pa.array(empty), pa.scalar(None, pa.string()), arr),
                              pa.float64()).fill_null(np.nan).to_numpy(zero_copy_only=False)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                num = pd.to_numeric(pd.Series(arr.to_pylist(), dtype=object),
                                    errors="coerce").to_numpy(dtype=float, na_value=np.nan)
            nan = np.isnan(num)
            if (nan & ~empty).any():
                nan_text = pc.is_in(pc.utf8_lower(arr), value_set=pa.array(sorted(_NAN_TEXT))
                                    ).to_numpy(zero_copy_only=False)
            else:
                nan_text = np.zeros(n, dtype=bool)
            if required:
                flag(empty, col, R_MISSING)
                flag(nan & ~empty & ~nan_text, col, R_NON_NUMERIC)
                flag(nan_text | np.isinf(num), col, R_NOT_FINITE)
            else:
                flag(nan & ~empty & ~nan_text, col, R_NON_NUMERIC)
                flag(np.isinf(num), col, R_NOT_FINITE)
                num = np.where(np.isinf(num), np.nan, num)
            return num

        adv = number("advance", True)
        with np.errstate(invalid="ignore"):
            frac = np.isfinite(adv) & (np.abs(adv) < 2**53) & (adv != np.round(adv))
            frac |= np.isfinite(adv) & (np.abs(adv) >= 2**53)
        flag(frac, "advance", R_NOT_INTEGER)
        out["advance"] = adv
        out["face_chainage_m"] = number("face_chainage_m", True)
        cur = number("current_a", True)
        with np.errstate(invalid="ignore"):
            flag(np.isfinite(cur) & (cur <= 0), "current_a", R_CURRENT)
        out["current_a"] = cur
        out["voltage_v"] = number("voltage_v", True)

        for col in OPTIONAL_NUMERIC_COLUMNS:
            if col not in raw:
                out[col] = np.full(n, np.nan)
                continue
            v = number(col, False)
            with np.errstate(invalid="ignore"):
                if col == "cutterhead_deg":
                    flag(~np.isnan(v) & ((v < 0) | (v >= 360)), col, R_ANGLE)
                elif col == "stack_n":
                    flag(~np.isnan(v) & ((v < 1) | (v != np.round(v))), col, R_STACK)
                else:
                    flag(~np.isnan(v) & (v < 0), col, R_NEGATIVE)
            out[col] = v

        if "time" in raw:
            empty = is_empty("time")
            t = self._times(raw["time"], empty)
            flag(~empty & np.isnat(t), "time", R_TIME)
            out["time"] = t
        else:
            out["time"] = np.full(n, np.datetime64("NaT", "ns"))

        lab: dict[str, np.ndarray] = {}
        for col in LABEL_COLUMNS:
            empty = is_empty(col)
            if col in ("a", "m"):
                flag(empty, col, R_MISSING)
            if self.labels is not None:
                codes = pc.index_in(raw[col], value_set=self._label_array)
                codes = codes.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int32)
                flag(~empty & (codes < 0), col, R_UNKNOWN_LABEL)
                codes[empty] = -1
                lab[col] = codes
            else:
                lab[col] = np.asarray(raw[col].to_pylist(), dtype=object)
            lab[col + "_empty"] = empty
        for (c1, c2), reason in R_SAME.items():
            e1, e2 = lab[c1 + "_empty"], lab[c2 + "_empty"]
            if self.labels is not None:
                same = ~e1 & ~e2 & (lab[c1] == lab[c2]) & (lab[c1] >= 0)
            else:
                same = ~e1 & ~e2 & (lab[c1] == lab[c2])
            if (c1, c2) == ("b", "n") and self.at_infinity:
                # one remote pole at infinity may serve as both returns
                same &= ~pc.is_in(raw["b"], value_set=pa.array(self.at_infinity)
                                  ).to_numpy(zero_copy_only=False)
            flag(same, c2, reason)

        ok = ~bad
        # face chainage going backwards within one advance, in file order (rows passing so far)
        if ok.any():
            idx = np.nonzero(ok)[0]
            a_ok = adv[idx].astype(np.int64)
            ch_ok = out["face_chainage_m"][idx]
            frame = pd.DataFrame({"adv": a_ok, "ch": ch_ok})
            run = frame.groupby("adv", sort=False)["ch"].cummax().to_numpy()
            if self._max_chainage:
                prev = frame["adv"].map(self._max_chainage).fillna(-math.inf).to_numpy()
            else:
                prev = np.full(len(a_ok), -math.inf)
            running = np.maximum(run, prev)
            back = ch_ok < running
            if back.any():
                mask = np.zeros(n, dtype=bool)
                mask[idx[back]] = True
                flag(mask, "face_chainage_m", R_CHAINAGE_BACK)
            last = frame.assign(r=running).groupby("adv", sort=False)["r"].max()
            self._max_chainage.update({int(k): float(v) for k, v in last.items()})
            ok = ~bad

        if ok.any():
            kept = pd.DataFrame({k: (v[ok] if isinstance(v, np.ndarray) else v)
                                 for k, v in out.items()})
            kept["advance"] = kept["advance"].astype(np.int64)
            for col in LABEL_COLUMNS:
                vals = lab[col][ok]
                if self.labels is None:
                    vals = np.where(lab[col + "_empty"][ok], None, vals)
                kept[col] = vals
            for col in self.extra:
                kept[col] = np.asarray(raw[col].filter(pa.array(ok)).to_pylist(), dtype=object)
            self._kept.append(kept)

    @staticmethod
    def _times(arr: pa.Array, empty: np.ndarray) -> np.ndarray:
        """ISO 8601 text -> datetime64[ns] in UTC (NaT where empty or not a time)."""
        values = pd.Series(arr.to_pylist(), dtype=object)
        values[empty] = None
        t = pd.to_datetime(values, format="ISO8601", errors="coerce", utc=True)
        return t.dt.tz_localize(None).to_numpy(dtype="datetime64[ns]")

    # -- end of file
    def finish(self) -> Readings:
        cats = self.labels
        if self._kept:
            table = pd.concat(self._kept, ignore_index=True)
        else:
            table = pd.DataFrame({c: pd.Series(dtype=float) for c in
                                  ("line", "advance", "face_chainage_m", "current_a",
                                   "voltage_v", *OPTIONAL_NUMERIC_COLUMNS)})
            table["line"] = table["line"].astype(np.int64)
            table["advance"] = table["advance"].astype(np.int64)
            table["time"] = pd.Series(dtype="datetime64[ns, UTC]")
            for col in (*LABEL_COLUMNS, *self.extra):
                table[col] = pd.Series(dtype=object)
        self._kept = []
        if cats is None:
            used = pd.unique(pd.concat([table[c] for c in LABEL_COLUMNS]).dropna())
            cats = tuple(sorted(str(x) for x in used))
        for col in LABEL_COLUMNS:
            if self.labels is not None and len(table):
                table[col] = pd.Categorical.from_codes(table[col].to_numpy(np.int32),
                                                       categories=list(cats))
            else:
                table[col] = pd.Categorical(table[col], categories=list(cats))
        if not isinstance(table["time"].dtype, pd.DatetimeTZDtype):
            table["time"] = pd.to_datetime(table["time"], utc=True)
        table = self._duplicates(table)
        table = table.reset_index(drop=True)

        parts = list(self._q)
        if self._q_rows:
            parts.append(pd.DataFrame(self._q_rows, columns=["line", "field", "value", "reason"]))
        if parts:
            q = pd.concat(parts, ignore_index=True)
            q["line"] = q["line"].astype(np.int64)
            order = {c: i for i, c in enumerate([ROW_FIELD, *self.names])}
            q["_o"] = q["field"].map(order).fillna(len(order)).astype(int)
            q = q.sort_values(["line", "_o"], kind="stable").drop(columns="_o")
            q.insert(0, "file", self.src)
            q = q.reset_index(drop=True)
        else:
            q = pd.DataFrame({c: pd.Series(dtype=object) for c in QUARANTINE_COLUMNS})
            q["line"] = q["line"].astype(np.int64)
        q = q[list(QUARANTINE_COLUMNS)]
        by_reason = q.drop_duplicates(["line", "reason"])["reason"].value_counts()
        n_q = int(q["line"].nunique())
        summary = ReadSummary(file=self.src, format=self.fmt, rows_read=self.rows_read,
                              rows_kept=len(table), rows_quarantined=n_q,
                              blank_lines=self.blank_lines,
                              by_reason={str(k): int(v) for k, v in by_reason.items()})
        if summary.rows_kept + summary.rows_quarantined != summary.rows_read:
            _LOG.error("%s: row count mismatch: read %d, kept %d, quarantined %d", self.src,
                       summary.rows_read, summary.rows_kept, summary.rows_quarantined)
        _LOG.info("%s: %d rows read, %d kept, %d quarantined", self.src, summary.rows_read,
                  summary.rows_kept, summary.rows_quarantined)
        return Readings(source=self.src, table=table, quarantine=q, summary=summary,
                        extra_columns=tuple(self.extra), columns_present=tuple(self.names))

    def _duplicates(self, table: pd.DataFrame) -> pd.DataFrame:
        """Quarantine repeated readings.

        Exact repeats after the first, and every member of a group of the same reading with
        different values.
        """
        if len(table) < 2:
            return table
        ident = ["advance", *LABEL_COLUMNS, "face_chainage_m"]
        if "cutterhead_deg" in self.names:
            ident.append("cutterhead_deg")
        if "time" in self.names:
            ident.append("time")
        values = ["current_a", "voltage_v",
                  *[c for c in OPTIONAL_NUMERIC_COLUMNS
                    if c in self.names and c != "cutterhead_deg"],
                  *self.extra]
        id_h = pd.util.hash_pandas_object(table[ident], index=False).to_numpy()
        dup_any = pd.Series(id_h).duplicated(keep=False).to_numpy()
        if not dup_any.any():
            return table
        sub = table.loc[dup_any]
        sub_id = id_h[dup_any]
        val_h = pd.util.hash_pandas_object(sub[values], index=False).to_numpy()
        frame = pd.DataFrame({"id": sub_id, "val": val_h, "line": sub["line"].to_numpy()},
                             index=sub.index)
        nval = frame.groupby("id")["val"].transform("nunique").to_numpy()
        drop: list[Any] = []
        conflict = frame.loc[nval > 1]
        for _, grp in conflict.groupby("id", sort=False):
            rows = table.loc[grp.index]
            differing = [c for c in values if rows[c].astype(str).nunique(dropna=False) > 1]
            if not differing:  # values hash apart but print alike: report the whole row
                differing = [ROW_FIELD]
            for ix in grp.index:
                for c in differing:
                    shown = "" if c == ROW_FIELD else str(table.at[ix, c])
                    self._q_rows.append((int(table.at[ix, "line"]), c, shown,
                                         R_DUPLICATE_CONFLICT))
            drop.extend(grp.index)
        same = frame.loc[nval == 1]
        if len(same):
            first_line = same.groupby("id")["line"].transform("min")
            later = same.loc[same["line"] != first_line]
            for ix, fl in zip(later.index, first_line.loc[later.index]):
                self._q_rows.append((int(table.at[ix, "line"]), ROW_FIELD,
                                     f"same as line {int(fl)}", R_DUPLICATE))
            drop.extend(later.index)
        return table.drop(index=drop)


def quarantine_reasons(readings: Readings) -> dict[int, set[str]]:
    """Line -> set of reasons, for quick look-ups (tests, reports)."""
    out: dict[int, set[str]] = {}
    for line, reason in zip(readings.quarantine["line"], readings.quarantine["reason"]):
        out.setdefault(int(line), set()).add(str(reason))
    return out


def iter_labels(table: pd.DataFrame) -> Iterable[str]:
    """Labels used in a readings table (a, b, m, n; poles left out)."""
    used = pd.unique(pd.concat([table[c].astype(object) for c in LABEL_COLUMNS]).dropna())
    return [str(x) for x in used]


__all__ = ["REQUIRED_COLUMNS", "OPTIONAL_COLUMNS", "OPTIONAL_NUMERIC_COLUMNS", "LABEL_COLUMNS",
           "QUARANTINE_COLUMNS", "REASONS", "ROW_FIELD", "FRAME_LABEL", "ReadingsError",
           "ReadSummary", "Readings", "read_readings", "write_quarantine", "quarantine_reasons",
           "iter_labels"]
