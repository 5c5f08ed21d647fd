"""The report of a scored run folder: ``report.html`` (:mod:`~rehedge.report.page`), its figures
(:mod:`~rehedge.report.figures`) and the run folder it reads (:mod:`~rehedge.report.scored`)."""

from rehedge.report.figures import write_frontier
from rehedge.report.page import build_report

__all__ = ["build_report", "write_frontier"]
