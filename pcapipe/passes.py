"""Passes over the data as small dask graphs with a fixed-order tree reduction.

One pass = one task per task of the :class:`~pcapipe.layout.Layout` (row
groups grouped or alone; groups of files for scores) plus a binary tree of
merges whose shape depends only on the number of tasks, so the floating-point
result is the same whatever scheduler ran it and however many workers there
were.  Task names are deterministic (``pcapipe-<pass>-<token>-<index>``).

Before a pass is built its layout is sized to the memory budget
(:func:`pcapipe.layout.layout_for`): a layout that cannot fit raises
:class:`~pcapipe.errors.InputError` before anything is read.
"""

from __future__ import annotations

import dataclasses
import logging
import operator
import os

import numpy as np
from dask import delayed
from dask.base import tokenize

from . import tasks
from .compute import cores as _cores
from .errors import InputError
from .config import parse_memory
from .layout import AUTO_WORKING_SET, Layout, layout_for
from .moments import Moments, merge_into, tree_merge
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


def _literal(value, name: str):
    """``value`` as a graph literal that dask does not walk.

    dask searches every argument of a task for collections, recursing into
    tuples and dataclasses: 5,000 row groups cost ~0.3 s per pass to walk
    (graph building and again in the scheduler); a named literal costs none.
    """
    return delayed(value, name=name, traverse=False)


def _pieces(name: str, task):
    """The row groups of one layout task, as a graph literal."""
    return _literal(task.pieces, f"{name}-pieces-{task.index}")


def _chunks(items: list, target_rows: int, rows) -> list[list]:
    """Consecutive items grouped until each group holds ``target_rows`` (fixed order)."""
    groups, current, n = [], [], 0
    for item in items:
        current.append(item)
        n += rows(item)
        if n >= target_rows:
            groups.append(current)
            current, n = [], 0
    if current:
        groups.append(current)
    return groups


