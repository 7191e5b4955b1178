"""``tbminv demo``: the whole chain on the bundled demo drive (an invented scenario).

Steps: check the bundled readings log (quarantine, QC, error model) → invert every advance into
the moving section store → write the shift report. Each step prints where its outputs went. A step
whose module is not part of this version is reported as such and the chain stops there: the demo
never makes up a result.
"""

from __future__ import annotations

import importlib
import logging
from collections.abc import Callable
from pathlib import Path

from tbminv.ground import demo_ground_path
from tbminv.layout import demo_layout_path, load_layout

_LOG = logging.getLogger("tbminv.demo")

DATA = Path(__file__).parent / "data"


def demo_readings_path() -> Path:
    """Path of the bundled demo readings log."""
    return DATA / "demo_readings.csv"


def demo_settings_path() -> Path:
    """Path of the bundled demo settings (``[qc]``, ``[invert]``, ``[contact]``)."""
    return DATA / "demo_settings.toml"


def _optional(name: str):  # noqa: ANN202 - module or None
    try:
        return importlib.import_module(f"tbminv.{name}")
    except ModuleNotFoundError as exc:
        if exc.name == f"tbminv.{name}":
            return None
        raise


def run_demo(out_dir: Path, echo: Callable[[str], None] | None = None) -> int:
    """Run the demo chain into ``out_dir`` and print what was done and where it went.

    Returns
    -------
    int
        0 if every available step succeeded.
    """
    echo = echo or _LOG.info
    import tbminv

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    layout = load_layout(demo_layout_path())
    echo(f"tbminv {tbminv.__version__} demo: {layout.name}")
    echo(f"  layout: {demo_layout_path()} ({len(layout.electrodes)} electrodes, "
          f"{len(layout.measurements)} quadrupoles)")
    echo(f"  ground used to make the demo log: {demo_ground_path()}")
    readings = demo_readings_path()
    if not readings.exists():
        echo(f"  demo readings log missing ({readings}); regenerate it with "
              "python scripts/make_demo_data.py")
        return 2
    echo(f"  readings log: {readings}")
    steps = (("check", "qc"), ("invert", "invert"), ("report", "report"))
    store = out / "section.nc"
    inv_settings = qc_settings = None
    qc_summary = None
    if _optional("invert") is not None:
        from tbminv.invert import load_settings

        inv_settings, qc_settings = load_settings(demo_settings_path())
        echo(f"  settings: {demo_settings_path()}")
    for step, module in steps:
        mod = _optional(module)
        if mod is None:
            echo(f"  {step}: not available in this version (tbminv.{module} is not built yet); "
                  "the demo stops here")
            break
        if step == "check":
            result = mod.run_check(readings, layout, out / "check", qc_settings)
            for line in result.describe():
                echo(f"  check: {line}")
            qc_summary = result.summary.get("qc")
            if not result.usable:
                return 1
        elif step == "invert":
            ds = mod.run_drive(readings, layout, store, settings=inv_settings,
                               qc_settings=qc_settings, out_dir=out / "invert",
                               layout_path=demo_layout_path(), progress=True)
            echo(f"  invert: {ds.sizes['advance']} advances -> section store {store}")
        else:
            paths = mod.write_report(store, out / "report", qc_summary=qc_summary)
            for p in paths:
                echo(f"  report: {p}")
    echo(tbminv.CAUTION)
    return 0


__all__ = ["run_demo", "demo_readings_path"]
