"""A self-contained HTML report of a run directory, and the PNG of each figure.

``build_report`` draws the figures of :mod:`pcapipe.figures` (matplotlib, the
optional ``plot`` extra), saves one PNG per figure and a ``report.html`` that
embeds the same PNGs as base64 data URIs: no script, no stylesheet or image
from elsewhere, so the page opens offline and can be mailed as one file.
Without matplotlib nothing is written and the returned record says how to
install it.

Only a bounded sample of the scores is read for the scatter: the first rows of
an even spread of row groups, at most ``SAMPLE_ROWS`` in all.
"""

from __future__ import annotations

import base64
import glob
import html
import json
import logging
import math
import os
import re

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from .config import format_size
from .errors import InputError, OutputError
from .formats import SPECTRUM_HEADERS, spectrum_cells
from .figures import (BAR_COMPONENTS, LEVELS, fig_convergence, fig_cumulative, fig_heatmap, fig_loadings,
                      fig_scatter, fig_scree, png_bytes)
from .weighted import weights_text
from .writer import partial_dir_for, write_json_atomic

__all__ = ["build_report", "write_report", "report_figures", "sample_scores", "summary_rows",
           "INSTALL_NOTE", "SAMPLE_ROWS", "HEATMAP_MAX_FEATURES"]

log = logging.getLogger("pcapipe")

INSTALL_NOTE = "install the plot extra: pip install 'pcapipe[plot]'"
SAMPLE_ROWS = 5000  # enough points to see structure; reading them costs ~nothing
HEATMAP_MAX_FEATURES = 40  # beyond this the feature names no longer fit beside a heatmap
_MAX_SAMPLE_GROUPS = 64  # row groups opened for the sample


# -- data for the figures --------------------------------------------------------
def sample_scores(directory: str, columns, limit: int = SAMPLE_ROWS) -> pd.DataFrame:
    """At most ``limit`` rows of ``scores/part-*.parquet``, read cheaply.

    Rows come from an even spread of at most 64 row groups over all parts,
    the first rows of each (never a full pass); rows with NaN scores (dropped
    for missing values) are left out.
    """
    groups = []
    for path in sorted(glob.glob(os.path.join(directory, "scores", "part-*.parquet"))):
        md = pq.ParquetFile(path).metadata
        groups += [(path, rg) for rg in range(md.num_row_groups) if md.row_group(rg).num_rows]
    columns = list(dict.fromkeys(columns))
    if not groups:
        return pd.DataFrame({c: [] for c in columns})
    pick = np.unique(np.linspace(0, len(groups) - 1, min(len(groups), _MAX_SAMPLE_GROUPS)).round().astype(int))
    per = math.ceil(limit / pick.size)
    frames = []
    for i in pick:
        path, rg = groups[i]
        batches = pq.ParquetFile(path).iter_batches(batch_size=per, row_groups=[rg], columns=columns)
        frames.append(next(batches).to_pandas())
    out = pd.concat(frames, ignore_index=True)
    pcs = [c for c in columns if re.fullmatch(r"PC\d+", c)]
    return out.dropna(subset=pcs).head(limit).reset_index(drop=True)




def summary_rows(manifest: dict) -> list[tuple[str, str]]:
    """(label, text) rows of the report's summary table: inputs, n, d, method and why, passes, time, versions."""
    m = manifest
    cfg = m.get("config", {})
    model, inp = cfg.get("model", {}), cfg.get("input", {})
    inputs = m.get("inputs", [])
    paths = [f["path"] for f in inputs]
    files = f"{len(inputs)} file(s), {format_size(sum(f.get('bytes', 0) for f in inputs))}, " \
            f"{sum(f.get('rows', 0) for f in inputs)} rows: " + ", ".join(paths[:5]) + \
            (f", ... ({len(paths) - 5} more)" if len(paths) > 5 else "")
    prep = ("centred" if model.get("center", True) else "not centred") + (
        ", scaled to unit variance (correlation PCA)" if model.get("scale") else ", unscaled (covariance PCA)")
    solver = m.get("solver", {})
    bad = [f"PC{i + 1}" for i, c in enumerate(m.get("components_converged", [])) if not c]
    timings = m.get("timings", {})
    parts = ", ".join(f"{k.removesuffix('_seconds')} {v:.2f}" for k, v in timings.items() if k != "total_seconds")
    versions = ", ".join(f"{k} {v}" for k, v in m.get("versions", {}).items())
    compute = m.get("compute", {})
    return [
        ("inputs", files),
        ("rows (n)", f"{m.get('rows')} used of {m.get('rows_read', m.get('rows'))} read"
                     f" (missing values: {inp.get('missing', 'fail')})"),
        ("features (d)", f"{m.get('features')}" + (f" from vector column {inp['vector_column']!r}"
                                                       if inp.get("vector_column") else "")),
        ("components (k)", f"{m.get('components')} (asked for {model.get('components')})"),
        ("preprocessing", prep),
        ("weights", weights_text(m.get("weights"))),
        ("total variance", f"{m.get('total_variance', float('nan')):.6g}"),
        ("method", f"{m.get('method')}: {m.get('method_reason', '')}"),
        ("passes over the data", str(m.get("passes_over_data"))),
        ("solver", f"{solver.get('iterations')} iteration(s), {solver.get('operator_applications')} operator "
                   f"application(s), block {solver.get('block_size')}, tolerance {solver.get('tolerance')}"),
        ("converged", "yes, every component" if not bad and m.get("converged") else "NO: " + ", ".join(bad)),
        ("time", f"{timings.get('total_seconds', float('nan')):.2f} s ({parts})"),
        ("compute", f"{compute.get('scheduler')}, {compute.get('workers')} worker(s)"),
        ("versions", versions),
        ("created", str(m.get("created", ""))),
        ("config", str(m.get("config_source", ""))),
    ]


