"""``tbminv demo``: the whole chain on the bundled demo drive (an invented scenario).

Steps: check the bundled readings log (quarantine, QC, error model) → invert every advance into
the moving section store → write the shift report. Each step prints where its outputs went.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from pathlib import Path

import tbminv
from tbminv.ground import demo_ground_path
from tbminv.inversion.settings import load_settings
from tbminv.jobs import run_check, run_drive, stage_times_line
from tbminv.layout import demo_layout_path, load_layout
from tbminv.report import write_report

_LOG = logging.getLogger(__name__)

DATA = Path(__file__).parent / "data"


def demo_readings_path() -> Path:
    """Path of the bundled demo readings log."""
    return DATA / "demo_readings.csv"


def demo_settings_path() -> Path:
    """Path of the bundled demo settings (``[qc]``, ``[invert]``, ``[contact]``)."""
    return DATA / "demo_settings.toml"


def run_demo(out_dir: Path, echo: Callable[[str], None] | None = None) -> int:
    """Run the demo chain into ``out_dir`` and print what was done and where it went.

    Returns
    -------
    int
        0 if every available step succeeded.
    """
    echo = echo or _LOG.info
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
    store = out / "section.nc"
    inv_settings, qc_settings = load_settings(demo_settings_path())
    echo(f"  settings: {demo_settings_path()}")
    result = run_check(readings, layout, out / "check", qc_settings,
                       model_error_floor=inv_settings.model_error_floor,
                       forward_settings=inv_settings.forward_settings)
    for line in result.describe():
        echo(f"  check: {line}")
    if not result.usable:
        return 1
    ds = run_drive(result.prepared, layout, store, settings=inv_settings,
                   layout_path=demo_layout_path(), progress=True)
    echo(f"  invert: {ds.sizes['advance']} advances -> section store {store}")
    echo(f"  invert: {stage_times_line(ds)}")
    for p in write_report(store, out / "report", qc_summary=result.summary.get("qc")):
        echo(f"  report: {p}")
    echo(tbminv.CAUTION)
    return 0


__all__ = ["run_demo", "demo_readings_path"]
