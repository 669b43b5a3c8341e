"""The command-line launchers: backfill, nightly and report (argument parsing, exit statuses).

``python -m pipelines.backfill|nightly|report`` in a checkout and the installed console entry
points ``corrtransforms-backfill``, ``corrtransforms-nightly`` and ``corrtransforms-report`` run
the ``main`` functions of :mod:`~corrtransforms.launch.backfill`,
:mod:`~corrtransforms.launch.nightly` and :mod:`~corrtransforms.launch.report`; what they share
(options, configuration loading, running a job, exit statuses) is in
:mod:`~corrtransforms.launch.common`.

Importing this package first installs a filter on the root logger that drops Beam's import-time
warning "apitools not found ..." (the optional Google Cloud client is absent: nothing to act on);
every other warning passes.
"""

import logging


class _WithoutApitoolsWarning(logging.Filter):
    """Drops the one message Beam logs when its optional Google Cloud clients are absent."""

    def filter(self, record: logging.LogRecord) -> bool:
        return not str(record.msg).startswith("apitools not found")


if not any(isinstance(f, _WithoutApitoolsWarning) for f in logging.getLogger().filters):
    logging.getLogger().addFilter(_WithoutApitoolsWarning())
