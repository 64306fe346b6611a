"""Tests of pcapipe.report and pcapipe.figures: each figure from a real run holds what it should.

Figures are checked through their matplotlib artists (line data, bar sizes,
image arrays, scatter offsets, legend texts), the page through its HTML and,
when Chromium is installed, by loading it in a headless browser.
"""

import base64
import copy
import json
import os
import pathlib
import re
import shutil
import subprocess
import sys

import numpy as np
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import known_spectrum, make_config, run_cli, write_parquet
from pcapipe.errors import InputError, OutputError
from pcapipe.figures import LEVELS, broken_stick, fig_convergence, history_array
from pcapipe.formats import sig
from pcapipe.report import (INSTALL_NOTE, SAMPLE_ROWS, build_report, report_figures, sample_scores,
                            summary_rows, write_report)

pytest.importorskip("matplotlib")

_SITES = np.array(["north", "south", "east", "west"])
_PNG = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, sec. 5.2)


def _png_size(path):
    with open(path, "rb") as f:
        head = f.read(24)
    assert head[:8] == _PNG
    return int.from_bytes(head[16:20], "big"), int.from_bytes(head[20:24], "big")


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """Correlation PCA, 8 features, 12 000 rows in 3 files of 4 row groups, with keep columns of each kind."""
    tmp = tmp_path_factory.mktemp("report-small")
    rng = np.random.default_rng(11)
    n = 12_000
    x = known_spectrum(n, 8, [6, 3, 2, 1, 0.5, 0.3, 0.2, 0.1], rng) * np.linspace(1, 20, 8) + 5.0
    keep = {"row_id": np.arange(n), "site": _SITES[rng.integers(0, 4, n)],
            "when": np.datetime64("2026-03-02T00:00", "ms") + np.arange(n) * np.timedelta64(5, "m"),
            "level": rng.standard_normal(n)}
    write_parquet(tmp / "in", x, files=3, row_group=1000, keep=keep)
    cfg = make_config(str(tmp / "in" / "*.parquet"), tmp / "run", model={"components": 4, "scale": True, "method": "matrix-free"},
                      input={"keep": list(keep)})
    return pcapipe.run(cfg)


@pytest.fixture(scope="module")
def wide(tmp_path_factory):
    """Covariance PCA of 50 features, matrix-free (several iterations), no scores."""
    tmp = tmp_path_factory.mktemp("report-wide")
    rng = np.random.default_rng(3)
    x = known_spectrum(600, 50, np.r_[10, 6, 4, np.linspace(1.5, 0.5, 47)], rng)
    write_parquet(tmp / "in", x)
    cfg = make_config(str(tmp / "in" / "*.parquet"), tmp / "run",
                      model={"components": 3, "method": "matrix-free", "oversample": 2}, output={"scores": False})
    return pcapipe.run(cfg)


@pytest.fixture(scope="module")
def figures(small):
    return report_figures(small.directory, small.manifest)[0]


# -- scree ---------------------------------------------------------------------------
@pytest.mark.parametrize("p, want", [
    (1, [1.0]),
    (2, [0.75, 0.25]),                                    # (1 + 1/2)/2, (1/2)/2
    (4, [25 / 48, 13 / 48, 7 / 48, 3 / 48]),              # (1/4) * sum_{j=i}^{4} 1/j, by hand
])
def test_broken_stick_shares(p, want):
    # the definition b_i = (1/p) sum_{j=i}^{p} 1/j (Jackson 1993, Ecology 74, eq. for the broken stick)
    np.testing.assert_allclose(broken_stick(p), want, rtol=1e-15)
    assert broken_stick(37).sum() == pytest.approx(1.0, rel=1e-14)


