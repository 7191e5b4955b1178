"""Readings -> pyGIMLi data containers per advance, and an xarray view of the readings.

Per advance, :meth:`Survey.advance` builds a ``pg.DataContainerERT``:

* sensors: the electrodes used, placed by :meth:`tbminv.layout.Layout.positions_world` for the
  advance's face chainage (median of its readings; or each reading's own, on request) and the
  logged cutterhead angle of each reading (0 deg where not logged).
  Cutterhead electrodes turn, so one label can give several sensors within an advance (one per
  distinct position; pyGIMLi snaps positions closer than 1 mm into one sensor). A remote
  electrode at infinity is no sensor: ``-1`` (a pole), as is an empty ``b`` / ``n``. The
  steel body used as one electrode (kind ``machine``) has no point position; it gets one
  sensor at the centre of the cutterhead face (world ``(face_chainage_m, 0, 0)``), named in
  ``sensor_labels`` so a forward model can treat it as the body, and its readings have no
  analytic geometric factor (NaN in the xarray view, 0 in the container).
* data: ``a b m n`` (sensor indices, -1 for poles), ``r`` (ohm), ``i`` (A), ``u`` (V),
  ``err`` (relative error, ``err_ohm / |r|``), ``k`` (m), ``rhoa = k r`` (ohm-m), ``valid``
  (1 = no QC flag), plus ``line`` (line in the log), ``qc`` (flag bits) and ``rec``
  (reciprocal error, 0 where unpaired).
* geometric factor: the analytic full-space factor
  ``k = 4 pi / (1/AM - 1/AN - 1/BM + 1/BN)`` (terms with a pole left out), recorded as such in
  ``attrs["geometric_factor"]``; pass ``geometric_factors=`` to use numeric factors (for example
  from a homogeneous run with the machine and tunnel in the mesh).

:meth:`Survey.to_xarray` gives our own ``xarray.Dataset`` of the readings with dimensions
``reading`` x ``advance`` (a reading is one quadrupole and its occurrence within an advance),
CF attributes and provenance; :meth:`Survey.to_netcdf` / :func:`open_survey_dataset` round-trip
it through NetCDF.
"""

from __future__ import annotations

import json
import logging
import math
import os
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from tbminv.readings.qc import FLAG_NAMES, QCResult
from tbminv.readings.reader import LABEL_COLUMNS

_LOG = logging.getLogger(__name__)

ANALYTIC_FULL_SPACE = ("analytic full space, k = 4 pi / (1/AM - 1/AN - 1/BM + 1/BN), "
                       "terms with a pole left out; the machine, tunnel and ground surface are "
                       "not in it")
"""How ``k`` is computed when no numeric factors are given."""

GeometricFactors = Callable[[Any, int], Any] | Mapping[int, Any]
"""A callable ``(data_container, advance) -> k per datum`` or a mapping advance -> k."""

_POS_DECIMALS = 9  # positions compared to 1 nm before pyGIMLi snaps them
_SNAP_M = 1e-3     # pyGIMLi's default snapping distance of createSensor, m


def full_space_geometric_factor(pos_a: np.ndarray, pos_b: np.ndarray, pos_m: np.ndarray,
                                pos_n: np.ndarray) -> np.ndarray:
    """Geometric factor of point electrodes in a full space, m.

    ``k = 4 pi / (1/AM - 1/AN - 1/BM + 1/BN)``; a row of NaN in ``pos_b`` or ``pos_n`` is a
    pole (its terms are left out). Then ``rho_a = k U / I``.

    Parameters
    ----------
    pos_a, pos_b, pos_m, pos_n : ndarray, shape (n, 3)
        Electrode positions, m (NaN rows: pole at infinity).

    Returns
    -------
    ndarray
        k, m (NaN where A or M has no position; inf where the four terms cancel).
    """
    def inv(p: np.ndarray, q: np.ndarray) -> np.ndarray:
        d = np.linalg.norm(np.asarray(p, float) - np.asarray(q, float), axis=-1)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(np.isnan(d), 0.0, 1.0 / d)

    pa, pm = np.asarray(pos_a, float), np.asarray(pos_m, float)
    g = inv(pa, pm) - inv(pa, pos_n) - inv(pos_b, pm) + inv(pos_b, pos_n)
    with np.errstate(divide="ignore", invalid="ignore"):
        k = 4.0 * math.pi / g
    k[np.isnan(pa).any(axis=-1) | np.isnan(pm).any(axis=-1)] = np.nan
    return k