class DataPasses:
    """Build and run the passes of one plan on one :class:`~pcapipe.compute.Runner`.

    Parameters
    ----------
    plan : Plan
    runner : Runner
    full : bool
        The moments pass assembles the ``d x d`` co-moment (covariance method):
        its accumulator counts in the memory estimate, checked here, before
        anything is read.

    Raises
    ------
    InputError
        The layout cannot fit the memory budget (:func:`pcapipe.layout.layout_for`).
    """

    def __init__(self, plan: Plan, runner, full: bool = False):
        self.plan = plan
        self.runner = runner
        self.count = 0
        self._held = None  # the matrix-free method's raw rows in (worker) memory, one per task (hold)
        self._pieces = plan.pieces()
        self._inputs_token = tokenize(plan.inputs_record())  # once: thousands of files take a while to hash
        d = plan.n_features
        self.moments_layout = self.layout(8 * d * d if full else 8 * 6 * d)
        self.spec = self._spec(self.moments_layout)

    def layout(self, accumulator: int, cached: int = 0) -> Layout:
        """The plan's tasks sized for a pass whose partial result is ``accumulator`` bytes."""
        info = self.runner.info
        shared = info.scheduler in ("threads", "synchronous")
        cores = min(_cores(), self.runner.parallelism) if not self.runner.distributed else 1
        auto = parse_memory(self.runner.cfg.memory_limit) is None
        return layout_for(self._pieces, self.plan.n_features, workers=info.workers,
                          memory_per_worker=info.memory_per_worker, cores=max(1, cores), shared=shared,
                          accumulator=accumulator, cached=cached, weighted=bool(self.plan.row_weight),
                          sliceable=not self.plan.vector_column,
                          working_set=AUTO_WORKING_SET if auto else None)

    def _spec(self, layout: Layout) -> ReadSpec:
        p = self.plan
        return ReadSpec(p.columns, p.vector_column, p.n_features, layout.batch_rows, p.keep,
                        weight_column=p.row_weight, threads=layout.threads, whole_bytes=layout.whole_bytes,
                        sliced_bytes=layout.sliced_bytes)

    def _name(self, kind: str, *args) -> str:
        return f"pcapipe-{kind}-{tokenize(self._inputs_token, self.spec, *args)}"

    def _announce(self, what: str, n: int, unit: str) -> None:
        self.count += 1
        log.info("pass %d: %s, %d %s", self.count, what, n, unit)

    def moments(self, full: bool, missing: str, fill=None) -> Moments:
        """One pass: per-task moments (batches folded in place) merged by Chan-Golub-LeVeque in a fixed tree.

        From the rows held by :meth:`hold` when there are (no read).
        """
        d = self.plan.n_features
        bt = self.runner.blas_threads()
        if self._held is not None:  # impute-mean's second moments: from the rows held, no read
            name = self._name("moments-held", missing, fill)
            parts = [delayed(tasks.rows_moments, pure=True)(x, self.held_spec, missing, fill,
                                                            dask_key_name=f"{name}-{i}")
                     for i, x in enumerate(self._held)]
            # over memory, not the files: like the direct method's refill, not counted as a pass
            log.info("moments again from the rows held in memory, %d tasks", len(parts))
            (m,) = self.runner.compute([tree_reduce(parts, merge_into, name)], "moments", quiet=True)
            return m
        layout = self.layout(8 * d * d if full else 8 * 6 * d)
        spec = self._spec(layout)
        name = self._name("moments", full, missing, fill, layout.batch_rows)
        parts = [delayed(tasks.moments_task, pure=True)(_pieces(name, t), spec, full, missing, fill, bt,
                                                        dask_key_name=f"{name}-{t.index}")
                 for t in layout.tasks]
        self._announce("moments" + (" and covariance" if full else ""), len(parts), "tasks")
        log.info("memory: %s", layout.estimate.describe())
        (m,) = self.runner.compute([tree_reduce(parts, merge_into, name)], "moments", in_flight=layout.in_flight)
        return m

    def held_bytes(self) -> int:
        """Memory :meth:`hold` takes (every row, raw, in :attr:`Plan.held_itemsize`)."""
        width = self.plan.n_features + (1 if self.plan.row_weight else 0)
        return self.plan.held_itemsize * self.plan.n_rows * width

    def hold(self, missing: str) -> Moments | None:
        """One read for the matrix-free method: every row kept in (worker) memory, and the moments of them all.

        Rows are held raw, in their stored precision (float32 when every
        feature is stored so: :attr:`Plan.held_itemsize`), by
        :func:`pcapipe.tasks.read_task`, which also folds their moments
        exactly as the moments pass does; merged in the same fixed tree, they
        are the moments pass's numbers.  Every later :meth:`product` (and
        impute-mean's second :meth:`moments`) then reads no file.  Returns
        None, and holds nothing, when the rows do not fit the memory budget
        next to the product tasks.
        """
        try:
            layout = self.layout(8 * self.plan.n_features * 4, cached=self.held_bytes())
        except InputError:
            return None
        self.held_spec = spec = self._spec(layout)
        dtype = "float32" if self.plan.held_itemsize == 4 else "float64"
        bt = self.runner.blas_threads()
        name = self._name("held", missing, dtype, layout.batch_rows)
        self._announce("read into memory, with moments", len(layout.tasks), "tasks")
        log.info("memory: %s", layout.estimate.describe())
        graph = [delayed(tasks.read_task, pure=True)(_pieces(name, t), spec, t.n_rows, missing, bt, dtype, "C",
                                                     dask_key_name=f"{name}-{t.index}")
                 for t in layout.tasks]
        kept = self.runner.persist(graph, "read")
        self._held = [delayed(operator.getitem, pure=True)(k, 0, dask_key_name=f"{name}-rows-{i}")
                      for i, k in enumerate(kept)]
        parts = [delayed(operator.getitem, pure=True)(k, 1, dask_key_name=f"{name}-moments-{i}")
                 for i, k in enumerate(kept)]
        # merging the small per-task moments is part of the read, not a pass of its own (no bar)
        (m,) = self.runner.compute([tree_reduce(parts, merge_into, f"{name}-merge")], "moments", quiet=True)
        return m

    @property
    def held(self) -> bool:
        return self._held is not None

    def _direct_layout(self) -> Layout:
        """Tasks of the direct method's one read; the memory estimate holds what it keeps.

        Held: every task's raw rows (the weight column too) and the assembled
        preprocessed matrix, ``8 n (d + w) + 8 n d`` bytes; each task folds
        its moments into an ``O(d)`` accumulator.
        """
        d, n = self.plan.n_features, self.plan.n_rows
        width = d + (1 if self.plan.row_weight else 0)
        return self.layout(8 * 6 * d, cached=8 * n * width + 8 * n * d)

    def read_once(self, missing: str) -> tuple[list[np.ndarray], Moments]:
        """One pass for the direct method: every task's raw rows in memory, and the moments of them all.

        Each task returns its rows decoded but untransformed
        (:func:`pcapipe.tasks.read_task`) and its moments, folded batch by
        batch exactly as the moments pass folds them; the moments are merged
        in the same fixed tree (:func:`pcapipe.moments.tree_merge`, the pairing
        of :func:`tree_reduce`), so they are the moments pass's numbers
        whatever ran the tasks.

        Raises
        ------
        InputError
            The rows do not fit the memory budget.
        """
        layout = self._direct_layout()
        self.direct_spec = spec = self._spec(layout)
        bt = self.runner.blas_threads()
        name = self._name("read", missing, layout.batch_rows)
        objs = [delayed(tasks.read_task, pure=True)(_pieces(name, t), spec, t.n_rows, missing, bt,
                                                    dask_key_name=f"{name}-{t.index}")
                for t in layout.tasks]
        self._announce("decode into memory, with moments", len(objs), "tasks")
        log.info("memory: %s", layout.estimate.describe())
        out = self.runner.compute(objs, "decode", in_flight=layout.in_flight)
        return [raw for raw, _ in out], tree_merge([m for _, m in out])

    def rows_moments(self, parts: list[np.ndarray], missing: str, fill: np.ndarray) -> Moments:
        """The moments of the rows :meth:`read_once` holds, with ``fill`` for missing values (no read)."""
        return tree_merge([tasks.rows_moments(raw, self.direct_spec, missing, fill) for raw in parts])

    def preprocessed(self, parts: list[np.ndarray], transform: tasks.Transform, n_used: int) -> np.ndarray:
        """The held raw rows transformed in place and stacked: the ``(n_used, d)`` matrix of the direct method.

        ``parts`` is emptied as it goes (each task's rows are freed once
        copied); a single task's rows are transformed where they are, with no
        copy.  ``n_used`` is the number of rows that enter the covariance
        (``Moments.n``).
        """
        d = self.plan.n_features
        if len(parts) == 1:
            raw = parts.pop()
            x = tasks.preprocess_into(raw, self.direct_spec, transform, np.empty((n_used, d), order="F"))
            return x
        out = np.empty((n_used, d), order="F")
        row = 0
        for i in range(len(parts)):
            x = tasks.preprocess_into(parts[i], self.direct_spec, transform, out[row:])
            if x.base is not out:
                out[row:row + x.shape[0]] = x
            row += x.shape[0]
            parts[i] = None  # free as we go
        parts.clear()
        if row != n_used:
            raise RuntimeError(f"direct method: {row} rows kept where the moments counted {n_used}")
        return out

    def release(self) -> None:
        self._held = None

    def product(self, transform: tasks.Transform, v: np.ndarray) -> np.ndarray:
        """One pass: ``sum_b Xb~^T (Xb~ V)``; from the cache when there is one."""
        bt = self.runner.blas_threads()
        name = self._name("product", transform, v)
        vd = delayed(v, pure=True, name=f"{name}-block")
        if self._held is not None:
            parts = [delayed(tasks.product_held_task, pure=True)(x, self.held_spec, transform, vd, bt,
                                                                 dask_key_name=f"{name}-{i}")
                     for i, x in enumerate(self._held)]
            in_flight = None
        else:
            layout = self.layout(2 * 8 * self.plan.n_features * v.shape[1])
            spec = self._spec(layout)
            parts = [delayed(tasks.product_task, pure=True)(_pieces(name, t), spec, transform, vd, bt,
                                                            dask_key_name=f"{name}-{t.index}")
                     for t in layout.tasks]
            in_flight = layout.in_flight
        self._announce(f"operator on {v.shape[1]} vectors" + (" (held rows)" if self._held else ""),
                       len(parts), "tasks")
        (out,) = self.runner.compute([tree_reduce(parts, tasks.add, name)], "product", in_flight=in_flight)
        return out

    def scores(self, transform: tasks.Transform, loadings: np.ndarray, names, out_dir: str,
               monitor=None) -> list:
        """One pass, small files grouped into one task: writes ``out_dir/part-NNNNN.parquet`` per input file.

        ``monitor`` (a :class:`~pcapipe.monitor.MonitorSpec`) adds the t2, spe
        and alarm columns.  Returns each part's :class:`~pcapipe.scoring.PartCounts`, in file order.
        """
        layout = self.layout(8 * self.plan.n_features * loadings.shape[1])
        spec = self._spec(layout)
        spec = dataclasses.replace(spec, threads=1)
        bt = self.runner.blas_threads()
        name = self._name("scores", transform, loadings, out_dir, monitor)
        os.makedirs(out_dir, exist_ok=True)
        parts = [(f.path, [rg for rg, n in enumerate(f.row_group_rows) if n],
                  os.path.join(out_dir, f"part-{fi:05d}.parquet")) for fi, f in enumerate(self.plan.files)]
        target = max(layout.batch_rows, (32 << 20) // (8 * max(1, self.plan.n_features)))
        rows_of = {f.path: f.n_rows for f in self.plan.files}
        groups = _chunks(parts, target, lambda part: rows_of[part[0]])
        objs = [delayed(tasks.scores_task, pure=True)(_literal(tuple(g), f"{name}-files-{i}"), spec, transform,
                                                      loadings, tuple(names), bt, monitor,
                                                      dask_key_name=f"{name}-{i}")
                for i, g in enumerate(groups)]
        self._announce("scores", len(parts), "files")
        rows = self.runner.compute(objs, "scores", in_flight=layout.in_flight)
        return [r for group in rows for r in group]
