"""Scores for new rows with a finished run's preprocessing and loadings.

The same decode and transform as the scores pass (:mod:`pcapipe.reader`,
:class:`pcapipe.tasks.Transform`), so projecting the training rows gives the
stored scores.  Parquet inputs are streamed in batches inside one dask task
per file, so memory is bounded by a batch of features plus the file's scores
(``k`` columns), never by the file's feature data.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import InputError, OutputError
from .plan import resolve_inputs
from .reader import ReadSpec, batch_rows_for, batch_to_array
from .monitor import STAT_COLUMNS, MonitorSpec
from .tasks import Transform, score_columns
from .weighted import input_scale

__all__ = ["Projector", "projector_for", "project_frame", "project_paths", "project_to_directory"]


_MISSING = {"fail": "fail", "drop-rows": "drop", "impute-mean": "impute"}


@dataclass(frozen=True)
class Projector:
    """Everything a task needs to score rows, as plain values (ships to any dask worker)."""

    spec: ReadSpec
    transform: Transform
    loadings: np.ndarray
    names: tuple[str, ...]
    monitor: MonitorSpec | None = None  # None for a run written before control limits existed


def projector_for(result) -> Projector:
    """The stored preprocessing (shift, scale, missing rule) and loadings of ``result``."""
    m = result.manifest
    cfg_in, model = m["config"]["input"], m["config"]["model"]
    f = result.features
    d = len(f)
    vec = cfg_in.get("vector_column", "")
    columns = (vec,) if vec else tuple(result.loadings.index)
    batch = batch_rows_for(d)
    spec = ReadSpec(columns, vec, d, batch, tuple(cfg_in.get("keep", ())))
    shift = f["mean"].to_numpy() if model.get("center", True) else np.zeros(d)
    inv = 1.0 / f["scale_used"].to_numpy() if model.get("scale", False) else None
    if "weight" in f and model.get("feature_weights"):  # the run's feature weights, as in its scores pass
        inv = input_scale(inv, f["weight"].to_numpy())
    # impute-mean puts the mean in place of a gap; after centring that is 0, without centring it is not
    fill = (f["mean"].to_numpy() - shift) * (inv if inv is not None else 1.0)
    transform = Transform(shift, inv, _MISSING[cfg_in.get("missing", "fail")], fill)
    monitor = None
    if m.get("limits"):
        from .alarms import monitor_spec

        monitor = monitor_spec(m["limits"], result._retained()["eigenvalue"].to_numpy(), training=False)
    return Projector(spec, transform, np.ascontiguousarray(result.loadings.to_numpy()),
                     tuple(result.loadings.columns), monitor)


def _is_numeric(t: pa.DataType) -> bool:
    return pa.types.is_integer(t) or pa.types.is_floating(t)


def _check_schema(pr: Projector, schema: pa.Schema, where: str) -> None:
    """Every feature column present, with a numeric type (a list of numbers for a vector column)."""
    missing = [c for c in pr.spec.columns if schema.get_field_index(c) < 0]
    if missing:
        shown = ", ".join(repr(c) for c in missing[:5]) + (f" and {len(missing) - 5} more" if len(missing) > 5 else "")
        raise InputError(f"{where}: feature column(s) {shown} of the run are missing ({len(missing)} of "
                         f"{len(pr.spec.columns)}); projection needs every column the run was fitted on")
    for name in pr.spec.columns:
        t = schema.field(name).type
        if pr.spec.vector_column:
            ok = (pa.types.is_list(t) or pa.types.is_large_list(t) or pa.types.is_fixed_size_list(t)) \
                and _is_numeric(t.value_type)
        else:
            ok = _is_numeric(t)
        if not ok:
            need = "a list of numbers" if pr.spec.vector_column else "a number type"
            raise InputError(f"{where}: column {name!r} has type {t}; the run needs {need} there")


def _scores_of(pr: Projector, batch, where: str) -> tuple[np.ndarray, dict]:
    """Scores of one batch and the monitoring columns; rows dropped for missing values get NaN."""
    t = pr.transform
    x = batch_to_array(batch, pr.spec, where, t.shift, t.inv_scale)
    try:
        return score_columns(x, t, pr.loadings, pr.monitor)
    except ValueError as e:
        j = e.args[0]
        col = pr.spec.columns[0] if pr.spec.vector_column else pr.spec.columns[j]
        raise InputError(f"{where}: column {col!r} has missing or non-finite values; the run used "
                         'input.missing = "fail", so rows with gaps cannot be scored') from e


def _keep_for(pr: Projector, names, keep) -> list[str]:
    if keep is None:
        return [c for c in pr.spec.keep if c in names]
    keep = [keep] if isinstance(keep, str) else list(keep)
    missing = [c for c in keep if c not in names]
    if missing:
        raise InputError(f"project: keep column {missing[0]!r} is not in the data to project; "
                         f"columns are {', '.join(map(str, list(names)[:10]))}")
    return keep


def project_frame(result, df: pd.DataFrame, keep=None) -> pd.DataFrame:
    """Project the rows of a DataFrame; its index is kept, keep columns are copied as they are."""
    pr = projector_for(result)
    try:
        table = pa.Table.from_pandas(df[[c for c in pr.spec.columns if c in df.columns]], preserve_index=False)
    except (pa.ArrowException, TypeError, ValueError) as e:
        raise InputError(f"project: the feature columns cannot be read as numbers ({e})") from e
    _check_schema(pr, table.schema, "project")
    keep = _keep_for(pr, list(df.columns), keep)
    s, extra = _scores_of(pr, table, "project")
    out = pd.DataFrame(s, index=df.index, columns=list(pr.names))
    for name, values in extra.items():
        out[name] = values
    for name in reversed(keep):
        out.insert(0, name, df[name])
    return out


def _out_schema(pr: Projector, schema: pa.Schema, keep) -> pa.Schema:
    stats = [pa.field(c, pa.bool_() if c.endswith("_alarm") else pa.float64())
             for c in (STAT_COLUMNS if pr.monitor is not None else ())]
    return pa.schema([*(schema.field(c) for c in keep), *(pa.field(n, pa.float64()) for n in pr.names), *stats])


def _iter_tables(pr: Projector, path: str, keep):
    """Stream one file: an Arrow table (keep columns + scores) per decoded batch."""
    pf = pq.ParquetFile(path)
    out_schema = _out_schema(pr, pf.schema_arrow, keep)
    cols = list(dict.fromkeys([*pr.spec.columns, *keep]))
    try:
        for batch in pf.iter_batches(batch_size=pr.spec.batch_rows, columns=cols, use_threads=False):
            s, extra = _scores_of(pr, batch, path)
            arrays = [batch.column(c) for c in keep] + [pa.array(s[:, j]) for j in range(s.shape[1])]
            arrays += [pa.array(v) for v in extra.values()]
            yield pa.Table.from_arrays(arrays, schema=out_schema)
    except pa.ArrowException as e:
        raise InputError(f"{path}: cannot be decoded ({e}); the file may be truncated, re-copy it") from e


def _project_file(pr: Projector, path: str, keep) -> pd.DataFrame:
    tables = list(_iter_tables(pr, path, keep))
    if not tables:
        return _out_schema(pr, pq.ParquetFile(path).schema_arrow, keep).empty_table().to_pandas()
    return pa.concat_tables(tables).to_pandas()


def _paths(data) -> list[str]:
    patterns = [data] if isinstance(data, (str, os.PathLike)) else list(data)
    if not patterns:
        raise InputError("project: no input given; pass Parquet files, directories or globs")
    found = []
    for p in patterns:
        try:
            found += resolve_inputs([os.fspath(p)], os.getcwd())
        except InputError as e:
            raise InputError(f"project: {os.fspath(p)!r} matches no Parquet file (relative paths resolve "
                             f"against {os.getcwd()})") from e
    return list(dict.fromkeys(found))


def _checked_paths(pr: Projector, data) -> tuple[list[str], list[str]]:
    """Resolve and check every file's footer before any task runs; returns (paths, common columns)."""
    paths = _paths(data)
    common = None
    for path in paths:
        try:
            schema = pq.ParquetFile(path).schema_arrow
        except (OSError, pa.ArrowException) as e:
            raise InputError(f"{path}: not a readable Parquet file ({e})") from e
        _check_schema(pr, schema, path)
        common = [c for c in (common if common is not None else schema.names) if c in schema.names]
    return paths, common


