"""Report: ``DIR/report/index.html`` and one PNG per subject and indicator from the output tables.

    python -m pipelines.report --output DIR [--report_dir FOLDER]

The checkout's spelling of the installed command ``corrtransforms-report``
(:mod:`corrtransforms.launch.report`); the report itself is :mod:`corrtransforms.report`.
"""

from corrtransforms.launch.report import cli, main
from corrtransforms.report import episodes_from_shifts, plot_file_name

__all__ = ["main", "plot_file_name", "episodes_from_shifts"]

if __name__ == "__main__":  # pragma: no cover
    cli()