@dataclass
class AdvanceSurvey:
    """The data of one advance as a pyGIMLi container.

    Attributes
    ----------
    advance : int
        Advance number.
    face_chainage_m : float
        Median face chainage of its readings, m.
    data : pygimli.DataContainerERT
        Sensors and data (see module notes).
    sensor_labels : tuple of str
        Electrode label of each sensor.
    lines : ndarray
        Line in the log of each datum.
    attrs : dict
        Provenance: geometric factor method, notes on the steel electrodes.
    """

    advance: int
    face_chainage_m: float
    data: Any
    sensor_labels: tuple[str, ...]
    lines: np.ndarray
    attrs: dict[str, str] = field(default_factory=dict)

    def valid_data(self) -> Any:
        """A copy of the container with the flagged readings removed (for inversion)."""
        out = type(self.data)(self.data)
        out.removeInvalid()
        return out


class Survey:
    """QC'd readings of one log, as pyGIMLi containers per advance and an xarray view.

    Parameters
    ----------
    qc : QCResult or pandas.DataFrame
        From :func:`tbminv.qc.run_qc` (or its ``table``: needs the readings columns plus
        ``r_ohm``, ``err_ohm``, ``qc_flags``, ``valid``, ``reciprocal_error``).
    layout : Layout
        Electrode positions.
    geometric_factors : callable or mapping, optional
        Numeric geometric factors: ``f(data_container, advance) -> k`` per datum, or a mapping
        advance -> k. Default: the analytic full-space factor.
    geometric_factor_method : str, optional
        Text recorded for supplied factors (default ``"numeric (supplied)"``).
    source : str
        The readings log, for provenance.
    face_chainage : str
        ``"advance"`` (default): every reading of an advance is placed at the advance's
        median face chainage (one set of machine sensors per advance, for a mesh in the
        machine frame); ``"reading"``: at each reading's own logged face chainage.
    """

    def __init__(self, qc: QCResult | pd.DataFrame, layout: Any,
                 geometric_factors: GeometricFactors | None = None,
                 geometric_factor_method: str | None = None, source: str = "",
                 face_chainage: str = "advance") -> None:
        if face_chainage not in ("advance", "reading"):
            raise ValueError(f"face_chainage = {face_chainage!r}; expected 'advance' or "
                             "'reading'")
        self.face_chainage = face_chainage
        self.qc = qc if isinstance(qc, QCResult) else None
        table = qc.table if isinstance(qc, QCResult) else qc
        self.table = table.reset_index(drop=True)
        self.layout = layout
        self.geometric_factors = geometric_factors
        if geometric_factors is None:
            self.geometric_factor_method = ANALYTIC_FULL_SPACE
        else:
            self.geometric_factor_method = geometric_factor_method or "numeric (supplied)"
        self.source = source
        self._cache: dict[int, AdvanceSurvey] = {}
        self._k_cache: dict[int, np.ndarray] = {}
        self._rows = {int(a): np.asarray(ix) for a, ix in
                      self.table.groupby("advance", sort=True).indices.items()}

    @property
    def advances(self) -> tuple[int, ...]:
        """Advance numbers, increasing."""
        return tuple(self._rows)

    def __iter__(self) -> Iterator[AdvanceSurvey]:
        for adv in self.advances:
            yield self.advance(adv)

    # ----------------------------------------------------------- containers
    def _positions(self, rows: pd.DataFrame) -> tuple[list[tuple[str, tuple[float, ...]]],
                                                        dict[str, np.ndarray]]:
        """Sensor list (label, position) and per-reading sensor indices for a, b, m, n."""
        fc = rows["face_chainage_m"].to_numpy(float)
        if self.face_chainage == "advance":
            fc = np.full(len(fc), float(np.median(fc)))
        ang = rows["cutterhead_deg"].to_numpy(float) if "cutterhead_deg" in rows else \
            np.zeros(len(rows))
        ang = np.where(np.isfinite(ang), ang, 0.0)
        uniq, inverse = np.unique(np.column_stack([fc, ang]), axis=0, return_inverse=True)
        inverse = np.asarray(inverse).reshape(-1)
        sensors: dict[tuple[str, tuple[float, ...]], int] = {}
        order: list[tuple[str, tuple[float, ...]]] = []
        labels = {c: rows[c].astype(object).to_numpy() for c in LABEL_COLUMNS}
        idx = {c: np.full(len(rows), -1, dtype=np.int64) for c in LABEL_COLUMNS}
        kinds = {e.label: e for e in self.layout.electrodes}
        for u, (f, a) in enumerate(uniq):
            pos = self.layout.positions_world(float(f), float(a))
            sel = np.nonzero(inverse == u)[0]
            for c in LABEL_COLUMNS:
                for i in sel:
                    lab = labels[c][i]
                    if lab is None or (isinstance(lab, float) and math.isnan(lab)):
                        continue
                    e = kinds.get(str(lab))
                    if e is None:
                        raise ValueError(f"electrode label {lab!r} of the readings is not in "
                                         f"the layout {getattr(self.layout, 'source', '')}")
                    if e.at_infinity:
                        continue
                    p = pos.get(str(lab))
                    if p is None:  # the machine body: centre of the cutterhead face
                        p = np.array([float(f), 0.0, 0.0])
                    k = (str(lab), tuple(np.round(np.asarray(p, float), _POS_DECIMALS)))
                    if k not in sensors:
                        sensors[k] = len(order)
                        order.append(k)
                    idx[c][i] = sensors[k]
        return order, idx

    def advance(self, adv: int) -> AdvanceSurvey:
        """The container of one advance (built once, then cached)."""
        adv = int(adv)
        if adv in self._cache:
            return self._cache[adv]
        if adv not in self._rows:
            raise KeyError(f"no readings for advance {adv}")
        from tbminv.gimli import pg

        rows = self.table.iloc[self._rows[adv]]
        order, idx = self._positions(rows)
        data = pg.DataContainerERT()
        # pyGIMLi snaps sensors closer than its tolerance (1 mm) into one: use its indices
        snap = np.array([int(data.createSensor(pg.Pos(*p), _SNAP_M)) for _, p in order],
                        dtype=np.int64)
        labels_of: dict[int, str] = {}
        for (lab, _), j in zip(order, snap.tolist()):
            if labels_of.setdefault(j, lab) != lab:
                raise ValueError(f"advance {adv}: electrodes {labels_of[j]!r} and {lab!r} are "
                                 f"closer than {_SNAP_M * 1000:g} mm")
        for c in LABEL_COLUMNS:
            idx[c] = np.where(idx[c] >= 0, snap[np.maximum(idx[c], 0)], -1)
        sens = np.array([[p[0], p[1], p[2]] for p in data.sensorPositions()], dtype=float)
        sensor_labels = tuple(labels_of[j] for j in range(data.sensorCount()))
        n = len(rows)
        data.resize(n)
        for c in LABEL_COLUMNS:
            data.set(c, pg.Vector(idx[c].astype(float)))
        r = rows["r_ohm"].to_numpy(float)
        data.set("r", pg.Vector(r))
        data.set("i", pg.Vector(rows["current_a"].to_numpy(float)))
        data.set("u", pg.Vector(rows["voltage_v"].to_numpy(float)))
        err_rel = rows["err_ohm"].to_numpy(float) / np.abs(r)
        data.set("err", pg.Vector(np.where(np.isfinite(err_rel), err_rel, 0.0)))
        pts = sens.reshape(-1, 3)

        def at(c: str) -> np.ndarray:
            out = np.full((n, 3), np.nan)
            ok = idx[c] >= 0
            out[ok] = pts[idx[c][ok]]
            return out

        machine = {e.label for e in self.layout.electrodes if e.kind == "machine"}
        attrs = {"advance": str(adv), "geometric_factor": self.geometric_factor_method,
                 "sensor_face_chainage": (
                     "median face chainage of the advance" if self.face_chainage == "advance"
                     else "face chainage of each reading")}
        if self.geometric_factors is None:
            k = full_space_geometric_factor(at("a"), at("b"), at("m"), at("n"))
            if machine:
                body = np.zeros(n, dtype=bool)
                for c in LABEL_COLUMNS:
                    body |= rows[c].astype(object).isin(machine).to_numpy()
                k[body] = np.nan
                attrs["machine_electrode"] = (
                    f"{', '.join(sorted(machine))}: the steel body, placed at the centre of the "
                    "cutterhead face; no analytic k (NaN) for its readings")
        else:
            gf = self.geometric_factors
            k = np.asarray(gf[adv] if isinstance(gf, Mapping) else gf(data, adv), dtype=float)
            if k.shape != (n,):
                raise ValueError(f"advance {adv}: geometric_factors gave {k.shape} values for "
                                 f"{n} readings")
        steel = sorted(e.label for e in self.layout.electrodes if e.on_steel)
        if steel:
            attrs["on_steel"] = (f"{', '.join(steel)} are at the machine's potential (bare on "
                                 "the steel or the body itself)")
        data.set("k", pg.Vector(np.where(np.isfinite(k), k, 0.0)))
        data.set("rhoa", pg.Vector(np.where(np.isfinite(k), k * r, 0.0)))
        valid = rows["valid"].to_numpy(bool) & np.isfinite(r)
        data.set("valid", pg.Vector(valid.astype(float)))
        lines = rows["line"].to_numpy(np.int64)
        data.set("line", pg.Vector(lines.astype(float)))
        data.set("qc", pg.Vector(rows["qc_flags"].to_numpy(float)))
        rec = rows["reciprocal_error"].to_numpy(float) if "reciprocal_error" in rows else \
            np.zeros(n)
        data.set("rec", pg.Vector(np.where(np.isfinite(rec), rec, 0.0)))
        out = AdvanceSurvey(advance=adv,
                            face_chainage_m=float(np.median(rows["face_chainage_m"])),
                            data=data, sensor_labels=sensor_labels,
                            lines=lines, attrs=attrs)
        self._k_cache[adv] = k
        self._cache[adv] = out
        return out

    # ----------------------------------------------------------------- xarray
    def to_xarray(self) -> xr.Dataset:
        """The readings as a Dataset with dims ``reading`` x ``advance`` (CF-1.8 attributes).

        A ``reading`` is one quadrupole (a, b, m, n in that order) and its occurrence within
        an advance (0 for the first time it is read in the advance, 1 for the second ...).
        Cells where a reading was not taken in an advance are NaN (``line`` -1).
        """
        t = self.table
        k = np.full(len(t), np.nan)
        for adv in self.advances:
            self.advance(adv)
            k[self._rows[adv]] = self._k_cache[adv]
        labs = {c: t[c].astype(object).where(t[c].notna(), "").astype(str).to_numpy()
                for c in LABEL_COLUMNS}
        quad = pd.Series(labs["a"]) + "|" + labs["b"] + "|" + labs["m"] + "|" + labs["n"]
        occ = pd.DataFrame({"adv": t["advance"].to_numpy(), "q": quad}).groupby(
            ["adv", "q"], sort=False).cumcount().to_numpy()
        rid = pd.MultiIndex.from_arrays([quad.to_numpy(), occ])
        uniq = pd.MultiIndex.from_frame(pd.DataFrame({"q": quad, "o": occ}).drop_duplicates())
        ri = uniq.get_indexer(rid)
        advs = np.array(self.advances, dtype=np.int64)
        ai = np.searchsorted(advs, t["advance"].to_numpy())
        shape = (len(uniq), len(advs))

        def grid(values: np.ndarray, fill: Any, dtype: Any) -> np.ndarray:
            g = np.full(shape, fill, dtype=dtype)
            g[ri, ai] = values
            return g

        r = t["r_ohm"].to_numpy(float)
        qsplit = [q.split("|") for q in uniq.get_level_values(0)]
        coords = {
            "reading": ("reading", np.arange(len(uniq), dtype=np.int64),
                        {"long_name": "reading (quadrupole and occurrence within advance)"}),
            "advance": ("advance", advs, {"long_name": "advance number", "units": "1"}),
            "a": ("reading", np.array([q[0] for q in qsplit], dtype=object),
                  {"long_name": "current electrode A (label)"}),
            "b": ("reading", np.array([q[1] for q in qsplit], dtype=object),
                  {"long_name": "current electrode B (label; empty: pole)"}),
            "m": ("reading", np.array([q[2] for q in qsplit], dtype=object),
                  {"long_name": "potential electrode M (label)"}),
            "n": ("reading", np.array([q[3] for q in qsplit], dtype=object),
                  {"long_name": "potential electrode N (label; empty: pole)"}),
            "occurrence": ("reading", uniq.get_level_values(1).to_numpy(np.int64),
                           {"long_name": "occurrence of the quadrupole within the advance",
                            "units": "1"}),
            "advance_face_chainage_m": (
                "advance",
                np.array([self.advance(a).face_chainage_m for a in self.advances]),
                {"long_name": "median face chainage of the advance", "units": "m"}),
        }
        f2 = ("reading", "advance")
        fl_bits = list(FLAG_NAMES.values())
        variables = {
            "r_ohm": (f2, grid(r, np.nan, float),
                      {"long_name": "transfer resistance U/I", "units": "ohm"}),
            "current_a": (f2, grid(t["current_a"].to_numpy(float), np.nan, float),
                          {"long_name": "injected current", "units": "A"}),
            "voltage_v": (f2, grid(t["voltage_v"].to_numpy(float), np.nan, float),
                          {"long_name": "measured potential difference", "units": "V"}),
            "err_ohm": (f2, grid(t["err_ohm"].to_numpy(float), np.nan, float),
                        {"long_name": "error of the transfer resistance (error model)",
                         "units": "ohm"}),
            "k_m": (f2, grid(k, np.nan, float),
                    {"long_name": "geometric factor", "units": "m",
                     "comment": self.geometric_factor_method}),
            "rhoa_ohmm": (f2, grid(k * r, np.nan, float),
                          {"long_name": "apparent resistivity k U/I", "units": "ohm m"}),
            "reciprocal_error": (
                f2, grid(t["reciprocal_error"].to_numpy(float), np.nan, float),
                {"long_name": "reciprocal error |2(|Rn|-|Rr|)/(|Rn|+|Rr|)|", "units": "1",
                 "references": "LaBrecque et al. 1996, Geophysics 61(2):538-548"}),
            "face_chainage_m": (f2, grid(t["face_chainage_m"].to_numpy(float), np.nan, float),
                                {"long_name": "face chainage at the reading", "units": "m"}),
            "cutterhead_deg": (f2, grid(t["cutterhead_deg"].to_numpy(float), np.nan, float),
                               {"long_name": "cutterhead angle at the reading",
                                "units": "degree"}),
            "qc_flags": (f2, grid(t["qc_flags"].to_numpy(np.int32), -1, np.int32),
                         {"long_name": "QC flags", "flag_masks": np.array(fl_bits, np.int32),
                          "flag_meanings": " ".join(FLAG_NAMES), "missing_value": np.int32(-1)}),
            "valid": (f2, grid(t["valid"].to_numpy(bool).astype(np.int8), -1, np.int8),
                      {"long_name": "reading used for inversion",
                       "flag_values": np.array([0, 1], np.int8),
                       "flag_meanings": "excluded valid", "missing_value": np.int8(-1)}),
            "line": (f2, grid(t["line"].to_numpy(np.int64), -1, np.int64),
                     {"long_name": "line of the reading in the readings log", "units": "1",
                      "missing_value": np.int64(-1)}),
        }
        from tbminv import __version__
        from tbminv.gimli import versions

        attrs: dict[str, Any] = {
            "Conventions": "CF-1.8",
            "title": "tbminv readings after QC",
            "source": self.source or "readings log",
            "history": f"{datetime.now(UTC).strftime('%Y-%m-%dT%H:%M:%SZ')} tbminv "
                       f"{__version__} survey.to_xarray",
            "tbminv_version": __version__,
            "geometric_factor": self.geometric_factor_method,
            "sensor_face_chainage": self.face_chainage,
        }
        for k_, v in versions().items():
            attrs[f"{k_}_version"] = v
        if self.qc is not None:
            attrs["qc_settings"] = json.dumps(self.qc.settings.to_dict(), sort_keys=True)
            attrs["error_models"] = json.dumps(
                {g: m.to_dict() for g, m in self.qc.error_models.items()}, sort_keys=True)
        try:
            attrs["layout"] = json.dumps(self.layout.to_dict(), sort_keys=True, default=str)
        except Exception:  # pragma: no cover - a layout stand-in without to_dict
            pass
        return xr.Dataset(variables, coords=coords, attrs=attrs)

    def to_netcdf(self, path: str | os.PathLike[str]) -> Path:
        """Write :meth:`to_xarray` to NetCDF (h5netcdf), atomically; return the path."""
        return write_survey_dataset(self.to_xarray(), path)


def write_survey_dataset(ds: xr.Dataset, path: str | os.PathLike[str]) -> Path:
    """Write a survey Dataset to NetCDF atomically (temporary file, then rename)."""
    from tbminv.cache import atomic_path

    path = Path(path)
    # NaN marks a missing float (no _FillValue attribute); integers carry missing_value
    encoding = {name: {"_FillValue": None} for name, v in ds.variables.items()
                if v.dtype.kind == "f"}
    with atomic_path(path) as tmp:
        ds.to_netcdf(tmp, engine="h5netcdf", encoding=encoding)
    return path


def open_survey_dataset(path: str | os.PathLike[str]) -> xr.Dataset:
    """Read a survey Dataset written by :meth:`Survey.to_netcdf` (loaded, file closed)."""
    with xr.open_dataset(path, engine="h5netcdf", mask_and_scale=False) as ds:
        return ds.load()


__all__ = ["ANALYTIC_FULL_SPACE", "full_space_geometric_factor", "AdvanceSurvey", "Survey",
           "write_survey_dataset", "open_survey_dataset"]