def test_scree_shows_the_spectrum_beyond_k_with_error_bars_broken_stick_and_kaiser(small, figures):
    fig, caption = figures["scree"]
    ax = fig.axes[0]
    spec = small.spectrum
    assert len(spec) == 8 and spec["retained"].sum() == 4  # covariance method: every eigenvalue, k = 4
    kept = next(line for line in ax.lines if line.get_gid() == "points_retained")
    rest = next(line for line in ax.lines if line.get_gid() == "points_not retained")
    np.testing.assert_allclose(kept.get_ydata(), spec["eigenvalue"][:4], rtol=1e-15)
    np.testing.assert_allclose(rest.get_ydata(), spec["eigenvalue"][4:], rtol=1e-15)
    np.testing.assert_array_equal(rest.get_xdata(), np.arange(5, 9))
    from matplotlib.container import ErrorbarContainer

    (bars,) = [c for c in ax.containers if isinstance(c, ErrorbarContainer)]
    (segments,) = bars.lines[2]
    half = np.array([abs(s[1, 1] - s[0, 1]) / 2 for s in segments.get_segments()])
    np.testing.assert_allclose(half, spec["std_error"], rtol=1e-12)
    stick = next(line for line in ax.lines if line.get_gid() == "broken_stick")
    p, total = small.manifest["features"], small.manifest["total_variance"]
    want = [sum(1 / j for j in range(i, p + 1)) / p * total for i in range(1, len(spec) + 1)]
    np.testing.assert_allclose(stick.get_ydata(), want, rtol=1e-12)
    kaiser = next(line for line in ax.lines if line.get_gid() == "kaiser")
    assert list(kaiser.get_ydata()) == [1.0, 1.0]
    marker = next(line for line in ax.lines if line.get_gid() == "k_marker")
    assert list(marker.get_xdata()) == [4.5, 4.5]
    assert fig.axes[1].get_yscale() == "log"
    # the caption states the error bars' size and what they assume
    assert "sqrt(2/n) = 1.3% of each eigenvalue" in caption  # sqrt(2 / 12000) = 0.0129
    assert "independent rows" in caption and "all 8 eigenvalues" in caption


def test_scree_of_a_covariance_pca_has_no_kaiser_line(wide):
    figs, _ = report_figures(wide.directory, wide.manifest)
    assert [line for line in figs["scree"][0].axes[0].lines if line.get_gid() == "kaiser"] == []


def test_scree_of_a_partial_spectrum_says_what_is_not_listed(wide):
    figs, _ = report_figures(wide.directory, wide.manifest)
    fig, caption = figs["scree"]
    spec = wide.spectrum
    assert len(spec) == 3 + 2  # matrix-free: k = 3 retained and the oversample = 2 extra Ritz values
    assert "the 5 eigenvalues the method determined (of 50)" in caption
    note = next(t for t in fig.axes[0].texts if t.get_gid() == "not_listed")
    rest = wide.manifest["total_variance"] - spec["eigenvalue"].sum()
    assert note.get_text().startswith("45 more eigenvalues not determined") and f"{rest:.4g}" in note.get_text()


# -- cumulative --------------------------------------------------------------------------
def test_cumulative_variance_with_levels(small, figures):
    ax = figures["cumulative"][0].axes[0]
    comp = small.spectrum
    line = next(line for line in ax.lines if line.get_gid() == "cumulative")
    np.testing.assert_allclose(line.get_ydata(), comp["cumulative_share"], rtol=1e-15)
    np.testing.assert_allclose([b.get_height() for b in ax.containers[0]], comp["share"], rtol=1e-15)
    colours = [b.get_facecolor() for b in ax.containers[0]]
    assert len({c for c in colours[:4]}) == 1 and colours[4] != colours[0]  # retained bars stand out
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    for level in LEVELS:
        mark = next(line for line in ax.lines if line.get_gid() == f"level_{level:g}")
        assert list(mark.get_ydata()) == [level, level]
        hit = np.flatnonzero(comp["cumulative_share"].to_numpy() >= level)
        where = f"reached at PC{hit[0] + 1}" if hit.size else "not reached by PC8"
        assert f"{level:.0%} ({where})" in legend


