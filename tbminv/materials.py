"""Candidate materials from resistivity, and Archie's law.

Resistivity does not name a material: the handbook ranges of soils and rocks overlap over
decades (a water-bearing sand and a silt can both read 60 ohm-m). :func:`candidates` therefore
returns *every* class whose range contains the value (or overlaps an interval), never a single
answer.

The built-in table (:data:`HANDBOOK_TABLE`) follows the ranges of Reynolds 2011, *An
Introduction to Applied and Environmental Geophysics*, 2nd ed., table 7.1 (after Telford et al.
1990, *Applied Geophysics*, 2nd ed.). **The numbers were written from memory of that table and
must be checked against the book before they are relied on.** A site-calibrated table (face
probes, borehole logs) in TOML or CSV replaces it (:func:`load_material_table`).

Archie's law (Archie 1942, Trans. AIME 146:54-62), for clean (clay-free) granular media::

    F = a / phi**m                       formation factor
    rho = F * rho_w / Sw**n              bulk resistivity, ohm-m

with tortuosity factor ``a``, cementation exponent ``m``, saturation exponent ``n``, porosity
``phi``, water saturation ``Sw`` and pore-water resistivity ``rho_w``. It does not hold where
clay minerals conduct (surface conduction): use it as a what-if, not for clays or tills.
"""

from __future__ import annotations

import csv
import logging
import math
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import tomli_w

from tbminv.cache import atomic_write_text
from tbminv.tomlfile import read_toml

_LOG = logging.getLogger(__name__)

HANDBOOK_SOURCE = ("Reynolds 2011, An Introduction to Applied and Environmental Geophysics, "
                   "2nd ed., table 7.1 (after Telford et al. 1990) -- ranges written from memory "
                   "of the table: check them against the book")


class MaterialTableError(ValueError):
    """A material table that is not valid; the message names file, row and field."""


@dataclass(frozen=True)
class MaterialClass:
    """One soil, rock or water class with its resistivity range.

    Parameters
    ----------
    name : str
        Class name.
    low_ohmm, high_ohmm : float
        Range of resistivity, ohm-m (``0 < low_ohmm <= high_ohmm``).
    group : str
        ``"soil"``, ``"rock"``, ``"water"`` or anything a site table uses.
    note : str
        Free text (conditions, e.g. "saturated").
    """

    name: str
    low_ohmm: float
    high_ohmm: float
    group: str = ""
    note: str = ""

    def contains(self, rho_ohmm: float) -> bool:
        """True if ``low_ohmm <= rho_ohmm <= high_ohmm``."""
        return self.low_ohmm <= rho_ohmm <= self.high_ohmm

    def overlaps(self, lo_ohmm: float, hi_ohmm: float) -> bool:
        """True if the range shares any value with ``[lo_ohmm, hi_ohmm]``."""
        return self.low_ohmm <= hi_ohmm and lo_ohmm <= self.high_ohmm


@dataclass(frozen=True)
class MaterialTable:
    """A list of material classes and where the ranges come from."""

    classes: tuple[MaterialClass, ...]
    source: str

    def names(self) -> list[str]:
        """Class names in table order."""
        return [c.name for c in self.classes]


# Ranges from memory of Reynolds 2011 table 7.1 / Telford et al. 1990 (CHECK AGAINST THE BOOK).
# Where the table gives one value per condition (gravel dry / saturated) the range spans them.
HANDBOOK_TABLE = MaterialTable(
    classes=(
        MaterialClass("clay", 1.0, 100.0, "soil"),
        MaterialClass("till (boulder clay)", 15.0, 35.0, "soil",
                      "narrow handbook range; sandy tills can be far more resistive"),
        MaterialClass("marl", 3.0, 70.0, "soil"),
        MaterialClass("silt", 10.0, 200.0, "soil", "least sure of these ranges"),
        MaterialClass("alluvium", 10.0, 800.0, "soil"),
        MaterialClass("sand", 10.0, 1000.0, "soil", "low end saturated, high end dry"),
        MaterialClass("gravel", 100.0, 1400.0, "soil",
                      "about 100 saturated, about 1400 dry"),
        MaterialClass("shale", 20.0, 2000.0, "rock"),
        MaterialClass("sandstone", 1.0, 7.4e8, "rock"),
        MaterialClass("limestone", 50.0, 1.0e7, "rock"),
        MaterialClass("chalk", 50.0, 300.0, "rock", "least sure of these ranges"),
        MaterialClass("granite", 300.0, 1.3e6, "rock"),
        MaterialClass("basalt", 10.0, 1.3e7, "rock"),
        MaterialClass("fresh groundwater", 10.0, 100.0, "water"),
        MaterialClass("saline groundwater", 0.05, 1.0, "water", "sea water is about 0.2"),
    ),
    source=HANDBOOK_SOURCE,
)


