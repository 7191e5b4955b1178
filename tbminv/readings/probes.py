"""Probe log: materials met by probe drilling ahead of the face or by boreholes (CSV).

One row per logged stretch of one probe (format: DEVELOPERS.md, "File formats"). Required
columns: ``chainage_from_m``, ``chainage_to_m`` (m, ``to > from``), ``material`` (text).
Optional: ``probe_id`` (rows of one probe or borehole; empty: one probe), ``time`` (ISO 8601,
UTC if no zone: when the stretch was drilled), ``resistivity_ohmm`` (measured on cuttings or
with a probe sensor or log, ohm-m), ``resistivity_rel_error`` (its relative standard error as
a value of the ground around the hole, > 0; default :data:`DEFAULT_RESISTIVITY_REL_ERROR`),
``offset_m`` (distance of the probe from the tunnel axis,
m, >= 0), ``bearing_deg`` (direction of that offset, degrees in [0, 360)), ``note`` (text),
``depth_resolution_m`` (how closely the probe places a change of material, m, > 0; default
:data:`DEFAULT_DEPTH_RESOLUTION_M`). Unknown columns are ignored with a warning.

A change of material between consecutive rows of one probe is a contact; it lies in the gap
between the two rows (a point where they touch). Stretches of one material that follow each
other without a gap form a *run*: the probe logs no contact inside a run.

Bad rows go to the quarantine table ``file, line, field, value, reason`` (the columns of the
readings log's quarantine; ``line`` 1-based, header = line 1), one row per failing field, and
each is logged as a warning naming the file, line and field; the good rows go on. A file that
cannot be read at all (missing, not UTF-8, no header, a required column missing, a column
named twice, no usable row) raises one :class:`ProbeLogError` naming the file.

Probe logs are site observations; tbminv treats them as such, but a probe sees a line, not
the face: material names and contacts between probes are not implied.
"""

from __future__ import annotations

import csv
import logging
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import pandas as pd

from tbminv.cache import atomic_path
from tbminv.readings.logformat import QUARANTINE_COLUMNS, ROW_FIELD

_LOG = logging.getLogger(__name__)

REQUIRED_PROBE_COLUMNS: tuple[str, ...] = ("chainage_from_m", "chainage_to_m", "material")
"""Columns every probe log must have."""
OPTIONAL_PROBE_COLUMNS: tuple[str, ...] = ("probe_id", "time", "resistivity_ohmm",
                                           "resistivity_rel_error", "offset_m", "bearing_deg",
                                           "note", "depth_resolution_m")
"""Optional columns with a meaning."""
DEFAULT_DEPTH_RESOLUTION_M = 0.5
"""Depth resolution of a probe without its own value, m: how closely a change of material is
placed along the hole (drill-rate and cuttings-return logs: common practice, no source)."""
DEFAULT_RESISTIVITY_REL_ERROR = 0.3
"""Relative error of a measured resistivity without its own value: a sample or a probe sensor
stands for the ground around the hole only roughly (common practice, no source)."""
DEFAULT_PROBE_ID = "probe"
"""Probe name of rows without a ``probe_id``."""

P_MISSING = "missing field"
P_NON_NUMERIC = "non-numeric"
P_NOT_FINITE = "NaN or inf"
P_ORDER = "chainage_to_m not greater than chainage_from_m"
P_POSITIVE = "expected a value > 0"
P_NEGATIVE = "negative value"
P_BEARING = "bearing outside [0, 360)"
P_TIME = "not an ISO 8601 time"
P_OVERLAP = "overlaps another row of the same probe"
P_FIELD_COUNT = "wrong number of fields"
PROBE_REASONS: tuple[str, ...] = (P_MISSING, P_NON_NUMERIC, P_NOT_FINITE, P_ORDER, P_POSITIVE,
                                  P_NEGATIVE, P_BEARING, P_TIME, P_OVERLAP, P_FIELD_COUNT)
"""Every quarantine reason of the probe log."""


class ProbeLogError(ValueError):
    """A probe log that cannot be read at all; the message names the file and what is wrong."""


@dataclass(frozen=True)
class ProbeRow:
    """One logged stretch of one probe (chainages in m along the tunnel axis)."""

    probe_id: str
    chainage_from_m: float
    chainage_to_m: float
    material: str
    line: int
    time: pd.Timestamp | None = None
    resistivity_ohmm: float = math.nan
    resistivity_rel_error: float = DEFAULT_RESISTIVITY_REL_ERROR
    offset_m: float = math.nan
    bearing_deg: float = math.nan
    note: str = ""
    depth_resolution_m: float = DEFAULT_DEPTH_RESOLUTION_M


