"""The section store: one NetCDF-4 file per drive, appended per shift atomically under a lock."""

from __future__ import annotations

import contextlib
import datetime as _dt
import fcntl
import json
import logging
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from tbminv.cache import atomic_path
from tbminv.results.section import SectionError, _attrs, transverse_dim

_LOG = logging.getLogger(__name__)

ENGINE = "h5netcdf"
"""NetCDF engine of the store."""

# --------------------------------------------------------------------------- the store


@contextlib.contextmanager
def _store_lock(store: Path) -> Iterator[None]:
    lock = store.with_name(store.name + ".lock")
    lock.parent.mkdir(parents=True, exist_ok=True)
    with open(lock, "a+") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)


def _remove_stale_temporaries(store: Path) -> None:
    """Delete temporaries of appends that died (called under the store lock: none is live)."""
    for tmp in store.parent.glob(f".{store.name}.*.tmp{store.suffix}"):
        _LOG.warning("removing %s, left by an append that did not finish", tmp)
        with contextlib.suppress(OSError):
            tmp.unlink()


def _write_dataset(ds: xr.Dataset, path: Path) -> None:
    """Write ``ds`` to ``path`` as NetCDF-4 (h5netcdf); the one place the store is written."""
    ds = ds.copy(deep=False)
    for var in ds.variables.values():  # no encodings carried over from the old file
        var.encoding = {}
    enc: dict[str, dict[str, Any]] = {}
    for name, var in ds.variables.items():
        if var.dtype.kind == "f" and var.ndim >= 2:
            enc[str(name)] = {"zlib": True, "complevel": 4}
        if name in ds.dims:  # CF 2.5.1: coordinate variables carry no _FillValue
            enc.setdefault(str(name), {})["_FillValue"] = None
        if var.dtype.kind == "i" and var.dtype.itemsize == 8:  # CF-1.8 has no 64-bit integers
            enc.setdefault(str(name), {})["dtype"] = "int32"
    units = "seconds since 1970-01-01T00:00:00Z"
    if "time" in ds.variables and ds["time"].dtype.kind == "M":
        if np.isnat(ds["time"].values).all():  # xarray cannot encode all-NaT with set units
            ds = ds.assign(time=(ds["time"].dims, np.full(ds["time"].shape, np.nan),
                                 {**ds["time"].attrs, "units": units, "calendar": "standard"}))
        else:
            enc["time"] = {"units": units, "calendar": "standard", "dtype": "float64"}
    ds.to_netcdf(path, engine=ENGINE, encoding=enc)


def open_section(path: str | os.PathLike[str]) -> xr.Dataset:
    """Load a section store fully into memory and close the file.

    Parameters
    ----------
    path : str or path-like
        The store (NetCDF).

    Returns
    -------
    xarray.Dataset
        The section; the file is closed, so the store can be replaced while it is in use.
    """
    p = Path(path)
    if not p.exists():
        raise FileNotFoundError(f"section store {p} does not exist")
    try:
        with xr.open_dataset(p, engine=ENGINE) as ds:
            out = ds.load()
    except Exception as exc:
        raise SectionError(f"{p}: not a readable section store ({exc})") from exc
    for name in list(out.variables):
        if out[name].dtype.kind in "SU":  # keep text variable-length (no truncation on concat)
            out[name] = out[name].astype(str).astype(object)
    return out


def _provenance_entry(ds: xr.Dataset) -> dict[str, Any]:
    return {k: ds.attrs.get(k, "") for k in (
        "date_created", "inputs_sha256", "settings_sha256", "settings_text", "layout_sha256",
        "tbminv_version", "pygimli_version", "pgcore_version", "synthetic")}


def _compatible_rest(store: Path, old: xr.Dataset, shift: str, advances: np.ndarray,
                     ahead: np.ndarray, transverse: np.ndarray, tdim: str,
                     layout_sha256: str | None) -> xr.Dataset:
    """The advances of ``old`` not of ``shift``, after checking the new shift fits beside them.

    Raises
    ------
    SectionError
        Another transverse dimension, grid or layout, or advance numbers of another shift.
    """
    if transverse_dim(old) != tdim:
        raise SectionError(f"{store}: shift {shift!r} is a {tdim} section, the store a "
                           f"{transverse_dim(old)} section")
    for dim, values in (("ahead", ahead), (tdim, transverse)):
        if old.sizes[dim] != len(values) or not np.allclose(old[dim].values, values):
            raise SectionError(f"{store}: the {dim} grid of shift {shift!r} differs from the "
                               "store's; resample it or start a new store")
    if old.attrs.get("layout_sha256") != layout_sha256:
        raise SectionError(f"{store}: shift {shift!r} was inverted with a different layout than "
                           "the store's; start a new store")
    keep = old.isel(advance=np.flatnonzero(old["shift"].values.astype(str) != shift))
    clash = np.intersect1d(keep["advance"].values, np.asarray(advances))
    if clash.size:
        owners = sorted(set(keep["shift"].sel(advance=clash).values.astype(str)))
        raise SectionError(f"{store}: advances {clash.tolist()} of shift {shift!r} are already "
                           f"stored under shift(s) {owners}")
    return keep


