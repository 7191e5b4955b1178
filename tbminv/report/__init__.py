"""The shift report (see :mod:`tbminv.report.document`)."""

from tbminv.report.document import write_report

__all__ = ["write_report"]
