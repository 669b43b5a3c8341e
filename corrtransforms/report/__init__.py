"""The static report of a job's output: summaries of the tables, trend pictures and one HTML page,
read and written through Beam's FileSystems (so a gs:// or s3:// output can be reported).

- :mod:`corrtransforms.report.summaries`: what the page needs from the tables;
- :mod:`corrtransforms.report.plots`: the matplotlib pictures;
- :mod:`corrtransforms.report.page`: the HTML page and :func:`write_report`;
- :mod:`corrtransforms.report.files`: the store over Beam's FileSystems.

matplotlib is an extra (``pip install "corrtransforms[report]"``); it is imported when the first
picture is drawn.
"""

from corrtransforms.report.page import CAUTION, render_index, write_report
from corrtransforms.report.plots import plot_file_name, plot_series
from corrtransforms.report.summaries import episodes_from_shifts, read_output, report_episodes

__all__ = [
    "CAUTION",
    "episodes_from_shifts",
    "plot_file_name",
    "plot_series",
    "read_output",
    "render_index",
    "report_episodes",
    "write_report",
]
