"""Passes over the data as small dask graphs with a fixed-order tree reduction.

One pass = one task per block (or per file, for scores) plus a binary tree of
merges whose shape depends only on the number of blocks, so the floating-point
result is the same whatever scheduler ran it and however many workers there
were.  Task names are deterministic (``pcapipe-<pass>-<token>-<index>``).
"""

from __future__ import annotations

import logging
import os

import numpy as np
from dask import delayed
from dask.base import tokenize

from . import tasks
from .moments import Moments, merge
from .plan import Plan
from .reader import ReadSpec

__all__ = ["DataPasses", "tree_reduce"]

log = logging.getLogger("pcapipe")


def tree_reduce(parts: list, fn, prefix: str):
    """Combine delayed ``parts`` pairwise, level by level, left to right."""
    level = 0
    while len(parts) > 1:
        parts = [
            delayed(fn, pure=True)(parts[i], parts[i + 1], dask_key_name=f"{prefix}-tree{level}-{i // 2}")
            if i + 1 < len(parts) else parts[i]
            for i in range(0, len(parts), 2)
        ]
        level += 1
    return parts[0]


class DataPasses:
    """Build and run the passes of one plan on one :class:`~pcapipe.compute.Runner`.

    Parameters
    ----------
    plan : Plan
    runner : Runner
    batch_rows : int
        Rows decoded at a time inside a task (bounds task memory).
    """

    def __init__(self, plan: Plan, runner, batch_rows: int):
        self.plan = plan
        self.runner = runner
        self.spec = ReadSpec(plan.columns, plan.vector_column, plan.n_features, batch_rows, plan.keep,
                             weight_column=plan.row_weight)
        self.count = 0
        self._cache = None
        self._cache_transform = None

    def _name(self, kind: str, *args) -> str:
        return f"pcapipe-{kind}-{tokenize(self.plan.inputs_record(), self.spec, *args)}"

    def _announce(self, what: str, n: int, unit: str) -> None:
        self.count += 1
        log.info("pass %d: %s, %d %s", self.count, what, n, unit)

    def moments(self, full: bool, missing: str, fill=None) -> Moments:
        """One pass: per-block moments merged by Chan-Golub-LeVeque in a fixed tree."""
        bt = self.runner.blas_threads()
        name = self._name("moments", full, missing, fill)
        spec = self.spec
        parts = [delayed(tasks.moments_task, pure=True)(b.path, b.row_group, spec, full, missing, fill, bt,
                                                        dask_key_name=f"{name}-{b.index}")
                 for b in self.plan.blocks]
        self._announce("moments" + (" and covariance" if full else ""), len(parts), "blocks")
        (m,) = self.runner.compute([tree_reduce(parts, merge, name)], "moments")
        return m

    def cache(self, transform: tasks.Transform) -> None:
        """Decode every block once and keep it in (worker) memory for later products."""
        bt = self.runner.blas_threads()
        name = self._name("decoded", transform)
        objs = [delayed(tasks.decode_task, pure=True)(b.path, b.row_group, self.spec, transform, bt,
                                                      dask_key_name=f"{name}-{b.index}")
                for b in self.plan.blocks]
        self._announce("decode into worker memory", len(objs), "blocks")
        self._cache = self.runner.persist(objs)
        self._cache_transform = transform

    @property
    def cached(self) -> bool:
        return self._cache is not None

    def release(self) -> None:
        self._cache = None

    def product(self, transform: tasks.Transform, v: np.ndarray) -> np.ndarray:
        """One pass: ``sum_b Xb~^T (Xb~ V)``; from the cache when there is one."""
        bt = self.runner.blas_threads()
        name = self._name("product", transform, v)
        vd = delayed(v, pure=True, name=f"{name}-block")
        if self._cache is not None and transform is self._cache_transform:
            parts = [delayed(tasks.product_cached_task, pure=True)(x, vd, bt, dask_key_name=f"{name}-{i}")
                     for i, x in enumerate(self._cache)]
        else:
            parts = [delayed(tasks.product_task, pure=True)(b.path, b.row_group, self.spec, transform, vd, bt,
                                                            dask_key_name=f"{name}-{b.index}")
                     for b in self.plan.blocks]
        self._announce(f"operator on {v.shape[1]} vectors" + (" (cached blocks)" if self._cache else ""),
                       len(parts), "blocks")
        (out,) = self.runner.compute([tree_reduce(parts, tasks.add, name)], "product")
        return out

    def scores(self, transform: tasks.Transform, loadings: np.ndarray, names, out_dir: str,
               monitor=None) -> list[int]:
        """One pass, one task per input file: writes ``out_dir/part-NNNNN.parquet``.

        ``monitor`` (a :class:`~pcapipe.monitor.MonitorSpec`) adds the t2, spe
        and alarm columns.
        """
        bt = self.runner.blas_threads()
        name = self._name("scores", transform, loadings, out_dir, monitor)
        os.makedirs(out_dir, exist_ok=True)
        objs = []
        for fi, f in enumerate(self.plan.files):
            groups = [rg for rg, n in enumerate(f.row_group_rows) if n]
            out = os.path.join(out_dir, f"part-{fi:05d}.parquet")
            objs.append(delayed(tasks.scores_task, pure=True)(f.path, groups, self.spec, transform, loadings,
                                                              tuple(names), out, bt, monitor,
                                                              dask_key_name=f"{name}-{fi}"))
        self._announce("scores", len(objs), "files")
        rows = self.runner.compute(objs, "scores")
        return list(rows)
