"""Scores for new rows with a finished run's preprocessing and loadings.

The same decode, transform and score writer as the scores pass
(:mod:`pcapipe.scoring`), so projecting the training rows gives the stored
scores.  Parquet inputs are streamed in batches inside one dask task per
file, so memory is bounded by a batch of features plus the file's scores
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
from .layout import batch_rows_for
from .plan import resolve_inputs
from .reader import ReadSpec, is_numeric
from .scoring import out_schema, score_batch, score_tables, write_part
from .monitor import MonitorSpec
from .conventions import Transform, missing_rule, transform_for
from .writer import path_inside

__all__ = ["Projector", "projector_for", "project_frame", "project_paths", "project_to_directory"]


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
    # the run's feature weights, as in its scores pass
    fw = f["weight"].to_numpy() if "weight" in f and model.get("feature_weights") else None
    transform = transform_for(f["mean"].to_numpy(), f["scale_used"].to_numpy(), center=model.get("center", True),
                              scale=model.get("scale", False), feature_weights=fw,
                              missing=missing_rule(cfg_in.get("missing", "fail")))
    monitor = None
    if m.get("limits"):
        from .alarms import monitor_spec

        monitor = monitor_spec(m["limits"], result._retained()["eigenvalue"].to_numpy(), training=False)
    return Projector(spec, transform, np.ascontiguousarray(result.loadings.to_numpy()),
                     tuple(result.loadings.columns), monitor)


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
                and is_numeric(t.value_type)
        else:
            ok = is_numeric(t)
        if not ok:
            need = "a list of numbers" if pr.spec.vector_column else "a number type"
            raise InputError(f"{where}: column {name!r} has type {t}; the run needs {need} there")


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
    s, extra = score_batch(table, pr.spec, pr.transform, pr.loadings, "project", monitor=pr.monitor)
    out = pd.DataFrame(s, index=df.index, columns=list(pr.names))
    for name, values in extra.items():
        out[name] = values
    for name in reversed(keep):
        out.insert(0, name, df[name])
    return out


def _project_file(pr: Projector, path: str, keep) -> pd.DataFrame:
    tables = list(score_tables(path, None, pr.spec, pr.transform, pr.loadings, pr.names, keep, pr.monitor))
    if not tables:
        return out_schema(pq.ParquetFile(path).schema_arrow, keep, pr.names, pr.monitor).empty_table().to_pandas()
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
    meta = out_schema(pq.ParquetFile(paths[0]).schema_arrow, keep, pr.names, pr.monitor).empty_table().to_pandas()
    parts = [dask.delayed(_project_file)(pr, p, keep)
             for i, p in enumerate(paths)]
    return dd.from_delayed(parts, meta=meta, verify_meta=False)


def _write_part(pr: Projector, path: str, keep, target: str) -> str:
    write_part(path, None, pr.spec, pr.transform, pr.loadings, pr.names, target, keep, pr.monitor)
    return target


def _check_out_dir(out_dir: str, data, paths) -> None:
    """Refuse an ``--out`` that holds an input file or lies inside an input directory.

    Part files written there would be read as data by the next run over that
    directory (or by this projection's own glob).
    """
    out = os.path.realpath(out_dir)
    patterns = [data] if isinstance(data, (str, os.PathLike)) else list(data)
    roots = [os.path.realpath(os.fspath(p)) for p in patterns if os.path.isdir(os.fspath(p))]
    clash = next((p for p in paths if path_inside(os.path.realpath(p), out)), None)
    clash = clash or next((r for r in roots if path_inside(out, r)), None)
    if clash is not None:
        raise OutputError(f"--out: {out_dir} overlaps the input {clash}; part files written there would be "
                          "read as input next time: choose an --out directory outside every input")


def project_to_directory(result, data, out_dir: str, keep=None, scheduler: str = "threads") -> list[str]:
    """Write ``part-NNNNN.parquet`` under ``out_dir``, one per input file in sorted path order.

    Raises
    ------
    InputError
        An input matches nothing, is not Parquet, or lacks a feature column.
    OutputError
        ``out_dir`` already holds part files (they would mix with the new
        ones), overlaps an input, or cannot be created.
    """
    import dask

    pr = projector_for(result)
    paths, names = _checked_paths(pr, data)
    keep = _keep_for(pr, names, keep)
    _check_out_dir(out_dir, data, paths)
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
