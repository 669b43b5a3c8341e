"""The report's index page: open episodes, assets and windows, rejects by reason, closed
episodes, the trend pictures and the tables read, as one static HTML file.

:func:`write_report` reads the output tables and writes ``REPORT/index.html`` and
``REPORT/plots/<asset>/<subject>__<indicator>.png`` through one store (any Beam filesystem).
A table that is missing (for example no shifts yet) is named on the page; the rest of the report
is still written.
"""

from __future__ import annotations

import datetime as _dt
import html
import os
from typing import Dict, List, Optional, Tuple

import numpy as np

from corrtransforms.report import files
from corrtransforms.report.plots import write_plots, write_shape_plots
from corrtransforms.report.summaries import (
    TABLES,
    OutputTables,
    _text_time,
    asset_summaries,
    fleet_overview,
    read_output,
    reject_counts,
    report_episodes,
    series_baselines,
    shift_percent,
)

CAUTION = (
    "Indicators and shift flags support, and never replace, inspection and judgement by "
    "qualified engineers under local codes and licensed practice."
)

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: #222;
       margin: 1.5rem auto; max-width: 74rem; padding: 0 1rem; line-height: 1.4; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.15rem; margin-top: 2rem; border-bottom: 2px solid #1d4e89; padding-bottom: 0.2rem; }
