"""Backfill: an asset's Parquet archive (or some of its days) -> the output tables, day by day.

    python -m pipelines.backfill --config FILE --output DIR [--start YYYY-MM-DD] [--end YYYY-MM-DD]
                                 [--commit_days N] [any Beam flag, e.g. --runner, --direct_num_workers]

The checkout's spelling of the installed command ``corrtransforms-backfill``
(:mod:`corrtransforms.launch.backfill`).
"""

from corrtransforms.launch.backfill import cli, main
from corrtransforms.launch.common import load_job_config

__all__ = ["main", "load_job_config"]

if __name__ == "__main__":  # pragma: no cover
    cli()
