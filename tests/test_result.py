"""Tests of pcapipe.result: correlation loadings, the notebook reprs, and load()'s checks."""

import html.parser
import json
import os

import numpy as np
import pytest

import pcapipe
from conftest import known_spectrum, make_config, write_parquet, retained
from pcapipe.errors import RunDirectoryError

# Column spreads and offsets far apart, so covariance and correlation PCA differ
# and the uncentred second-moment matrix is dominated by the means.
_SPREAD = np.array([1.0, 10.0, 0.1, 3.0, 50.0, 2.0])
_OFFSET = np.array([100.0, -5.0, 3.0, 0.0, 1e3, 7.0])


def _data(rng, n=500):
    return known_spectrum(n, 6, [5, 3, 2, 1, 0.5, 0.2], rng) * _SPREAD + _OFFSET


def _run(tmp_path, x, name="run", vector=None, **model):
    write_parquet(tmp_path / f"in-{name}", x, files=2, vector=vector)
    cfg = make_config(str(tmp_path / f"in-{name}" / "*.parquet"), tmp_path / name,
                      model={"components": 3, **model},
                      input={"vector_column": "emb"} if vector else {})
    return pcapipe.run(cfg)


def _corr_reference(x, scores):
    """Pearson correlation of every data column with every score column (numpy.corrcoef)."""
    k = scores.shape[1]
    return np.array([[np.corrcoef(x[:, j], scores[:, i])[0, 1] for i in range(k)] for j in range(x.shape[1])])


@pytest.mark.parametrize("center, scale, method, vector", [
    (True, True, "covariance", None),      # correlation PCA: loading * sqrt(eigenvalue)
    (True, False, "covariance", None),     # covariance PCA: loading * sqrt(eigenvalue) / std
    (False, False, "matrix-free", None),   # uncentred: eigenvectors of the second-moment matrix
    (False, True, "covariance", None),     # uncentred and scaled
    (True, False, "matrix-free", "fixed"),  # one vector column instead of scalar columns
])
def test_correlation_loadings_match_corrcoef_of_data_and_scores(tmp_path, rng, center, scale, method, vector):
    x = _data(rng)
    res = _run(tmp_path, x, vector=vector, center=center, scale=scale, method=method)
    scores = res.scores().compute()[list(res.loadings.columns)].to_numpy()
    got = res.correlation_loadings
    assert list(got.index) == list(res.loadings.index) and list(got.columns) == list(res.loadings.columns)
    # 1e-9: the solver's relative residual tolerance; the differences seen are 1e-15 .. 5e-11
    np.testing.assert_allclose(got.to_numpy(), _corr_reference(x, scores), rtol=0, atol=1e-9)


def test_correlation_loadings_closed_forms(tmp_path, rng):
    x = _data(rng)
    corr = _run(tmp_path, x, name="corr", scale=True)
    lam = retained(corr)
    # correlation PCA: the standardised features have unit variance (Jolliffe 2002, sec. 2.3, from memory)
    np.testing.assert_allclose(corr.correlation_loadings.to_numpy(), corr.loadings.to_numpy() * np.sqrt(lam),
                               rtol=1e-12)
    cov = _run(tmp_path, x, name="cov", scale=False)
    lam = retained(cov)
    std = cov.features["std"].to_numpy()[:, None]
    np.testing.assert_allclose(cov.correlation_loadings.to_numpy(), cov.loadings.to_numpy() * np.sqrt(lam) / std,
                               rtol=1e-12)
    assert not np.allclose(cov.correlation_loadings.to_numpy(), cov.loadings.to_numpy() * np.sqrt(lam))


def test_correlation_loadings_with_rows_dropped_for_missing_values(tmp_path, rng):
    x = _data(rng)
    x[rng.random(x.shape) < 0.03] = np.nan
    write_parquet(tmp_path / "in", x, files=2)
    res = pcapipe.run(make_config(str(tmp_path / "in" / "*.parquet"), tmp_path / "run",
                                  model={"components": 3}, input={"missing": "drop-rows"}))
    scores = res.scores().compute()[list(res.loadings.columns)].to_numpy()
    ok = np.isfinite(x).all(axis=1)
    assert np.isnan(scores[~ok]).all()
    np.testing.assert_allclose(res.correlation_loadings.to_numpy(), _corr_reference(x[ok], scores[ok]),
                               rtol=0, atol=1e-9)  # the solver tolerance, as above


