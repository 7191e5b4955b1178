"""The report's appendix: settings as TOML text and the provenance table.

The store keeps each shift's settings as text (``settings_text``): TOML, or, in stores written so
far, the Python literal of the settings' dictionary. :func:`settings_toml` gives TOML either
way, laid out as a settings file (``[invert]``, ``[contact]``, plus ``[qc]`` and ``[ahead]``
where known); values that are not set (None) are written as comments.
"""

from __future__ import annotations

import ast
import datetime as _dt
import hashlib
import json
import math
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import matplotlib
import tomli_w
import xarray as xr

import tbminv
from tbminv.gimli import versions


def _parse(text: str) -> dict[str, Any] | None:
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        pass
    try:
        val = ast.literal_eval(text)
    except (ValueError, SyntaxError, MemoryError, RecursionError):
        return None
    return val if isinstance(val, dict) else None


def _table(name: str, d: Mapping[str, Any]) -> str:
    """One TOML table; None as a comment, nested mappings as their own tables."""
    plain = {k: v for k, v in d.items() if v is not None and not isinstance(v, Mapping)}
    unset = [k for k, v in d.items() if v is None]
    nested = {k: v for k, v in d.items() if isinstance(v, Mapping)}
    out = f"[{name}]\n" + tomli_w.dumps(_clean(plain))
    out += "".join(f"# {k}: not set\n" for k in unset)
    for k, v in nested.items():
        out += "\n" + _table(k if name == "invert" and k == "contact" else f"{name}.{k}", v)
    return out


def _clean(d: Mapping[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in d.items():
        if isinstance(v, float) and not math.isfinite(v):
            out[k] = str(v)
        elif isinstance(v, (list, tuple)):
            out[k] = [x for x in v if x is not None]
        else:
            out[k] = v
    return out


def settings_toml(settings_text: str, *, qc: Mapping[str, Any] | None = None,
                  ahead: Mapping[str, Any] | None = None) -> str:
    """The settings of a shift as TOML text.

    Parameters
    ----------
    settings_text : str
        The store's ``settings_text`` (TOML or a Python dictionary literal).
    qc : mapping, optional
        The ``[qc]`` settings (from the check's summary).
    ahead : mapping, optional
        The ``[ahead]`` thresholds the report used.

    Returns
    -------
    str
        TOML text (a comment line when the stored text cannot be read).
    """
    doc = _parse(settings_text) if settings_text else None
    parts: list[str] = []
    if doc is None:
        parts.append("# inversion settings: not stored in a readable form")
    elif "invert" in doc or "contact" in doc:
        parts += [_table(k, v) for k, v in doc.items() if isinstance(v, Mapping)]
    else:
        inv = {k: v for k, v in doc.items() if k != "contact"}
        parts.append(_table("invert", inv))
        if isinstance(doc.get("contact"), Mapping):
            parts.append(_table("contact", doc["contact"]))
    if qc:
        parts.append(_table("qc", qc))
    if ahead:
        parts.append(_table("ahead", ahead))
    return "\n".join(parts)


def sha256_file(path: Path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def provenance_rows(store: Path, ds: xr.Dataset, shift: str) -> list[list[str]]:
    """Rows (item, value) of the provenance table: store, layout, each shift, this report."""
    prov = json.loads(ds.attrs.get("provenance_by_shift", "{}") or "{}")
    rows = [["store", str(store)], ["store SHA-256", sha256_file(store)],
            ["layout SHA-256", str(ds.attrs.get("layout_sha256", ""))]]
    for name in sorted(prov):
        p = prov[name]
        mark = " (this report)" if name == shift else ""
        syn = str(p.get("synthetic", ""))
        rows += [[f"shift {name}{mark}: readings SHA-256", str(p.get("inputs_sha256", ""))],
                 [f"shift {name}: settings SHA-256", str(p.get("settings_sha256", ""))],
                 [f"shift {name}: written", f"{p.get('date_created', '')} by tbminv "
                  f"{p.get('tbminv_version', '')}, pyGIMLi {p.get('pygimli_version', '')}, "
                  f"pgcore {p.get('pgcore_version', '')}"],
                 [f"shift {name}: readings", {"1": "simulated (synthetic data)",
                                              "0": "measured (as the log says)"}.get(
                                                  syn, "not recorded")]]
    ver = versions()
    rows.append(["this report", f"{_dt.datetime.now(_dt.UTC):%Y-%m-%dT%H:%M:%SZ} by tbminv "
                 f"{tbminv.__version__}, pyGIMLi {ver.get('pygimli', '?')}, pgcore "
                 f"{ver.get('pgcore', '?')}, matplotlib {matplotlib.__version__}"])
    return rows


__all__ = ["settings_toml", "sha256_file", "provenance_rows"]