@dataclass(frozen=True)
class Candidate:
    """A material class whose range contains a resistivity.

    ``position`` is where the value sits in the class's range on a log scale (0 at the low
    end, 1 at the high end; for an interval query, of the interval's geometric centre, clipped).
    """

    material: MaterialClass
    position: float

    @property
    def name(self) -> str:
        """Class name."""
        return self.material.name


def candidates(rho_ohmm: float, table: MaterialTable | None = None, *,
               hi_ohmm: float | None = None) -> list[Candidate]:
    """Every class of the table whose range contains ``rho_ohmm`` (or overlaps an interval).

    Parameters
    ----------
    rho_ohmm : float
        Resistivity, ohm-m; with ``hi_ohmm`` the low end of an interval.
    table : MaterialTable, optional
        Default :data:`HANDBOOK_TABLE`.
    hi_ohmm : float, optional
        High end of an interval (e.g. the uncertainty of a fitted resistivity), ohm-m.

    Returns
    -------
    list of Candidate
        In table order. Several entries are the rule, not the exception: resistivity alone
        does not decide between them.
    """
    tbl = table or HANDBOOK_TABLE
    lo = float(rho_ohmm)
    hi = float(hi_ohmm) if hi_ohmm is not None else lo
    if not (lo > 0 and hi >= lo and math.isfinite(hi)):
        raise ValueError(f"candidates: expected 0 < rho ({lo!r}) <= hi ({hi!r}) ohm-m, finite")
    centre = math.sqrt(lo * hi)
    out = []
    for c in tbl.classes:
        if c.overlaps(lo, hi):
            span = math.log10(c.high_ohmm) - math.log10(c.low_ohmm)
            pos = 0.5 if span == 0 else (math.log10(centre) - math.log10(c.low_ohmm)) / span
            out.append(Candidate(c, float(min(max(pos, 0.0), 1.0))))
    return out


def describe_candidates(rho_ohmm: float, table: MaterialTable | None = None, *,
                        hi_ohmm: float | None = None) -> str:
    """One line of text: the candidate classes of a value or interval and the table source."""
    tbl = table or HANDBOOK_TABLE
    found = candidates(rho_ohmm, tbl, hi_ohmm=hi_ohmm)
    val = (f"{rho_ohmm:.3g} ohm-m" if hi_ohmm is None
           else f"{rho_ohmm:.3g}-{hi_ohmm:.3g} ohm-m")
    if not found:
        return f"{val}: no class of the table contains it ({tbl.source})"
    names = ", ".join(c.name for c in found)
    more = " (ranges overlap: resistivity alone does not decide)" if len(found) > 1 else ""
    return f"{val}: {names}{more}"


# --------------------------------------------------------------------------- site tables


def _row_class(row: dict[str, Any], where: str) -> MaterialClass:
    def num(key: str) -> float:
        if key not in row or row[key] in (None, ""):
            raise MaterialTableError(f"{where}: field {key!r} missing; expected a number, ohm-m")
        try:
            v = float(row[key])
        except (TypeError, ValueError):
            raise MaterialTableError(f"{where}: field {key!r} = {row[key]!r}: expected a "
                                     "number, ohm-m") from None
        if not (v > 0 and math.isfinite(v)):
            raise MaterialTableError(f"{where}: field {key!r} = {row[key]!r}: expected a "
                                     "finite number > 0, ohm-m")
        return v

    name = str(row.get("name") or "").strip()
    if not name:
        raise MaterialTableError(f"{where}: field 'name' missing or empty")
    lo, hi = num("low_ohmm"), num("high_ohmm")
    if lo > hi:
        raise MaterialTableError(f"{where}: low_ohmm = {lo} > high_ohmm = {hi}")
    return MaterialClass(name, lo, hi, str(row.get("group") or ""), str(row.get("note") or ""))


