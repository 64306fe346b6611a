"""The report's figures, drawn with matplotlib (the optional ``plot`` extra).

Each ``fig_*`` function takes plain tables and returns a
:class:`matplotlib.figure.Figure` on its own Agg canvas.  pyplot is never
used, so drawing a report changes nothing in a notebook's global state and is
safe from worker threads; tests inspect the returned figures' artists (lines,
bars, images, collections) rather than pixels.  matplotlib is imported inside
the functions, so importing this module never requires it.
"""

from __future__ import annotations

import io
import math

import numpy as np
import pandas as pd

__all__ = ["broken_stick", "history_array", "fig_scree", "fig_cumulative", "fig_loadings", "fig_heatmap",
           "fig_scatter", "fig_convergence", "png_bytes", "scree_limit", "LEVELS", "TOP", "BAR_COMPONENTS",
           "POSITIVE", "NEGATIVE", "SIGN_CMAP", "MAX_CATEGORIES"]

LEVELS = (0.8, 0.9, 0.95)  # cumulative shares people usually quote (common practice, no source)
TOP = 10  # features per component in the bar chart
BAR_COMPONENTS = 6  # components in the bar chart
MAX_CATEGORIES = 10  # categories given a colour and a legend entry each in the scatter
_PALETTE = "tab20"  # colours for more categories than that; they repeat every 20
SCREE_MIN = 40  # eigenvalues drawn at least in the scree plot when more are listed
# One sign convention in every figure: the two ends of the diverging map of the heatmap.
SIGN_CMAP = "RdBu_r"
POSITIVE = "#b2182b"  # dark red, the positive end of RdBu_r
NEGATIVE = "#2166ac"  # dark blue, the negative end
_RETAINED = "tab:blue"
_BEYOND = "0.45"
_DPI = 100


# -- helpers -------------------------------------------------------------------
def _figure(width: float, height: float):
    """A figure on its own Agg canvas (no pyplot, no global backend switch)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=_DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def png_bytes(fig) -> bytes:
    """The figure as PNG bytes, at a fixed size (figsize x 100 dpi, no tight cropping)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI)
    return buf.getvalue()


def _ticks(ax, names) -> None:
    """Component labels: PC1... for a few, plain numbers (readable without rotation) for many."""
    if len(names) <= 12:
        ax.set_xticks(np.arange(1, len(names) + 1), names)
        return
    step = max(1, math.ceil(len(names) / 25))
    idx = np.arange(0, len(names), step)
    ax.set_xticks(idx + 1, [str(i + 1) for i in idx])


def broken_stick(p: int) -> np.ndarray:
    """Expected shares of the pieces of a stick broken at random into ``p`` pieces, largest first.

    ``b_i = (1/p) * sum_{j=i}^{p} 1/j``; they sum to 1.  Components whose share
    stays above it are usually read as more than noise (Frontier 1976, J. Exp.
    Mar. Biol. Ecol. 25; Jackson 1993, Ecology 74).
    """
    if p < 1:
        raise ValueError(f"broken_stick: p must be at least 1, got {p}")
    inv = 1.0 / np.arange(1, p + 1)
    return np.cumsum(inv[::-1])[::-1] / p


def history_array(history) -> np.ndarray:
    """The manifest's residual history (rows of per-component values, None where absent) as floats."""
    rows = [[np.nan if v is None else float(v) for v in row] for row in history or []]
    width = max((len(r) for r in rows), default=0)
    return np.array([r + [np.nan] * (width - len(r)) for r in rows], dtype=float).reshape(len(rows), width)


# -- figures -------------------------------------------------------------------
def scree_limit(spectrum: pd.DataFrame) -> int:
    """Eigenvalues drawn in the scree and cumulative plots: all listed up to max(3k, 40)."""
    k = int(spectrum["retained"].sum())
    return min(len(spectrum), max(3 * k, SCREE_MIN))


