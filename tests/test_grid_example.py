"""The gridded-field example (configs/grid.toml, data_demo/make_grid.py): latitude and month-length weights."""

from __future__ import annotations

import os
import sys

import numpy as np
import pandas as pd

import pcapipe
from conftest import ROOT, retained

sys.path.insert(0, os.path.join(ROOT, "data_demo"))
import make_grid  # noqa: E402


def _run(tmp_path, name, *overrides):
    sets = [f"input.paths={tmp_path / 'grid'}/*.parquet", f"output.directory={tmp_path / name}",
            "output.report=false", *overrides]
    return pcapipe.run(os.path.join(ROOT, "configs", "grid.toml"), overrides=sets)


def test_grid_example_is_area_weighted(tmp_path):
    make_grid.write_grid(str(tmp_path / "grid"), months=120, files=3)
    table = pd.read_csv(tmp_path / "grid" / "grid_weights.csv")
    lat = np.repeat(make_grid.LATITUDES, make_grid.LONGITUDES.size)
    # sqrt(cos(latitude)) per grid point (Hannachi, Jolliffe & Stephenson 2007, sec. 3.1)
    np.testing.assert_allclose(table["weight"], np.sqrt(np.cos(np.radians(lat))), rtol=1e-15)
    weighted = _run(tmp_path, "w", f"model.feature_weights={tmp_path / 'grid' / 'grid_weights.csv'}")
    plain = _run(tmp_path, "u", "model.feature_weights=")

    x, days = make_grid.make_rows(120, 2007)
    f = table["weight"].to_numpy()
    c = np.cov(x, rowvar=False, fweights=days)  # month lengths are frequency weights (numpy docs, cov)
    vals, vecs = np.linalg.eigh(np.diag(f) @ c @ np.diag(f))
    np.testing.assert_allclose(retained(weighted), vals[::-1][:3], rtol=1e-10)
    np.testing.assert_allclose(np.abs(weighted.loadings.to_numpy().T @ vecs[:, ::-1][:, :3]), np.eye(3), atol=1e-7)

    polar, tropical = make_grid.patterns()
    def share(res, pattern):  # |cosine| between PC1 and a planted pattern
        v = res.loadings["PC1"].to_numpy()
        return abs(v @ pattern) / np.linalg.norm(pattern)
    # the crowded polar points win without weights; area weighting puts the tropical dipole first
    assert share(plain, polar) > 0.95 and share(weighted, tropical) > 0.95
    assert weighted.manifest["weights"]["row_weight"] == "days"
    assert weighted.manifest["weights"]["sum"] == days.sum()
