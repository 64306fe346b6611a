"""Functions that run inside dask tasks, one call per task of the layout (or group of files).

Each task reads its row groups (:class:`pcapipe.layout.Piece`) with
:func:`pcapipe.reader.iter_task`, batch by batch, and returns a small partial
result: moments folded into one accumulator, a ``d x b`` product, or row
counts after writing scores parts.  Tasks take only plain values (paths,
numbers, arrays, frozen dataclasses), so they run unchanged in a thread, a
process, or on a remote dask worker.
"""

from __future__ import annotations

import numpy as np
import pyarrow.parquet as pq

from .conventions import Transform
from .moments import Accumulator, Moments
from .monitor import MonitorSpec, monitor_columns
from .reader import ReadSpec, iter_task, split_weights

__all__ = ["Transform", "prepare_rows", "score_rows", "score_columns", "moments_task", "product_task", "scores_task",
           "read_task", "rows_moments", "preprocess_into", "product_held_task", "add", "limit_blas", "probe_task"]

_blas_limit = None


def limit_blas(threads: int) -> None:
    """Cap BLAS threads in this worker process once (worker threads x BLAS <= cores)."""
    global _blas_limit
    if threads <= 0 or _blas_limit is not None:
        return
    from threadpoolctl import threadpool_limits

    _blas_limit = threadpool_limits(limits=threads, user_api="blas")


def prepare_rows(x: np.ndarray, t: Transform) -> tuple[np.ndarray, np.ndarray | None]:
    """Apply the missing rule to a transformed batch.

    Returns the rows to use and, when rows were dropped, the mask of the rows
    kept (None otherwise).  Raises ``ValueError`` with the first offending
    column index under ``"fail"`` (the caller names the column).
    """
    if t.missing == "none":
        return x, None
    bad = ~np.isfinite(x)
    if not bad.any():
        return x, None
    if t.missing == "fail":
        raise ValueError(int(np.flatnonzero(bad.any(axis=0))[0]))
    if t.missing == "impute":
        return np.where(bad, t.fill, x), None
    ok = ~bad.any(axis=1)
    return x[ok], ok


def score_rows(x: np.ndarray, t: Transform, loadings: np.ndarray) -> np.ndarray:
    """Scores of a transformed batch; dropped rows get NaN, so row i stays row i."""
    return score_columns(x, t, loadings)[0]


def score_columns(x: np.ndarray, t: Transform, loadings: np.ndarray,
                  monitor: MonitorSpec | None = None) -> tuple[np.ndarray, dict]:
    """Scores of a transformed batch and, with ``monitor``, its t2/spe/alarm columns (row i stays row i)."""
    x, ok = prepare_rows(x, t)
    s = x @ loadings
    extra = monitor_columns(s, x, loadings, monitor, ok) if monitor is not None else {}
    if ok is not None:
        full = np.full((ok.size, loadings.shape[1]), np.nan)
        full[ok] = s
        s = full
    return s, extra


def moments_task(pieces, spec: ReadSpec, full: bool, missing: str, fill=None, blas_threads: int = 0) -> Moments:
    """Moments of one task's rows: every batch folded into one :class:`~pcapipe.moments.Accumulator`."""
    limit_blas(blas_threads)
    acc = Accumulator(spec.n_features, full, missing, fill, weighted=bool(spec.weight_column))
    for xb in iter_task(pieces, spec):
        x, w = split_weights(xb, spec)
        acc.add(x, w)
    return acc.result()


def read_task(pieces, spec: ReadSpec, n_rows: int, missing: str, blas_threads: int = 0,
              dtype: str = "float64", order: str = "F") -> tuple[np.ndarray, Moments]:
    """A task's raw rows in one array, and their moments, from one read.

    The array holds the decoded values untransformed (and, with row weights,
    the weight column last); the moments are exactly those of
    :func:`moments_task` on the same task (the same batches folded in the
    same order), so neither the direct nor the matrix-free method needs a
    separate moments pass.  ``dtype`` is float32 only when every feature is
    stored as float32 (the copy is then exact, at half the memory): the
    matrix-free method holds its rows so, C-ordered for its row slabs
    (:func:`product_held_task`).
    """
    limit_blas(blas_threads)
    width = spec.n_features + (1 if spec.weight_column else 0)
    out = np.empty((n_rows, width), dtype=dtype, order=order)
    acc = Accumulator(spec.n_features, False, missing, None, weighted=bool(spec.weight_column))
    row = 0
    for xb in iter_task(pieces, spec):
        out[row:row + xb.shape[0]] = xb
        row += xb.shape[0]
        acc.add(*split_weights(xb, spec))  # may overwrite xb: its values are already in out
    if row != n_rows:
        raise RuntimeError(f"read_task: {row} rows decoded where the footers promise {n_rows}")
    return out, acc.result()


def rows_moments(raw: np.ndarray, spec: ReadSpec, missing: str, fill: np.ndarray | None) -> Moments:
    """Moments of a task's raw rows held in memory (from :func:`read_task`), ``spec.batch_rows`` at a time.

    For the second moments of ``impute-mean`` (``fill`` known) without a
    second read; each batch is copied, so ``raw`` is left as it is.
    """
    acc = Accumulator(spec.n_features, False, missing, fill, weighted=bool(spec.weight_column))
    for i in range(0, raw.shape[0], spec.batch_rows):
        acc.add(*split_weights(np.array(raw[i:i + spec.batch_rows], dtype=np.float64, order="F"), spec))
    return acc.result()


