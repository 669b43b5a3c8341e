"""Nightly: one calendar day of an asset, resuming the shift detectors from the previous state.

    python -m pipelines.nightly --config FILE --output DIR [--date YYYY-MM-DD] [--rebuild_state]
                                [any Beam flag]

The checkout's spelling of the installed command ``corrtransforms-nightly``
(:mod:`corrtransforms.launch.nightly`, which explains the exit statuses).
"""

from corrtransforms.launch.nightly import MISSING_STATE, cli, main, yesterday

__all__ = ["MISSING_STATE", "main", "yesterday"]

if __name__ == "__main__":  # pragma: no cover
    cli()
