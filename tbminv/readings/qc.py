"""Quality control of checked readings and an error model per advance or per shift.

What is computed, per reading of a :class:`tbminv.readings.reader.Readings` table:

* ``r_ohm``: transfer resistance ``voltage_v / current_a``, ohm.
* Reciprocal pairs, found automatically within one advance: the current and potential dipoles
  swapped (A,B <-> M,N; found with the orientation of each dipole ignored, as in pyGIMLi's
  ``uniqueERTIndex(unify=True)``, which builds the keys here). The two readings are then
  compared **signed, in one orientation**: by reciprocity, current in at M and out at N with
  the voltage taken as V(A) - V(B) gives the same transfer resistance, sign included, as the
  normal reading (A -> B, V(M) - V(N)); a reciprocal logged with a dipole the other way round
  is turned back (its R times -1 per reversed dipole) before the comparison. The signed
  difference is ``dr_ohm = Rn - Rr`` (oriented) and the reciprocal error
  ``|Rn - Rr| / ((|Rn| + |Rr|) / 2)`` (LaBrecque et al. 1996, Geophysics 61(2):538-548, with
  the mean of the magnitudes below the line): a polarity reversal of one reading gives 2
  (200 %), not 0.
* Stacking error: ``voltage_std_v`` itself. The readings-log format defines ``voltage_std_v``
  as the standard error of the logged (stacked) voltage, V; ``stack_n`` is for the record and
  does not enter (the error is not divided by ``sqrt(stack_n)`` here).
* Flags (bit mask ``qc_flags``, see :class:`Flag`): reciprocal error above a maximum, stacking
  error above a relative maximum, contact resistance above a maximum, voltage below a noise
  floor, sign against the neighbouring advances of the same quadrupole, magnitude outlier
  against them, no error model. Flagged readings stay in the table with ``valid = False``:
  they are excluded from inversion, not deleted.
* An error model ``e = a + b |R|`` (ohm), fitted to the normal-reciprocal differences per
  advance, per shift or for the whole log (Slater et al. 2000, J. Appl. Geophys. 44:85-102),
  with the pairs binned by ``|R|`` into equal-count bins and the root mean square of the
  signed differences ``Rn - Rr`` in each bin fitted (Koestel et al. 2008; the same binning and
  bin count rule as pyGIMLi's ``fitReciprocalErrorModel``). The RMS, not the standard
  deviation, so that a systematic normal-reciprocal offset stays in the error. The fit is
  weighted by 1 / (bin RMS), because a bin's RMS is uncertain in proportion to itself, and
  constrained to
  ``a, b >= 0`` (non-negative least squares). Where a group has too few pairs, the fallback
  ``fallback_a_ohm`` / ``fallback_b`` is used only if the user set it; otherwise the readings
  of that group get no error and the flag ``NO_ERROR_MODEL`` (never a silent default).

Settings are a plain dataclass, :class:`QCSettings`, loadable from a TOML table ``[qc]``.
"""

from __future__ import annotations

import enum
import logging
import math
import os
import warnings
from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy.optimize import nnls

from tbminv.gimli import ert
from tbminv.readings.reader import LABEL_COLUMNS, Readings
from tbminv.tomlfile import read_toml

_LOG = logging.getLogger(__name__)


class QCError(ValueError):
    """Bad QC settings or a QC request the data cannot serve (message says what to set)."""


class Flag(enum.IntFlag):
    """QC flags of a reading (bit mask in the ``qc_flags`` column)."""

    RECIPROCAL = 1
    """Reciprocal error above ``reciprocal_max``."""
    STACKING = 2
    """Stacking error above ``stack_max_rel`` of the voltage."""
    CONTACT = 4
    """Contact resistance of A or M above ``contact_max_ohm``."""
    LOW_VOLTAGE = 8
    """|voltage| below ``voltage_floor_v``."""
    SIGN = 16
    """Sign opposite to the median of the same quadrupole over the neighbouring advances
    (and its own)."""
    OUTLIER = 32
    """|R| off that median by more than ``outlier_max_rel``."""
    NO_ERROR_MODEL = 64
    """No error model for the reading's group (too few pairs and no fallback set)."""
    NEGATIVE_RHOA = 128
    """Negative apparent resistivity: the sign is opposite to the same quadrupole's response
    in a homogeneous ground (set by :func:`tbminv.readings.advance.flag_negative_apparent`
    when the caller knows that sign). The image inversion and the contact fit work on log
    apparent resistivity and cannot take it: the reading is counted, kept in the table and
    the flags file, and left out of both."""


