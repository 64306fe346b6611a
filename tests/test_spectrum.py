"""The whole spectrum in spectrum.parquet (issue 12 part 2): every eigenvalue the method
determined, the first k retained, and the variance the listed ones leave unexplained."""

from __future__ import annotations

import numpy as np
import pytest

import pcapipe
from conftest import known_spectrum, make_config, write_parquet

D = 12
SPECTRUM = [9, 6, 4, 3, 1.2, 1.0, 0.8, 0.6, 0.4, 0.3, 0.2, 0.1]  # invented, well separated at the top


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("spectrum")
    x = known_spectrum(2000, D, SPECTRUM, np.random.default_rng(8))
    write_parquet(tmp / "in", x, files=2)
    return tmp, x, np.linalg.eigvalsh(np.cov(x, rowvar=False))[::-1]  # numpy reference, ddof = 1


def _run(data, name, **model):
    tmp, _, _ = data
    cfg = make_config(str(tmp / "in" / "*.parquet"), tmp / name, model={"tolerance": 1e-12, **model})
    return pcapipe.run(cfg)


def test_covariance_method_lists_every_eigenvalue(data):
    _, x, ref = data
    res = _run(data, "cov", components=3, method="covariance")
    spec = res.spectrum
    assert list(spec.index) == [f"PC{i}" for i in range(1, D + 1)]
    np.testing.assert_allclose(spec["eigenvalue"], ref, rtol=1e-10)
    assert spec["retained"].tolist() == [True] * 3 + [False] * (D - 3)
    assert spec["converged"].all()
    trace = np.trace(np.cov(x, rowvar=False))  # numpy
    np.testing.assert_allclose(spec["share"], ref / trace, rtol=1e-10)
    assert spec["cumulative_share"].iloc[-1] == pytest.approx(1.0, rel=1e-12)
    v = res.manifest["variance"]
    assert v["not_listed"] == 0.0 and v["eigenvalues_listed"] == D and v["eigenvalues_retained"] == 3
    assert v["retained"] == pytest.approx(ref[:3].sum(), rel=1e-10)
    assert res.loadings.shape == (D, 3)  # vectors only for the retained ones


def test_matrix_free_lists_the_extra_ritz_values_as_such(data):
    _, x, ref = data
    res = _run(data, "mf", components=3, method="matrix-free", oversample=4)
    spec = res.spectrum
    assert len(spec) == 3 + 4 and spec["retained"].sum() == 3  # k retained + oversample extra Ritz values
    np.testing.assert_allclose(spec["eigenvalue"][:3], ref[:3], rtol=1e-9)
    extra = spec[~spec["retained"]]
    # a Ritz value never exceeds the eigenvalue of the same rank (Cauchy interlacing;
    # Parlett 1998, The Symmetric Eigenvalue Problem, sec. 10.1)
    assert (extra["eigenvalue"].to_numpy() <= ref[3:7] * (1 + 1e-10)).all()
    done = extra["converged"].to_numpy()
    np.testing.assert_allclose(extra["eigenvalue"].to_numpy()[done], ref[3:7][done], rtol=1e-8)
    trace = np.trace(np.cov(x, rowvar=False))
    v = res.manifest["variance"]
    assert v["not_listed"] == pytest.approx(trace - spec["eigenvalue"].sum(), rel=1e-9)
    assert v["not_listed_share"] == pytest.approx(v["not_listed"] / trace, rel=1e-12)
    assert v["not_listed"] > 0.5  # eigenvalues 8-12 of the reference: 1.6 in all, minus sampling noise


def test_a_fraction_of_the_variance_keeps_what_was_found_beyond_k(data):
    _, _, ref = data
    res = _run(data, "frac", components=0.8, method="covariance")
    cum = np.cumsum(ref) / ref.sum()
    k = int(np.searchsorted(cum, 0.8) + 1)
    spec = res.spectrum
    assert spec["retained"].sum() == k == res.manifest["components"] and len(spec) == D
    np.testing.assert_allclose(spec["eigenvalue"], ref, rtol=1e-10)


def test_total_time_counts_the_report(data):
    pytest.importorskip("matplotlib")
    tmp, _, _ = data
    res = pcapipe.run(make_config(str(tmp / "in" / "*.parquet"), tmp / "timed", model={"components": 2},
                                  output={"report": True}))
    t = res.manifest["timings"]
    assert t["report_seconds"] > 0
    parts = sum(v for name, v in t.items() if name != "total_seconds")
    assert t["total_seconds"] == pytest.approx(parts, abs=1e-3)  # each part rounded to 0.1 ms