def check_appendable(store_path: str | os.PathLike[str], *, shift: str,
                     advances: np.ndarray, ahead: np.ndarray, transverse: np.ndarray,
                     layout_sha256: str, tdim: str = "radius") -> Path:
    """Check, before any work, that a shift can be appended to the store.

    Writes a probe file beside the store and removes it (the folder is writable), and, when
    the store exists, checks what :func:`append_shift` will check: the same transverse
    dimension, grid and layout, and no advance number held by another shift.

    Parameters
    ----------
    store_path : str or path-like
        The section store (NetCDF; need not exist).
    shift : str
        The shift label the advances will be stored under.
    advances : ndarray of int
        Advance numbers of the shift.
    ahead, transverse : ndarray
        The output grid, m.
    layout_sha256 : str
        SHA-256 of the layout text (the ``layout_sha256`` attribute of the section).
    tdim : str
        ``radius`` or ``z``.

    Returns
    -------
    pathlib.Path
        The store.

    Raises
    ------
    SectionError
        The folder is not writable, or the store cannot take the shift; nothing is changed.
    """
    store = Path(store_path)
    try:
        store.parent.mkdir(parents=True, exist_ok=True)
        with atomic_path(store.with_name(f".{store.name}.probe")) as tmp:
            tmp.write_bytes(b"tbminv store probe\n")
        store.with_name(f".{store.name}.probe").unlink()
    except OSError as exc:
        raise SectionError(f"{store}: cannot write beside the store ({exc})") from None
    if store.exists():
        _compatible_rest(store, open_section(store), str(shift), advances, ahead, transverse,
                         tdim, layout_sha256)
    return store


def append_shift(store_path: str | os.PathLike[str], ds: xr.Dataset, shift: str) -> Path:
    """Add one shift's advances to the store (create it if missing), atomically.

    Parameters
    ----------
    store_path : str or path-like
        The section store (NetCDF).
    ds : xarray.Dataset
        The shift's section from :func:`build_section`.
    shift : str
        Shift label. Advances of the store labelled with it are replaced by ``ds``'s.

    Returns
    -------
    pathlib.Path
        The store.

    Notes
    -----
    The global attributes are those of the latest append; every shift's provenance (input
    and settings hashes, settings text, versions, time) is kept in the JSON attribute
    ``provenance_by_shift``, and ``history`` grows by one line per append.

    Raises
    ------
    SectionError
        ``ds`` has advance numbers held by another shift, a different grid, or a different
        layout than the store. The store is left as it was.
    """
    store = Path(store_path)
    shift = str(shift)
    if not shift:
        raise SectionError("append_shift: shift label must not be empty")
    new = ds.copy()
    new["shift"] = ("advance", np.array([shift] * new.sizes["advance"], dtype=object),
                    ds["shift"].attrs if "shift" in ds else _attrs("shift label"))
    with _store_lock(store):
        _remove_stale_temporaries(store)
        provenance: dict[str, Any] = {}
        if store.exists():
            old = open_section(store)
            provenance = json.loads(old.attrs.get("provenance_by_shift", "{}") or "{}")
            keep = _compatible_rest(store, old, shift, new["advance"].values, new["ahead"].values,
                                    new[transverse_dim(new)].values, transverse_dim(new),
                                    new.attrs.get("layout_sha256"))
            n_it = max(keep.sizes.get("iteration", 1), new.sizes.get("iteration", 1))
            parts = [p.reindex(iteration=np.arange(n_it, dtype=np.int32)) for p in (keep, new)]
            merged = xr.concat(parts, dim="advance", data_vars="minimal", coords="minimal",
                               compat="override", combine_attrs="override", join="outer")
            merged = merged.sortby("advance")
            merged.attrs = dict(new.attrs)
            merged.attrs["history"] = (str(old.attrs.get("history", "")).rstrip() + "\n"
                                       + str(new.attrs.get("history", ""))).strip()
        else:
            merged = new
        provenance[shift] = _provenance_entry(new)
        merged.attrs["history"] = (str(merged.attrs.get("history", "")).rstrip()
                                   + f"\n{_dt.datetime.now(_dt.UTC):%Y-%m-%dT%H:%M:%SZ} "
                                     f"shift {shift} written to the store").strip()
        merged.attrs["provenance_by_shift"] = json.dumps(provenance, sort_keys=True)
        merged.attrs["shifts"] = " ".join(sorted(provenance))
        # simulated readings in any shift make the store's results synthetic
        merged.attrs["synthetic"] = int(any(str(p.get("synthetic", "")) in ("1", "True")
                                            for p in provenance.values()))
        for name in ("covered", "fit_flag", "postprocess_flag", "converged", "iterations",
                     "n_data", "n_used", "contact_at_bound", "contact_ambiguous",
                     "contact_contrast_open", "probe_contradicts"):
            if name in merged and merged[name].dtype.kind == "f":  # concat may promote
                merged[name] = merged[name].fillna(0).astype(ds[name].dtype)
        for name in list(merged.data_vars):  # text missing in one part (older stores): empty
            if merged[name].dtype.kind == "O":
                merged[name] = merged[name].copy(data=np.vectorize(
                    lambda v: v if isinstance(v, str) else "", otypes=[object])(
                        merged[name].values))
        with atomic_path(store) as tmp:
            _write_dataset(merged, tmp)
    _LOG.info("store %s: shift %s written (%d advances)", store, shift, new.sizes["advance"])
    return store


__all__ = ["check_appendable", "ENGINE", "open_section", "append_shift"]
