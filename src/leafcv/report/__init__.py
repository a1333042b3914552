"""The report of a run folder: one self-contained HTML page (report.html), each figure as PNG, SVG and
the CSV of its plotted data (figures/), each table as CSV (tables/). Built from the run folder alone,
without a sampler."""
from .write import write_report

__all__ = ["write_report"]