def test_constant_feature_has_no_correlation(tmp_path, rng):
    x = _data(rng)
    x[:, 2] = 4.0
    res = _run(tmp_path, x, scale=False)
    r = res.correlation_loadings
    assert r.loc["f2"].isna().all()
    assert np.isfinite(r.drop(index="f2").to_numpy()).all()


# -- reprs ---------------------------------------------------------------------
class _Cells(html.parser.HTMLParser):
    """Collects the text of each table row of an HTML fragment."""

    def __init__(self):
        super().__init__()
        self.rows, self._row, self._text = [], None, None

    def handle_starttag(self, tag, attrs):
        if tag == "tr":
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._text = ""

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._text is not None:
            self._row.append(self._text)
            self._text = None
        elif tag == "tr":
            self.rows.append(self._row)
            self._row = None

    def handle_data(self, data):
        if self._text is not None:
            self._text += data


def test_repr_is_one_short_line_with_the_spectrum(tmp_path, rng):
    x = known_spectrum(400, 8, [8, 6, 5, 4, 3, 2, 1, 0.5], rng)
    res = _run(tmp_path, x, components=7, scale=False)
    text = repr(res)
    assert "\n" not in text and len(text) < 400
    assert "400 rows x 8 features" in text and "7 components" in text and "covariance PCA" in text
    ratio = res.spectrum["share"]
    for pc in ("PC1", "PC5"):
        assert f"{pc} {ratio[pc]:.1%}" in text
    assert "PC6" not in text and "(2 more)" in text
    assert f"total {retained(res, 'cumulative_share')[-1]:.1%}" in text


def test_repr_html_table_matches_components_and_escapes_the_path(tmp_path, rng):
    x = _data(rng)
    odd = tmp_path / "a<b&c"
    odd.mkdir()
    res = _run(odd, x, scale=True)
    page = res._repr_html_()
    assert "a&lt;b&amp;c" in page and "a<b&c" not in page
    parser = _Cells()
    parser.feed(page)
    header, *rows = parser.rows
    assert header == ["component", "eigenvalue", "share", "cumulative", "residual", "std error", "retained"]
    assert [r[0] for r in rows] == list(res.spectrum.index)
    for r, (_, c) in zip(rows, res.spectrum.iterrows()):
        assert float(r[1]) == pytest.approx(c["eigenvalue"], rel=5e-4)  # 4 significant digits
        assert float(r[2].rstrip("%")) / 100 == pytest.approx(c["share"], rel=5e-3)  # 3
        assert float(r[3].rstrip("%")) / 100 == pytest.approx(c["cumulative_share"], rel=5e-4)  # 4
        assert r[6] == ("yes" if c["retained"] else "")


# -- load() keeps refusing damaged run directories ---------------------------------
def test_load_refuses_edited_or_unknown_run_directories(tmp_path, rng):
    res = _run(tmp_path, _data(rng))
    again = pcapipe.load(res.directory)
    assert again.correlation_loadings.shape == (6, 3)
    manifest = os.path.join(res.directory, "manifest.json")
    with open(manifest) as f:
        m = json.load(f)
    with open(manifest, "w") as f:
        json.dump({**m, "features": 7}, f)
    with pytest.raises(RunDirectoryError, match="loadings.parquet"):
        pcapipe.load(res.directory)
    with open(manifest, "w") as f:
        json.dump({**m, "format_version": 999}, f)
    with pytest.raises(RunDirectoryError, match="format_version 999"):
        pcapipe.load(res.directory)
    with open(manifest, "w") as f:
        json.dump(m, f)
    os.remove(os.path.join(res.directory, "features.parquet"))
    with pytest.raises(RunDirectoryError, match="features.parquet is missing"):
        pcapipe.load(res.directory)
