"""Operators and the cost model behind model.method = "auto"."""

from __future__ import annotations

import numpy as np
import pytest

import pcapipe
from conftest import make_config, write_parquet
from pcapipe.operators import DenseOperator, MatrixFreeOperator, choose_method

GiB = 1 << 30


@pytest.mark.parametrize(
    "n, d, memory, expected",
    [
        (1_000_000, 256, 4 * GiB, "covariance"),     # tall: one Gram pass beats ~14 passes
        (200_000, 2048, 4 * GiB, "covariance"),      # 32 MiB matrix fits; n d^2 still cheaper than 14 x 4ndb
        (200_000, 8192, 4 * GiB, "matrix-free"),     # 512 MiB matrix: fits, but the passes are cheaper
        (100_000, 100_000, 16 * GiB, "matrix-free"),  # 80 GB matrix: cannot be formed at all
        (50_000, 4096, 256 << 20, "matrix-free"),    # 128 MiB matrix > half of a 256 MiB worker
    ],
)
def test_auto_picks_by_cost_and_memory(n, d, memory, expected):
    choice = choose_method("auto", n, d, 16, n * d * 8, memory, 2, 2)
    assert choice.method == expected, choice.reason
    assert choice.estimates["gram_bytes"] == 8 * d * d
    assert choice.reason


@pytest.mark.parametrize("method", ["covariance", "matrix-free"])
def test_explicit_method_is_obeyed_and_recorded(method):
    choice = choose_method(method, 10, 100_000, 16, 1, 1 << 20, 1, 1)
    assert choice.method == method and "in the config" in choice.reason


def test_auto_choice_is_recorded_in_the_manifest(tmp_path, rng):
    write_parquet(tmp_path / "d", rng.standard_normal((300, 6)))
    res = pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 2}))
    m = res.manifest
    assert m["method"] == "covariance" and "fits" in m["method_reason"]
    assert set(m["method_estimates"]) >= {"covariance_seconds", "matrix_free_seconds", "gram_bytes"}


def test_auto_goes_matrix_free_when_memory_is_short(tmp_path, rng):
    # 600 features: the 2.9 MB matrix (x3) does not fit half of a 16 MiB worker (less than that would
    # not hold pyarrow's buffers for 600 columns plus a batch: the layout would be refused)
    x = rng.standard_normal((700, 600))
    x[:, :3] *= [30.0, 20.0, 10.0]  # two clear leading components, so the iteration is short
    write_parquet(tmp_path / "d", x, row_group=350)
    res = pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 2},
                                  compute={"memory_limit": "16MiB", "scheduler": "synchronous"}))
    assert res.manifest["method"] == "matrix-free" and "more than half" in res.manifest["method_reason"]


def test_dense_and_matrix_free_operators_agree(rng):
    x = rng.standard_normal((500, 7)) @ rng.standard_normal((7, 7))
    xc = x - x.mean(axis=0)
    c = xc.T @ xc / (x.shape[0] - 1)
    dense = DenseOperator(c)
    free = MatrixFreeOperator(lambda v: xc.T @ (xc @ v), x.shape[0], np.trace(c), 7)
    v = rng.standard_normal((7, 3))
    np.testing.assert_allclose(free.matmat(v), dense.matmat(v), rtol=1e-12)
    assert free.passes == 1 and dense.trace == pytest.approx(free.trace, rel=1e-15)