def _mark_k(ax, k: int, total: int) -> None:
    if k < total:
        ax.axvline(k + 0.5, color="0.3", lw=1, ls="-.", gid="k_marker")
        ax.annotate(f"k = {k} retained", xy=(k + 0.5, 1.0), xycoords=("data", "axes fraction"),
                    xytext=(4, -4), textcoords="offset points", va="top", fontsize=8, color="0.2")


def _scree_points(ax, x, values, spectrum, *, errors=None) -> None:
    retained = spectrum["retained"].to_numpy(dtype=bool)
    estimate = ~spectrum["converged"].to_numpy(dtype=bool) & ~retained
    ax.plot(x, values, "-", color="0.7", lw=1, zorder=1)
    groups = [(retained, dict(marker="o", color=_RETAINED, ms=5), "retained"),
              (~retained & ~estimate, dict(marker="o", mfc="white", color=_BEYOND, ms=5), "not retained"),
              (estimate, dict(marker="x", color=_BEYOND, ms=5), "not retained, estimate (Ritz value)")]
    for mask, style, label in groups:
        if mask.any():
            ax.plot(x[mask], values[mask], ls="none", label=label, zorder=3, gid=f"points_{label.split(',')[0]}",
                    **style)
    if errors is not None:
        ax.errorbar(x, values, yerr=errors, fmt="none", ecolor=_RETAINED, elinewidth=1.2, capsize=3, zorder=2,
                    gid="std_error")


def fig_scree(spectrum: pd.DataFrame, total_variance: float, scaled: bool, d: int):
    """The eigenvalues beyond k as well, with k marked: linear scale (left) and log scale (right).

    Error bars are ``std_error = eigenvalue * sqrt(2/n)`` (North, Bell, Cahalan &
    Moeng 1982, Mon. Wea. Rev. 110), drawn on the left panel; the guide is
    ``broken_stick(d) * total_variance`` (Frontier 1976; Jackson 1993); the
    eigenvalue-1 line (Kaiser criterion, common practice) only means something
    when the features have unit variance.  The log panel shows where the tail
    flattens into noise, which the linear panel squashes against zero.
    """
    shown = spectrum.iloc[: scree_limit(spectrum)]
    names = list(shown.index)
    x = np.arange(1, len(names) + 1)
    values = shown["eigenvalue"].to_numpy(dtype=float)
    k = int(shown["retained"].sum())
    stick = broken_stick(d)[: len(x)] * total_variance
    fig = _figure(11.0, 4.4)
    lin, log = fig.subplots(1, 2)
    for ax in (lin, log):
        _scree_points(ax, x, values, shown, errors=shown["std_error"].to_numpy(dtype=float) if ax is lin else None)
        ax.plot(x, stick, "--", color="tab:orange", lw=1.2, label="broken-stick expectation", gid="broken_stick")
        if scaled:
            ax.axhline(1.0, color="tab:green", lw=1, ls=":", label="eigenvalue 1 (Kaiser)", gid="kaiser")
        _mark_k(ax, k, len(x))
        _ticks(ax, names)
        ax.set_xlabel("component (PC number)")
        ax.set_xlim(0.4, len(x) + 0.6)
    lin.set_ylim(bottom=0)
    lin.set_ylabel("eigenvalue (variance of the component)")
    lin.set_title("Scree plot")
    log.set_yscale("log")
    positive = values[values > 0]
    if positive.size:
        log.set_ylim(positive.min() / 2, values.max() * 2)
    log.set_title("Same, log scale")
    lin.legend(fontsize=8, loc="upper right")
    rest = total_variance - float(spectrum["eigenvalue"].sum())
    if len(spectrum) < d and total_variance > 0:
        lin.annotate(f"{d - len(spectrum)} more eigenvalues not determined;\ntogether {rest:.4g} "
                     f"({rest / total_variance:.1%} of the variance)", xy=(0.98, 0.45), xycoords="axes fraction",
                     ha="right", fontsize=8, color="0.25", gid="not_listed")
    return fig


