"""Invented archives for the scale benchmark (benchmarks/run_all.py): 8 channels at 100 Hz.

Layout as a permanent logger writes it: wide, one Parquet file per hour in Hive ``date=`` folders,
a ``time`` column ``timestamp[us, UTC]``, float32 channels ``acc1..acc8`` and a float32
``temperature`` covariate, row groups of 15 minutes (90 000 rows, about 4 MB decoded), zstd, plain encoding (no
dictionary: every sample value is distinct).

The signal is a small invented structure, so every indicator has something to find: two lightly
damped modes (3.1 Hz, 2 % and 7.0 Hz, 1.5 % critical damping) driven by white noise and seen by
the channels through invented mode-shape ordinates, a ground-borne broadband component that reaches
``acc7`` and ``acc8`` 50 ms apart, and independent sensor noise on every channel. Each mode is the
exact discrete-time impulse-invariant resonator (an AR(2) filter), carried across hour boundaries
so the record is continuous. The temperature follows a daily sine.

The longest archive is generated once; shorter ones are hard links to its first days, so every
variant of every length reads byte-identical files.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
import textwrap
from typing import List, Optional

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from scipy import signal

SAMPLE_RATE_HZ = 100.0
CHANNELS = tuple(f"acc{i}" for i in range(1, 9))
COVARIATE = "temperature"
START = dt.datetime(2024, 3, 4, tzinfo=dt.timezone.utc)
ROWS_PER_HOUR = int(3600 * SAMPLE_RATE_HZ)
ROW_GROUP_ROWS = ROWS_PER_HOUR // 4  # 15 minutes
SEED = 7
#: (frequency Hz, damping ratio) of the invented modes
MODES = ((3.1, 0.02), (7.0, 0.015))
#: mode-shape ordinates of each channel for each mode (invented)
SHAPES = np.array([[1.0, 0.3], [0.8, -0.6], [0.5, 1.0], [-0.4, 0.7], [0.9, 0.1], [0.2, -0.9], [0.1, 0.05], [0.1, 0.05]])
GROUND_DELAY_SAMPLES = 5  # acc8 sees the ground-borne component 50 ms after acc7


def _resonator(freq_hz: float, damping: float, fs: float):
    """AR(2) coefficients of an impulse-invariant single-degree-of-freedom oscillator."""
    w = 2 * np.pi * freq_hz
    r = np.exp(-damping * w / fs)
    wd = w * np.sqrt(1 - damping**2) / fs
    return np.array([1.0]), np.array([1.0, -2 * r * np.cos(wd), r * r])


def _hours(days: int) -> List[dt.datetime]:
    return [START + dt.timedelta(hours=h) for h in range(days * 24)]


def file_path(archive: str, hour: dt.datetime) -> str:
    return os.path.join(archive, f"date={hour.date().isoformat()}", f"{hour.strftime('%H')}.parquet")


def write_archive(archive: str, days: int, hours: Optional[int] = None) -> None:
    """Write ``days`` days (or just ``hours`` hours) of hourly files under ``archive`` (skipped
    when already complete)."""
    marker = os.path.join(archive, "_complete")
    if os.path.exists(marker):
        return
    rng = np.random.default_rng(SEED)
    filters = [_resonator(f, z, SAMPLE_RATE_HZ) for f, z in MODES]
    states = [np.zeros(2) for _ in MODES]
    ground_tail = np.zeros(GROUND_DELAY_SAMPLES)
    n = ROWS_PER_HOUR
    for hour in _hours(days)[:hours]:
        modal = np.empty((n, len(MODES)))
        for m, (b, a) in enumerate(filters):
            out, states[m] = signal.lfilter(b, a, rng.standard_normal(n), zi=states[m])
            modal[:, m] = out / np.sqrt(np.mean(out**2) + 1e-30)
        ground = rng.standard_normal(n)
        delayed = np.concatenate([ground_tail, ground[:-GROUND_DELAY_SAMPLES]])
        ground_tail = ground[-GROUND_DELAY_SAMPLES:]
        data = modal @ SHAPES.T + 0.3 * rng.standard_normal((n, len(CHANNELS)))
        data[:, 6] += ground
        data[:, 7] += 0.8 * delayed
        t0 = int(hour.timestamp() * 1_000_000)
        time = pa.array(t0 + np.arange(n, dtype=np.int64) * int(1e6 / SAMPLE_RATE_HZ), type=pa.int64()).cast(
            pa.timestamp("us", "UTC")
        )
        seconds = (hour - START).total_seconds() + np.arange(n) / SAMPLE_RATE_HZ
        temperature = (12.0 + 4.0 * np.sin(2 * np.pi * seconds / 86400.0)).astype(np.float32)
        columns = {
            "time": time,
            **{c: data[:, i].astype(np.float32) for i, c in enumerate(CHANNELS)},
            COVARIATE: temperature,
        }
        path = file_path(archive, hour)
        os.makedirs(os.path.dirname(path), exist_ok=True)
        pq.write_table(pa.table(columns), path, row_group_size=ROW_GROUP_ROWS, compression="zstd", use_dictionary=False)
    open(marker, "w").close()


def link_archive(source: str, archive: str, days: int) -> None:
    """``archive`` as hard links to the first ``days`` days of the complete ``source``."""
    marker = os.path.join(archive, "_complete")
    if os.path.exists(marker):
        return
    shutil.rmtree(archive, ignore_errors=True)
    for hour in _hours(days):
        target = file_path(archive, hour)
        os.makedirs(os.path.dirname(target), exist_ok=True)
        try:
            os.link(file_path(source, hour), target)
        except OSError:
            shutil.copyfile(file_path(source, hour), target)
    open(marker, "w").close()


def archive_files(archive: str) -> List[str]:
    """The archive's Parquet files, sorted (what every variant reads)."""
    out = []
    for folder, _, names in os.walk(archive):
        out.extend(os.path.join(folder, n) for n in names if n.endswith(".parquet"))
    return sorted(out)