# -- loadings --------------------------------------------------------------------------
def test_loading_bars_show_the_largest_loadings_by_name(small, figures):
    fig = figures["loadings"][0]
    loadings = pq.read_table(os.path.join(small.directory, "loadings.parquet")).to_pandas().set_index("feature")
    axes = [ax for ax in fig.axes if ax.get_title().startswith("PC")]
    assert [ax.get_title() for ax in axes] == list(loadings.columns)
    for ax in axes:
        col = loadings[ax.get_title()]
        order = col.abs().sort_values(ascending=False, kind="stable").index[:8]
        assert [t.get_text() for t in ax.get_yticklabels()] == list(order)
        np.testing.assert_allclose([b.get_width() for b in ax.containers[0]], col[order], rtol=1e-15)


def test_heatmap_holds_every_loading_when_d_is_small(small, figures):
    ax = figures["heatmap"][0].axes[0]
    np.testing.assert_array_equal(ax.images[0].get_array(), small.loadings.to_numpy())
    assert [t.get_text() for t in ax.get_yticklabels()] == list(small.loadings.index)
    assert [t.get_text() for t in ax.get_xticklabels()] == list(small.loadings.columns)


def test_loading_panels_share_one_symmetric_scale_and_the_sign_colours(small, figures):
    from matplotlib.colors import to_rgba

    from pcapipe.figures import NEGATIVE, POSITIVE, SIGN_CMAP

    axes = [ax for ax in figures["loadings"][0].axes if ax.get_title().startswith("PC")]
    limits = {ax.get_xlim() for ax in axes}
    assert len(limits) == 1
    (lo, hi), = limits
    assert lo == -hi and hi >= small.loadings.abs().to_numpy().max()
    for ax in axes:
        for bar in ax.containers[0]:
            assert bar.get_facecolor() == to_rgba(POSITIVE if bar.get_width() >= 0 else NEGATIVE)
    # the heatmap uses the same convention: its map is red at the positive end, blue at the negative end
    im = figures["heatmap"][0].axes[0].images[0]
    assert im.get_cmap().name == SIGN_CMAP
    high, low = im.get_cmap()(0.9), im.get_cmap()(0.1)
    assert high[0] > high[2] and to_rgba(POSITIVE)[0] > to_rgba(POSITIVE)[2]
    assert low[2] > low[0] and to_rgba(NEGATIVE)[2] > to_rgba(NEGATIVE)[0]


def test_heatmap_is_kept_up_to_100_features_and_dropped_beyond(wide, monkeypatch):
    import pcapipe.report as report_module

    figs, notes = report_figures(wide.directory, wide.manifest)
    assert set(figs) == {"scree", "cumulative", "loadings", "heatmap", "convergence"}  # 50 features
    assert len(figs["heatmap"][0].axes[0].get_yticklabels()) == 50
    assert any("scatter" in n and "output.scores = false" in n for n in notes)
    monkeypatch.setattr(report_module, "HEATMAP_MAX_FEATURES", 40)
    figs, notes = report_figures(wide.directory, wide.manifest)
    assert "heatmap" not in figs and any("heatmap" in n and "50 features" in n for n in notes)