h3 { font-size: 1rem; margin-top: 1.2rem; }
p.meta { color: #555; margin-top: 0; }
p.caution { border-left: 4px solid #8a6d00; background: #fbf6e6; padding: 0.5rem 0.8rem; }
p.note { color: #555; font-style: italic; }
table { border-collapse: collapse; margin: 0.5rem 0; font-size: 0.9rem; }
th, td { border: 1px solid #c8c8c8; padding: 0.25rem 0.55rem; text-align: left; vertical-align: top; }
th { background: #eef2f7; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
td.time { white-space: nowrap; }
table.episodes { font-size: 0.85rem; }
table.episodes td, table.episodes th { padding: 0.2rem 0.4rem; }
div.wide { overflow-x: auto; }
tr.open td { background: #fdecea; }
.up::before { content: "\\2191\\00a0"; } .down::before { content: "\\2193\\00a0"; }
.grid { display: grid; grid-template-columns: repeat(auto-fill, minmax(30rem, 1fr)); gap: 1rem; }
figure { margin: 0; } figure img { width: 100%; border: 1px solid #ddd; }
figcaption { font-size: 0.85rem; color: #444; }
"""


def _e(value) -> str:
    return html.escape("" if value is None else str(value))


def _number(value, digits=4) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return ""
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    return f"{value:.{digits}g}"


def _episode_rows(episodes: List[Dict], plots: Dict[Tuple[str, str, str], str]) -> List[str]:
    rows = []
    for e in episodes:
        direction = {1: '<span class="up">up</span>', -1: '<span class="down">down</span>'}.get(e["direction"], "")
        plot = plots.get((e["asset"], e["subject"], e["indicator"]))
        link = f'<a href="{_e(plot)}">picture</a>' if plot else ""
        size = _number(e.get("shift_size"), 3)
        percent = e.get("shift_percent")
        percent = "" if percent is None else f"{percent:+.1f} %"
        rows.append(
            f'<tr class="{_e(e["status"])}"><td>{_e(e["asset"])}</td>'
            f"<td>{_e(e['subject'])}</td><td>{_e(e['indicator'])}</td><td>{direction}</td>"
            f'<td class="time">{_e(_text_time(e.get("onset")))}</td>'
            f'<td class="time">{_e(_text_time(e.get("first_alarm")))}</td>'
            f'<td class="time">{_e(_text_time(e.get("last_window")))}</td><td class="num">{_e(e.get("n_windows"))}</td>'
            f'<td class="num">{_e(size)} {_e(e.get("unit") or "")}</td><td class="num">{_e(percent)}</td>'
            f'<td class="num">{_e(_number(e.get("peak_abs_z"), 3))}</td><td>{_e(e.get("detector") or "")}</td>'
            f"<td>{link}</td></tr>"
        )
    return rows


_EPISODE_HEAD = (
    "<tr><th>asset</th><th>subject</th><th>indicator</th><th>direction</th>"
    "<th>estimated onset</th><th>first alarm</th><th>last shifted</th><th>windows</th>"
    "<th>shift size</th><th>of baseline level</th><th>peak |z|</th><th>detector</th><th></th></tr>"
)


def _page_head(output: OutputTables, generated: str) -> List[str]:
    """Doctype, title, output folder and the caution."""
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        "<title>corrtransforms report</title>",
        f"<style>{_CSS}</style></head><body>",
        "<h1>Correlation indicators and shifts</h1>",
        f'<p class="meta">Output folder <code>{_e(_shown_folder(output.folder))}</code>; '
        f"report written {_e(generated)}. All times UTC.</p>",
        f'<p class="caution"><strong>Caution.</strong> {_e(CAUTION)}</p>',
    ]
    return parts


def _open_section(output: OutputTables, open_episodes: List[Dict], plot_index: Dict) -> List[str]:
    """Open shift episodes, earliest onset first."""
    parts: List[str] = []
    parts.append(f'<h2 id="open">Open shift episodes ({len(open_episodes)})</h2>')
    if output.get("shifts") is None and output.get("episodes") is None:
        parts.append(
            '<p class="note">No shifts table was found: shift detection has not run on this '
            "output yet, so there are no episodes to list.</p>"
        )
    elif not open_episodes:
        parts.append("<p>No series is in state shifted at its latest window.</p>")
    else:
        parts.append("<p>Series whose latest window is still in state shifted, earliest onset first.</p>")
        parts.append(
            '<div class="wide"><table class="episodes">'
            + _EPISODE_HEAD
            + "".join(_episode_rows(open_episodes, plot_index))
            + "</table></div>"
        )
    return parts


def _assets_section(assets: List[Dict]) -> List[str]:
    """Per asset: days, windows planned, computed and rejected."""
    parts: List[str] = []
    parts.append('<h2 id="assets">Assets and windows processed</h2>')
    if not assets:
        parts.append('<p class="note">No output tables with rows were found in this folder.</p>')
    else:
        parts.append(
            "<table><tr><th>asset</th><th>days</th><th>first window</th><th>last window</th>"
            "<th>windows planned</th><th>windows computed</th><th>windows rejected</th>"
            "<th>indicator rows</th><th>monitored series</th><th>detector state through</th></tr>"
        )
        for a in assets:
            parts.append(
                f'<tr><td>{_e(a["asset"])}</td><td class="num">{a["days"]}</td><td>{_e(a["first_window"])}</td>'
                f'<td>{_e(a["last_window"])}</td><td class="num">{a["windows_planned"]}</td>'
                f'<td class="num">{a["windows_computed"]}</td><td class="num">{a["windows_rejected"]}</td>'
                f'<td class="num">{a["indicator_rows"]}</td><td class="num">{a["monitored_series"]}</td>'
                f"<td>{_e(a['state_through'])}</td></tr>"
            )
        parts.append("</table>")
        parts.append(
            "<p>Windows computed have correlation rows; windows rejected produced none (their "
            "reasons are below); planned = computed + rejected.</p>"
        )
    return parts


def _rejects_section(output: OutputTables, rejects: List[Dict]) -> List[str]:
    """Rejected, repaired and flagged input by reason."""
    parts: List[str] = []
    parts.append('<h2 id="rejects">Rejected, repaired and flagged input by reason</h2>')
    if output.get("rejects") is None and output.get("indicators") is not None:
        parts.append(
            "<p>No input was rejected. The rejects table has no rows: nothing was repaired or flagged either.</p>"
        )
    elif output.get("rejects") is None:
        parts.append(f'<p class="note">No rejects table was found ({_e(output.notes.get("rejects", ""))}).</p>')
    else:
        parts.append(
            "<table><tr><th>asset</th><th>reason</th><th>action</th><th>stage</th><th>rows</th>"
            "<th>subjects</th><th>example</th></tr>"
        )
        for r in rejects:
            subjects = ", ".join(r["subjects"][:6]) + (
                f" and {len(r['subjects']) - 6} more" if len(r["subjects"]) > 6 else ""
            )
            parts.append(
                f"<tr><td>{_e(r['asset'])}</td><td><code>{_e(r['reason'])}</code></td><td>{_e(r['action'])}</td>"
                f'<td>{_e(r["stage"])}</td><td class="num">{r["count"]}</td><td>{_e(subjects)}</td>'
                f"<td>{_e(r['example'][:160])}</td></tr>"
            )
        parts.append("</table>")
    return parts


def _closed_section(closed: List[Dict], episode_source: str, plot_index: Dict) -> List[str]:
    """Closed shift episodes."""
    parts: List[str] = []
    parts.append(f'<h2 id="closed">Closed shift episodes ({len(closed)})</h2>')
    if closed:
        parts.append(
            '<div class="wide"><table class="episodes">'
            + _EPISODE_HEAD
            + "".join(_episode_rows(closed, plot_index))
            + "</table></div>"
        )
    else:
        parts.append("<p>None.</p>")
    if episode_source == "shifts":
        parts.append(
            '<p class="note">Episodes are derived from the shifts table (each begins at a first alarm and '
            "ends where the series leaves state shifted or reverses direction).</p>"
        )
    return parts


def _shapes_beside_trends(plots: List[Dict]) -> List[Dict]:
    """Each multi-channel mode's shape picture just before the first trend of that mode."""
    shapes = {p["subject"]: p for p in plots if p["indicator"] == "mode_shape"}
    ordered: List[Dict] = []
    for p in plots:
        if p["indicator"] == "mode_shape":
            continue
        if p["subject"] in shapes:
            ordered.append(shapes.pop(p["subject"]))
        ordered.append(p)
    return ordered + list(shapes.values())


def _trends_section(output: OutputTables, plots: List[Dict]) -> List[str]:
    """The pictures, per asset, monitored series first."""
    parts: List[str] = []
    parts.append('<h2 id="trends">Trends per subject and indicator</h2>')
    if output.get("indicators") is None:
        parts.append(
            f'<p class="note">No indicators table was found ({_e(output.notes.get("indicators", ""))}); '
            "there is nothing to plot.</p>"
        )
    else:
        if output.get("shifts") is None:
            parts.append(
                '<p class="note">No shifts table was found: the pictures show the indicator values '
                "and their standard errors only, without expectation, healthy band or shift marks.</p>"
            )
        parts.append(
            "<p>Grey band: value \u00b1 standard error. Where a series is monitored: blue line, the "
            "covariate-compensated expectation; light blue band, the healthy band where |z| \u2264 3 "
            "(expected \u00b1 3 \u221a(residual scale\u00b2 + standard error\u00b2)); "
            "grey background, the baseline windows; red diamonds, shifted windows; dashed red line, "
            "the estimated onset; lower panel, the standardised residual z.</p>"
        )
        for asset in sorted({p["asset"] for p in plots}):
            mine = [p for p in plots if p["asset"] == asset]
            mine.sort(key=lambda p: (not p["monitored"], p["subject"], p["indicator"]))
            mine = _shapes_beside_trends(mine)
            parts.append(f"<h3>{_e(asset)}</h3>")
            parts.append('<div class="grid">')
            for p in mine:
                if p["indicator"] == "mode_shape":
                    label = f"{p['subject']} \u2014 mode shape: baseline reference and latest window"
                    parts.append(
                        f'<figure><a href="{_e(p["path"])}"><img src="{_e(p["path"])}" alt="{_e(label)}" '
                        f'loading="lazy"></a><figcaption>{_e(label)}</figcaption></figure>'
                    )
                    continue
                label = f"{p['subject']} \u2014 {p['indicator']}" + (
                    f" (baseline {p['baseline']})"
                    if p.get("baseline")
                    else ""
                    if p["monitored"]
                    else " (not monitored)"
                )
                parts.append(
                    f'<figure><a href="{_e(p["path"])}"><img src="{_e(p["path"])}" alt="{_e(label)}" '
                    f'loading="lazy"></a><figcaption>{_e(label)}</figcaption></figure>'
                )
            parts.append("</div>")
    return parts


def _tables_section(output: OutputTables) -> List[str]:
    """Which tables were read, with their row counts."""
    parts: List[str] = []
    parts.append('<h2 id="tables">Tables read</h2><table><tr><th>table</th><th>rows</th><th>note</th></tr>')
    for name in TABLES:
        table = output.get(name)
        rows = "" if table is None else str(table.num_rows)
        note = output.notes.get(name, "")
        if name == "episodes" and table is None:
            note = (note + "; episodes derived from the shifts table") if output.get("shifts") is not None else note
        parts.append(f'<tr><td>{_e(name)}</td><td class="num">{rows}</td><td>{_e(note)}</td></tr>')
    parts.append("</table>")
    return parts


def render_index(
    output: OutputTables,
    assets: List[Dict],
    rejects: List[Dict],
    episodes: List[Dict],
    episode_source: str,
    plots: List[Dict],
    generated: str,
    overview: Optional[List[Dict]] = None,
) -> str:
    """The index page as an HTML string (open episodes first, then for a fleet the overview of
    its assets with links to their pages, then assets, rejects, closed episodes, pictures, and
    the tables found)."""
    plot_index = {(p["asset"], p["subject"], p["indicator"]): p["path"] for p in plots}
    open_episodes = [e for e in episodes if e["status"] == "open"]
    closed = [e for e in episodes if e["status"] != "open"]
    parts = (
        _page_head(output, generated)
        + _open_section(output, open_episodes, plot_index)
        + (_overview_section(overview) if overview is not None else [])
        + _assets_section(assets)
        + _rejects_section(output, rejects)
        + _closed_section(closed, episode_source, plot_index)
        + _trends_section(output, plots)
        + _tables_section(output)
    )
    parts.append(f'<p class="caution">{_e(CAUTION)}</p>')
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def asset_page_name(asset: str) -> str:
    """The file of an asset's page beside the fleet overview (asset names are folder-safe)."""
    return f"asset-{asset}.html"


def render_overview(output: OutputTables, rows: List[Dict], generated: str) -> str:
    """The overview of a fleet alone as a page: one row per asset, linking to the asset's page."""
    parts = _page_head(output, generated) + _overview_section(rows)
    parts.append(f'<p class="caution">{_e(CAUTION)}</p>')
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def _overview_section(rows: List[Dict]) -> List[str]:
    """The fleet overview: one row per asset, linking to the asset's page."""
    parts = ['<h2 id="overview">Fleet overview</h2>']
    parts.append(
        "<table><tr><th>asset</th><th>last day</th><th>windows that day</th><th>open episodes</th>"
        "<th>series in baseline</th><th>last window (UTC)</th></tr>"
    )
    for r in rows:
        flag = ' class="open"' if r["open_episodes"] else ""
        parts.append(
            f'<tr{flag}><td><a href="{_e(asset_page_name(r["asset"]))}">{_e(r["asset"])}</a></td>'
            f'<td>{_e(r["last_day"])}</td><td class="num">{r["windows_last_day"]}</td>'
            f'<td class="num">{r["open_episodes"]}</td>'
            f'<td class="num">{r["series_in_baseline"]} of {r["series"]}</td><td>{_e(r["last_window"])}</td></tr>'
        )
    parts.append("</table>")
    parts.append(
        "<p>Windows that day: windows with correlation rows on the asset's last day with any. "
        "Series in baseline: monitored series still accumulating their baseline sample (no "
        "alarms yet), of all series with a detector state.</p>"
    )
    return parts


def _of_asset(items: List[Dict], asset: str) -> List[Dict]:
    return [i for i in items if i.get("asset") == asset]


def _shown_folder(folder: str) -> str:
    """The output folder as the page names it: a URL as given, a local path made absolute."""
    return folder if "://" in folder else os.path.abspath(folder)


def write_report(output_dir: str, report_dir: Optional[str] = None, store=None) -> str:
    """Read the tables under ``output_dir`` and write the report; return the index page's path.

    Parameters
    ----------
    output_dir : str
        The job's output folder or filesystem URL (gs://, s3://, ...).
    report_dir : str, optional
        Where the page and its pictures go; None means ``output_dir/report``.
    store : object, optional
        The file access; None means :class:`corrtransforms.report.files.ReportFiles` (Beam's
        FileSystems).
    """
    store = store or files.default_store()
    report_dir = report_dir or store.join(output_dir, "report")
    output = read_output(output_dir, store)
    assets = asset_summaries(output)
    rejects = reject_counts(output)
    episodes, source = report_episodes(output)
    baselines = series_baselines(output)
    for e in episodes:
        level = baselines.get((e["asset"], e["subject"], e["indicator"]), {}).get("level")
        e["shift_percent"] = shift_percent(e.get("shift_size"), level)
    plots = write_plots(output, report_dir, store) + write_shape_plots(output, report_dir, store)
    for p in plots:
        found = baselines.get((p["asset"], p["subject"], p["indicator"]))
        if found:
            p["baseline"] = (
                f"{found['status']}, {found['windows_seen']} windows seen"
                if found["status"] == "accumulating"
                else found["status"]
            )
    generated = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    if len(assets) > 1:  # a fleet: the overview first, one page per asset beside it
        for a in assets:
            name = a["asset"]
            mine = (_of_asset(rejects, name), _of_asset(episodes, name), source, _of_asset(plots, name))
            with store.create(store.join(report_dir, asset_page_name(name))) as handle:
                handle.write(render_index(output, [a], *mine, generated).encode("utf-8"))
        overview = fleet_overview(output, episodes, baselines)
        page = render_index(output, assets, rejects, episodes, source, plots, generated, overview=overview)
    else:
        page = render_index(output, assets, rejects, episodes, source, plots, generated)
    index = store.join(report_dir, "index.html")
    with store.create(index) as handle:
        handle.write(page.encode("utf-8"))
    return index