def load_material_table(path: str | Path) -> MaterialTable:
    """Read a site-calibrated material table (TOML or CSV); it replaces the handbook table.

    TOML::

        source = "face probes, drive 2, rings 100-400"
        [[material]]
        name = "clay"
        low_ohmm = 8.0
        high_ohmm = 20.0
        group = "soil"          # optional
        note = "grey, stiff"    # optional

    CSV: columns ``name, low_ohmm, high_ohmm`` (``group``, ``note`` optional); the source is the
    file name unless a ``# source: ...`` first line gives it.

    Raises
    ------
    MaterialTableError
        Naming the file, the row (``[[material]]`` index or CSV line) and the field.
    """
    p = Path(path)
    if not p.exists():
        raise MaterialTableError(f"{p}: material table not found")
    classes: list[MaterialClass] = []
    if p.suffix.lower() == ".toml":
        doc = read_toml(p, MaterialTableError, "material table")
        rows = doc.get("material")
        if not isinstance(rows, list) or not rows:
            raise MaterialTableError(f"{p}: no [[material]] tables")
        for i, row in enumerate(rows):
            if not isinstance(row, dict):
                raise MaterialTableError(f"{p}: [[material]] {i + 1}: expected a table")
            classes.append(_row_class(row, f"{p}: [[material]] {i + 1}"))
        source = str(doc.get("source") or f"site table {p.name}")
    elif p.suffix.lower() == ".csv":
        lines = p.read_text(encoding="utf-8").splitlines()
        source = f"site table {p.name}"
        first = 0
        if lines and lines[0].lstrip().startswith("#"):
            head = lines[0].lstrip("# ").strip()
            if head.lower().startswith("source:"):
                source = head[len("source:"):].strip()
            first = 1
        reader = csv.DictReader(lines[first:])
        missing = {"name", "low_ohmm", "high_ohmm"} - set(reader.fieldnames or [])
        if missing:
            raise MaterialTableError(f"{p}: line {first + 1} (header): missing columns "
                                     f"{sorted(missing)}")
        for k, row in enumerate(reader):
            classes.append(_row_class(row, f"{p}: line {first + 2 + k}"))
        if not classes:
            raise MaterialTableError(f"{p}: no rows")
    else:
        raise MaterialTableError(f"{p}: expected a .toml or .csv material table")
    return MaterialTable(tuple(classes), source)


def save_material_table(table: MaterialTable, path: str | Path) -> Path:
    """Write a material table as TOML (the format :func:`load_material_table` reads), atomically.

    Parameters
    ----------
    table : MaterialTable
    path : str or Path
        A ``.toml`` file.
    """
    doc = {"source": table.source,
           "material": [{"name": c.name, "low_ohmm": float(c.low_ohmm),
                         "high_ohmm": float(c.high_ohmm),
                         **({"group": c.group} if c.group else {}),
                         **({"note": c.note} if c.note else {})} for c in table.classes]}
    return atomic_write_text(Path(path), tomli_w.dumps(doc))


# --------------------------------------------------------------------------- Archie's law


def _check(name: str, v: Any, lo: float = 0.0, hi: float = math.inf, *,
           hi_inclusive: bool = True) -> np.ndarray:
    a = np.asarray(v, dtype=float)
    bad = ~(a > lo) | (a > hi if hi_inclusive else a >= hi) | ~np.isfinite(a)
    if np.any(bad):
        raise ValueError(f"Archie: {name} = {v!r}: expected values in ({lo}, {hi}]")
    return a


def formation_factor(porosity: Any, a: float = 1.0, m: float = 2.0) -> Any:
    """Archie formation factor ``F = a / phi**m`` (Archie 1942), dimensionless."""
    phi = _check("porosity", porosity, 0.0, 1.0)
    return a / phi**m


