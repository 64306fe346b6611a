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
           "fig_scatter", "fig_convergence", "png_bytes", "LEVELS", "TOP", "BAR_COMPONENTS"]

LEVELS = (0.8, 0.9, 0.95)  # cumulative shares people usually quote (common practice, no source)
TOP = 10  # features per component in the bar chart
BAR_COMPONENTS = 6  # components in the bar chart
_MAX_CATEGORIES = 10  # legend entries in the scatter; the rest are "other"
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
    step = max(1, math.ceil(len(names) / 25))
    idx = np.arange(0, len(names), step)
    ax.set_xticks(idx + 1, [names[i] for i in idx], rotation=90 if len(idx) > 12 else 0)


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
def fig_scree(components: pd.DataFrame, total_variance: float, scaled: bool, d: int):
    """Eigenvalues with std-error bars, the broken-stick guide, and eigenvalue 1 for correlation PCA.

    Error bars are ``std_error = eigenvalue * sqrt(2/n)`` (North, Bell, Cahalan &
    Moeng 1982, Mon. Wea. Rev. 110); the guide is ``broken_stick(d) *
    total_variance``; the eigenvalue-1 line (Kaiser criterion, common practice)
    only means something when the features have unit variance.
    """
    names = list(components.index)
    x = np.arange(1, len(names) + 1)
    fig = _figure(7.0, 4.2)
    ax = fig.add_subplot()
    ax.errorbar(x, components["eigenvalue"].to_numpy(), yerr=components["std_error"].to_numpy(),
                fmt="o-", capsize=3, color="tab:blue", label="eigenvalue \u00b1 std error")
    stick = broken_stick(d)[: len(x)] * total_variance
    ax.plot(x, stick, "--", color="0.4", label="broken-stick expectation", gid="broken_stick")
    if scaled:
        ax.axhline(1.0, color="tab:red", lw=1, ls=":", label="eigenvalue 1 (Kaiser)", gid="kaiser")
    _ticks(ax, names)
    ax.set_ylim(bottom=0)
    ax.set_xlabel("component")
    ax.set_ylabel("eigenvalue (variance of the component)")
    ax.set_title("Scree plot")
    ax.legend()
    return fig


def fig_cumulative(components: pd.DataFrame):
    """Each component's share (bars) and the cumulative share (line), with the LEVELS marked."""
    names = list(components.index)
    x = np.arange(1, len(names) + 1)
    cum = components["cumulative_share"].to_numpy()
    fig = _figure(8.5, 4.2)
    ax = fig.add_subplot()
    ax.bar(x, components["share"].to_numpy(), width=0.6, color="tab:blue", alpha=0.35,
           label="share of each component")
    ax.plot(x, cum, "o-", color="tab:blue", label="cumulative share", gid="cumulative")
    for level, color in zip(LEVELS, ("tab:green", "tab:orange", "tab:red")):
        hit = np.flatnonzero(cum >= level - 1e-12)
        where = f"reached at {names[hit[0]]}" if hit.size else f"not reached by {names[-1]}"
        ax.axhline(level, color=color, lw=1, ls=":", label=f"{level:.0%} ({where})", gid=f"level_{level:g}")
    _ticks(ax, names)
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("component")
    ax.set_ylabel("share of total variance")
    ax.set_title("Explained variance")
    ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8)
    return fig


def fig_loadings(loadings: pd.DataFrame, top: int = TOP, max_components: int = BAR_COMPONENTS):
    """Bars of the ``top`` features of largest |loading| for each of the first components."""
    pcs = list(loadings.columns[:max_components])
    top = min(top, len(loadings))
    cols = min(3, len(pcs))
    rows = math.ceil(len(pcs) / cols)
    fig = _figure(4.2 * cols, (0.26 * top + 1.1) * rows)
    for i, pc in enumerate(pcs):
        ax = fig.add_subplot(rows, cols, i + 1)
        v = loadings[pc].to_numpy()
        order = np.argsort(-np.abs(v), kind="stable")[:top]
        vals = v[order]
        ax.barh(np.arange(top), vals, color=np.where(vals >= 0, "tab:blue", "tab:red"))
        ax.set_yticks(np.arange(top), [str(loadings.index[j]) for j in order], fontsize=8)
        ax.invert_yaxis()  # largest on top
        ax.axvline(0.0, color="0.3", lw=0.8)
        ax.set_title(pc)
        ax.set_xlabel("loading")
    fig.suptitle(f"Top {top} loadings per component")
    return fig


