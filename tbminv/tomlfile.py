"""Reading a TOML input file with one clear error naming the file (layout, ground, settings...)."""

from __future__ import annotations

import math
import os
import tomllib
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any


def read_toml(path: str | os.PathLike[str], error: type[Exception], what: str, *,
              relaxed: Callable[[str], str] | None = None) -> dict[str, Any]:
    """Parse a TOML file (UTF-8, a byte-order mark accepted).

    Parameters
    ----------
    path : path-like
        The file.
    error : exception class
        Raised, with a message that starts with the file name, when the file is missing,
        unreadable, not UTF-8 or not valid TOML.
    what : str
        What the file is, for the message (``"layout file"``, ``"settings file"``).
    relaxed : callable, optional
        A rewrite of the text tried when strict TOML fails (the layout accepts several
        ``key = value`` pairs on one line); the strict parser's message is kept if it fails too.

    Returns
    -------
    dict
        The parsed document.
    """
    p = Path(path)
    try:
        text = p.read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise error(f"{p}: {what} not found") from None
    except UnicodeDecodeError as exc:
        raise error(f"{p}: not UTF-8 text ({exc}); expected a TOML {what}") from None
    except OSError as exc:
        raise error(f"{p}: cannot read the {what} ({exc.strerror or exc})") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        if relaxed is not None:
            other = relaxed(text)
            if other != text:
                try:
                    return tomllib.loads(other)
                except tomllib.TOMLDecodeError:
                    pass
        raise error(f"{p}: not valid TOML ({exc})") from None


def check_keys(table: Mapping[str, Any], allowed: Iterable[str], where: str,
               error: type[Exception]) -> None:
    """Refuse keys a table does not know, naming them and the ones it takes.

    Parameters
    ----------
    table : mapping
        One parsed TOML table.
    allowed : iterable of str
        The keys the table takes.
    where : str
        File and table for the message (``"layout.toml [machine]"``).
    error : exception class
        Raised with the message.
    """
    extra = sorted(set(table) - set(allowed))
    if extra:
        raise error(f"{where}: unknown key(s) {', '.join(extra)}; expected some of "
                    f"{', '.join(sorted(allowed))}")


def number(table: Mapping[str, Any], key: str, where: str, error: type[Exception], *,
           default: float | None = None, required: bool = True, positive: bool = False,
           nonneg: bool = False, allow_inf: bool = False, missing: str = "expected a number"
           ) -> float | None:
    """One number of a parsed TOML table, checked, or one clear error naming file and key.

    Parameters
    ----------
    table : mapping
        The parsed table.
    key : str
        The key.
    where : str
        File, table and key for the message (``"layout.toml [machine] diameter_m"``).
    error : exception class
        Raised with the message.
    default : float, optional
        Value when the key is absent.
    required : bool
        Absent with no default raises (else ``None`` is returned).
    positive, nonneg : bool
        Require a value > 0, or >= 0.
    allow_inf : bool
        Accept infinities, also written as the strings ``"inf"``, ``"infinity"``, ``"-inf"``.
    missing : str
        What the message says after "missing;".

    Returns
    -------
    float or None
    """
    if key not in table:
        if required and default is None:
            raise error(f"{where}: missing; {missing}")
        return default
    raw = table[key]
    if isinstance(raw, str) and allow_inf:
        word = raw.strip().lower()
        if word in ("inf", "infinity", "+inf", "-inf", "-infinity"):
            return -math.inf if word.startswith("-") else math.inf
    if isinstance(raw, bool) or not isinstance(raw, (int, float)):
        hint = ' or "inf"' if allow_inf else ""
        raise error(f"{where} = {raw!r}: expected a number{hint}")
    val = float(raw)
    if math.isnan(val) or (math.isinf(val) and not allow_inf):
        raise error(f"{where} = {raw!r}: expected a finite number")
    if positive and not val > 0:
        raise error(f"{where} = {raw!r}: expected a number > 0")
    if nonneg and val < 0:
        raise error(f"{where} = {raw!r}: expected a number >= 0")
    return val


__all__ = ["read_toml", "check_keys", "number"]