def project_paths(result, data, keep=None):
    """Project Parquet files lazily: a dask DataFrame with one partition per file, row order kept."""
    import dask
    import dask.dataframe as dd

    pr = projector_for(result)
    paths, names = _checked_paths(pr, data)
    keep = _keep_for(pr, names, keep)
    meta = _out_schema(pr, pq.ParquetFile(paths[0]).schema_arrow, keep).empty_table().to_pandas()
    parts = [dask.delayed(_project_file)(pr, p, keep)
             for i, p in enumerate(paths)]
    return dd.from_delayed(parts, meta=meta, verify_meta=False)


def _write_part(pr: Projector, path: str, keep, target: str) -> str:
    """Stream one file's scores into ``target`` (written under a temporary name, then renamed)."""
    tmp = target + ".tmp"
    schema = _out_schema(pr, pq.ParquetFile(path).schema_arrow, keep)
    with pq.ParquetWriter(tmp, schema, compression="zstd") as writer:
        for table in _iter_tables(pr, path, keep):
            writer.write_table(table)
    os.replace(tmp, target)
    return target


def project_to_directory(result, data, out_dir: str, keep=None, scheduler: str = "threads") -> list[str]:
    """Write ``part-NNNNN.parquet`` under ``out_dir``, one per input file in sorted path order.

    Raises
    ------
    InputError
        An input matches nothing, is not Parquet, or lacks a feature column.
    OutputError
        ``out_dir`` already holds part files (they would mix with the new
        ones), or cannot be created.
    """
    import dask

    pr = projector_for(result)
    paths, names = _checked_paths(pr, data)
    keep = _keep_for(pr, names, keep)
    if os.path.isdir(out_dir) and any(n.startswith("part-") and n.endswith(".parquet") for n in os.listdir(out_dir)):
        raise OutputError(f"--out: {out_dir} already holds part-*.parquet files; remove them or choose "
                          "another directory")
    try:
        os.makedirs(out_dir, exist_ok=True)
    except OSError as e:
        raise OutputError(f"--out: cannot create {out_dir}: {e.strerror}") from e
    tasks = [dask.delayed(_write_part)(pr, p, keep, os.path.join(out_dir, f"part-{i:05d}.parquet"))
             for i, p in enumerate(paths)]
    return list(dask.compute(*tasks, scheduler=scheduler))
