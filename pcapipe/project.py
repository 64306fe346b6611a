"""Scores for new rows with a finished run's preprocessing and loadings.

The same decode and transform as the scores pass (:mod:`pcapipe.reader`,
:class:`pcapipe.tasks.Transform`), so projecting the training rows gives the
stored scores.
"""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import InputError
from .plan import resolve_inputs
from .reader import batch_to_array

__all__ = ["project_frame", "project_paths", "project_to_directory"]


def _check_columns(result, names, where: str) -> None:
    spec = result._spec()
    missing = [c for c in spec.columns if c not in names]
    if missing:
        shown = ", ".join(missing[:5]) + (f" and {len(missing) - 5} more" if len(missing) > 5 else "")
        raise InputError(f"{where}: feature column(s) {shown} of the run are missing; "
                         "projection needs every feature the run was fitted on")


def _scores_of(result, table: pa.Table, where: str) -> np.ndarray:
    t = result._transform()
    x = batch_to_array(table, result._spec(), where, t.shift, t.inv_scale)
    bad = ~np.isfinite(x)
    ok = None
    if bad.any():
        if t.missing == "fail":
            col = result._spec().columns[0] if result._spec().vector_column else \
                result._spec().columns[int(np.flatnonzero(bad.any(axis=0))[0])]
            raise InputError(f"{where}: column {col!r} has missing or non-finite values; the run used "
                             'input.missing = "fail"')
        if t.missing == "zero":
            x[bad] = 0.0
        else:
            ok = ~bad.any(axis=1)
            x = x[ok]
    s = x @ result.loadings.to_numpy()
    if ok is not None:
        full = np.full((ok.size, s.shape[1]), np.nan)
        full[ok] = s
        s = full
    return s


def _frame(result, table: pa.Table, keep, where: str) -> pd.DataFrame:
    s = _scores_of(result, table, where)
    out = pd.DataFrame(s, columns=list(result.loadings.columns))
    for name in reversed(keep):
        out.insert(0, name, table.column(name).to_pandas())
    return out


def _keep_for(result, names, keep):
    if keep is None:
        return [c for c in result._spec().keep if c in names]
    missing = [c for c in keep if c not in names]
    if missing:
        raise InputError(f"keep column {missing[0]!r} is not in the data to project")
    return list(keep)


def project_frame(result, df: pd.DataFrame, keep=None) -> pd.DataFrame:
    """Project the rows of a DataFrame; the index is kept."""
    _check_columns(result, list(df.columns), "project")
    keep = _keep_for(result, list(df.columns), keep)
    cols = list(dict.fromkeys([*result._spec().columns, *keep]))
    table = pa.Table.from_pandas(df[cols], preserve_index=False)
    out = _frame(result, table, keep, "project")
    out.index = df.index
    return out


def _project_file(result, path: str, keep) -> pd.DataFrame:
    spec = result._spec()
    cols = list(dict.fromkeys([*spec.columns, *keep]))
    pf = pq.ParquetFile(path)
    parts = [_frame(result, pa.Table.from_batches([b]), keep, path)
             for b in pf.iter_batches(batch_size=spec.batch_rows, columns=cols)]
    if not parts:
        return _frame(result, pf.schema_arrow.empty_table().select(cols), keep, path)
    return pd.concat(parts, ignore_index=True)


def _paths(data) -> list[str]:
    patterns = [data] if isinstance(data, (str, os.PathLike)) else list(data)
    return resolve_inputs([os.fspath(p) for p in patterns], os.getcwd())


def _checked_paths(result, data):
    paths = _paths(data)
    for path in paths:
        try:
            names = pq.ParquetFile(path).schema_arrow.names
        except (OSError, pa.ArrowException) as e:
            raise InputError(f"{path}: not a readable Parquet file ({e})") from e
        _check_columns(result, names, path)
    return paths, names


def project_paths(result, data, keep=None):
    """Project Parquet files lazily: a dask DataFrame, one partition per file."""
    import dask
    import dask.dataframe as dd

    paths, names = _checked_paths(result, data)
    keep = _keep_for(result, names, keep)
    meta = _project_file(result, paths[0], keep).iloc[:0]
    parts = [dask.delayed(_project_file)(result, p, keep) for p in paths]
    return dd.from_delayed(parts, meta=meta, verify_meta=False)


def project_to_directory(result, data, out_dir: str, keep=None) -> list[str]:
    """Write ``part-NNNNN.parquet`` under ``out_dir`` (one per input file), atomically per part."""
    import dask

    paths, names = _checked_paths(result, data)
    keep = _keep_for(result, names, keep)
    os.makedirs(out_dir, exist_ok=True)

    def one(i, path):
        target = os.path.join(out_dir, f"part-{i:05d}.parquet")
        pq.write_table(pa.Table.from_pandas(_project_file(result, path, keep), preserve_index=False),
                       target + ".tmp", compression="zstd")
        os.replace(target + ".tmp", target)
        return target

    return list(dask.compute(*[dask.delayed(one)(i, p) for i, p in enumerate(paths)], scheduler="threads"))