def preprocess_into(raw: np.ndarray, spec: ReadSpec, t: Transform, out: np.ndarray | None) -> np.ndarray:
    """Transform a task's raw rows in place and return the rows that enter the covariance.

    ``(x - shift) * inv_scale`` in place (the arithmetic the reader fuses into
    its decode, so the values are the same bits), then the missing rule;
    weighted rows become ``sqrt(w) x`` and rows of weight 0 are left out (as
    :func:`product_held_task`).  When rows are left out they are copied into the
    leading rows of ``out`` (which must have room); otherwise the result is
    a view of ``raw``.
    """
    x, w = split_weights(raw, spec)
    x -= t.shift
    if t.inv_scale is not None:
        x *= t.inv_scale
    keep = None
    if t.missing != "none":
        bad = ~np.isfinite(x)
        if t.missing == "impute":
            np.copyto(x, np.broadcast_to(t.fill, x.shape), where=bad)
        elif bad.any():
            keep = ~bad.any(axis=1)
    if w is not None:
        x *= np.sqrt(w)[:, None]
        keep = w > 0 if keep is None else keep & (w > 0)
    if keep is None or keep.all():
        return x
    k = int(keep.sum())
    return np.compress(keep, x, axis=0, out=out[:k])


def _rows(xb: np.ndarray, spec: ReadSpec, t: Transform) -> tuple[np.ndarray, np.ndarray | None]:
    """The rows to use of a decoded batch and their row weights (None when unweighted)."""
    x, w = split_weights(xb, spec)
    x, ok = prepare_rows(x, t)
    if w is not None and ok is not None:
        w = w[ok]
    return x, w


def _product(x: np.ndarray, v: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
    """``X^T diag(w) X V``: the weights scale the n x b product, not the n x d data."""
    y = x @ v
    if w is not None:
        y *= w[:, None]
    return x.T @ y


def product_task(pieces, spec: ReadSpec, t: Transform, v: np.ndarray, blas_threads: int = 0) -> np.ndarray:
    """``sum over batches of Xb~^T (Xb~ V)`` for one task, Xb~ transformed on the fly."""
    limit_blas(blas_threads)
    out = np.zeros((spec.n_features, v.shape[1]))
    for xb in iter_task(pieces, spec, t.shift, t.inv_scale):
        x, w = _rows(xb, spec, t)
        out += _product(x, v, w)
    return out


def _slabs(x: np.ndarray):
    """Row slices of held rows of about 2 MiB of float64 each (cache-sized, whatever d)."""
    step = max(16, (2 << 20) // (8 * max(1, x.shape[1])))
    return (slice(r, r + step) for r in range(0, x.shape[0], step))


def product_held_task(x: np.ndarray, spec: ReadSpec, t: Transform, v: np.ndarray, blas_threads: int = 0) -> np.ndarray:
    """``X~^T (X~ V)`` of a task's raw rows held in memory (:func:`read_task`), one slab at a time.

    Each slab is transformed in float64 (a float32 feature with mean 1e4
    keeps its digits) into a fresh cache-sized array, then the missing rule
    and the row weights apply as in :func:`product_task`.
    """
    limit_blas(blas_threads)
    out = np.zeros((spec.n_features, v.shape[1]))
    for rows in _slabs(x):
        feats, w = split_weights(x[rows], spec)
        xt = np.subtract(feats, t.shift, dtype=np.float64)
        if t.inv_scale is not None:
            xt *= t.inv_scale
        xt, ok = prepare_rows(xt, t)
        if w is not None:
            w = np.array(w if ok is None else w[ok], dtype=np.float64)
        out += _product(xt, v, w)
    return out


def add(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Sum of two partial products (a tree-reduction node)."""
    return a + b


def scores_task(parts, spec: ReadSpec, t: Transform, loadings: np.ndarray, names, blas_threads: int = 0,
                monitor: MonitorSpec | None = None) -> list:
    """Write the scores of several input files, one part each; returns each part's
    :class:`~pcapipe.scoring.PartCounts` (rows written, alarms).

    ``parts`` is a sequence of ``(input path, row groups, part path)``; each
    part is written by :func:`pcapipe.scoring.write_part` (the writer
    ``project`` uses too).  ``monitor`` adds the t2, spe and alarm columns.
    """
    from .scoring import write_part

    limit_blas(blas_threads)
    return [write_part(path, groups, spec, t, loadings, names, out, spec.keep, monitor)
            for path, groups, out in parts]


def probe_task(path: str) -> dict:
    """Open one file's footer on a worker (the cluster can read the input)."""
    import socket

    try:
        rows = pq.ParquetFile(path).metadata.num_rows
        return {"ok": True, "host": socket.gethostname(), "rows": rows}
    except Exception as e:  # reported to the client with the worker's name
        return {"ok": False, "host": socket.gethostname(), "error": f"{type(e).__name__}: {e}"}