@dataclass(frozen=True)
class ProbeContact:
    """A change of material logged by one probe.

    ``lo_m``/``hi_m`` bound the gap between the two rows (equal where they touch); ``time`` is
    when the probe reached the second material (None: not logged).
    """

    probe_id: str
    lo_m: float
    hi_m: float
    material_before: str
    material_after: str
    depth_resolution_m: float
    time: pd.Timestamp | None
    line: int

    @property
    def chainage_m(self) -> float:
        """Middle of the gap, m."""
        return 0.5 * (self.lo_m + self.hi_m)


@dataclass(frozen=True)
class ProbeRun:
    """Consecutive stretches of one material without a gap: no contact inside ``(lo_m, hi_m)``."""

    probe_id: str
    lo_m: float
    hi_m: float
    material: str
    depth_resolution_m: float


@dataclass
class ProbeLog:
    """The checked rows of a probe log and its quarantine.

    Attributes
    ----------
    source : str
        The file read.
    rows : tuple of ProbeRow
        Kept rows, sorted by probe and chainage.
    quarantine : pandas.DataFrame
        ``file, line, field, value, reason``.
    rows_read : int
        Data rows read.
    """

    source: str
    rows: tuple[ProbeRow, ...]
    quarantine: pd.DataFrame = field(repr=False)
    rows_read: int = 0

    @property
    def probe_ids(self) -> list[str]:
        """Probe names in order of first appearance along the drive."""
        seen: dict[str, None] = {}
        for r in self.rows:
            seen.setdefault(r.probe_id, None)
        return list(seen)

    def by_probe(self) -> Iterator[tuple[str, list[ProbeRow]]]:
        """Rows per probe, sorted by chainage."""
        for pid in self.probe_ids:
            yield pid, [r for r in self.rows if r.probe_id == pid]

    def known_at(self, time: str | pd.Timestamp | None) -> ProbeLog:
        """The rows drilled at or before ``time`` (rows without a time: always known).

        ``time`` None gives every row (an advance without a logged time cannot be ordered
        against the probes).
        """
        if time is None:
            return self
        t = _utc(pd.Timestamp(time))
        keep = tuple(r for r in self.rows if r.time is None or r.time <= t)
        return replace(self, rows=keep)

    def contacts(self) -> list[ProbeContact]:
        """Every change of material between consecutive rows of a probe."""
        out = []
        for pid, rows in self.by_probe():
            for a, b in zip(rows[:-1], rows[1:]):
                if a.material.casefold() != b.material.casefold():
                    times = [t for t in (a.time, b.time) if t is not None]
                    out.append(ProbeContact(pid, a.chainage_to_m, b.chainage_from_m, a.material,
                                            b.material, max(a.depth_resolution_m,
                                                            b.depth_resolution_m),
                                            max(times) if times else None, b.line))
        return out

    def runs(self) -> list[ProbeRun]:
        """Stretches where a probe logs one material without a gap (no contact inside)."""
        out: list[ProbeRun] = []
        for pid, rows in self.by_probe():
            cur: ProbeRun | None = None
            for r in rows:
                if (cur is not None and r.material.casefold() == cur.material.casefold()
                        and r.chainage_from_m <= cur.hi_m + 1e-9):
                    cur = replace(cur, hi_m=r.chainage_to_m,
                                  depth_resolution_m=max(cur.depth_resolution_m,
                                                         r.depth_resolution_m))
                    continue
                if cur is not None:
                    out.append(cur)
                cur = ProbeRun(pid, r.chainage_from_m, r.chainage_to_m, r.material,
                               r.depth_resolution_m)
            if cur is not None:
                out.append(cur)
        return out

    def to_frame(self) -> pd.DataFrame:
        """Kept rows as a table (columns of the file format plus ``line``)."""
        cols = ["line", "probe_id", "chainage_from_m", "chainage_to_m", "material", "time",
                "resistivity_ohmm", "resistivity_rel_error", "offset_m", "bearing_deg",
                "depth_resolution_m", "note"]
        return pd.DataFrame([{c: getattr(r, c) for c in cols} for r in self.rows], columns=cols)

    def write_quarantine(self, path: str | Path) -> Path:
        """Write the quarantine table (atomically; header only when empty)."""
        p = Path(path)
        p.parent.mkdir(parents=True, exist_ok=True)
        with atomic_path(p) as tmp:
            self.quarantine.reindex(columns=list(QUARANTINE_COLUMNS)).to_csv(
                tmp, index=False, lineterminator="\n")
        return p