def fig_heatmap(loadings: pd.DataFrame):
    """All loadings as a diverging heatmap (features x components), for small d."""
    v = loadings.to_numpy()
    d, k = v.shape
    fig = _figure(max(4.5, 0.45 * k + 3.0), 0.24 * d + 1.6)
    ax = fig.add_subplot()
    lim = float(np.max(np.abs(v))) if v.size else 1.0
    im = ax.imshow(v, aspect="auto", cmap="RdBu_r", vmin=-lim, vmax=lim, interpolation="nearest")
    ax.set_yticks(np.arange(d), [str(f) for f in loadings.index], fontsize=8)
    ax.set_xticks(np.arange(k), list(loadings.columns), rotation=90 if k > 12 else 0)
    fig.colorbar(im, ax=ax, label="loading")
    ax.set_title("Loadings")
    return fig


def _categorical(values: pd.Series) -> bool:
    if pd.api.types.is_bool_dtype(values) or not (pd.api.types.is_numeric_dtype(values)
                                                   or pd.api.types.is_datetime64_any_dtype(values)):
        return True
    # a few distinct integers (codes, voyages of one ship) read better as a legend
    return pd.api.types.is_integer_dtype(values) and values.nunique() <= _MAX_CATEGORIES


def _scatter_colored(fig, ax, x, y, values: pd.Series, label: str) -> None:
    if _categorical(values):
        text = values.astype("string").fillna("(missing)").to_numpy(dtype=object)
        counts = pd.Series(text).value_counts(sort=True)
        shown = list(counts.index[:_MAX_CATEGORIES])
        if len(counts) > len(shown):
            other = ~np.isin(text, shown)
            ax.scatter(x[other], y[other], s=6, lw=0, color="0.75", alpha=0.5, label="other")
        for cat in shown:
            mask = text == cat
            ax.scatter(x[mask], y[mask], s=8, lw=0, alpha=0.7, label=str(cat))
        title = label if len(counts) == len(shown) else f"{label}\n({len(shown)} most frequent of {len(counts)})"
        ax.legend(title=title, fontsize=7, markerscale=2, loc="center left", bbox_to_anchor=(1.01, 0.5))
        return
    if pd.api.types.is_datetime64_any_dtype(values):
        import matplotlib.dates as mdates

        if getattr(values.dt, "tz", None) is not None:
            values = values.dt.tz_convert("UTC").dt.tz_localize(None)
        sc = ax.scatter(x, y, c=mdates.date2num(values.to_numpy()), s=6, lw=0, cmap="viridis")
        bar = fig.colorbar(sc, ax=ax, label=label)
        loc = mdates.AutoDateLocator()
        bar.ax.yaxis.set_major_locator(loc)
        bar.ax.yaxis.set_major_formatter(mdates.ConciseDateFormatter(loc))
        return
    sc = ax.scatter(x, y, c=values.to_numpy(dtype=float), s=6, lw=0, cmap="viridis")
    fig.colorbar(sc, ax=ax, label=label)


def fig_scatter(sample: pd.DataFrame, ratios=None, color_by: str | None = None):
    """PC1 against PC2 for a sample of scores, optionally coloured by a keep column.

    Categorical columns (text, booleans, integers with few values) get a
    legend of the most frequent values; numbers and times get a colour bar.
    """
    x, y = sample["PC1"].to_numpy(), sample["PC2"].to_numpy()
    fig = _figure(7.5 if color_by else 6.0, 5.0)
    ax = fig.add_subplot()
    if color_by is None:
        ax.scatter(x, y, s=6, lw=0, alpha=0.5, color="tab:blue")
    else:
        _scatter_colored(fig, ax, x, y, sample[color_by], color_by)
    ax.axhline(0.0, color="0.6", lw=0.6)
    ax.axvline(0.0, color="0.6", lw=0.6)
    share = [f" ({r:.1%} of variance)" for r in ratios] if ratios is not None else ["", ""]
    ax.set_xlabel("PC1" + share[0])
    ax.set_ylabel("PC2" + share[1])
    ax.set_title(f"Scores, sample of {len(sample)} rows" + (f", colour: {color_by}" if color_by else ""))
    return fig


def fig_convergence(history, tolerance: float | None = None):
    """Relative residual ``||C v - theta v|| / theta_1`` per iteration for each component (log scale)."""
    h = history_array(history)
    it = np.arange(1, h.shape[0] + 1)
    fig = _figure(7.0, 4.2)
    ax = fig.add_subplot()
    ax.set_yscale("log")
    shown = np.where(h > 0, h, np.nan)  # an exact zero has no place on a log axis
    for i in range(h.shape[1]):
        ax.plot(it, shown[:, i], marker="o", ms=3, lw=1, label=f"PC{i + 1}" if i < 12 else None)
    if tolerance:
        ax.axhline(tolerance, color="0.2", ls="--", lw=1, label=f"tolerance {tolerance:g}", gid="tolerance")
    ax.set_xlabel("iteration")
    ax.set_ylabel("relative residual")
    ax.set_title("Convergence")
    if it.size:
        ax.set_xticks(it if it.size <= 20 else np.unique(np.linspace(1, it[-1], 20).round()))
    ax.legend(fontsize=7, ncols=2 if h.shape[1] > 6 else 1)
    return fig
