"""Report: the static report of an output folder (or filesystem URL).

    corrtransforms-report --output DIR [--report_dir FOLDER] [Beam filesystem flags]

Writes ``DIR/report/index.html`` and one PNG per subject and indicator
(:func:`corrtransforms.report.write_report`), reading and writing through Beam's FileSystems.
"""

from __future__ import annotations

import sys
from typing import List, Optional

from corrtransforms.launch import common


def main(argv: Optional[List[str]] = None) -> int:
    """Write the report; returns the exit status (0 done, 1 a missing or empty output)."""
    from corrtransforms.report import files, write_report

    options = common.pipeline_options(argv, "report")
    args = options.view_as(common.JobOptions)
    if not args.output:
        raise SystemExit("--output is required")
    try:
        import matplotlib  # noqa: F401 - the pictures need it; checked before anything is written
    except ImportError:
        print(
            'report: matplotlib is not installed; install the report extra: pip install "corrtransforms[report]"',
            file=sys.stderr,
        )
        return common.ERROR
    store = files.default_store()
    if not store.holds_anything(args.output):
        print(f"report: --output {args.output!r} is not a folder (nothing is stored under it)", file=sys.stderr)
        return common.ERROR
    index = write_report(args.output, args.report_dir, store)
    print(f"report written to {index}")
    return common.DONE


def cli() -> None:
    """Console entry point ``corrtransforms-report``."""
    sys.exit(main())
