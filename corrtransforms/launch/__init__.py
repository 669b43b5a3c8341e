"""The command-line launchers: backfill, nightly and report (argument parsing, exit statuses).

``python -m pipelines.backfill|nightly|report`` in a checkout and the installed console entry
points ``corrtransforms-backfill``, ``corrtransforms-nightly`` and ``corrtransforms-report`` run
the ``main`` functions of :mod:`~corrtransforms.launch.backfill`,
:mod:`~corrtransforms.launch.nightly` and :mod:`~corrtransforms.launch.report`; what they share
(options, configuration loading, running a job, exit statuses) is in
:mod:`~corrtransforms.launch.common`.
"""
