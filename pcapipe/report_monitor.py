"""The report's monitoring part: a control chart of T^2 and SPE, and a table of the most extreme rows.

The chart shows a bounded number of points however many rows were scored:
the rows are cut into at most ``CHART_BINS`` consecutive bins and each bin
contributes its row of largest T^2 and its row of largest SPE, so every
excursion above a limit stays visible (an envelope, not a random sample,
which would miss short faults).  The table reads the few extreme rows back
from the input files to name the features that drove them
(:mod:`pcapipe.explain`).
"""

from __future__ import annotations

import glob
import html
import logging
import os

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

__all__ = ["chart_points", "fig_control_chart", "monitor_section", "CHART_BINS", "TABLE_ROWS"]

log = logging.getLogger("pcapipe")

CHART_BINS = 2000  # at most 2 points per bin: 4000 points, like the scatter's sample
TABLE_ROWS = 10
PER_ID = 3  # rows per value of the first keep column in the table, so one long fault does not fill it


def chart_points(directory: str, time: str | None = None, bins: int = CHART_BINS) -> pd.DataFrame:
    """Per bin of consecutive rows, the rows of largest T^2 and of largest SPE, and the bin medians.

    Returns columns ``row`` (global position), ``t2``, ``spe``, ``t2_median``,
    ``spe_median`` (of the row's bin) and ``time`` when a time column is
    given, sorted by row.
    """
    parts = sorted(glob.glob(os.path.join(directory, "scores", "part-*.parquet")))
    total = sum(pq.ParquetFile(p).metadata.num_rows for p in parts)
    width = max(1, -(-total // max(1, bins)))
    picked, offset = [], 0
    for path in parts:
        cols = ["t2", "spe", *([time] if time else [])]
        df = pq.read_table(path, columns=cols).to_pandas()
        df["row"] = np.arange(offset, offset + len(df))
        offset += len(df)
        df = df.dropna(subset=["t2", "spe"])
        if df.empty:
            continue
        bin_of = df["row"] // width
        groups = df.groupby(bin_of, sort=False)
        medians = groups[["t2", "spe"]].median().add_suffix("_median")
        chosen = df.loc[np.union1d(groups["t2"].idxmax().to_numpy(), groups["spe"].idxmax().to_numpy())]
        picked.append(chosen.join(medians, on=bin_of.loc[chosen.index]))
    if not picked:
        return pd.DataFrame(columns=["row", "t2", "spe", *(["time"] if time else [])])
    out = pd.concat(picked, ignore_index=True).sort_values("row").reset_index(drop=True)
    return out.rename(columns={time: "time"}) if time else out


def fig_control_chart(points: pd.DataFrame, limits: dict, time_label: str | None = None):
    """T^2 (top) and SPE (bottom) against row order or time: the largest value of each bin as points
    (red above the limit), the bin median as a grey line, the limits as dashed lines."""
    from .figures import _figure

    fig = _figure(9.0, 5.5)
    axes = fig.subplots(2, 1, sharex=True)
    x = points["time"] if time_label else points["row"]
    conf = limits.get("confidence", 0.99)
    for ax, stat, key, label in ((axes[0], "t2", "t2_training", "T\u00b2"), (axes[1], "spe", "spe", "SPE")):
        y = points[stat].to_numpy()
        lim = limits.get(key)
        over = y > lim if lim is not None else np.zeros(y.size, bool)
        ax.scatter(x[~over], y[~over], s=4, lw=0, color="tab:blue", alpha=0.6)
        ax.scatter(x[over], y[over], s=6, lw=0, color="tab:red", label="largest of a bin, above the limit")
        ax.plot(x, points[f"{stat}_median"].to_numpy(), color="0.45", lw=0.7, label="bin median")
        if lim is not None:
            ax.axhline(lim, color="0.15", ls="--", lw=1, gid=f"limit-{stat}",
                       label=f"{conf:.0%} limit {lim:.3g}" + (" (estimated)" if stat == "spe" and limits.get(
                           "estimated") else ""))
        ax.set_yscale("log")
        ax.set_ylabel(label)
        ax.legend(fontsize=7, loc="upper left")
    axes[1].set_xlabel(time_label or "row (scores order)")
    axes[0].set_title(f"Control chart: largest T\u00b2 and SPE per bin of rows ({len(points)} points)")
    return fig


def _table(rows: pd.DataFrame, keep) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in ("row", *keep, "T\u00b2", "SPE", "severity",
                                                           "top SPE features", "top T\u00b2 features"))
    body = []
    for row, r in rows.iterrows():
        cells = [str(row), *(html.escape(str(r[c])) for c in keep), f"{r['t2']:.4g}", f"{r['spe']:.4g}",
                 f"{r['severity']:.3g}", html.escape(r["top_spe"]), html.escape(r["top_t2"])]
        body.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def monitor_section(directory: str, manifest: dict, time: str | None = None):
    """The control chart figure, an HTML block (alarm counts, extreme rows) and notes.

    Returns ``({name: (Figure, caption)}, html, notes)``; empty for a run
    without limits or without scores.
    """
    from .explain import explain_rows, extreme_rows
    from .result import Result

    limits = manifest.get("limits")
    if not limits:
        return {}, "", ["no control chart: the run has no control limits"]
    if not manifest.get("scores", {}).get("written"):
        return {}, "", ["no control chart: the run was made with output.scores = false"]
    keep = list(manifest["config"]["input"].get("keep", []))
    time = time or manifest.get("monitor", {}).get("time") or None
    if time and time not in keep:
        from .errors import InputError

        raise InputError(f"--time: {time!r} is not a keep column of this run; keep columns are "
                         f"{', '.join(keep) or '(none)'}")
    points = chart_points(directory, time)
    figs = {"control": (fig_control_chart(points, limits, time),
                        f"T\u00b2 against the training-row limit (Tracy, Young & Mason 1992) and SPE against "
                        f"Box's limit (Nomikos & MacGregor 1995) at {limits['confidence']:g}; the limits assume "
                        "independent, roughly normal rows, and autocorrelated rows cross them more often. "
                        "Each point is the largest value of a bin of consecutive rows, so red points "
                        "overstate how often single rows cross a limit: the share of rows above each "
                        "limit is given below the chart.")}
    counts = manifest.get("monitor", {}).get("training_alarms") or {}
    notes = []
    text = ""
    if counts:
        n = max(counts["rows"], 1)
        text += (f"<p>{counts['t2_alarms']} of {counts['rows']} rows ({counts['t2_alarms'] / n:.2%}) above the "
                 f"T\u00b2 limit, {counts['spe_alarms']} ({counts['spe_alarms'] / n:.2%}) above the SPE limit "
                 f"(expected without a fault: {1 - limits['confidence']:.0%} each).</p>")
    worst = extreme_rows(os.path.join(directory, "scores"), limits, 20 * TABLE_ROWS, training=True,
                         extra_columns=keep)
    if keep:
        worst = worst.groupby(keep[0], sort=False).head(PER_ID)
    worst = worst.head(TABLE_ROWS)
    paths = [f["path"] for f in manifest.get("inputs", [])]
    try:
        table = explain_rows(Result(directory, manifest), worst, paths)
        per = f" (at most {PER_ID} per {keep[0]})" if keep else ""
        text += (f"<p>The most extreme rows{per}; severity = the larger of T\u00b2 and SPE over its limit; the "
                 "features contributing most to each statistic, with their share of it:</p>" + _table(table, keep))
    except (OSError, ValueError, KeyError) as e:  # the input files moved: the chart still stands
        notes.append(f"no table of extreme rows: the input files cannot be read back ({type(e).__name__}: {e})")
    return figs, text, notes
