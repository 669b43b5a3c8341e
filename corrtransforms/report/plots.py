"""The trend pictures of the report: one PNG per asset, subject and indicator (matplotlib, Agg).

Each picture shows the indicator's value per window with its standard-error band; when the shifts
table holds the series, also the covariate-compensated expectation, the healthy band (expected
+/- 3 sqrt(resid_scale^2 + stderr^2), i.e. |z| <= 3), the baseline windows, the shifted windows
and the estimated onsets, and a lower panel with the standardised residual z.
"""

from __future__ import annotations

import io
import re
from typing import Dict, List, Optional, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from corrtransforms.records import holds_window
from corrtransforms.report.summaries import OutputTables, _column, _text_time, _us

#: width of the healthy band drawn around the expectation, in residual scales (common practice:
#: the Shewhart three-sigma limits)
BAND_SCALES = 3.0

# colours of the pictures (plain, high contrast, distinguishable in grey print)
INK = "#222222"
EXPECTED_COLOUR = "#1d4e89"
BAND_COLOUR = "#c9dcef"
STDERR_COLOUR = "#9a9a9a"
BASELINE_COLOUR = "#ececec"
SHIFTED_COLOUR = "#c0392b"
QUALITY_COLOUR = "#8a6d00"
HELD_OUT_COLOUR = "#6a3d9a"


def plot_file_name(subject: str, indicator: str) -> str:
    """File name of a series' picture: safe on every file system (":" of pairs becomes "--")."""
    safe = re.sub(r"[^A-Za-z0-9_.-]", "_", subject.replace(":", "--"))
    return f"{safe}__{re.sub(r'[^A-Za-z0-9_.-]', '_', indicator)}.png"


def _series_arrays(table: pa.Table, columns: Sequence[str]) -> Dict[str, np.ndarray]:
    out = {"time": _us(table.column("window_start"))}
    for name in columns:
        if name not in table.column_names:
            out[name] = np.full(table.num_rows, np.nan)
        elif pa.types.is_floating(table.schema.field(name).type) or pa.types.is_integer(table.schema.field(name).type):
            out[name] = pc.cast(table.column(name), pa.float64()).fill_null(np.nan).to_numpy()
        elif pa.types.is_timestamp(table.schema.field(name).type):
            out[name] = _us(table.column(name))
        else:
            out[name] = np.array([v if v is not None else "" for v in table.column(name).to_pylist()], dtype=object)
    order = np.argsort(out["time"], kind="stable")
    return {k: v[order] for k, v in out.items()}


def _as_datetimes(us: np.ndarray) -> np.ndarray:
    return us.astype("datetime64[us]")