def _utc(t: pd.Timestamp) -> pd.Timestamp:
    return t.tz_localize("UTC") if t.tzinfo is None else t.tz_convert("UTC")


def _number(row: dict[str, str], key: str, problems: list[tuple[str, str, str]], *,
            required: bool = False, default: float = math.nan) -> float:
    text = (row.get(key) or "").strip()
    if not text:
        if required:
            problems.append((key, text, P_MISSING))
        return default
    try:
        v = float(text)
    except ValueError:
        problems.append((key, text, P_NON_NUMERIC))
        return default
    if not math.isfinite(v):
        problems.append((key, text, P_NOT_FINITE))
        return default
    return v


def _check_row(row: dict[str, str]) -> tuple[ProbeRow | None, list[tuple[str, str, str]]]:
    """One row's values, or the problems ``(field, value, reason)`` that quarantine it."""
    problems: list[tuple[str, str, str]] = []
    lo = _number(row, "chainage_from_m", problems, required=True)
    hi = _number(row, "chainage_to_m", problems, required=True)
    if math.isfinite(lo) and math.isfinite(hi) and not hi > lo:
        problems.append(("chainage_to_m", row["chainage_to_m"], P_ORDER))
    material = (row.get("material") or "").strip()
    if not material:
        problems.append(("material", "", P_MISSING))
    rho = _number(row, "resistivity_ohmm", problems)
    if math.isfinite(rho) and not rho > 0:
        problems.append(("resistivity_ohmm", row["resistivity_ohmm"], P_POSITIVE))
    rho_err = _number(row, "resistivity_rel_error", problems,
                      default=DEFAULT_RESISTIVITY_REL_ERROR)
    if not rho_err > 0:
        problems.append(("resistivity_rel_error", row["resistivity_rel_error"], P_POSITIVE))
    offset = _number(row, "offset_m", problems)
    if math.isfinite(offset) and offset < 0:
        problems.append(("offset_m", row["offset_m"], P_NEGATIVE))
    bearing = _number(row, "bearing_deg", problems)
    if math.isfinite(bearing) and not 0.0 <= bearing < 360.0:
        problems.append(("bearing_deg", row["bearing_deg"], P_BEARING))
    res = _number(row, "depth_resolution_m", problems, default=DEFAULT_DEPTH_RESOLUTION_M)
    if not res > 0:
        problems.append(("depth_resolution_m", row["depth_resolution_m"], P_POSITIVE))
    time = None
    text = (row.get("time") or "").strip()
    if text:
        try:
            time = _utc(pd.Timestamp(text))
        except (ValueError, TypeError):
            problems.append(("time", text, P_TIME))
        else:
            if pd.isna(time):
                problems.append(("time", text, P_TIME))
    if problems:
        return None, problems
    return ProbeRow(probe_id=(row.get("probe_id") or "").strip() or DEFAULT_PROBE_ID,
                    chainage_from_m=lo, chainage_to_m=hi, material=material, line=0, time=time,
                    resistivity_ohmm=rho, resistivity_rel_error=rho_err, offset_m=offset,
                    bearing_deg=bearing,
                    note=(row.get("note") or "").strip(), depth_resolution_m=res), []