# -- scatter ---------------------------------------------------------------------------
def test_sample_is_bounded_spread_and_made_of_real_score_rows(small):
    stored = small.scores().compute().set_index("row_id")
    sample = sample_scores(small.directory, ["row_id", "PC1", "PC2"], limit=600)
    assert 0 < len(sample) <= 600
    ids = sample["row_id"].to_numpy()
    assert ids.min() < 1000 and ids.max() >= 11_000  # from the first and the last row group
    assert len(np.unique(ids // 1000)) == 12  # every row group contributes
    np.testing.assert_array_equal(sample[["PC1", "PC2"]].to_numpy(), stored.loc[ids, ["PC1", "PC2"]].to_numpy())
    assert len(sample_scores(small.directory, ["PC1", "PC2"])) == min(SAMPLE_ROWS, 12_000)


def test_scatter_plots_the_sample(small, figures):
    fig, caption = figures["scatter"]
    ax = fig.axes[0]
    offsets = ax.collections[0].get_offsets()
    sample = sample_scores(small.directory, ["PC1", "PC2"])
    np.testing.assert_array_equal(np.asarray(offsets), sample[["PC1", "PC2"]].to_numpy())
    ratio = small.spectrum["share"]
    assert ax.get_xlabel() == f"PC1 ({ratio['PC1']:.1%} of variance)"
    assert f"for {len(sample)} rows" in caption


def test_scatter_coloured_by_a_categorical_column_has_a_legend_and_random_order(small):
    from matplotlib.colors import to_rgba

    figs, _ = report_figures(small.directory, small.manifest, color_by="site")
    ax = figs["scatter"][0].axes[0]
    sample = sample_scores(small.directory, ["PC1", "PC2", "site"])
    legend = ax.get_legend()
    assert legend.get_title().get_text() == "site"
    names = [t.get_text() for t in legend.get_texts()]
    assert names == sorted(_SITES)  # the column's own (sorted) order, not by frequency
    # one collection, points in the order of the seeded permutation: no category drawn last over the rest
    (coll,) = ax.collections
    order = np.random.default_rng(small.manifest["config"]["model"]["seed"]).permutation(len(sample))
    np.testing.assert_array_equal(np.asarray(coll.get_offsets()), sample[["PC1", "PC2"]].to_numpy()[order])
    colour_of = {n: to_rgba(h.get_color()) for n, h in zip(names, legend.legend_handles)}
    got = [tuple(c) for c in coll.get_facecolors()]
    want = [colour_of[v] for v in sample["site"].to_numpy()[order]]
    np.testing.assert_allclose(np.array(got)[:, :3], np.array(want)[:, :3])


@pytest.mark.parametrize("column", ["level", "when"])  # a float column, a timestamp column
def test_scatter_coloured_by_a_numeric_column_has_a_colorbar(small, column):
    figs, _ = report_figures(small.directory, small.manifest, color_by=column)
    fig = figs["scatter"][0]
    ax = fig.axes[0]
    assert ax.get_legend() is None
    assert len(fig.axes) == 2 and fig.axes[1].get_ylabel().startswith(column)  # the colour bar
    if column == "level":
        sample = sample_scores(small.directory, ["PC1", "PC2", "level"])
        order = np.random.default_rng(0).permutation(len(sample))
        np.testing.assert_array_equal(ax.collections[0].get_array(), sample["level"].to_numpy()[order])


def test_unknown_color_column_names_the_keep_columns(small):
    with pytest.raises(InputError, match=r"'nope' is not a keep column.*row_id, site, when, level"):
        build_report(small.directory, small.manifest, color_by="nope")


# -- convergence -----------------------------------------------------------------------
def test_convergence_draws_the_residual_history(wide):
    figs, _ = report_figures(wide.directory, wide.manifest)
    ax = figs["convergence"][0].axes[0]
    history = np.array(wide.manifest["solver"]["residual_history"], dtype=float)
    assert history.shape[0] >= 3 and ax.get_yscale() == "log"
    lines = [line for line in ax.lines if line.get_label().startswith("PC")]
    assert [line.get_label() for line in lines] == ["PC1", "PC2", "PC3"]
    # x = pass over the data: the read into memory with the moments (1), then one per operator application
    m = wide.manifest
    assert m["blocks_cached"].startswith("rows read once") and not m["scores"]["written"]
    assert m["passes_over_data"] == 1 + m["solver"]["operator_applications"]
    assert ax.get_xlabel() == "pass over the data"
    for i, line in enumerate(lines):
        np.testing.assert_array_equal(line.get_xdata(), np.arange(2, history.shape[0] + 2))
        np.testing.assert_array_equal(line.get_ydata(), history[:, i])
    tol = next(line for line in ax.lines if line.get_gid() == "tolerance")
    assert list(tol.get_ydata()) == [wide.manifest["solver"]["tolerance"]] * 2


def test_history_with_gaps_becomes_nan():
    h = history_array([[0.5, None], [1e-3, 2e-2], [0.0, 1e-12]])
    np.testing.assert_array_equal(np.isnan(h), [[False, True], [False, False], [False, False]])
    ys = [line.get_ydata() for line in fig_convergence([[0.5, None], [0.0, 1e-12]]).axes[0].lines]
    assert np.isnan(ys[0][1]) and ys[1][1] == 1e-12  # an exact 0 cannot be drawn on a log axis


# -- summary and page ------------------------------------------------------------------
def test_summary_rows_come_from_the_manifest(small):
    m = small.manifest
    rows = dict(summary_rows(m))
    assert rows["rows (n)"].startswith("12000 used of 12000 read")
    assert rows["features (d)"] == "8"
    assert rows["method"] == f"{m['method']}: {m['method_reason']}"
    assert rows["passes over the data"] == str(m["passes_over_data"])
    assert rows["time"].startswith(f"{m['timings']['total_seconds']:.2f} s")
    assert rows["inputs"].startswith("3 file(s)") and m["inputs"][0]["path"] in rows["inputs"]
    assert f"numpy {np.__version__}" in rows["versions"] and f"pcapipe {pcapipe.__version__}" in rows["versions"]
    assert "correlation PCA" in rows["preprocessing"]


@pytest.fixture(scope="module")
def built(small, tmp_path_factory):
    """A copy of the small run with its report written by write_report (the run stays untouched)."""
    target = tmp_path_factory.mktemp("built") / "run"
    shutil.copytree(small.directory, target)
    res = pcapipe.load(target)
    path = write_report(res, color_by="site")
    return res, path


def test_report_files_and_manifest_entry(built):
    res, path = built
    assert path == os.path.join(res.directory, "report.html")
    entry = json.load(open(os.path.join(res.directory, "manifest.json")))["report"]
    assert entry["requested"] and entry["written"] and entry["color_by"] == "site"
    names = ["scree", "cumulative", "loadings", "heatmap", "scatter", "convergence", "control"]
    assert entry["files"] == ["report.html", *(f"{n}.png" for n in names)]
    for n in names:
        w, h = _png_size(os.path.join(res.directory, f"{n}.png"))
        assert w >= 400 and h >= 250
    assert pcapipe.load(res.directory).manifest["report"] == entry  # still a valid run directory


def test_report_html_is_self_contained(built):
    res, path = built
    page = open(path, encoding="utf-8").read()
    refs = re.findall(r'(?:src|href)\s*=\s*"([^"]*)"', page)
    assert refs and all(r.startswith("data:image/png;base64,") for r in refs)
    assert "<script" not in page and "http://" not in page and "https://" not in page and "@import" not in page
    images = re.findall(r'<figure id="fig-(\w+)"><img src="data:image/png;base64,([^"]+)"', page)
    assert [n for n, _ in images] == ["scree", "cumulative", "loadings", "heatmap", "scatter", "convergence",
                                      "control"]
    for name, data in images:
        with open(os.path.join(res.directory, f"{name}.png"), "rb") as f:
            assert base64.b64decode(data) == f.read()
    for pc, v in res.spectrum["eigenvalue"].items():
        assert f"<th>{pc}</th><td class=\"num\">{sig(v, 4)}</td>" in page
    assert res.manifest["method_reason"] in page


def test_without_matplotlib_nothing_is_written(small, tmp_path, monkeypatch):
    target = tmp_path / "run"
    shutil.copytree(small.directory, target)
    before = sorted(os.listdir(target))
    for name in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # makes `import matplotlib` raise ImportError
    entry = build_report(str(target), copy.deepcopy(small.manifest))
    assert entry == {"requested": True, "written": False, "note": INSTALL_NOTE}
    assert sorted(os.listdir(target)) == before
    with pytest.raises(OutputError, match=re.escape(INSTALL_NOTE)):
        write_report(pcapipe.load(target))


def test_build_report_in_the_engines_unfinished_directory(small, tmp_path):
    """The engine builds the report in ``<dir>.incomplete`` before the manifest exists there."""
    partial = tmp_path / "night.incomplete"
    shutil.copytree(small.directory, partial)
    os.remove(partial / "manifest.json")
    entry = build_report(str(partial), copy.deepcopy(small.manifest))
    assert entry["written"] and entry["color_by"] is None
    assert sorted(entry["files"]) == sorted(n for n in os.listdir(partial) if n.endswith((".png", ".html")))
    page = (partial / "report.html").read_text(encoding="utf-8")
    assert "<title>pcapipe report: night</title>" in page


def test_cli_report_errors_name_the_column(small):
    done = run_cli("report", small.directory, "--color-by", "nope")
    assert done.returncode == 2
    assert done.stderr.startswith("error: --color-by: 'nope' is not a keep column")
    assert "row_id" in done.stderr and "Traceback" not in done.stderr
    assert not os.path.exists(os.path.join(small.directory, "report.html"))


# -- in a real browser -----------------------------------------------------------------
_CHROMIUM = "/usr/bin/chromium"
_PROBE = ("<script>window.addEventListener('load', function () {document.body.setAttribute('data-widths', "
          "Array.from(document.images).map(function (i) {return i.naturalWidth + 'x' + i.naturalHeight;})"
          ".join(' '));});</script>")


def _chromium(tmp_path, *args):
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run",
             f"--user-data-dir={tmp_path / 'profile'}", "--virtual-time-budget=10000"]
    return subprocess.run([_CHROMIUM, *flags, *args], capture_output=True, text=True, timeout=120)


@pytest.mark.skipif(not os.path.exists(_CHROMIUM), reason="Chromium is not installed")
def test_report_renders_in_headless_chromium(built, tmp_path):
    res, path = built
    # the probe goes into a copy: the report itself carries no script
    probe = tmp_path / "probe.html"
    probe.write_text(open(path, encoding="utf-8").read().replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    done = _chromium(tmp_path, "--dump-dom", probe.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    found = re.search(r'data-widths="([^"]*)"', done.stdout)
    assert found, done.stdout[-2000:]
    want = [_png_size(p) for p in (os.path.join(res.directory, f"{n}.png") for n in res.manifest["report"]["figures"])]
    assert found.group(1).split() == [f"{w}x{h}" for w, h in want]
    shot = tmp_path / "page.png"
    done = _chromium(tmp_path, f"--screenshot={shot}", "--window-size=1200,2400", pathlib.Path(path).as_uri())
    assert done.returncode == 0 and _png_size(shot) == (1200, 2400)


# -- scatter colouring rules, on invented samples ---------------------------------------------
def _sample(n, column):
    rng = np.random.default_rng(9)
    return __import__("pandas").DataFrame({"PC1": rng.standard_normal(n), "PC2": rng.standard_normal(n),
                                           "c": column})


def test_many_tied_categories_are_all_coloured_and_the_legend_says_so():
    from pcapipe.figures import fig_scatter

    ids = np.repeat([f"unit-{i:02d}" for i in range(40)], 25)  # 40 categories, all tied at 25 rows
    ax = fig_scatter(_sample(1000, ids), color_by="c").axes[0]
    title = ax.get_legend().get_title().get_text()
    assert "40 categories" in title and "colours repeat every 20" in title
    assert "most frequent" not in title and ax.get_legend().get_texts() == []
    colours = np.unique(np.round(ax.collections[0].get_facecolors()[:, :3], 6), axis=0)
    assert len(colours) == 20  # no point left grey


def test_ordered_categories_keep_their_order_and_get_a_sequential_palette():
    import pandas as pd

    from pcapipe.figures import fig_scatter

    levels = ["low", "medium", "high"]
    values = pd.Categorical(np.array(levels)[np.r_[np.zeros(50, int), np.ones(5, int), np.full(20, 2)]],
                            categories=levels, ordered=True)
    ax = fig_scatter(_sample(75, values), color_by="c").axes[0]
    assert [t.get_text() for t in ax.get_legend().get_texts()] == levels  # not by frequency (50, 20, 5)
    lum = [np.dot(h.get_color()[:3], [0.299, 0.587, 0.114]) for h in ax.get_legend().legend_handles]
    assert lum == sorted(lum)  # viridis: darker to lighter along the order


def test_numeric_keep_column_with_many_values_gets_a_colour_scale():
    from pcapipe.figures import fig_scatter

    fig = fig_scatter(_sample(300, np.arange(300)), color_by="c")  # integers, many distinct: continuous
    assert fig.axes[0].get_legend() is None and fig.axes[1].get_ylabel() == "c"
