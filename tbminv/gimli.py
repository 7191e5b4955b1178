"""pyGIMLi, set up once for tbminv.

Import pyGIMLi only through this module::

    from tbminv.gimli import pg, ert

It makes three things safe before pyGIMLi is first used:

* **Cache folder.** pyGIMLi crashes on first use when the parent of its user cache folder is
  missing, and it silently caches geometric factors and created data across runs. We create
  the folder and switch pyGIMLi's function cache off (our own caches live in
  :mod:`tbminv.cache`, keyed by a hash of their inputs).
* **Log.** pyGIMLi logs at INFO level and adds a handler to the root logger on import. We
  remove that handler, set pyGIMLi's logger to WARNING (override with ``TBMINV_PG_LOGLEVEL``)
  and let its records propagate under the ``tbminv.pygimli`` name.
* **Threads.** pgcore gives each ERT operator ``min(8, nCPU - 2)`` worker threads: zero on a
  2-CPU machine, in which case the sensitivity loop never runs and Jacobians are all zero.
  ``BERT_NUM_THREADS`` is set before the first operator exists, and
  :func:`configure_operator` sets the count on each operator explicitly. The count comes from
  one setting, :func:`thread_count` (``TBMINV_THREADS``, default 1: with two threads a race
  was seen to corrupt single Jacobian entries).
"""

from __future__ import annotations

import logging
import os
from collections.abc import Mapping, Sequence
from typing import Any

_LOG = logging.getLogger("tbminv.gimli")


def thread_count() -> int:
    """Worker threads for pyGIMLi ERT operators.

    Returns
    -------
    int
        ``TBMINV_THREADS`` if set (at least 1), else 1.
    """
    raw = os.environ.get("TBMINV_THREADS", "1")
    try:
        n = int(raw)
    except ValueError:
        _LOG.warning("TBMINV_THREADS=%r is not an integer; using 1", raw)
        n = 1
    return max(1, n)


def _prepare_environment() -> None:
    os.environ["BERT_NUM_THREADS"] = str(thread_count())
    os.environ.setdefault("OMP_NUM_THREADS", os.environ.get("OMP_NUM_THREADS", "1"))
    home_cache = os.environ.get("XDG_CACHE_HOME") or os.path.join(
        os.path.expanduser("~"), ".cache"
    )
    try:
        os.makedirs(os.path.join(home_cache, "pygimli"), exist_ok=True)
    except OSError:  # read-only home: point pyGIMLi somewhere writable
        import tempfile

        os.environ["XDG_CACHE_HOME"] = tempfile.mkdtemp(prefix="tbminv-cache-")
    home_cfg = os.environ.get("XDG_CONFIG_HOME") or os.path.join(
        os.path.expanduser("~"), ".config"
    )
    try:
        os.makedirs(home_cfg, exist_ok=True)
    except OSError:
        import tempfile

        os.environ["XDG_CONFIG_HOME"] = tempfile.mkdtemp(prefix="tbminv-config-")


def _quiet_logging() -> None:
    root = logging.getLogger()
    pg_logger = logging.getLogger("pyGIMLi")
    for handler in list(root.handlers):
        # pyGIMLi attaches its own handler to the root logger on import
        if type(handler).__module__.startswith("pygimli"):
            root.removeHandler(handler)
    for handler in list(pg_logger.handlers):
        pg_logger.removeHandler(handler)
    level = os.environ.get("TBMINV_PG_LOGLEVEL", "WARNING").upper()
    pg_logger.setLevel(getattr(logging, level, logging.WARNING))
    pg_logger.propagate = True


_root_handlers_before = list(logging.getLogger().handlers)
_prepare_environment()

import numpy as np  # noqa: E402
import pygimli as pg  # noqa: E402
import pygimli.physics.ert as ert  # noqa: E402

for _h in list(logging.getLogger().handlers):
    if _h not in _root_handlers_before:
        logging.getLogger().removeHandler(_h)
_quiet_logging()
try:
    os.makedirs(pg.getCachePath(), exist_ok=True)
except OSError:  # pragma: no cover - exotic file systems
    _LOG.warning("could not create pyGIMLi cache folder %s", pg.getCachePath())
try:
    pg.utils.noCache(True)
except AttributeError:  # pragma: no cover - older pyGIMLi
    pass
try:
    pg.setThreadCount(thread_count())
except Exception:  # pragma: no cover
    pass


def configure_operator(fop: Any, n_threads: int | None = None) -> Any:
    """Give a pyGIMLi ERT forward operator its worker threads.

    Parameters
    ----------
    fop : pygimli.physics.ert.ERTModelling or similar
        Operator with a ``_core`` pgcore operator (ERT) or without (left unchanged).
    n_threads : int, optional
        Threads; defaults to :func:`thread_count`.

    Returns
    -------
    object
        The same operator, for chaining.
    """
    n = thread_count() if n_threads is None else max(1, int(n_threads))
    core = getattr(fop, "_core", None)
    if core is not None and hasattr(core, "setThreadCount"):
        core.setThreadCount(n)
    return fop


def ert_data_container(sensors: Sequence[Sequence[float]],
                       quadrupoles: Sequence[Sequence[int]],
                       fields: Mapping[str, Any] | None = None) -> Any:
    """An ERT data container of sensors and quadrupoles, the one place tbminv builds one.

    Parameters
    ----------
    sensors : sequence of positions
        Sensor coordinates, m: (x, y) on a 2D or 2.5D section, (x, y, z) in 3D. pyGIMLi merges
        positions closer than 1 mm into one sensor; quadrupoles index ``sensors`` either way.
    quadrupoles : sequence of (a, b, m, n)
        Indices into ``sensors`` of the current (a, b) and potential (m, n) electrodes of each
        datum; -1 for none (a pole).
    fields : mapping name -> sequence, optional
        Data fields, one value per quadrupole, e.g. ``{"k": ..., "rhoa": ..., "err": ...}``
        (units as pyGIMLi reads them: ``k`` m, ``rhoa`` ohm-m, ``err`` relative). ``k`` defaults
        to ones.

    Returns
    -------
    pygimli.DataContainerERT
    """
    data = pg.DataContainerERT()
    index = [int(data.createSensor(pg.Pos(*(float(c) for c in p)))) for p in sensors]
    for i, q in enumerate(quadrupoles):
        data.createFourPointData(i, *(index[int(j)] if int(j) >= 0 else -1 for j in q))
    values = {"k": np.ones(len(quadrupoles))}
    values.update(fields or {})
    for name, v in values.items():
        v = np.asarray(v, float)
        if v.shape != (len(quadrupoles),):
            raise ValueError(f"data field {name!r} has shape {v.shape} for {len(quadrupoles)} "
                             "quadrupoles")
        data.set(name, pg.Vector(v))
    return data


def versions() -> dict[str, str]:
    """Versions of pyGIMLi and pgcore as text (for provenance attributes)."""
    out = {"pygimli": str(getattr(pg, "__version__", "unknown"))}
    try:
        from importlib.metadata import version

        out["pygimli"] = version("pygimli")
        out["pgcore"] = version("pgcore")
    except Exception:  # pragma: no cover
        pass
    return out


__all__ = ["pg", "ert", "configure_operator", "ert_data_container", "thread_count", "versions"]
