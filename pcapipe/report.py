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
from time import perf_counter
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from .config import format_size
from .errors import InputError, OutputError
from .figures import (BAR_COMPONENTS, LEVELS, fig_convergence, fig_cumulative, fig_heatmap, fig_loadings,
                      fig_scatter, fig_scree, png_bytes, scree_limit)
from .formats import FLAG_NOTES, SPECTRUM_HEADERS, flag, percent, sig, spectrum_cells, spectrum_shown
from .weighted import weights_text
from .writer import partial_dir_for, write_json_atomic

__all__ = ["build_report", "write_report", "report_figures", "sample_scores", "summary_rows", "FIGURES",
           "FigureContext", "first_solver_pass",
           "INSTALL_NOTE", "SAMPLE_ROWS", "HEATMAP_MAX_FEATURES"]

log = logging.getLogger("pcapipe")

def _install_note() -> str:
    """How to get matplotlib: from a source checkout (pyproject.toml beside the package) the extra of
    that checkout, else the published package's extra."""
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    try:
        with open(os.path.join(root, "pyproject.toml"), encoding="utf-8") as f:
            ours = 'name = "pcapipe"' in f.read()
    except OSError:
        ours = False
    if ours:
        return f"install the plot extra: pip install \".[plot]\" in {root}"
    return "install the plot extra: pip install \"pcapipe[plot]\""


INSTALL_NOTE = _install_note()
SAMPLE_ROWS = 5000  # enough points to see structure; reading them costs ~nothing
HEATMAP_MAX_FEATURES = 100  # beyond this the feature names no longer fit beside a heatmap (6-point labels)
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


def with_report_time(manifest: dict, seconds: float) -> dict:
    """A copy of ``manifest`` whose timings count ``seconds`` for the report (replacing an earlier one)."""
    timings = dict(manifest.get("timings", {}))
    old = timings.get("report_seconds", 0.0)
    if "total_seconds" in timings:
        timings["total_seconds"] = round(timings["total_seconds"] - old + seconds, 4)
    timings["report_seconds"] = round(seconds, 4)
    return dict(manifest, timings=timings)


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


@dataclass
class FigureContext:
    """What every figure builder may use: the run and the options of this report."""

    directory: str
    manifest: dict
    result: object  # pcapipe.result.Result
    color_by: str | None

    @property
    def spectrum(self) -> pd.DataFrame:
        return self.result.spectrum

    @property
    def retained(self) -> pd.DataFrame:
        return self.spectrum[self.spectrum["retained"]]

    @property
    def k(self) -> int:
        return int(self.spectrum["retained"].sum())

    @property
    def d(self) -> int:
        return int(self.manifest["features"])

    @property
    def scaled(self) -> bool:
        return bool(self.manifest["config"]["model"].get("scale"))


def _std_error_note(ctx: FigureContext) -> str:
    n = ctx.manifest.get("rows") or 0
    if n <= 0:
        return ""
    rel = math.sqrt(2.0 / n)
    size = (f"{percent(rel, 2)} of each eigenvalue" + (", smaller than the markers" if rel < 0.02 else ""))
    return (f" Error bars: std_error = eigenvalue \u00d7 sqrt(2/n) = {size} at n = {n} (North et al. 1982); "
            "this assumes independent rows: autocorrelated rows (time series, telemetry) carry fewer "
            "independent observations, so the true errors are larger.")


def _scree(ctx: FigureContext):
    spec = ctx.spectrum
    drawn = scree_limit(spec)
    known = (f"all {ctx.d} eigenvalues" if len(spec) == ctx.d
             else f"the {len(spec)} eigenvalues the method determined (of {ctx.d})")
    listed = known if drawn == len(spec) else f"the first {drawn} of {known}"
    estimate = "; crosses: estimates beyond k (Ritz values, at most the eigenvalue)" \
        if (~spec["converged"] & ~spec["retained"]).any() else ""
    return (fig_scree(spec, float(ctx.manifest["total_variance"]), ctx.scaled, ctx.d),
            f"Eigenvalues, {listed}: filled, the k = {ctx.k} retained; open, the rest{estimate}. "
            "Dashed: broken-stick expectation (Frontier 1976; Jackson 1993)"
            + ("; dotted: eigenvalue 1 (Kaiser)" if ctx.scaled else "") + "." + _std_error_note(ctx))


