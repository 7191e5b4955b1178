"""The readings log's contract: its columns, the quarantine reasons, the counts of one read.

The format itself is described in DEVELOPERS.md ("File formats"); :mod:`tbminv.readings.reader`
reads and checks a log against it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

REQUIRED_COLUMNS: tuple[str, ...] = ("advance", "face_chainage_m", "a", "b", "m", "n",
                                     "current_a", "voltage_v")
"""Columns every readings log must have."""
OPTIONAL_NUMERIC_COLUMNS: tuple[str, ...] = ("cutterhead_deg", "stack_n", "voltage_std_v",
                                             "contact_ohm_a", "contact_ohm_m")
"""Optional numeric columns (empty cell or ``nan``: not logged for that reading)."""
OPTIONAL_COLUMNS: tuple[str, ...] = ("time",) + OPTIONAL_NUMERIC_COLUMNS
"""All optional columns with a meaning."""
LABEL_COLUMNS: tuple[str, ...] = ("a", "b", "m", "n")
SYNTHETIC_COLUMN = "synthetic"
"""Optional pass-through column: ``1`` on the rows of a simulated log (``tbminv simulate``
writes it); ``0`` or absent: measured readings. Any kept row marked ``1``/``true``/``yes``
makes the whole log synthetic (:attr:`tbminv.readings.reader.Readings.synthetic`)."""
SYNTHETIC_TRUE = frozenset({"1", "1.0", "true", "yes"})
"""Texts of the ``synthetic`` column read as "simulated" (case-insensitive)."""
QUARANTINE_COLUMNS: tuple[str, ...] = ("file", "line", "field", "value", "reason")
"""Columns of ``quarantine.csv`` (a contract)."""
ROW_FIELD = "(row)"
"""Field name in the quarantine for problems with a whole row."""

# quarantine reasons (fixed texts, counted in the summary)
R_MISSING = "missing field"
R_NON_NUMERIC = "non-numeric"
R_NOT_FINITE = "NaN or inf"
R_NOT_INTEGER = "not an integer"
R_CURRENT = "zero or negative current"
R_NEGATIVE = "negative value"
R_STACK = "stack count not a positive integer"
R_UNKNOWN_LABEL = "unknown electrode label"
R_TIME = "not an ISO 8601 time"
R_ANGLE = "cutterhead angle outside [0, 360)"
R_CHAINAGE_BACK = "face chainage going backwards within one advance"
R_DUPLICATE = "duplicated reading"
R_DUPLICATE_CONFLICT = "duplicated reading with different values"
R_FIELD_COUNT = "wrong number of fields"
R_ENCODING = "not UTF-8 text"
R_QUOTING = "bad quoting"
R_SAME = {("a", "b"): "A = B", ("a", "m"): "A = M", ("a", "n"): "A = N",
          ("b", "m"): "B = M", ("b", "n"): "B = N", ("m", "n"): "M = N"}
REASONS: tuple[str, ...] = (R_MISSING, R_NON_NUMERIC, R_NOT_FINITE, R_NOT_INTEGER, R_CURRENT,
                            R_NEGATIVE, R_STACK, R_UNKNOWN_LABEL, R_TIME, R_ANGLE,
                            R_CHAINAGE_BACK, R_DUPLICATE, R_DUPLICATE_CONFLICT, R_FIELD_COUNT,
                            R_ENCODING, R_QUOTING, *R_SAME.values())
"""Every reason the reader can give."""



class ReadingsError(ValueError):
    """A readings log that cannot be read at all.

    The message names the file and what was expected.
    """


# --------------------------------------------------------------------------- results
@dataclass
class ReadSummary:
    """Counts of one read.

    Attributes
    ----------
    file : str
        The log read.
    format : str
        ``"csv"``, ``"parquet"`` or ``"dataframe"``.
    rows_read : int
        Data rows read (header and blank lines not counted).
    rows_kept : int
        Rows that passed every check.
    rows_quarantined : int
        Rows with at least one quarantine entry (``rows_read = rows_kept + rows_quarantined``).
    blank_lines : int
        Empty or all-blank lines, skipped (not readings).
    by_reason : dict
        Reason -> number of rows quarantined for it (a row can count under several reasons).
    """

    file: str
    format: str
    rows_read: int = 0
    rows_kept: int = 0
    rows_quarantined: int = 0
    blank_lines: int = 0
    by_reason: dict[str, int] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Plain dictionary (JSON-ready)."""
        return {"file": self.file, "format": self.format, "rows_read": self.rows_read,
                "rows_kept": self.rows_kept, "rows_quarantined": self.rows_quarantined,
                "blank_lines": self.blank_lines, "quarantined_by_reason": dict(self.by_reason)}

    def to_text(self) -> str:
        """A few lines of plain text."""
        out = [f"readings log: {self.file} ({self.format})",
               f"rows read: {self.rows_read}", f"rows kept: {self.rows_kept}",
               f"rows quarantined: {self.rows_quarantined}"]
        if self.blank_lines:
            out.append(f"blank lines skipped: {self.blank_lines}")
        for reason, count in sorted(self.by_reason.items(), key=lambda kv: (-kv[1], kv[0])):
            out.append(f"  {count:>9d}  {reason}")
        return "\n".join(out)


__all__ = ["REQUIRED_COLUMNS", "OPTIONAL_NUMERIC_COLUMNS", "OPTIONAL_COLUMNS", "LABEL_COLUMNS",
           "SYNTHETIC_COLUMN", "SYNTHETIC_TRUE",
           "QUARANTINE_COLUMNS", "ROW_FIELD", "REASONS", "ReadingsError", "ReadSummary"]
