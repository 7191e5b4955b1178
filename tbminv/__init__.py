"""tbminv: electrical-resistivity look-ahead for tunnel boring machines.

A thin layer over pyGIMLi: layouts of machine, tunnel and electrodes; synthetic drives; readings
screening; regularised inversion with the steel machine as a fixed conductive body; the moving
section ahead of the face; look-ahead reach; the shift report.

An interpretation aid only: it does not replace probing, site investigation and the judgement of
licensed engineers; local codes rule.
"""

from __future__ import annotations

import logging

__version__ = "0.1.0"

logging.getLogger("tbminv").addHandler(logging.NullHandler())

CAUTION = (
    "tbminv is an interpretation aid. Its images, distances and material candidates are "
    "model results with stated uncertainty, not observations: they do not replace probing "
    "ahead of the face, site investigation, or the judgement of licensed engineers, and "
    "local codes and the project's own procedures rule."
)


def environment_report() -> str:
    """A text report of the platform and package versions, for bug reports (scooby).

    Returns
    -------
    str
        Versions of Python, tbminv, pyGIMLi, pgcore, numpy, scipy, xarray, matplotlib, dask
        and the netCDF engines, plus CPU count and memory.
    """
    import scooby

    from tbminv import gimli  # noqa: F401  (configures pyGIMLi first)

    report = scooby.Report(
        core=["tbminv", "pygimli", "pgcore", "numpy", "scipy", "xarray", "matplotlib"],
        optional=["dask", "distributed", "h5netcdf", "netCDF4", "ipywidgets", "pandas",
                  "pyarrow", "sksparse", "tqdm"],
        ncol=2,
    )
    return str(report)


__all__ = ["__version__", "environment_report", "CAUTION"]