def _cumulative(ctx: FigureContext):
    return (fig_cumulative(ctx.spectrum), f"Share of total variance per component (blue: the k = {ctx.k} "
            "retained) and cumulated; dotted lines at " + ", ".join(f"{v:.0%}" for v in LEVELS) + ".")


def _loadings(ctx: FigureContext):
    return (fig_loadings(ctx.result.loadings), f"Features of largest |loading| for the first "
            f"{min(ctx.k, BAR_COMPONENTS)} component(s); red positive, blue negative, one scale for all panels; "
            f"dotted: \u00b11/\u221ad = \u00b1{1 / math.sqrt(max(ctx.d, 1)):.2f}, the loading of every feature if all "
            "counted alike.")


def _heatmap(ctx: FigureContext):
    if ctx.d > HEATMAP_MAX_FEATURES:
        return f"no loadings heatmap: {ctx.d} features are more than {HEATMAP_MAX_FEATURES}"
    return fig_heatmap(ctx.result.loadings), "All loadings (unit-norm eigenvectors); red positive, blue negative."


def _scatter(ctx: FigureContext):
    if not ctx.manifest.get("scores", {}).get("written"):
        return "no scores scatter: the run was made with output.scores = false"
    if ctx.k < 2:
        return "no scores scatter: the run has a single component"
    sample = sample_scores(ctx.directory, ["PC1", "PC2", *([ctx.color_by] if ctx.color_by else [])])
    seed = int(ctx.manifest["config"]["model"].get("seed", 0))
    return (fig_scatter(sample, ctx.retained["share"].to_numpy()[:2], ctx.color_by, seed=seed),
            f"PC1 against PC2 for {len(sample)} rows from a spread of row groups "
            f"(of {ctx.manifest['scores'].get('rows')} scored rows; the first rows of each group read, a "
            "systematic sample rather than a random one), drawn in random order; equal scales on both axes.")


def first_solver_pass(manifest: dict) -> int | None:
    """The pass over the data of the solver's first iteration (matrix-free), else None (in memory)."""
    if manifest.get("method") != "matrix-free":
        return None
    applications = int(manifest.get("solver", {}).get("operator_applications", 0))
    after = 1 if manifest.get("scores", {}).get("written") else 0  # the scores pass comes last
    return int(manifest.get("passes_over_data", 0)) - after - applications + 1


def _convergence(ctx: FigureContext):
    solver = ctx.manifest.get("solver", {})
    history = solver.get("residual_history") or []
    if not history:
        return "no convergence figure: the method found the eigenvalues without iterating (no residual history)"
    first = first_solver_pass(ctx.manifest)
    held = str(ctx.manifest.get("blocks_cached", "")).startswith("rows read once")
    before = ("pass 1: the rows read into worker memory, with their moments" if held else "pass 1: moments") + (
        ", pass 2: the moments again with the imputed means" if first == 3 else "")
    axis = (f"per pass over the data ({before})" if first
            else "per iteration on the in-memory matrix (built in the single pass over the data)")
    return (fig_convergence(history, solver.get("tolerance"), first_pass=first),
            f"Relative residual ||C v - \u03b8 v|| / \u03b8\u2081 of each retained component {axis}; "
            "a component is done below the tolerance.")


# The report's figures in page order: name -> builder(ctx) returning (Figure, caption), or a note
# saying why the figure is left out.  Other modules add theirs with FIGURES[name] = builder.
FIGURES = {"scree": _scree, "cumulative": _cumulative, "loadings": _loadings, "heatmap": _heatmap,
           "scatter": _scatter, "convergence": _convergence}