def fig_cumulative(spectrum: pd.DataFrame):
    """Each component's share (bars) and the cumulative share (line), k and the LEVELS marked."""
    shown = spectrum.iloc[: scree_limit(spectrum)]
    names = list(shown.index)
    x = np.arange(1, len(names) + 1)
    cum = shown["cumulative_share"].to_numpy(dtype=float)
    retained = shown["retained"].to_numpy(dtype=bool)
    fig = _figure(9.0, 4.2)
    ax = fig.add_subplot()
    ax.bar(x, shown["share"].to_numpy(dtype=float), width=0.6, color=np.where(retained, _RETAINED, "0.7"),
           label="share of each component")
    ax.plot(x, cum, "o-", color=_RETAINED, ms=3, label="cumulative share", gid="cumulative")
    for level, color in zip(LEVELS, ("tab:green", "tab:orange", "tab:red")):
        hit = np.flatnonzero(cum >= level - 1e-12)
        where = f"reached at {names[hit[0]]}" if hit.size else f"not reached by {names[-1]}"
        ax.axhline(level, color=color, lw=1, ls=":", label=f"{level:.0%} ({where})", gid=f"level_{level:g}")
    _mark_k(ax, int(retained.sum()), len(x))
    _ticks(ax, names)
    ax.set_ylim(0, 1.02)
    ax.set_xlim(0.4, len(x) + 0.6)
    ax.set_xlabel("component (PC number)")
    ax.set_ylabel("share of total variance")
    ax.set_title("Explained variance")
    ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8)
    return fig


def fig_loadings(loadings: pd.DataFrame, top: int = TOP, max_components: int = BAR_COMPONENTS):
    """Bars of the ``top`` features of largest |loading| for each of the first components.

    Every panel has the same x-axis, symmetric about 0, so bar lengths compare
    across components; positive bars are red and negative blue, as in the heatmap.
    """
    pcs = list(loadings.columns[:max_components])
    top = min(top, len(loadings))
    cols = min(3, len(pcs))
    rows = math.ceil(len(pcs) / cols)
    lim = 1.05 * float(np.max(np.abs(loadings[pcs].to_numpy()))) if len(loadings) else 1.0
    fig = _figure(4.2 * cols, (0.26 * top + 1.2) * rows)
    for i, pc in enumerate(pcs):
        ax = fig.add_subplot(rows, cols, i + 1)
        v = loadings[pc].to_numpy()
        order = np.argsort(-np.abs(v), kind="stable")[:top]
        vals = v[order]
        ax.barh(np.arange(top), vals, color=np.where(vals >= 0, POSITIVE, NEGATIVE))
        ax.set_yticks(np.arange(top), [str(loadings.index[j]) for j in order], fontsize=8)
        ax.invert_yaxis()  # largest on top
        ax.axvline(0.0, color="0.3", lw=0.8)
        for side in (-1, 1):  # the size every loading would have if all features counted alike
            ax.axvline(side / math.sqrt(len(loadings)), color="0.5", lw=0.8, ls=":", gid="equal_share")
        ax.set_xlim(-lim, lim)
        ax.set_title(pc)
        ax.set_xlabel("loading")
    fig.suptitle(f"Top {top} loadings per component (red positive, blue negative; same scale in every panel)")
    return fig


def fig_heatmap(loadings: pd.DataFrame):
    """All loadings as a diverging heatmap (features x components), readable up to ~100 features."""
    v = loadings.to_numpy()
    d, k = v.shape
    row = 0.24 if d <= 40 else 0.14  # inches per feature
    font = 8 if d <= 40 else 6
    fig = _figure(max(4.5, 0.45 * k + 3.2), row * d + 1.6)
    ax = fig.add_subplot()
    lim = float(np.max(np.abs(v))) if v.size else 1.0
    im = ax.imshow(v, aspect="auto", cmap=SIGN_CMAP, vmin=-lim, vmax=lim, interpolation="nearest")
    ax.set_yticks(np.arange(d), [str(f) for f in loadings.index], fontsize=font)
    ax.set_xticks(np.arange(k), list(loadings.columns), rotation=90 if k > 12 else 0, fontsize=8)
    ax.tick_params(axis="y", length=2, pad=1)
    if d > 40:  # a tall map: component names on top as well
        ax.tick_params(axis="x", top=True, labeltop=True)
    fig.colorbar(im, ax=ax, label="loading (red positive, blue negative)", shrink=min(1.0, 12 / max(d, 1) + 0.3))
    ax.set_title("Loadings")
    return fig


