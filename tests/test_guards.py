"""Guard rails: row ids and a dominant feature, from footers and from moments."""

from __future__ import annotations

import os
from types import SimpleNamespace

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from pcapipe.guards import FooterStats, moment_warnings


def _stats(tmp_path, tables, row_group):
    paths = []
    for i, t in enumerate(tables):
        paths.append(os.path.join(tmp_path, f"p{i}.parquet"))
        pq.write_table(t, paths[-1], row_group_size=row_group)
    stats = FooterStats(tables[0].schema, [n for n in tables[0].schema.names])
    for p in paths:
        stats.add(pq.ParquetFile(p).metadata)
    return stats, sum(t.num_rows for t in tables)


@pytest.mark.parametrize("columns, row_group, expected", [
    # 0..99 in four increasing row groups: proven distinct from the footers alone
    ([{"id": np.arange(100)}], 25, [("id", 0, 99, True)]),
    # the same ids in one row group: only a candidate (the run checks the variance)
    ([{"id": np.arange(100)}], 100, [("id", 0, 99, False)]),
    # ids restarting in each file: not unique over the data
    ([{"id": np.arange(50)}, {"id": np.arange(50)}], 25, []),
    # small integer codes: a row group spans fewer values than rows
    ([{"id": np.arange(100) % 7}], 25, []),
    # floats are never ids
    ([{"id": np.arange(100.0)}], 25, []),
])
def test_row_id_candidates_from_footers(tmp_path, columns, row_group, expected):
    stats, n = _stats(tmp_path, [pa.table(c) for c in columns], row_group)
    assert list(stats.row_ids(n)) == expected


@pytest.mark.parametrize("n", [2, 7, 1000])
def test_variance_of_distinct_consecutive_integers(n):
    # the run's confirmation: sample variance (ddof = 1) of N distinct consecutive integers is N (N + 1) / 12
    # (from memory; checked here against numpy)
    x = np.random.default_rng(n).permutation(n) + 5
    assert np.isclose(x.var(ddof=1), n * (n + 1) / 12, rtol=1e-12)


def _moments(x):
    return SimpleNamespace(n=x.shape[0], mean=x.mean(axis=0), variance=lambda: x.var(axis=0, ddof=1), weight=None)


def test_moment_warnings(tmp_path):
    rng = np.random.default_rng(0)
    ids = rng.permutation(200)
    x = np.column_stack([ids, rng.standard_normal((200, 2))]).astype(float)
    plan = SimpleNamespace(features=("id", "a", "b"), row_ids=(("id", 0, 199, False),))
    (text,) = moment_warnings(plan, _moments(x), scale=False, center=True)
    assert "'id' looks like a row id" in text and "distinct by the moments" in text
    # the same range with repeated values is not an id; it still dominates the variance
    x[:2, 0] = 0
    x[2:4, 0] = 199
    (text,) = moment_warnings(plan, _moments(x), scale=False, center=True)
    share = x[:, 0].var(ddof=1) / x.var(axis=0, ddof=1).sum()
    assert f"'id' holds {share:.0%} of the total variance" in text
    # scaled: no warning about the variance
    assert moment_warnings(plan, _moments(x), scale=True, center=True) == []