def _check_color_by(manifest: dict, color_by: str | None) -> None:
    if color_by is None:
        return
    keep = list(manifest.get("config", {}).get("input", {}).get("keep", []))
    if color_by not in keep:
        raise InputError(f"--color-by: {color_by!r} is not a keep column of this run; keep columns are "
                         f"{', '.join(keep) or '(none: set input.keep and run again)'}")
    if not manifest.get("scores", {}).get("written"):
        raise InputError(f"--color-by: {color_by!r} colours the scores scatter, but this run was made with "
                         "output.scores = false")


def report_figures(directory: str, manifest: dict, color_by: str | None = None):
    """The report's figures as ``{name: (Figure, caption)}``, plus notes on the ones left out."""
    from .result import Result

    _check_color_by(manifest, color_by)
    res = Result(directory, manifest)
    spec, load = res.spectrum, res.loadings
    comp = spec[spec["retained"]]
    scaled = bool(manifest["config"]["model"].get("scale"))
    d, k = int(manifest["features"]), len(comp)
    figs, notes = {}, []
    figs["scree"] = (fig_scree(comp, float(manifest["total_variance"]), scaled, d),
                     "Eigenvalues with std-error bars (North et al. 1982); dashed: broken-stick expectation "
                     "(Frontier 1976; Jackson 1993)" + ("; dotted: eigenvalue 1 (Kaiser)" if scaled else "") + ".")
    figs["cumulative"] = (fig_cumulative(comp), "Share of total variance per component and cumulated; "
                          "dotted lines at " + ", ".join(f"{v:.0%}" for v in LEVELS) + ".")
    figs["loadings"] = (fig_loadings(load), f"Features of largest |loading| for the first "
                        f"{min(k, BAR_COMPONENTS)} component(s); blue positive, red negative.")
    if d <= HEATMAP_MAX_FEATURES:
        figs["heatmap"] = (fig_heatmap(load), "All loadings (unit-norm eigenvectors).")
    else:
        notes.append(f"no loadings heatmap: {d} features are more than {HEATMAP_MAX_FEATURES}")
    if not manifest.get("scores", {}).get("written"):
        notes.append("no scores scatter: the run was made with output.scores = false")
    elif k < 2:
        notes.append("no scores scatter: the run has a single component")
    else:
        sample = sample_scores(directory, ["PC1", "PC2", *([color_by] if color_by else [])])
        figs["scatter"] = (fig_scatter(sample, comp["share"].to_numpy()[:2], color_by),
                           f"PC1 against PC2 for {len(sample)} rows from a spread of row groups "
                           f"(of {manifest['scores'].get('rows')} scored rows).")
    history = manifest.get("solver", {}).get("residual_history") or []
    if history:
        figs["convergence"] = (fig_convergence(history, manifest["solver"].get("tolerance")),
                               "Relative residual ||C v - \u03b8 v|| / \u03b8\u2081 per solver iteration; "
                               "a component is done below the tolerance.")
    else:
        notes.append("no convergence figure: the manifest holds no residual history")
    return figs, notes


