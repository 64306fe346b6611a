"""What drove an alarm: per-feature contributions and the most extreme rows.

Used by :meth:`pcapipe.result.Result.contributions`, ``pcapipe project
--explain N`` and the report.  The formulas are in :mod:`pcapipe.monitor`.
Rows are found by position: row ``r`` of score part ``i`` is row ``r`` of
input file ``i`` (the score writer keeps the row order), so the few extreme
rows are read back from their files (only the row groups that hold them).
"""

from __future__ import annotations

import glob
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import InputError
from .monitor import contributions
from .reader import batch_to_array

__all__ = ["contributions_frame", "read_rows", "extreme_rows", "explain_rows", "top_features"]


def contributions_frame(result, df: pd.DataFrame) -> pd.DataFrame:
    """Contributions of the rows of ``df`` (raw feature columns) to T^2 and SPE.

    Returns a DataFrame with the index of ``df`` and columns
    ``(statistic, feature)`` for statistic in ("t2", "spe"); each row of
    ``frame["spe"]`` sums to the row's SPE, of ``frame["t2"]`` to its T^2.
    Rows the run's missing rule drops get NaN.
    """
    from .project import _check_schema, projector_for
    from .tasks import prepare_rows

    pr = projector_for(result)
    cols = [c for c in pr.spec.columns if c in df.columns]
    try:
        table = pa.Table.from_pandas(df[cols], preserve_index=False)
    except (pa.ArrowException, TypeError, ValueError) as e:
        raise InputError(f"contributions: the feature columns cannot be read as numbers ({e})") from e
    _check_schema(pr, table.schema, "contributions")
    t = pr.transform
    x = batch_to_array(table, pr.spec, "contributions", t.shift, t.inv_scale)
    try:
        x, ok = prepare_rows(x, t)
    except ValueError as e:
        raise InputError("contributions: a row has missing or non-finite values and the run used "
                         'input.missing = "fail"') from e
    if pr.monitor is None:
        from .errors import RunDirectoryError

        raise RunDirectoryError(f"{result.directory}: this run has no monitoring record (written by a pcapipe "
                                "without it); run the job again")
    t2c, spec = contributions(x, pr.loadings, pr.monitor.values)
    if ok is not None:
        t2c, spec = (_expand_rows(a, ok) for a in (t2c, spec))
    features = list(result.loadings.index)
    columns = pd.MultiIndex.from_product([["t2", "spe"], features], names=["statistic", "feature"])
    return pd.DataFrame(np.hstack([t2c, spec]), index=df.index, columns=columns)


def _expand_rows(a: np.ndarray, ok: np.ndarray) -> np.ndarray:
    full = np.full((ok.size, a.shape[1]), np.nan)
    full[ok] = a
    return full


def read_rows(paths, positions, columns) -> pd.DataFrame:
    """Rows at global ``positions`` (0-based, over ``paths`` in order), only ``columns``, in the given order."""
    starts = np.concatenate([[0], np.cumsum([pq.ParquetFile(p).metadata.num_rows for p in paths])])
    positions = np.asarray(positions, dtype=np.int64)
    if positions.size and (positions.min() < 0 or positions.max() >= starts[-1]):
        bad = positions[(positions < 0) | (positions >= starts[-1])][0]
        raise InputError(f"contributions: row {bad} is outside the run's {starts[-1]} rows (0-based)")
    frames = {}
    for fi in np.unique(np.searchsorted(starts, positions, side="right") - 1):
        pf = pq.ParquetFile(paths[fi])
        local = positions[(positions >= starts[fi]) & (positions < starts[fi + 1])] - starts[fi]
        rg_starts = np.concatenate([[0], np.cumsum([pf.metadata.row_group(g).num_rows
                                                   for g in range(pf.metadata.num_row_groups)])])
        for g in np.unique(np.searchsorted(rg_starts, local, side="right") - 1):
            table = pf.read_row_group(int(g), columns=list(columns))
            for r in local[(local >= rg_starts[g]) & (local < rg_starts[g + 1])]:
                frames[int(r + starts[fi])] = table.slice(int(r - rg_starts[g]), 1)
    if not frames:
        return pd.DataFrame(columns=list(columns))
    out = pa.concat_tables([frames[int(p)] for p in positions]).to_pandas()
    out.index = pd.Index(positions, name="row")
    return out


def extreme_rows(parts, limits: dict, n: int, training: bool, extra_columns=()) -> pd.DataFrame:
    """The ``n`` rows of score parts farthest beyond their limits.

    Severity is ``max(t2 / T2_limit, spe / SPE_limit)``; a row above 1 is an
    alarm.  Returns index = global row position, columns ``part``,
    ``part_row``, ``extra_columns``, ``t2``, ``spe``, ``severity``.
    """
    if isinstance(parts, str):
        parts = sorted(glob.glob(os.path.join(parts, "part-*.parquet")))
    t2_lim = limits["t2_training"] if training else limits["t2"]
    t2_lim = t2_lim if t2_lim else np.inf
    spe_lim = limits["spe"] if limits["spe"] > 0 else np.inf
    best, offset = [], 0
    for i, path in enumerate(parts):
        cols = ["t2", "spe", *[c for c in extra_columns if c not in ("t2", "spe")]]
        df = pq.read_table(path, columns=cols).to_pandas()
        df["severity"] = np.fmax(df["t2"] / t2_lim, df["spe"] / spe_lim)
        df["part"], df["part_row"] = i, np.arange(len(df))
        df.index = pd.RangeIndex(offset, offset + len(df), name="row")
        offset += len(df)
        best.append(df.nlargest(n, "severity"))
    if not best:
        return pd.DataFrame(columns=["part", "part_row", *extra_columns, "t2", "spe", "severity"])
    out = pd.concat(best).nlargest(n, "severity")
    return out[["part", "part_row", *[c for c in extra_columns if c not in ("t2", "spe")], "t2", "spe",
                "severity"]]


def top_features(contrib: pd.DataFrame, statistic: str, m: int = 3) -> list[list[tuple[str, float]]]:
    """Per row, the ``m`` features of largest contribution to ``statistic``, with their share of it."""
    block = contrib[statistic]
    total = block.sum(axis=1)
    out = []
    for idx, row in block.iterrows():
        top = row.abs().nlargest(m).index
        out.append([(str(f), float(row[f] / total[idx]) if total[idx] else float("nan")) for f in top])
    return out


def explain_rows(result, worst: pd.DataFrame, paths, m: int = 3) -> pd.DataFrame:
    """``worst`` (from :func:`extreme_rows`) with the top SPE and T^2 features read back from ``paths``."""
    from .project import projector_for

    pr = projector_for(result)
    rows = read_rows(paths, worst.index.to_numpy(), pr.spec.columns)
    contrib = contributions_frame(result, rows)
    out = worst.copy()
    out["top_spe"] = [", ".join(f"{f} {s:.0%}" for f, s in row) for row in top_features(contrib, "spe", m)]
    out["top_t2"] = [", ".join(f"{f} {s:.0%}" for f, s in row) for row in top_features(contrib, "t2", m)]
    return out
