"""The morning report: one self-contained HTML page per campaign.

``quietwell report --data-dir DIR [--campaign ID | UID ...] -o FILE.html`` writes it;
:func:`write_report` does the same from Python. Each picture of the page is also a
function here that takes a run (``client[uid]``) or a table and returns a matplotlib
Figure, so a notebook shows the same pictures::

    from quietwell import report
    from quietwell.results import open_store

    client = open_store("quietwell-data")  # in-process, read-only; or quietwell.open_catalog
    run = client.values().last()           # e.g. a gain sweep
    report.gain_figure(run)

The report reads the store through :func:`quietwell.report._read.open_runs` alone, and
each stream of a run once (:mod:`quietwell.report._streams`).
"""

from ._collect import ReportData, RunEntry, StepEntry, collect, summary_values
from ._page import render_report, write_report
from ._plots import (
    AXIS_COLOURS,
    damping_figure,
    gain_figure,
    heating_line,
    heating_pressure_figure,
    heating_table,
    psd_figure,
    psd_fits,
    reheating_figure,
    sideband_figure,
    sideband_fits,
)

__all__ = [
    "AXIS_COLOURS",
    "ReportData",
    "RunEntry",
    "StepEntry",
    "collect",
    "damping_figure",
    "gain_figure",
    "heating_line",
    "heating_pressure_figure",
    "heating_table",
    "psd_figure",
    "psd_fits",
    "reheating_figure",
    "render_report",
    "sideband_figure",
    "sideband_fits",
    "summary_values",
    "write_report",
]