# -- the page --------------------------------------------------------------------
_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2rem auto;max-width:1100px;
padding:0 1rem;color:#222;line-height:1.4}
h1{font-size:1.5rem;margin-bottom:.2rem} h2{font-size:1.15rem;margin-top:2rem;border-bottom:1px solid #ddd}
table{border-collapse:collapse;font-size:.9rem} th,td{padding:.25rem .6rem;border-bottom:1px solid #eee;
text-align:left;vertical-align:top} td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:1.5rem 0} img{max-width:100%;height:auto;border:1px solid #eee}
figcaption{font-size:.85rem;color:#555} .bad{color:#b00;font-weight:bold} .notes{color:#555;font-size:.9rem}
"""


def _png_size(data: bytes) -> tuple[int, int]:
    # the IHDR chunk follows the 8-byte signature: 4 length + 4 type bytes, then width, height
    return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")


def _spectrum_table(spectrum: pd.DataFrame) -> str:
    head = "".join(f"<th>{h}</th>" for h in ("component", *SPECTRUM_HEADERS, "converged"))
    rows = []
    for (name, r), cells in zip(spectrum.iterrows(), spectrum_cells(spectrum)):
        ok = bool(r.get("converged", True))
        rows.append(f"<tr><th>{html.escape(str(name))}</th>" + "".join(f'<td class="num">{c}</td>' for c in cells)
                    + ("<td>yes</td>" if ok else '<td class="bad">no</td>') + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>"


def _page(title: str, manifest: dict, components: pd.DataFrame, images, notes, monitor_html: str = "") -> str:
    summary = "".join(f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>"
                      for k, v in summary_rows(manifest))
    figures = []
    for name, (data, caption) in images.items():
        w, h = _png_size(data)
        uri = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
        figures.append(f'<figure id="fig-{name}"><img src="{uri}" width="{w}" height="{h}" '
                       f'alt="{html.escape(name)}"><figcaption>{html.escape(caption)}</figcaption></figure>')
    state = "" if manifest.get("converged") else '<p class="bad">Not every component converged.</p>'
    note_list = "".join(f"<li>{html.escape(n)}</li>" for n in notes)
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8"><title>pcapipe report: '
            f"{html.escape(title)}</title><style>{_CSS}</style></head><body>"
            f"<h1>pcapipe report: {html.escape(title)}</h1>"
            f"<p>{manifest.get('rows')} rows \u00d7 {manifest.get('features')} features, "
            f"{manifest.get('components')} components, method {html.escape(str(manifest.get('method')))}</p>"
            f"{state}<h2>Spectrum</h2>{_spectrum_table(components)}<h2>Figures</h2>{''.join(figures)}"
            + (f"<h2>Monitoring</h2>{monitor_html}" if monitor_html else "")
            + (f'<ul class="notes">{note_list}</ul>' if notes else "")
            + f"<h2>Run</h2><table>{summary}</table></body></html>\n")


def _write_file(directory: str, name: str, data: bytes) -> None:
    tmp = os.path.join(directory, f".{name}.tmp")
    with open(tmp, "wb") as f:
        f.write(data)
    os.replace(tmp, os.path.join(directory, name))


def _title(directory: str) -> str:
    final = directory.removesuffix(".incomplete")
    return os.path.basename(final if partial_dir_for(final) == os.path.normpath(directory) else directory)


def build_report(directory: str, manifest: dict, color_by: str | None = None, time: str | None = None) -> dict:
    """Write ``report.html`` and one PNG per figure into ``directory``; return the manifest's "report" record.

    Parameters
    ----------
    directory : str
        A run directory (or the ``.incomplete`` sibling the engine is filling)
        holding components, loadings, features and optionally scores.
    manifest : dict
        The run's manifest (summary table, residual history, scores record).
    color_by : str, optional
        A keep column colouring the PC1-PC2 scatter.
    time : str, optional
        A keep column for the control chart's x-axis (default ``monitor.time``).

    Returns
    -------
    dict
        ``{"requested": True, "written": True, "files": [...], "figures": [...],
        "notes": [...], "color_by": ...}``; without matplotlib ``written`` is
        False and ``note`` says how to install it.

    Raises
    ------
    InputError
        ``color_by`` is not a keep column, or the run has no scores.
    """
    directory = os.path.normpath(os.fspath(directory))
    _check_color_by(manifest, color_by)
    try:
        import matplotlib  # noqa: F401  (the optional plot extra)
    except ImportError:
        log.warning("no report: %s", INSTALL_NOTE)
        return {"requested": True, "written": False, "note": INSTALL_NOTE}
    from .result import Result

    from .report_monitor import monitor_section

    figs, notes = report_figures(directory, manifest, color_by)
    monitor_figs, monitor_html, monitor_notes = monitor_section(directory, manifest, time)
    figs.update(monitor_figs)
    notes += monitor_notes
    images = {name: (png_bytes(fig), caption) for name, (fig, caption) in figs.items()}
    for name, (data, _) in images.items():
        _write_file(directory, f"{name}.png", data)
    page = _page(_title(directory), manifest, Result(directory, manifest).spectrum, images, notes, monitor_html)
    _write_file(directory, "report.html", page.encode("utf-8"))
    log.debug("wrote the report: %s", os.path.join(directory, "report.html"))
    return {"requested": True, "written": True, "files": ["report.html", *(f"{n}.png" for n in images)],
            "figures": list(images), "notes": notes, "color_by": color_by, "time": time}


def write_report(result, color_by: str | None = None, time: str | None = None) -> str:
    """Build the report of a finished run and record it in its manifest (``pcapipe report``).

    Returns
    -------
    str
        The path of ``report.html``.

    Raises
    ------
    InputError
        ``color_by`` is not a keep column of the run.
    OutputError
        matplotlib is not installed (the message says how to install it).
    """
    entry = build_report(result.directory, result.manifest, color_by, time)
    if not entry["written"]:
        raise OutputError(f"{result.directory}: no report written; {entry['note']}")
    path = os.path.join(result.directory, "manifest.json")
    # the file as written (a previous format version keeps its own key names), plus the report
    with open(path) as f:
        on_disk = json.load(f)
    write_json_atomic(path, dict(on_disk, report=entry))
    result.manifest = dict(result.manifest, report=entry)
    return os.path.join(result.directory, "report.html")
