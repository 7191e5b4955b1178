"""Reading a TOML input file with one clear error naming the file (layout, ground, settings...)."""

from __future__ import annotations

import os
import tomllib
from collections.abc import Callable
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


__all__ = ["read_toml"]