def _category_order(values: pd.Series) -> list:
    """Categories in their own order: an ordered categorical's order, else sorted (never by frequency)."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        present = set(values.dropna().unique())
        return [c for c in values.cat.categories if c in present]
    uniq = pd.unique(values.dropna())
    try:
        return sorted(uniq)
    except TypeError:
        return sorted(uniq, key=str)


def _categorical(values: pd.Series) -> bool:
    if isinstance(values.dtype, pd.CategoricalDtype) or pd.api.types.is_bool_dtype(values):
        return True
    if pd.api.types.is_datetime64_any_dtype(values):
        return False
    if not pd.api.types.is_numeric_dtype(values):
        return True
    # a few distinct integers (codes, voyages of one ship) read better as a legend
    return pd.api.types.is_integer_dtype(values) and values.nunique() <= MAX_CATEGORIES


def _ordered(values: pd.Series) -> bool:
    """Categories with an order of their own: an ordered categorical, or numbers (voyage 1, 2, ...)."""
    if isinstance(values.dtype, pd.CategoricalDtype):
        return bool(values.cat.ordered)
    return pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)


def _palette(n: int, ordered: bool, many: bool):
    """``color(i)`` for category i: a sequential map for ordered ones, qualitative colours otherwise."""
    from matplotlib import colormaps

    if ordered and not many:
        seq = colormaps["viridis"]
        return lambda i: seq(0.9 * i / max(1, n - 1))  # the yellow end is too pale on white
    qual = colormaps[_PALETTE if many else "tab10"]
    return lambda i: qual(i % qual.N)


def _scatter_categories(ax, x, y, values: pd.Series, label: str, order: np.ndarray) -> None:
    """One colour per category, points drawn in ``order`` (random) so no category hides another."""
    from matplotlib.lines import Line2D

    cats = _category_order(values)
    index = {c: i for i, c in enumerate(cats)}
    code = np.array([index.get(v, -1) if not pd.isna(v) else -1 for v in values], dtype=int)
    many = len(cats) > MAX_CATEGORIES
    color = _palette(len(cats), _ordered(values), many)
    colors = np.array([color(i) if i >= 0 else (0.6, 0.6, 0.6, 1.0) for i in code]).reshape(len(code), 4)
    ax.scatter(x[order], y[order], c=colors[order], s=8, lw=0, alpha=0.7)
    if many:
        ax.legend([], [], title=f"{label}: {len(cats)} categories,\ncolours repeat every 20\n(too many to list)",
                  fontsize=7, loc="center left", bbox_to_anchor=(1.01, 0.5))
        return
    handles = [Line2D([], [], ls="none", marker="o", color=color(i)) for i in range(len(cats))]
    names = [str(c) for c in cats]
    if (code < 0).any():
        handles.append(Line2D([], [], ls="none", marker="o", color="0.6"))
        names.append("(missing)")
    ax.legend(handles, names, title=label, fontsize=7, markerscale=1.3, loc="center left",
              bbox_to_anchor=(1.01, 0.5))


def _scatter_continuous(fig, ax, x, y, values: pd.Series, label: str, order: np.ndarray) -> None:
    if pd.api.types.is_datetime64_any_dtype(values):
        import matplotlib.dates as mdates

        if getattr(values.dt, "tz", None) is not None:
            values = values.dt.tz_convert("UTC").dt.tz_localize(None)
        c = mdates.date2num(values.to_numpy())
        sc = ax.scatter(x[order], y[order], c=c[order], s=6, lw=0, cmap="viridis")
        bar = fig.colorbar(sc, ax=ax)
        loc = mdates.AutoDateLocator()
        bar.ax.yaxis.set_major_locator(loc)
        # the offset text ("2026-Mar") above a colour bar pushes it away from the axes: say it in the label
        bar.ax.yaxis.set_major_formatter(mdates.ConciseDateFormatter(loc, show_offset=False))
        first, last = values.min(), values.max()
        bar.set_label(f"{label} ({first:%Y-%m-%d} to {last:%Y-%m-%d})")
        return
    c = values.to_numpy(dtype=float)
    sc = ax.scatter(x[order], y[order], c=c[order], s=6, lw=0, cmap="viridis")
    fig.colorbar(sc, ax=ax, label=label)


def fig_scatter(sample: pd.DataFrame, ratios=None, color_by: str | None = None, seed: int = 0):
    """PC1 against PC2 for a sample of scores, optionally coloured by a keep column.

    Categorical columns (text, booleans, ordered categories, integers with few
    values) get one colour per category in the column's own order (at most
    ``MAX_CATEGORIES`` listed; more share a repeating palette and the legend
    says so); numbers and times get a continuous colour scale.  Points are
    drawn in a random order (``numpy.random.default_rng(seed)``) so that the
    last category drawn does not cover the others.
    """
    x, y = sample["PC1"].to_numpy(), sample["PC2"].to_numpy()
    order = np.random.default_rng(seed).permutation(len(sample))
    fig = _figure(7.5 if color_by else 6.0, 5.0)
    ax = fig.add_subplot()
    ax.set_aspect("equal", adjustable="datalim")  # both axes in score units: spreads compare by eye
    if color_by is None:
        ax.scatter(x, y, s=6, lw=0, alpha=0.5, color=_RETAINED)
    elif _categorical(sample[color_by]):
        _scatter_categories(ax, x, y, sample[color_by].reset_index(drop=True), color_by, order)
    else:
        _scatter_continuous(fig, ax, x, y, sample[color_by].reset_index(drop=True), color_by, order)
    ax.axhline(0.0, color="0.6", lw=0.6)
    ax.axvline(0.0, color="0.6", lw=0.6)
    share = [f" ({r:.1%} of variance)" for r in ratios] if ratios is not None else ["", ""]
    ax.set_xlabel("PC1" + share[0])
    ax.set_ylabel("PC2" + share[1])
    ax.set_title(f"Scores, sample of {len(sample)} rows" + (f", colour: {color_by}" if color_by else ""))
    return fig


def fig_convergence(history, tolerance: float | None = None, first_pass: int | None = None):
    """Relative residual ``||C v - theta v|| / theta_1`` of each component (log scale).

    With ``first_pass`` (matrix-free: each solver iteration is one pass over
    the data) the x-axis is the pass over the data, counting the passes before
    the solver; without it, iterations on the in-memory matrix.
    """
    h = history_array(history)
    it = np.arange(1, h.shape[0] + 1)
    xs = it + (first_pass - 1) if first_pass else it
    fig = _figure(7.0, 4.2)
    ax = fig.add_subplot()
    ax.set_yscale("log")
    shown = np.where(h > 0, h, np.nan)  # an exact zero has no place on a log axis
    for i in range(h.shape[1]):
        ax.plot(xs, shown[:, i], marker="o", ms=3, lw=1, label=f"PC{i + 1}" if i < 12 else None)
    if tolerance:
        ax.axhline(tolerance, color="0.2", ls="--", lw=1, label=f"tolerance {tolerance:g}", gid="tolerance")
    ax.set_xlabel("pass over the data" if first_pass else "iteration on the in-memory matrix (no pass over the data)")
    ax.set_ylabel("relative residual")
    ax.set_title("Convergence")
    if xs.size:
        ax.set_xticks(xs if xs.size <= 20 else np.unique(np.linspace(xs[0], xs[-1], 20).round()))
    ax.legend(fontsize=7, ncols=2 if h.shape[1] > 6 else 1)
    return fig
