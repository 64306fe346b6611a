"""The one score writer: scores of an input file, streamed batch by batch into a Parquet part.

Used by the scores pass of ``run`` (:func:`pcapipe.tasks.scores_task`) and by
``project`` (:mod:`pcapipe.project`), so projecting the training rows gives
the stored scores byte for byte.  Memory is one decoded batch plus its
scores; the part is written under a temporary name and renamed, so a part
that exists is complete.  Row ``i`` of a part is row ``i`` of its input file
(rows dropped for missing values get NaN scores).
"""

from __future__ import annotations

import dataclasses
import os
from typing import Iterator, NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import InputError
from .reader import ReadSpec, batch_to_array, iter_file, one_line, open_file, split_weights
from .monitor import STAT_COLUMNS, MonitorSpec
from .tasks import Transform, score_columns

__all__ = ["score_batch", "out_schema", "score_tables", "write_part", "PartCounts", "alarm_totals"]


def score_batch(batch, spec: ReadSpec, t: Transform, loadings: np.ndarray, where: str,
                x: np.ndarray | None = None, monitor: MonitorSpec | None = None) -> tuple[np.ndarray, dict]:
    """Scores of one Arrow batch (or of ``x``, its decoded and transformed values), and with
    ``monitor`` its t2/spe/alarm columns (a dict of arrays).

    Raises
    ------
    InputError
        A row has a missing value and the run used ``input.missing = "fail"``.
    """
    if x is None:
        x = batch_to_array(batch, spec, where, t.shift, t.inv_scale)
    try:
        return score_columns(x, t, loadings, monitor)
    except ValueError as e:
        j = e.args[0]
        col = spec.columns[0] if spec.vector_column else spec.columns[j]
        raise InputError(f"{where}: column {col!r} has missing or non-finite values; the run used "
                         'input.missing = "fail", so rows with gaps cannot be scored') from e


def out_schema(file_schema: pa.Schema, keep, names, monitor: MonitorSpec | None = None) -> pa.Schema:
    """Keep columns as they are in the input, one float64 column per score name, then t2/spe/alarms."""
    stats = [pa.field(c, pa.bool_() if c.endswith("_alarm") else pa.float64())
             for c in (STAT_COLUMNS if monitor is not None else ())]
    return pa.schema([*(file_schema.field(c) for c in keep), *(pa.field(n, pa.float64()) for n in names), *stats])


def score_tables(path: str, row_groups, spec: ReadSpec, t: Transform, loadings: np.ndarray, names,
                 keep, monitor: MonitorSpec | None = None) -> Iterator[pa.Table]:
    """One Arrow table (keep columns + scores [+ t2/spe/alarms]) per decoded batch of ``path``.

    ``row_groups`` None reads them all.
    """
    yield from _scored(path, row_groups, spec, t, loadings, names, keep, monitor)[1]


def _scored(path: str, row_groups, spec: ReadSpec, t: Transform, loadings: np.ndarray, names, keep,
            monitor: MonitorSpec | None) -> tuple[pa.Schema, Iterator[pa.Table]]:
    """The output schema and the tables of :func:`score_tables`, the file opened once for both."""
    pf = open_file(path)
    schema = out_schema(pf.schema_arrow, keep, names, monitor)
    if row_groups is None:
        row_groups = range(pf.metadata.num_row_groups)
    spec = dataclasses.replace(spec, keep=tuple(keep), threads=1)

    def tables():
        for xb, kept in iter_file(path, row_groups, spec, t.shift, t.inv_scale, with_keep=True, pf=pf):
            s, extra = score_batch(None, spec, t, loadings, path, x=split_weights(xb, spec)[0], monitor=monitor)
            arrays = [kept.column(c) for c in keep] + [pa.array(s[:, j]) for j in range(s.shape[1])]
            arrays += [pa.array(v) for v in extra.values()]
            yield pa.Table.from_arrays(arrays, schema=schema)

    return schema, tables()


class PartCounts(NamedTuple):
    """Rows of one written part and, when it has the monitoring columns, its alarms."""

    rows: int
    t2_alarms: int = 0
    spe_alarms: int = 0
    any_alarm: int = 0


def write_part(path: str, row_groups, spec: ReadSpec, t: Transform, loadings: np.ndarray, names,
               out_path: str, keep, monitor: MonitorSpec | None = None) -> PartCounts:
    """Stream the scores of ``path`` into ``out_path``; returns the rows written and their alarms.

    Counting the alarms as the rows are written spares reading 5,000 parts back
    (measured: as long as the writing itself on 5,000 small files).

    Raises
    ------
    InputError
        The input cannot be decoded, or holds a gap under ``missing = "fail"``.
    OSError
        ``out_path`` cannot be written (the temporary file is removed).
    """
    tmp = out_path + ".tmp"
    counts = np.zeros(4, dtype=np.int64)  # rows, t2, spe, either
    try:
        schema, tables = _scored(path, row_groups, spec, t, loadings, names, keep, monitor)
        # dictionary pages only for keep columns: continuous scores never repeat, and trying a
        # dictionary on them took most of the write time (measured, tests/perf/bench_monitor.py)
        with pq.ParquetWriter(tmp, schema, compression="zstd", use_dictionary=list(keep)) as writer:
            for table in tables:
                writer.write_table(table)
                counts[0] += table.num_rows
                if monitor is not None:
                    a = table.column("t2_alarm").to_numpy(zero_copy_only=False)
                    b = table.column("spe_alarm").to_numpy(zero_copy_only=False)
                    counts[1:] += (a.sum(), b.sum(), (a | b).sum())
    except pa.ArrowException as e:
        _remove(tmp)
        raise InputError(f"{path}: cannot be decoded ({one_line(e)}); the file may be truncated, "
                         "re-copy it") from e
    except BaseException:
        _remove(tmp)
        raise
    os.replace(tmp, out_path)
    return PartCounts(*(int(c) for c in counts))


def _remove(path: str) -> None:
    try:
        os.remove(path)
    except FileNotFoundError:
        pass


def alarm_totals(parts) -> dict:
    """The run's alarm counts from the :class:`PartCounts` of its parts (as ``alarms.count_alarms`` reads them)."""
    total = np.sum([tuple(p) for p in parts], axis=0, dtype=np.int64) if parts else np.zeros(4, np.int64)
    return dict(zip(("rows", "t2_alarms", "spe_alarms", "any_alarm"), (int(v) for v in total)))