def report_figures(directory: str, manifest: dict, color_by: str | None = None):
    """The report's figures as ``{name: (Figure, caption)}``, plus notes on the ones left out."""
    from .result import Result

    _check_color_by(manifest, color_by)
    ctx = FigureContext(directory, manifest, Result(directory, manifest), color_by)
    figs, notes = {}, []
    for name, builder in FIGURES.items():
        out = builder(ctx)
        if isinstance(out, str):
            notes.append(out)
        elif out is not None:
            figs[name] = out
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
tr.rule td{border-bottom:2px solid #888;font-size:.8rem;color:#555;text-align:center}
"""


def _png_size(data: bytes) -> tuple[int, int]:
    # the IHDR chunk follows the 8-byte signature: 4 length + 4 type bytes, then width, height
    return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")


def _spectrum_table(spectrum: pd.DataFrame, manifest: dict) -> str:
    shown, hidden = spectrum_shown(spectrum)
    k = int(spectrum["retained"].sum())
    heads = ("component", *SPECTRUM_HEADERS, "converged")
    head = "".join(f"<th>{h}</th>" for h in heads)
    rows = []
    for i, ((name, r), cells) in enumerate(zip(shown.iterrows(), spectrum_cells(shown))):
        if i == k:
            rows.append(f'<tr class="rule"><td colspan="{len(heads)}">k = {k} retained above; not retained '
                        "below</td></tr>")
        mark = flag(r)
        state = {"": "<td>yes</td>", "*": '<td class="bad">no</td>', "~": "<td>estimate</td>"}[mark]
        rows.append(f"<tr><th>{html.escape(str(name))}</th>" + "".join(f'<td class="num">{c}</td>' for c in cells[:-1])
                    + f"<td>{cells[-1]}</td>" + state + "</tr>")
    notes = []
    if hidden:
        notes.append(f"{hidden} more eigenvalue(s) listed in spectrum.parquet.")
    v = manifest.get("variance") or {}
    if v.get("not_listed"):
        notes.append(f"Variance not listed (beyond the eigenvalues the method determined): "
                     f"{sig(v['not_listed'], 3)}, {percent(v['not_listed_share'], 3)} of the total.")
    elif v:
        notes.append(f"All {v.get('eigenvalues_listed')} eigenvalues are listed; they sum to the total variance.")
    if "~" in {flag(r) for _, r in shown.iterrows()}:
        notes.append(FLAG_NOTES["~"].lstrip("~ ").capitalize() + ": marked estimate.")
    foot = f'<p class="notes">{" ".join(html.escape(n) for n in notes)}</p>' if notes else ""
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>{foot}"


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
            f"k = {manifest.get('components')} components retained of {len(components)} eigenvalues listed, "
            f"method {html.escape(str(manifest.get('method')))}</p>"
            f"{state}<h2>Spectrum</h2>{_spectrum_table(components, manifest)}<h2>Figures</h2>{''.join(figures)}"
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


def build_report(directory: str, manifest: dict, color_by: str | None = None, time: str | None = None,
                 warn: bool = True) -> dict:
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
    warn : bool
        Log the install hint when matplotlib is missing (off when the caller
        reports it itself, so that it is said once).

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
        if warn:
            log.warning("no report: %s", INSTALL_NOTE)
        return {"requested": True, "written": False, "note": INSTALL_NOTE}
    from .result import Result

    from .report_monitor import monitor_section

    t0 = perf_counter()
    figs, notes = report_figures(directory, manifest, color_by)
    monitor_figs, monitor_html, monitor_notes = monitor_section(directory, manifest, time)
    figs.update(monitor_figs)
    notes += monitor_notes
    images = {name: (png_bytes(fig), caption) for name, (fig, caption) in figs.items()}
    manifest = with_report_time(manifest, perf_counter() - t0)
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
    entry = build_report(result.directory, result.manifest, color_by, time, warn=False)  # the error says it
    if not entry["written"]:
        raise OutputError(f"{result.directory}: no report written; {entry['note']}")
    path = os.path.join(result.directory, "manifest.json")
    # the file as written (a previous format version keeps its own key names), plus the report
    with open(path) as f:
        on_disk = json.load(f)
    write_json_atomic(path, dict(on_disk, report=entry))
    result.manifest = dict(result.manifest, report=entry)
    return os.path.join(result.directory, "report.html")