#: file name of the lean job's configuration beside each archive's asset.toml
LEAN_CONFIG = "asset_lean.toml"


def config_text(archive_folder: str = "archive", lean: bool = False) -> str:
    """The benchmark asset's TOML: all 36 pairs, max lag 10 s, two modes, screening and shifts.

    ``lean``: the same job cut down to what the plain script computes (correlations, rms,
    correlation time, lag and peak coefficient; the pipeline still adds its errors and shift
    detection on those four): no modes, screening off. Used only to show where the time goes.
    """
    text = _full_config_text(archive_folder)
    if not lean:
        return text
    text = text.split("[[modes]]")[0] + "[baseline]" + text.split("[baseline]")[1]
    text = text.replace("[screening]\nenabled = true", "[screening]\nenabled = false")
    text = text.replace(
        '[shifts]\ndetector = "both"',
        '[shifts]\ndetector = "both"\nindicators = ["rms", "corr_time_s", "lag_s", "peak_coef"]',
    )
    return text.replace("# invented benchmark asset", "# invented benchmark asset, lean job")


def _full_config_text(archive_folder: str) -> str:
    return textwrap.dedent(f"""\
        # invented benchmark asset (benchmarks/scale_archive.py)
        [asset]
        name = "scale-bench"

        [archive]
        path = "{archive_folder}"
        layout = "wide"
        sample_rate_hz = {SAMPLE_RATE_HZ}

        [channels]
        names = [{", ".join(f'"{c}"' for c in CHANNELS)}]
        covariates = ["{COVARIATE}"]

        [windows]
        length_s = 600.0

        [correlation]
        max_lag_s = 10.0
        pairs = "all"

        [[modes]]
        name = "mode_1"
        channel = "acc1"
        band_hz = [2.6, 3.6]

        [[modes]]
        name = "mode_2"
        channel = "acc3"
        band_hz = [6.3, 7.7]

        [baseline]
        windows = 36

        [screening]
        enabled = true

        [shifts]
        detector = "both"
        """)


def prepare(work: str, days_list) -> dict:
    """Archives for every length in ``days_list`` (and their configs) under ``work``.

    Returns ``{days: (archive folder, config path)}``.
    """
    longest = max(days_list)
    source = os.path.join(work, f"archive_{longest}d")
    write_archive(source, longest)
    out = {}
    for days in sorted(set(days_list)):
        folder = os.path.join(work, f"{days}d")
        archive = os.path.join(folder, "archive")
        if days == longest:
            if not os.path.exists(os.path.join(archive, "_complete")):
                link_archive(source, archive, days)
        else:
            link_archive(source, archive, days)
        config = os.path.join(folder, "asset.toml")
        with open(config, "w") as handle:
            handle.write(config_text("archive"))
        with open(os.path.join(folder, LEAN_CONFIG), "w") as handle:
            handle.write(config_text("archive", lean=True))
        out[days] = (archive, config)
    return out