def _break_gaps(time_us: np.ndarray, *arrays: np.ndarray):
    """Insert a NaN point into each array where the spacing exceeds 3 times the median spacing, so
    lines and bands are not drawn across missing days. Returns (datetimes, *arrays)."""
    if time_us.size < 3:
        return (_as_datetimes(time_us),) + tuple(arrays)
    spacing = np.diff(time_us)
    gaps = np.flatnonzero(spacing > 3 * np.median(spacing)) + 1
    time_out = np.insert(time_us, gaps, time_us[gaps - 1] + spacing[gaps - 1] // 2)
    return (_as_datetimes(time_out),) + tuple(np.insert(a.astype(float), gaps, np.nan) for a in arrays)


def plot_series(path, asset: str, subject: str, indicator: str, values: pa.Table, shifts: Optional[pa.Table]) -> None:
    """Write one trend picture (PNG) for a subject and indicator (:func:`draw_series`)."""
    import matplotlib.pyplot as plt

    fig = draw_series(asset, subject, indicator, values, shifts)
    fig.savefig(path, dpi=100, format="png")
    plt.close(fig)


def _quality_marks(ax, time, value, finite, quality, handles) -> None:
    """Values with quality codes: hollow circles where the codes are informational, crosses where
    they hold the window out of the detectors (the shift stage's rule,
    :func:`corrtransforms.records.holds_window`)."""
    codes_of = [tuple(c for c in str(q).split(";") if c and c != "ok") for q in quality]
    coded = np.array([bool(c) for c in codes_of], dtype=bool) & finite
    held = np.array([holds_window(c) for c in codes_of], dtype=bool) & coded
    for mask, label, style in (
        (
            coded & ~held,
            "value with an informational quality code",
            dict(s=14, facecolors="none", edgecolors=QUALITY_COLOUR, linewidths=0.7),
        ),
        (held, "held out of the detectors", dict(s=22, marker="x", color=HELD_OUT_COLOUR, linewidths=0.9)),
    ):
        if not mask.any():
            continue
        counts: Dict[str, int] = {}
        for codes in (c for c, m in zip(codes_of, mask) if m):
            for code in codes:
                counts[code] = counts.get(code, 0) + 1
        common = sorted(counts, key=lambda c: (-counts[c], c))
        text = f"{label} ({common[0]}{', ...' if len(common) > 1 else ''})"
        handles.append(ax.scatter(time[mask], value[mask], zorder=4, label=text, **style))


def draw_series(asset: str, subject: str, indicator: str, values: pa.Table, shifts: Optional[pa.Table]):
    """One trend picture for a subject and indicator, as a matplotlib Figure (constrained layout,
    the legend below the axes inside the figure).

    Parameters
    ----------
    asset, subject, indicator : str
        Names for the title.
    values : pyarrow.Table
        The series' indicators rows (window_start, value, stderr, unit, quality).
    shifts : pyarrow.Table or None
        The series' shifts rows (window_start, value, stderr, expected, resid_scale, z, state,
        onset), or None when the series is not monitored.

    Notes
    -----
    The healthy band is ``expected +/- 3 sqrt(resid_scale^2 + stderr^2)``, the values with
    ``|z| <= 3`` (three-sigma limits, common practice for control charts, Shewhart 1931), where
    ``resid_scale`` is the baseline residual scale net of the windows' own error and ``stderr``
    the window's record-length error; the error band of each value is
    ``value +/- stderr``. The lower panel shows ``z = (value - expected) / sqrt(resid_scale^2 +
    stderr^2)`` as written by the shift detector.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    v = _series_arrays(values, ["value", "stderr", "unit", "quality"])
    unit = next((u for u in v["unit"] if u), "")
    monitored = shifts is not None and shifts.num_rows > 0
    if monitored:
        fig, (ax, az) = plt.subplots(
            2, 1, figsize=(10, 6.0), sharex=True, layout="constrained", gridspec_kw={"height_ratios": [3, 1.2]}
        )
    else:
        fig, ax = plt.subplots(1, 1, figsize=(10, 4.2), layout="constrained")
        az = None
    time = _as_datetimes(v["time"])
    handles: List = []
    if monitored:
        _shift_layers(ax, az, shifts, handles)
    _value_layers(ax, v, time, handles)
    _finish(fig, ax, az, f"{asset} \u2014 {subject} \u2014 {indicator}", indicator, unit, v, shifts, handles)
    return fig


def _shift_layers(ax, az, shifts: pa.Table, handles: List) -> None:
    """What the shift detector wrote: baseline windows, healthy band, expectation, shifted
    windows and onsets on the upper axes; the standardised residual on the lower."""
    s = _series_arrays(shifts, ["expected", "resid_scale", "z", "state", "onset", "value", "stderr"])
    stime = _as_datetimes(s["time"])
    baseline = s["state"] == "baseline"
    if baseline.any():
        first, last = stime[baseline][0], stime[baseline][-1]
        handles.append(ax.axvspan(first, last, color=BASELINE_COLOUR, zorder=0, label="baseline windows"))
        az.axvspan(first, last, color=BASELINE_COLOUR, zorder=0)
    spread = np.sqrt(s["resid_scale"] ** 2 + np.where(np.isfinite(s["stderr"]), s["stderr"], 0.0) ** 2)
    band = np.isfinite(s["expected"]) & np.isfinite(spread)
    if band.any():
        gap_time, expected, low, high = _break_gaps(
            s["time"],
            s["expected"],
            np.where(band, s["expected"] - BAND_SCALES * spread, np.nan),
            np.where(band, s["expected"] + BAND_SCALES * spread, np.nan),
        )
        handles.append(
            ax.fill_between(
                gap_time,
                low,
                high,
                color=BAND_COLOUR,
                linewidth=0,
                zorder=1,
                label=f"healthy band: |z| \u2264 {BAND_SCALES:g}",
            )
        )
        handles.append(
            ax.plot(
                gap_time,
                expected,
                color=EXPECTED_COLOUR,
                linewidth=1.2,
                zorder=3,
                label="expected (covariate-compensated)",
            )[0]
        )
    shifted = s["state"] == "shifted"
    if shifted.any():
        handles.append(
            ax.scatter(
                stime[shifted],
                s["value"][shifted],
                s=26,
                marker="D",
                color=SHIFTED_COLOUR,
                zorder=5,
                label="shifted window",
            )
        )
        onsets = np.unique(s["onset"][shifted & (s["onset"] != np.iinfo(np.int64).min)])
        for k, onset in enumerate(onsets):
            line = ax.axvline(
                _as_datetimes(np.array([onset]))[0],
                color=SHIFTED_COLOUR,
                linestyle="--",
                linewidth=1.0,
                zorder=4,
                label="estimated onset" if k == 0 else None,
            )
            az.axvline(_as_datetimes(np.array([onset]))[0], color=SHIFTED_COLOUR, linestyle="--", linewidth=1.0)
            if k == 0:
                handles.append(line)
    _z_panel(az, s, stime, shifted)


def _z_panel(az, s: Dict[str, np.ndarray], stime, shifted: np.ndarray) -> None:
    """The lower panel: z with its +/- BAND_SCALES lines, shifted windows as diamonds."""
    zfinite = np.isfinite(s["z"])
    az.axhline(0.0, color=INK, linewidth=0.6)
    for level in (-BAND_SCALES, BAND_SCALES):
        az.axhline(level, color=EXPECTED_COLOUR, linewidth=0.8, linestyle=":")
    az.plot(stime[zfinite & ~shifted], s["z"][zfinite & ~shifted], ".", color=INK, markersize=3)
    az.plot(stime[zfinite & shifted], s["z"][zfinite & shifted], "D", color=SHIFTED_COLOUR, markersize=3.5)
    az.set_ylabel("z")
    zlim = np.nanpercentile(np.abs(s["z"][zfinite]), 99.5) if zfinite.any() else BAND_SCALES
    az.set_ylim(-max(zlim, 4.0) * 1.1, max(zlim, 4.0) * 1.1)
    az.grid(True, color="#dddddd", linewidth=0.5)


def _value_layers(ax, v: Dict[str, np.ndarray], time, handles: List) -> None:
    """The indicator values with their error band and quality marks, and the value axis range."""
    value, stderr = v["value"], v["stderr"]
    finite = np.isfinite(value)
    band_ok = finite & np.isfinite(stderr)
    if band_ok.any():
        gap_time, low, high = _break_gaps(
            v["time"][finite],
            np.where(band_ok, value - stderr, np.nan)[finite],
            np.where(band_ok, value + stderr, np.nan)[finite],
        )
        handles.append(
            ax.fill_between(
                gap_time,
                low,
                high,
                color=STDERR_COLOUR,
                alpha=0.45,
                linewidth=0,
                zorder=2,
                label="value \u00b1 standard error",
            )
        )
    ok = np.array([q in ("", "ok") for q in v["quality"]], dtype=bool)
    gap_time, line = _break_gaps(v["time"][finite], value[finite])
    ax.plot(gap_time, line, color=INK, linewidth=0.5, alpha=0.5, zorder=2)
    handles.append(ax.scatter(time[finite & ok], value[finite & ok], s=7, color=INK, zorder=4, label="value"))
    _quality_marks(ax, time, value, finite, v["quality"], handles)
    if finite.any():
        low, high = np.nanpercentile(value[finite], [0.5, 99.5])
        pad = 0.15 * (high - low) if high > low else max(abs(high) * 0.05, 1e-12)
        ax.set_ylim(low - pad, high + pad)
    else:
        ax.text(0.5, 0.5, "no finite values", transform=ax.transAxes, ha="center", va="center", color=INK)


def _finish(
    fig,
    ax,
    az,
    title: str,
    indicator: str,
    unit: str,
    v: Dict[str, np.ndarray],
    shifts: Optional[pa.Table],
    handles: List,
) -> None:
    """Titles, labels, the legend inside the figure below the axes, the date axis."""
    import matplotlib.dates as mdates

    monitored = shifts is not None and shifts.num_rows > 0
    finite = np.isfinite(v["value"])
    ax.set_title(title, loc="left", fontsize=12, color=INK)
    shifted_count = 0
    if shifts is not None and monitored:
        shifted_count = int((shifts.column("state").to_numpy(zero_copy_only=False) == "shifted").sum())
    ax.set_title(
        f"{int(finite.sum())} windows" + (f", {shifted_count} shifted" if monitored else ", not monitored"),
        loc="right",
        fontsize=9,
        color="#555555",
    )
    ax.set_ylabel(f"{indicator} [{unit}]" if unit else indicator)
    ax.grid(True, color="#dddddd", linewidth=0.5)
    legend = [h for h in handles if not str(h.get_label()).startswith("_")]
    widest = max((len(str(h.get_label())) for h in legend), default=0)
    fig.legend(handles=legend, loc="outside lower center", fontsize=8, frameon=False, ncol=3 if widest <= 40 else 2)
    bottom = az if az is not None else ax
    locator = mdates.AutoDateLocator()
    bottom.xaxis.set_major_locator(locator)
    bottom.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    bottom.set_xlabel("window start (UTC)")
    for a in (ax, az):
        if a is not None:
            for side in ("top", "right"):
                a.spines[side].set_visible(False)


def write_plots(output: OutputTables, report_dir: str, store) -> List[Dict]:
    """One PNG per asset, subject and indicator of the indicators table, written through
    ``store`` under ``report_dir``; returns their entries (path relative to ``report_dir``)."""
    indicators = output.get("indicators")
    if indicators is None:
        return []
    shifts = output.get("shifts")
    keys = sorted(
        set(
            zip(
                _column(indicators, "asset", ""),
                _column(indicators, "subject", ""),
                _column(indicators, "indicator", ""),
            )
        )
    )
    shift_keys = set()
    if shifts is not None:
        shift_keys = set(
            zip(_column(shifts, "asset", ""), _column(shifts, "subject", ""), _column(shifts, "indicator", ""))
        )
    entries = []
    for asset, subject, indicator in keys:
        mask = pc.and_(
            pc.and_(pc.equal(indicators.column("asset"), asset), pc.equal(indicators.column("subject"), subject)),
            pc.equal(indicators.column("indicator"), indicator),
        )
        series_shifts = None
        if shifts is not None and (asset, subject, indicator) in shift_keys:
            smask = pc.and_(
                pc.and_(pc.equal(shifts.column("asset"), asset), pc.equal(shifts.column("subject"), subject)),
                pc.equal(shifts.column("indicator"), indicator),
            )
            series_shifts = shifts.filter(smask)
        folder = re.sub(r"[^A-Za-z0-9_.-]", "_", asset)
        picture = io.BytesIO()
        plot_series(picture, asset, subject, indicator, indicators.filter(mask), series_shifts)
        with store.create(store.join(report_dir, "plots", folder, plot_file_name(subject, indicator))) as handle:
            handle.write(picture.getvalue())
        entries.append(
            {
                "asset": asset,
                "subject": subject,
                "indicator": indicator,
                "path": f"plots/{folder}/{plot_file_name(subject, indicator)}",
                "monitored": series_shifts is not None,
            }
        )
    return entries


# ----------------------------------------------------------------------------------------------
# Mode shapes of multi-channel modes


def shape_plot_file_name(mode: str) -> str:
    """File name of a multi-channel mode's shape picture."""
    return plot_file_name(mode, "mode_shape")


def _latest_window(rows: pa.Table) -> pa.Table:
    starts = _us(rows.column("window_start"))
    return rows.filter(pa.array(starts == starts.max())).sort_by("channel")


def draw_mode_shape(asset: str, mode: str, latest: pa.Table, reference=None, mac: Optional[tuple] = None):
    """The shape picture of one multi-channel mode: real and imaginary part of each component
    against the channel, the baseline reference beside the latest window (with +/- stderr).

    Parameters
    ----------
    asset, mode : str
    latest : pyarrow.Table
        The mode_shapes rows of the latest window (one per channel, sorted by channel).
    reference : ModeReference, optional
        The baseline reference (components in the order of ``latest``), None when not complete.
    mac : (float, float), optional
        The latest window's mode_mac and its stderr, for the title.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from corrtransforms.numerics.mode_shapes import normalise_shape

    channels = _column(latest, "channel", "")
    shape = np.asarray(_column(latest, "shape_real", np.nan), float) + 1j * np.asarray(
        _column(latest, "shape_imag", np.nan), float
    )
    stderr = np.asarray(_column(latest, "stderr", np.nan), float)
    x = np.arange(len(channels))
    fig, ax = plt.subplots(1, 1, figsize=(7.5, 4.6), layout="constrained")
    ax.axhline(0.0, color="#bbbbbb", linewidth=0.8)
    if reference is not None:
        at_one = np.nonzero(shape == 1.0 + 0j)[0]  # the latest window's normalisation channel
        ref = normalise_shape(reference.shape, int(at_one[0])) if len(at_one) else reference.shape
        ax.plot(
            x - 0.06,
            ref.real,
            "o-",
            color=EXPECTED_COLOUR,
            label=f"baseline reference, real ({reference.n_windows} windows)",
        )
        ax.plot(x - 0.06, ref.imag, "o--", color=EXPECTED_COLOUR, mfc="white", label="baseline reference, imaginary")
    when = _text_time(int(_us(latest.column("window_start"))[0]))
    ax.errorbar(
        x + 0.06,
        shape.real,
        yerr=stderr,
        fmt="s-",
        color=SHIFTED_COLOUR,
        capsize=3,
        label="latest window, real (\u00b1 stderr)",
    )
    ax.plot(x + 0.06, shape.imag, "s--", color=SHIFTED_COLOUR, mfc="white", label="latest window, imaginary")
    ax.set_xticks(x, channels)
    ax.set_ylabel("shape component (1 at the reference channel)")
    subtitle = f"latest window {when} UTC"
    if mac is not None and np.isfinite(mac[0]):
        subtitle += f", MAC to the reference {mac[0]:.4f} \u00b1 {mac[1]:.4f}"
    elif reference is None:
        subtitle += ", no baseline reference yet"
    ax.set_title(f"{asset} \u2014 {mode} \u2014 mode shape", loc="left", fontsize=12, color=INK, pad=18)
    ax.text(0.0, 1.01, subtitle, transform=ax.transAxes, fontsize=9, color="#555555", va="bottom")
    ax.grid(True, color="#dddddd", linewidth=0.5)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    fig.legend(loc="outside lower center", fontsize=8, frameon=False, ncol=2)
    return fig


def _latest_mac(indicators: Optional[pa.Table], asset: str, mode: str, start_us: int) -> Optional[tuple]:
    if indicators is None:
        return None
    rows = indicators.filter(
        pc.and_(
            pc.and_(pc.equal(indicators.column("asset"), asset), pc.equal(indicators.column("subject"), mode)),
            pc.equal(indicators.column("indicator"), "mode_mac"),
        )
    )
    hit = _us(rows.column("window_start")) == start_us
    if not hit.any():
        return None
    i = int(np.nonzero(hit)[0][0])
    return float(rows.column("value")[i].as_py() or np.nan), float(rows.column("stderr")[i].as_py() or np.nan)


def write_shape_plots(output: OutputTables, report_dir: str, store) -> List[Dict]:
    """One PNG per asset and multi-channel mode of the mode_shapes table (latest window against
    the baseline reference); returns entries like :func:`write_plots` (indicator "mode_shape")."""
    from corrtransforms.stages.mode_reference import median_reference, stored_baseline_rows

    shapes = output.get("mode_shapes")
    if shapes is None:
        return []
    entries = []
    for asset, mode in sorted(set(zip(_column(shapes, "asset", ""), _column(shapes, "mode", "")))):
        rows = shapes.filter(pc.and_(pc.equal(shapes.column("asset"), asset), pc.equal(shapes.column("mode"), mode)))
        latest = _latest_window(rows)
        channels = tuple(_column(latest, "channel", ""))
        baseline = stored_baseline_rows(store, output.folder, asset)
        reference = None
        if baseline is not None:
            mine = baseline.filter(pc.equal(baseline.column("mode"), mode))
            reference = median_reference(mine, mode, channels) if mine.num_rows else None
        mac = _latest_mac(output.get("indicators"), asset, mode, int(_us(latest.column("window_start"))[0]))
        figure = draw_mode_shape(asset, mode, latest, reference, mac)
        picture = io.BytesIO()
        figure.savefig(picture, format="png", dpi=100)
        import matplotlib.pyplot as plt

        plt.close(figure)
        folder = re.sub(r"[^A-Za-z0-9_.-]", "_", asset)
        path = f"plots/{folder}/{shape_plot_file_name(mode)}"
        with store.create(store.join(report_dir, path)) as handle:
            handle.write(picture.getvalue())
        entries.append({"asset": asset, "subject": mode, "indicator": "mode_shape", "path": path, "monitored": False})
    return entries