def archie_resistivity(porosity: Any, water_resistivity_ohmm: Any, saturation: Any = 1.0,
                       a: float = 1.0, m: float = 2.0, n: float = 2.0) -> Any:
    """Bulk resistivity ``rho = a rho_w phi**-m Sw**-n``, ohm-m (Archie 1942).

    Parameters
    ----------
    porosity : float or array
        Porosity ``phi``, fraction (0, 1].
    water_resistivity_ohmm : float or array
        Pore-water resistivity ``rho_w``, ohm-m.
    saturation : float or array
        Water saturation ``Sw``, fraction (0, 1].
    a, m, n : float
        Tortuosity factor, cementation and saturation exponents.
    """
    rho_w = _check("water_resistivity_ohmm", water_resistivity_ohmm)
    sw = _check("saturation", saturation, 0.0, 1.0)
    return formation_factor(porosity, a, m) * rho_w / sw**n


def archie_porosity(resistivity_ohmm: Any, water_resistivity_ohmm: Any, saturation: Any = 1.0,
                    a: float = 1.0, m: float = 2.0, n: float = 2.0) -> Any:
    """Porosity from bulk resistivity by Archie's law: ``(a rho_w / (rho Sw**n))**(1/m)``."""
    rho = _check("resistivity_ohmm", resistivity_ohmm)
    rho_w = _check("water_resistivity_ohmm", water_resistivity_ohmm)
    sw = _check("saturation", saturation, 0.0, 1.0)
    return (a * rho_w / (rho * sw**n)) ** (1.0 / m)


def archie_saturation(resistivity_ohmm: Any, water_resistivity_ohmm: Any, porosity: Any,
                      a: float = 1.0, m: float = 2.0, n: float = 2.0) -> Any:
    """Water saturation by Archie's law: ``(a rho_w / (rho phi**m))**(1/n)`` (may exceed 1)."""
    rho = _check("resistivity_ohmm", resistivity_ohmm)
    rho_w = _check("water_resistivity_ohmm", water_resistivity_ohmm)
    phi = _check("porosity", porosity, 0.0, 1.0)
    return (a * rho_w / (rho * phi**m)) ** (1.0 / n)


def archie_water_resistivity(resistivity_ohmm: Any, porosity: Any, saturation: Any = 1.0,
                             a: float = 1.0, m: float = 2.0, n: float = 2.0) -> Any:
    """Pore-water resistivity by Archie's law: ``rho Sw**n / F``, ohm-m."""
    rho = _check("resistivity_ohmm", resistivity_ohmm)
    sw = _check("saturation", saturation, 0.0, 1.0)
    return rho * sw**n / formation_factor(porosity, a, m)


def classify_values(values_ohmm: Iterable[tuple[str, float, float | None]],
                    table: MaterialTable | None = None
                    ) -> list[tuple[str, float, float | None, list[Candidate]]]:
    """Candidates of labelled resistivities or intervals.

    ``values_ohmm`` holds (label, rho or interval low, interval high or None), ohm-m; entries
    without a positive finite value are left out, a high end below the low end is dropped.
    Returns (label, low, high or None, candidates) per kept entry.
    """
    out = []
    for label, lo, hi in values_ohmm:
        if not (lo is not None and np.isfinite(lo) and lo > 0):
            continue
        if hi is not None and not (np.isfinite(hi) and hi >= lo):
            hi = None
        out.append((label, float(lo), hi, candidates(lo, table, hi_ohmm=hi)))
    return out


def candidate_table_rows(values_ohmm: Iterable[tuple[str, float, float | None]],
                         table: MaterialTable | None = None) -> list[tuple[str, str, str]]:
    """Rows (label, value text, candidate names) for a report table.

    ``values_ohmm`` holds (label, rho or interval low, interval high or None).
    """
    rows = []
    for label, lo, hi, found in classify_values(values_ohmm, table):
        val = f"{lo:.3g}" if hi is None else f"{lo:.3g}-{hi:.3g}"
        rows.append((label, f"{val} ohm-m", ", ".join(c.name for c in found) or "none"))
    return rows


__all__ = ["MaterialClass", "MaterialTable", "MaterialTableError", "Candidate", "HANDBOOK_TABLE",
           "HANDBOOK_SOURCE", "candidates", "describe_candidates", "load_material_table",
           "save_material_table",
           "formation_factor", "archie_resistivity", "archie_porosity", "archie_saturation",
           "archie_water_resistivity", "classify_values", "candidate_table_rows"]