FLAG_NAMES: dict[str, int] = {f.name.lower(): int(f.value) for f in Flag}
"""Flag name -> bit value (``reciprocal``, ``stacking``, ...)."""


def flag_names(mask: int) -> list[str]:
    """Names of the flags set in ``mask``."""
    return [name for name, bit in FLAG_NAMES.items() if int(mask) & bit]


# ----------------------------------------------------------------------- settings
@dataclass
class QCSettings:
    """QC thresholds and error-model choices (TOML table ``[qc]``).

    Attributes
    ----------
    reciprocal_max : float
        Largest reciprocal error (fraction) of a good pair; 0.1 = 10 % (common practice,
        no source; pyGIMLi's ``reciprocalProcessing`` uses 0.2).
    contact_max_ohm : float
        Contact resistance above which A or M is suspect, ohm; 20 kohm (common practice: tens
        of kohm is suspect, no single source).
    voltage_floor_v : float
        Noise floor, V; |voltage| below it is flagged. 1e-4 V, the absolute voltage error
        pyGIMLi's ``ert.simulate`` assumes by default.
    stack_max_rel : float
        Largest stacking error relative to |voltage|; 0.05 (common practice, no source).
    neighbour_advances : int
        Advances on each side compared for sign and outliers (same quadrupole).
    min_neighbours : int
        Neighbouring advances needed before sign or outlier flags are given.
    outlier_max_rel : float
        |R| more than (1 + this) times or less than 1 / (1 + this) times the neighbours'
        median is an outlier; 0.5 (our choice, no source).
    error_model_group : str
        ``"advance"`` (one model per advance), ``"shift"`` (per shift, needs ``time``) or
        ``"log"`` (one for the whole log).
    shift_hours : float
        Length of a shift, h.
    shift_start_hour : float
        Hour of day (UTC) at which shifts start.
    min_pairs : int
        Fewest reciprocal pairs to fit a group's model (below: fallback or none).
    n_bins : int or None
        Bins for the fit; None: pyGIMLi's rule ``max(min(n_pairs // 30, 30), 4)``.
    error_model : str
        ``"reciprocal"`` (fit, fallback where too few pairs) or ``"fixed"`` (always the
        fallback; both fallback values must then be set).
    fallback_a_ohm : float or None
        Absolute part of the fallback model, ohm. None: no fallback (the default).
    fallback_b : float or None
        Relative part of the fallback model (fraction of |R|). None: no fallback.
    fit_reciprocal_max : float or None
        Pairs with a larger reciprocal error are left out of the error-model fit (blunders).
        None (default): every pair whose two readings carry no other flag is used; the
        ``reciprocal_max`` cut is not applied to the fit, as it would remove the large
        relative differences of small |R| and bias ``a`` low.
    """

    reciprocal_max: float = 0.1
    contact_max_ohm: float = 20_000.0
    voltage_floor_v: float = 1e-4
    stack_max_rel: float = 0.05
    neighbour_advances: int = 2
    min_neighbours: int = 2
    outlier_max_rel: float = 0.5
    error_model_group: str = "advance"
    shift_hours: float = 8.0
    shift_start_hour: float = 6.0
    min_pairs: int = 20
    n_bins: int | None = None
    error_model: str = "reciprocal"
    fallback_a_ohm: float | None = None
    fallback_b: float | None = None
    fit_reciprocal_max: float | None = None

    def __post_init__(self) -> None:
        self.validate()

    @property
    def has_fallback(self) -> bool:
        """True if the user set both fallback values."""
        return self.fallback_a_ohm is not None and self.fallback_b is not None

    def validate(self, source: str = "QCSettings") -> None:
        """Raise :class:`QCError` naming the bad setting."""
        def bad(key: str, expected: str) -> QCError:
            return QCError(f"{source}: [qc] {key} = {getattr(self, key)!r}; expected {expected}")

        for key in ("reciprocal_max", "contact_max_ohm", "voltage_floor_v", "stack_max_rel",
                    "outlier_max_rel", "shift_hours"):
            v = getattr(self, key)
            if not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
                raise bad(key, "a finite number >= 0")
        for key in ("neighbour_advances", "min_neighbours", "min_pairs"):
            v = getattr(self, key)
            if not isinstance(v, int) or v < 0:
                raise bad(key, "an integer >= 0")
        if self.min_pairs < 2:
            raise bad("min_pairs", "an integer >= 2")
        if self.n_bins is not None and (not isinstance(self.n_bins, int) or self.n_bins < 2):
            raise bad("n_bins", "an integer >= 2 or absent")
        if self.error_model_group not in ("advance", "shift", "log"):
            raise bad("error_model_group", "'advance', 'shift' or 'log'")
        if self.error_model not in ("reciprocal", "fixed"):
            raise bad("error_model", "'reciprocal' or 'fixed'")
        for key in ("fallback_a_ohm", "fallback_b", "fit_reciprocal_max"):
            v = getattr(self, key)
            if v is not None and (not isinstance(v, (int, float)) or not math.isfinite(v)
                                  or v < 0):
                raise bad(key, "a finite number >= 0 or absent")
        if (self.fallback_a_ohm is None) != (self.fallback_b is None):
            raise QCError(f"{source}: [qc] set both fallback_a_ohm and fallback_b, or neither")
        if self.error_model == "fixed" and not self.has_fallback:
            raise QCError(f"{source}: [qc] error_model = 'fixed' needs fallback_a_ohm and "
                          "fallback_b")

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], source: str = "<dict>") -> QCSettings:
        """Settings from a plain mapping (the ``[qc]`` table); unknown keys are an error."""
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - names)
        if unknown:
            raise QCError(f"{source}: [qc] unknown key(s) {', '.join(unknown)}; expected some "
                          f"of {', '.join(sorted(names))}")
        try:
            return cls(**dict(d))
        except QCError as exc:
            raise QCError(str(exc).replace("QCSettings", source, 1)) from None

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str]) -> QCSettings:
        """Settings from the ``[qc]`` table of a TOML file (defaults if the table is absent)."""
        path = Path(path)
        doc = read_toml(path, QCError, "settings file")
        table = doc.get("qc", {})
        if not isinstance(table, dict):
            raise QCError(f"{path}: [qc] must be a table")
        return cls.from_dict(table, source=str(path))

    def to_dict(self) -> dict[str, Any]:
        """Plain dictionary (None values left out, as TOML has no null)."""
        return {k: v for k, v in asdict(self).items() if v is not None}


