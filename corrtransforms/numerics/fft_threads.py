"""Threads for the batched FFTs of screening, read from the environment.

The one place that reads :data:`TRANSFORM_THREADS_ENV`. scipy's pocketfft runs the rows of a
batched transform on several threads; each row's transform is computed exactly as with one
thread, so results are bit-identical. Worth it only when a worker process has idle cores (the
in-process local runner on a multi-core machine); with one worker process per core it only
adds contention.
"""

from __future__ import annotations

import os

#: environment variable: threads for screening's batched transforms (default 1)
TRANSFORM_THREADS_ENV = "CORRTRANSFORMS_TRANSFORM_THREADS"


def transform_threads() -> int:
    """Threads for the batched 2n-point transforms of screening.

    Returns
    -------
    int
        ``CORRTRANSFORMS_TRANSFORM_THREADS`` when set to a positive integer, else 1.
    """
    try:
        value = int(os.environ.get(TRANSFORM_THREADS_ENV, "1"))
    except ValueError:
        return 1
    return max(1, value)