def read_probe_log(path: str | Path) -> ProbeLog:
    """Read and check a probe log (CSV, UTF-8, comma-separated, header line first).

    Parameters
    ----------
    path : str or Path
        The probe log.

    Returns
    -------
    ProbeLog
        Kept rows (sorted by probe and chainage) and the quarantine of the others.

    Raises
    ------
    ProbeLogError
        The file cannot be read at all, or none of its rows is usable.
    """
    p = Path(path)
    if not p.is_file():
        raise ProbeLogError(f"{p}: probe log not found")
    try:
        text = p.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ProbeLogError(f"{p}: not UTF-8 text (byte {exc.start}); save the probe log as "
                            "UTF-8 CSV") from None
    reader = csv.reader(text.splitlines())
    header = next(reader, None)
    if not header or not any(h.strip() for h in header):
        raise ProbeLogError(f"{p}: line 1: no header line; expected the columns "
                            f"{', '.join(REQUIRED_PROBE_COLUMNS)}")
    names = [h.strip() for h in header]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise ProbeLogError(f"{p}: line 1 (header): column(s) named twice: {twice}")
    missing = [c for c in REQUIRED_PROBE_COLUMNS if c not in names]
    if missing:
        raise ProbeLogError(f"{p}: line 1 (header): missing column(s) {missing}; required: "
                            f"{', '.join(REQUIRED_PROBE_COLUMNS)}")
    unknown = [n for n in names if n not in REQUIRED_PROBE_COLUMNS + OPTIONAL_PROBE_COLUMNS]
    if unknown:
        _LOG.warning("%s: columns %s have no meaning in a probe log and are ignored", p, unknown)
    quarantine: list[dict[str, object]] = []
    rows: list[ProbeRow] = []
    n_read = 0
    for values in reader:
        line = reader.line_num
        if not any(v.strip() for v in values):
            continue
        n_read += 1
        if len(values) != len(names):
            quarantine.append({"file": str(p), "line": line, "field": ROW_FIELD,
                               "value": ",".join(values)[:200],
                               "reason": f"{P_FIELD_COUNT} ({len(values)}, expected "
                                         f"{len(names)})"})
            continue
        row, problems = _check_row(dict(zip(names, values)))
        for fld, val, why in problems:
            quarantine.append({"file": str(p), "line": line, "field": fld, "value": val,
                               "reason": why})
        if row is not None:
            rows.append(replace(row, line=line))
    rows.sort(key=lambda r: (r.probe_id, r.chainage_from_m))
    kept: list[ProbeRow] = []
    for r in rows:   # a stretch overlapping the one before it in the same probe
        prev = next((k for k in reversed(kept) if k.probe_id == r.probe_id), None)
        if prev is not None and r.chainage_from_m < prev.chainage_to_m - 1e-9:
            quarantine.append({"file": str(p), "line": r.line, "field": "chainage_from_m",
                               "value": f"{r.chainage_from_m:g}",
                               "reason": f"{P_OVERLAP} (line {prev.line}, to "
                                         f"{prev.chainage_to_m:g} m)"})
            continue
        kept.append(r)
    qt = pd.DataFrame(quarantine, columns=list(QUARANTINE_COLUMNS)).sort_values(
        "line", kind="stable").reset_index(drop=True)
    for q in qt.itertuples(index=False):
        _LOG.warning("%s: line %d, field %s = %r: %s (row quarantined, not used)", q.file,
                     q.line, q.field, q.value, q.reason)
    if not kept:
        raise ProbeLogError(f"{p}: no usable row ({n_read} read, {len(qt)} problem(s); first: "
                            + (f"line {qt.line[0]}, field {qt.field[0]}: {qt.reason[0]}"
                               if len(qt) else "the file has no data rows") + ")")
    first = {pid: min(r.chainage_from_m for r in kept if r.probe_id == pid)
             for pid in {r.probe_id for r in kept}}
    kept.sort(key=lambda r: (first[r.probe_id], r.probe_id, r.chainage_from_m))
    return ProbeLog(str(p), tuple(kept), qt, n_read)


def probe_rows_text(log: ProbeLog) -> list[str]:
    """One line per kept row, for the command line and the report."""
    out = []
    for r in log.rows:
        extra = []
        if math.isfinite(r.resistivity_ohmm):
            extra.append(f"{r.resistivity_ohmm:.3g} ohm-m measured")
        if math.isfinite(r.offset_m):
            extra.append(f"{r.offset_m:.1f} m off the axis"
                         + (f" at {r.bearing_deg:.0f} deg" if math.isfinite(r.bearing_deg)
                            else ""))
        if r.time is not None:
            extra.append(f"drilled {r.time:%Y-%m-%d %H:%M} UTC")
        if r.note:
            extra.append(r.note)
        out.append(f"{r.probe_id}: chainage {r.chainage_from_m:.1f}-{r.chainage_to_m:.1f} m "
                   f"{r.material}" + (f" ({'; '.join(extra)})" if extra else ""))
    return out


def describe_contacts(contacts: Sequence[ProbeContact]) -> list[str]:
    """One line per probed contact."""
    return [f"{c.probe_id}: {c.material_before} -> {c.material_after} at chainage "
            f"{c.chainage_m:.1f} m" + (f" (gap {c.lo_m:.1f}-{c.hi_m:.1f} m)" if c.hi_m > c.lo_m
                                       else f" (+/- {c.depth_resolution_m:g} m)")
            for c in contacts]


__all__ = ["REQUIRED_PROBE_COLUMNS", "OPTIONAL_PROBE_COLUMNS", "DEFAULT_DEPTH_RESOLUTION_M",
           "DEFAULT_RESISTIVITY_REL_ERROR",
           "DEFAULT_PROBE_ID", "PROBE_REASONS", "ProbeLogError", "ProbeRow", "ProbeContact",
           "ProbeRun", "ProbeLog", "read_probe_log", "probe_rows_text", "describe_contacts"]