# ------------------------------------------------------------------- error model
def reciprocal_error(r_normal: Any, r_reciprocal: Any) -> np.ndarray:
    """Signed reciprocal error ``|Rn - Rr| / ((|Rn| + |Rr|) / 2)`` (LaBrecque et al. 1996).

    Parameters
    ----------
    r_normal, r_reciprocal : array_like
        Transfer resistances of the normal and the reciprocal reading, ohm, in one
        orientation (the reciprocal's dipoles as the normal's swapped: by reciprocity the two
        are equal, sign included; see :func:`reciprocal_orientation`).

    Returns
    -------
    numpy.ndarray
        Dimensionless error (0.1 = 10 %); 2 for a reading of the opposite sign and equal
        magnitude (a polarity reversal).
    """
    rn = np.asarray(r_normal, dtype=float)
    rr = np.asarray(r_reciprocal, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.abs(2.0 * (rn - rr) / (np.abs(rn) + np.abs(rr)))


def reciprocal_orientation(table: pd.DataFrame, i_normal: np.ndarray,
                           i_reciprocal: np.ndarray) -> np.ndarray:
    """Sign that turns each reciprocal reading into the normal's orientation, +1 or -1.

    The reciprocal of the normal ``A B M N`` in the same orientation is ``M N A B``; each of
    its dipoles logged the other way round (``N M`` or ``B A``) changes the sign of R once.

    Parameters
    ----------
    table : pandas.DataFrame
        Readings with the label columns ``a b m n`` (empty or NaN for a pole).
    i_normal, i_reciprocal : ndarray of int
        Positions of the paired readings (:func:`find_reciprocal_pairs`).

    Returns
    -------
    ndarray of float
        Multiply the reciprocal's R by it before comparing.
    """
    lab = {c: table[c].astype(object).where(table[c].notna(), "").astype(str).to_numpy(object)
           for c in LABEL_COLUMNS}
    a, b, m, n = (lab[c][i_normal] for c in LABEL_COLUMNS)
    ra, rb, rm, rn = (lab[c][i_reciprocal] for c in LABEL_COLUMNS)
    cur = np.where((ra == m) & (rb == n), 1.0, -1.0)
    pot = np.where((rm == a) & (rn == b), 1.0, -1.0)
    return cur * pot


def default_bin_count(n_pairs: int) -> int:
    """PyGIMLi's bin count rule of ``fitReciprocalErrorModel``: ``max(min(n // 30, 30), 4)``."""
    return int(max(min(n_pairs // 30, 30), 4))


@dataclass
class ErrorModel:
    """``e = a_ohm + b |R|``, ohm, for one group of readings.

    ``source`` is ``"reciprocal fit"``, ``"fallback"`` or ``"none"`` (then ``a_ohm`` and
    ``b`` are NaN). ``bin_r_ohm`` / ``bin_std_ohm`` are the binned data the fit used
    (``bin_std_ohm``: the root mean square of the signed differences in each bin, ohm).
    """

    group: str
    a_ohm: float
    b: float
    source: str
    n_pairs: int = 0
    n_bins: int = 0
    bin_r_ohm: tuple[float, ...] = ()
    bin_std_ohm: tuple[float, ...] = ()
    note: str = ""

    def error_ohm(self, r_ohm: Any) -> np.ndarray:
        """Error of readings with transfer resistance ``r_ohm``, ohm."""
        return self.a_ohm + self.b * np.abs(np.asarray(r_ohm, dtype=float))

    def to_dict(self) -> dict[str, Any]:
        """Plain dictionary (JSON-ready; NaN as None)."""
        d = asdict(self)
        for k in ("a_ohm", "b"):
            if not math.isfinite(d[k]):
                d[k] = None
        d["bin_r_ohm"] = list(self.bin_r_ohm)
        d["bin_std_ohm"] = list(self.bin_std_ohm)
        return d


def fit_error_model(r_mean_ohm: Any, dr_ohm: Any, n_bins: int | None = None,
                    group: str = "") -> ErrorModel:
    """Fit ``e = a + b |R|`` to normal-reciprocal differences (binned, weighted NNLS).

    Parameters
    ----------
    r_mean_ohm : array_like
        Mean |R| of each pair, ohm.
    dr_ohm : array_like
        Signed difference ``Rn - Rr`` of each pair in one orientation, ohm.
    n_bins : int, optional
        Equal-count bins along |R|; default :func:`default_bin_count`.
    group : str
        Name of the group (for the record).

    Returns
    -------
    ErrorModel
        ``e`` estimates the root mean square of ``Rn - Rr`` at ``|R|`` (a systematic
        offset between normal and reciprocal readings included).
    """
    r = np.abs(np.asarray(r_mean_ohm, dtype=float))
    d = np.asarray(dr_ohm, dtype=float)
    keep = np.isfinite(r) & np.isfinite(d)
    r, d = r[keep], d[keep]
    n = len(r)
    nb = int(n_bins or default_bin_count(n))
    nb = max(1, min(nb, n // 2))
    if n < 4 or nb < 2:
        raise QCError(f"error model {group!r}: {n} reciprocal pairs are too few to fit")
    order = np.argsort(r)
    r, d = r[order], d[order]
    edges = np.linspace(0, n, nb + 1).astype(int)
    mean_r = np.array([r[edges[k]:edges[k + 1]].mean() for k in range(nb)])
    std_d = np.array([math.sqrt(float(np.mean(d[edges[k]:edges[k + 1]] ** 2)))
                      for k in range(nb)])
    use = np.isfinite(std_d) & (std_d > 0)
    if use.sum() < 2:
        raise QCError(f"error model {group!r}: the reciprocal differences do not vary")
    g = np.column_stack([np.ones(use.sum()), mean_r[use]])
    w = 1.0 / std_d[use]
    ab, _ = nnls(g * w[:, None], std_d[use] * w)
    return ErrorModel(group=group, a_ohm=float(ab[0]), b=float(ab[1]), source="reciprocal fit",
                      n_pairs=n, n_bins=nb, bin_r_ohm=tuple(mean_r.tolist()),
                      bin_std_ohm=tuple(std_d.tolist()))


# ------------------------------------------------------------------ pair finding
class _Indices:
    """Minimal stand-in for a DataContainerERT (``a b m n``, sensor count, size).

    pyGIMLi's ``uniqueERTIndex`` then builds the keys for all readings in one vectorised call.
    """

    def __init__(self, codes: Mapping[str, np.ndarray], n_sensors: int) -> None:
        self._codes = codes
        self._n = n_sensors

    def __getitem__(self, key: str) -> np.ndarray:
        return self._codes[key]

    def sensorCount(self) -> int:  # noqa: N802 - pyGIMLi's name
        return self._n

    def size(self) -> int:
        return len(self._codes["a"])


def _label_codes(table: pd.DataFrame) -> tuple[dict[str, np.ndarray], int]:
    cats = None
    codes: dict[str, np.ndarray] = {}
    for c in LABEL_COLUMNS:
        col = table[c]
        if not isinstance(col.dtype, pd.CategoricalDtype):
            col = col.astype("category")
        if cats is None:
            cats = list(col.cat.categories)
        elif list(col.cat.categories) != cats:
            col = col.cat.set_categories(cats)
        codes[c] = col.cat.codes.to_numpy().astype(np.int64)
    return codes, len(cats or [])


def quadrupole_keys(table: pd.DataFrame, unify: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Forward and reversed (A,B <-> M,N) keys of every reading.

    Built by pyGIMLi's ``uniqueERTIndex`` (poles have code -1).
    """
    codes, ncat = _label_codes(table)
    data = _Indices(codes, ncat)
    fwd = np.asarray(ert.uniqueERTIndex(data, unify=unify), dtype=np.int64)
    rev = np.asarray(ert.uniqueERTIndex(data, unify=unify, reverse=True), dtype=np.int64)
    return fwd, rev


def find_reciprocal_pairs(table: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Positions (into ``table``) of normal and reciprocal readings, paired within advances.

    The normal of a pair is the reading whose (unified) key is the smaller of its forward and
    reversed keys. Repeated readings of one quadrupole in one advance pair in file order; a
    reading without a partner is left unpaired.
    """
    if len(table) == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    fwd, rev = quadrupole_keys(table, unify=True)
    frame = pd.DataFrame({"adv": table["advance"].to_numpy(), "canon": np.minimum(fwd, rev),
                          "normal": fwd < rev, "pos": np.arange(len(table))})
    frame = frame[fwd != rev]
    frame["occ"] = frame.groupby(["adv", "canon", "normal"], sort=False).cumcount()
    nrm = frame[frame["normal"]]
    rec = frame[~frame["normal"]]
    merged = nrm.merge(rec, on=["adv", "canon", "occ"], suffixes=("_n", "_r"))
    merged = merged.sort_values("pos_n")
    return merged["pos_n"].to_numpy(np.int64), merged["pos_r"].to_numpy(np.int64)


# --------------------------------------------------------------------------- QC
@dataclass
class QCResult:
    """Readings with QC columns, reciprocal pairs and error models.

    Attributes
    ----------
    table : pandas.DataFrame
        The readings table plus ``r_ohm``, ``reciprocal_error`` (NaN if unpaired),
        ``reciprocal_diff_ohm`` (signed ``Rn - Rr`` of its pair in the normal's orientation),
        ``partner_line`` (line of the reciprocal partner, -1 if none), ``stack_error_v``,
        ``error_group``, ``err_ohm`` (NaN where no error model), ``err_rel``
        (``err_ohm / |r_ohm|``), ``qc_flags`` (int, :class:`Flag` bits), ``valid`` (bool).
    pairs : pandas.DataFrame
        One row per pair: ``advance, line_normal, line_reciprocal, r_normal_ohm,
        r_reciprocal_ohm`` (as logged), ``r_mean_ohm`` (mean magnitude), ``dr_ohm`` (signed
        ``Rn - Rr`` in one orientation), ``reciprocal_error, used_in_fit``.
    error_models : dict
        Group name -> :class:`ErrorModel`.
    settings : QCSettings
        The settings used.
    sign_checked : bool
        True once readings were checked for a negative apparent resistivity
        (:func:`tbminv.readings.advance.flag_negative_apparent`).
    """

    table: pd.DataFrame
    pairs: pd.DataFrame
    error_models: dict[str, ErrorModel]
    settings: QCSettings
    sign_checked: bool = False

    def flag_counts(self) -> dict[str, int]:
        """Readings carrying each flag."""
        f = self.table["qc_flags"].to_numpy()
        return {name: int(((f & bit) != 0).sum()) for name, bit in FLAG_NAMES.items()}

    def flags_per_electrode(self) -> pd.DataFrame:
        """Flagged readings per electrode label (rows) and flag (columns).

        A reading counts for every electrode it uses.
        """
        f = self.table["qc_flags"].to_numpy()
        rows = []
        for c in LABEL_COLUMNS:
            lab = self.table[c].astype(object)
            for name, bit in FLAG_NAMES.items():
                hit = (f & bit) != 0
                if hit.any():
                    vc = lab[hit].dropna().value_counts()
                    rows.extend((str(k), name, int(v)) for k, v in vc.items())
        if not rows:
            return pd.DataFrame(columns=list(FLAG_NAMES))
        frame = pd.DataFrame(rows, columns=["electrode", "flag", "count"])
        return frame.pivot_table(index="electrode", columns="flag", values="count",
                                 aggfunc="sum", fill_value=0)

    def summary(self) -> dict[str, Any]:
        """Plain dictionary for qc_summary.json."""
        t = self.table
        models = {k: m.to_dict() for k, m in self.error_models.items()}
        by_source: dict[str, int] = {}
        for m in self.error_models.values():
            by_source[m.source] = by_source.get(m.source, 0) + 1
        rec = self.pairs["reciprocal_error"].to_numpy() if len(self.pairs) else np.zeros(0)
        return {
            "readings": int(len(t)),
            "valid": int(t["valid"].sum()) if len(t) else 0,
            "flagged": int((t["qc_flags"] != 0).sum()) if len(t) else 0,
            "flags": self.flag_counts(),
            "negative_apparent_resistivity": (self.flag_counts()["negative_rhoa"]
                                              if self.sign_checked else None),
            "reciprocal_pairs": int(len(self.pairs)),
            "reciprocal_error_median": float(np.median(rec)) if len(rec) else None,
            "reciprocal_error_p90": float(np.percentile(rec, 90)) if len(rec) else None,
            "advances": int(t["advance"].nunique()) if len(t) else 0,
            "error_model_group": self.settings.error_model_group,
            "error_models_by_source": by_source,
            "error_models": models,
            "settings": self.settings.to_dict(),
        }


def _groups(table: pd.DataFrame, settings: QCSettings) -> np.ndarray:
    kind = settings.error_model_group
    if kind == "advance":
        return table["advance"].astype(str).to_numpy(dtype=object)
    if kind == "log":
        return np.full(len(table), "log", dtype=object)
    t = table["time"]
    if t.isna().all():
        raise QCError("[qc] error_model_group = 'shift' needs the 'time' column in the "
                      "readings log; set error_model_group = 'advance' or 'log'")
    if t.isna().any():
        raise QCError(f"[qc] error_model_group = 'shift': {int(t.isna().sum())} readings have "
                      "no time; set error_model_group = 'advance' or 'log'")
    start = pd.Timedelta(hours=settings.shift_start_hour)
    length = pd.Timedelta(hours=settings.shift_hours)
    shifted = t - start
    day = shifted.dt.floor("D")
    k = ((shifted - day) // length).astype(int)
    begin = day + start + k * length
    return begin.dt.strftime("%Y-%m-%dT%H:%MZ").to_numpy(dtype=object)


def _neighbour_median(table: pd.DataFrame, r: np.ndarray, window: int
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Median R of one (ordered) quadrupole over its advance and ``window`` on each side.

    Each advance's readings of it are reduced to their median first; the advance's own value
    is part of the median, so that with two neighbours a single odd advance is out-voted
    rather than dragging its neighbours' reference. Also returns how many neighbouring
    advances there were (the advance itself not counted).
    """
    n = len(table)
    if n == 0 or window == 0:
        return np.full(n, np.nan), np.zeros(n, dtype=int)
    fwd, _ = quadrupole_keys(table, unify=False)
    per = pd.DataFrame({"q": fwd, "adv": table["advance"].to_numpy(), "r": r})
    med = per.groupby(["q", "adv"], sort=True)["r"].median().reset_index()
    g = med.groupby("q", sort=False)["r"]
    cols = [g.shift(k).to_numpy() for k in range(1, window + 1)]
    cols += [g.shift(-k).to_numpy() for k in range(1, window + 1)]
    nb = np.column_stack(cols)
    count = np.isfinite(nb).sum(axis=1)
    nb = np.column_stack([med["r"].to_numpy(), nb])  # the advance itself: a robust centre
    with np.errstate(all="ignore"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            m = np.nanmedian(nb, axis=1)
    med["nb_median"] = m
    med["nb_count"] = count
    joined = per.merge(med[["q", "adv", "nb_median", "nb_count"]], on=["q", "adv"], how="left")
    return joined["nb_median"].to_numpy(), joined["nb_count"].to_numpy().astype(int)


def run_qc(readings: Readings | pd.DataFrame, settings: QCSettings | None = None) -> QCResult:
    """QC flags, reciprocal pairs and error models of checked readings.

    Parameters
    ----------
    readings : Readings or pandas.DataFrame
        From :func:`tbminv.readings.reader.read_readings` (or its ``table``).
    settings : QCSettings, optional
        Defaults: :class:`QCSettings` (no fallback error model).

    Returns
    -------
    QCResult
    """
    settings = settings or QCSettings()
    table = readings.table if isinstance(readings, Readings) else readings
    table = table.reset_index(drop=True).copy()
    n = len(table)
    cur = table["current_a"].to_numpy(float)
    volt = table["voltage_v"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = volt / cur
    table["r_ohm"] = r
    flags = np.zeros(n, dtype=np.int64)

    # reciprocal pairs
    i_n, i_r = find_reciprocal_pairs(table)
    r_rec = r[i_r] * reciprocal_orientation(table, i_n, i_r)   # in the normal's orientation
    rec = reciprocal_error(r[i_n], r_rec)
    table["reciprocal_error"] = np.nan
    table["partner_line"] = np.int64(-1)
    lines = table["line"].to_numpy()
    recerr = np.full(n, np.nan)
    recerr[i_n] = rec
    recerr[i_r] = rec
    partner = np.full(n, -1, dtype=np.int64)
    partner[i_n] = lines[i_r]
    partner[i_r] = lines[i_n]
    table["reciprocal_error"] = recerr
    table["partner_line"] = partner
    diff = np.full(n, np.nan)
    diff[i_n] = r[i_n] - r_rec
    diff[i_r] = r[i_n] - r_rec
    table["reciprocal_diff_ohm"] = diff
    with np.errstate(invalid="ignore"):
        flags[recerr > settings.reciprocal_max] |= Flag.RECIPROCAL

    # stacking
    std = table["voltage_std_v"].to_numpy(float)
    serr = std   # the error of the stacked value itself (stack_n is for the record only)
    with np.errstate(invalid="ignore", divide="ignore"):
        flags[serr > settings.stack_max_rel * np.abs(volt)] |= Flag.STACKING
    table["stack_error_v"] = serr

    # contact resistance
    with np.errstate(invalid="ignore"):
        for c in ("contact_ohm_a", "contact_ohm_m"):
            flags[table[c].to_numpy(float) > settings.contact_max_ohm] |= Flag.CONTACT
    # noise floor
    flags[np.abs(volt) < settings.voltage_floor_v] |= Flag.LOW_VOLTAGE

    # neighbouring advances, same quadrupole
    nb_med, nb_cnt = _neighbour_median(table, r, settings.neighbour_advances)
    enough = nb_cnt >= max(1, settings.min_neighbours)
    with np.errstate(invalid="ignore", divide="ignore"):
        sign_bad = enough & (np.sign(nb_med) != 0) & (np.sign(r) != np.sign(nb_med))
        ratio = np.abs(r) / np.abs(nb_med)
        lim = 1.0 + settings.outlier_max_rel
        out_bad = enough & np.isfinite(ratio) & ((ratio > lim) | (ratio < 1.0 / lim))
    flags[sign_bad] |= Flag.SIGN
    flags[out_bad] |= Flag.OUTLIER
    table["neighbour_r_ohm"] = nb_med

    # error models
    groups = _groups(table, settings) if n else np.zeros(0, dtype=object)
    table["error_group"] = groups
    not_rec = flags & ~np.int64(Flag.RECIPROCAL)
    usable = (not_rec[i_n] == 0) & (not_rec[i_r] == 0) & np.isfinite(rec)
    if settings.fit_reciprocal_max is not None:
        usable &= rec <= settings.fit_reciprocal_max
    pairs = pd.DataFrame({
        "advance": table["advance"].to_numpy()[i_n],
        "line_normal": lines[i_n], "line_reciprocal": lines[i_r],
        "r_normal_ohm": r[i_n], "r_reciprocal_ohm": r[i_r],
        "r_mean_ohm": 0.5 * (np.abs(r[i_n]) + np.abs(r[i_r])),
        "dr_ohm": r[i_n] - r_rec,
        "reciprocal_error": rec, "used_in_fit": usable,
        "error_group": groups[i_n] if n else np.zeros(0, dtype=object),
    })
    models: dict[str, ErrorModel] = {}
    err = np.full(n, np.nan)
    fit_pairs = pairs[pairs["used_in_fit"]]
    pair_rows = fit_pairs.groupby("error_group", sort=False).indices
    fit_r = fit_pairs["r_mean_ohm"].to_numpy()
    fit_dr = fit_pairs["dr_ohm"].to_numpy()
    none_ix = np.zeros(0, dtype=np.int64)
    for g, sel in pd.Series(groups).groupby(groups, sort=False).indices.items():
        g = str(g)
        ix = pair_rows.get(g, none_ix)
        model = _model_for(g, fit_r[ix], fit_dr[ix], settings)
        models[g] = model
        err[sel] = model.error_ohm(r[sel])
    with np.errstate(invalid="ignore", divide="ignore"):
        stack_ohm = serr / cur
        err = np.where(np.isfinite(stack_ohm) & np.isfinite(err), np.maximum(err, stack_ohm),
                       err)
    flags[~np.isfinite(err)] |= Flag.NO_ERROR_MODEL
    table["err_ohm"] = err
    with np.errstate(invalid="ignore", divide="ignore"):
        table["err_rel"] = err / np.abs(r)
    table["qc_flags"] = flags
    table["valid"] = flags == 0
    none = [g for g, m in models.items() if m.source == "none"]
    if none:
        _LOG.warning("%d error-model group(s) without a model (too few reciprocal pairs, no "
                     "fallback set): %s; their readings are flagged no_error_model",
                     len(none), ", ".join(none[:10]) + (" ..." if len(none) > 10 else ""))
    return QCResult(table=table, pairs=pairs, error_models=models, settings=settings)


def _model_for(group: str, r_mean: np.ndarray, dr: np.ndarray,
               settings: QCSettings) -> ErrorModel:
    n = len(r_mean)
    if settings.error_model == "fixed":
        return ErrorModel(group, float(settings.fallback_a_ohm), float(settings.fallback_b),
                          "fallback", n_pairs=n, note="error_model = 'fixed'")
    why = ""
    if n >= settings.min_pairs:
        try:
            return fit_error_model(r_mean, dr, settings.n_bins, group)
        except QCError as exc:
            why = str(exc)
    else:
        why = f"{n} usable reciprocal pairs (min_pairs = {settings.min_pairs})"
    if settings.has_fallback:
        return ErrorModel(group, float(settings.fallback_a_ohm), float(settings.fallback_b),
                          "fallback", n_pairs=n, note=why)
    return ErrorModel(group, math.nan, math.nan, "none", n_pairs=n,
                      note=why + "; set [qc] fallback_a_ohm and fallback_b to use a fixed model")


def _json(obj: Any) -> Any:
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return None if not np.isfinite(obj) else float(obj)
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(type(obj).__name__)


def summary_text(readings: Readings, qc: QCResult) -> str:
    """The plain-text QC summary (qc_summary.txt)."""
    s = qc.summary()
    lines = [readings.summary.to_text(), "",
             f"readings checked by QC: {s['readings']}",
             f"valid for inversion: {s['valid']}",
             f"flagged (kept, excluded from inversion): {s['flagged']}"]
    for name, count in s["flags"].items():
        if count:
            lines.append(f"  {count:>9d}  {name}")
    neg = s["negative_apparent_resistivity"]
    lines.append("negative apparent resistivity (sign against a homogeneous ground; left out of "
                 f"the image and the contact fit): {'not checked' if neg is None else neg}")
    lines.append(f"reciprocal pairs: {s['reciprocal_pairs']}")
    if s["reciprocal_error_median"] is not None:
        lines.append(f"reciprocal error: median {100 * s['reciprocal_error_median']:.2f} %, "
                     f"90th percentile {100 * s['reciprocal_error_p90']:.2f} %")
    lines.append(f"error model per {s['error_model_group']}: e = a + b |R| "
                 f"({', '.join(f'{k}: {v}' for k, v in s['error_models_by_source'].items())})")
    models = list(qc.error_models.values())
    for m in models[:20]:
        if m.source == "none":
            lines.append(f"  {m.group}: no model ({m.note})")
        else:
            lines.append(f"  {m.group}: a = {m.a_ohm:.4g} ohm, b = {m.b:.4g} ({m.source}, "
                         f"{m.n_pairs} pairs)")
    if len(models) > 20:
        lines.append(f"  ... {len(models) - 20} more in qc_summary.json")
    lines.append("usable data remain" if s["valid"] > 0 else "NO usable data remain")
    return "\n".join(lines) + "\n"


__all__ = ["QCError", "Flag", "flag_names", "QCSettings", "reciprocal_error", "default_bin_count",
           "reciprocal_orientation", "ErrorModel", "fit_error_model", "quadrupole_keys",
           "find_reciprocal_pairs", "QCResult", "run_qc", "summary_text"]
