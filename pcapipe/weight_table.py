"""Read ``model.feature_weights``: a small table of feature -> weight (Parquet or CSV).

The table has exactly the columns ``feature`` (text) and ``weight`` (a
finite number >= 0), one row per feature of the run.  It is read on the
client while planning, before any data are decoded, and every problem is
reported with the file and the names involved.
"""

from __future__ import annotations

import os

import numpy as np
import pyarrow as pa

from .errors import InputError

__all__ = ["read_feature_weights", "TABLE_SUFFIXES"]

TABLE_SUFFIXES = (".parquet", ".pq", ".csv")


def _names(items, limit: int = 5) -> str:
    items = list(items)
    shown = ", ".join(repr(str(v)) for v in items[:limit])
    return shown + (f" and {len(items) - limit} more" if len(items) > limit else "")


def _read(path: str) -> pa.Table:
    where = f"model.feature_weights: {path}"
    if not os.path.isfile(path):
        raise InputError(f"{where}: no such file; write a table with columns feature, weight "
                         "(Parquet or CSV) or leave model.feature_weights empty")
    suffix = os.path.splitext(path)[1].lower()
    if suffix not in TABLE_SUFFIXES:
        raise InputError(f"{where}: the name ends in {suffix or 'nothing'!r}; use a .parquet or .csv table "
                         "with columns feature, weight")
    try:
        if suffix == ".csv":
            import pyarrow.csv as pcsv

            opts = pcsv.ConvertOptions(column_types={"feature": pa.string()})
            return pcsv.read_csv(path, convert_options=opts)
        import pyarrow.parquet as pq

        return pq.read_table(path)
    except (OSError, pa.ArrowException) as e:
        text = " ".join(str(e).split()) or type(e).__name__
        raise InputError(f"{where}: cannot be read ({text}); write a table with columns feature, weight") from e


def read_feature_weights(path: str, features) -> tuple[float, ...]:
    """The weight of each of ``features``, in their order.

    Raises
    ------
    InputError
        The file is missing or unreadable, lacks the columns ``feature`` and
        ``weight``, repeats a feature, names features the run does not have,
        leaves features of the run out, or holds a weight that is negative,
        not finite, or all weights are 0.
    """
    where = f"model.feature_weights: {path}"
    table = _read(path)
    absent = [c for c in ("feature", "weight") if c not in table.column_names]
    if absent:
        raise InputError(f"{where}: column(s) {_names(absent)} missing (it has {_names(table.column_names)}); "
                         "the table needs the columns feature, weight")
    wtype = table.schema.field("weight").type
    if not (pa.types.is_integer(wtype) or pa.types.is_floating(wtype)):
        raise InputError(f"{where}: column 'weight' has type {wtype}; the weights must be numbers")
    names = [None if v is None else str(v) for v in table.column("feature").to_pylist()]
    weights = table.column("weight").to_numpy(zero_copy_only=False).astype(np.float64)
    seen, repeated = set(), []
    for name in names:
        if name in seen:
            repeated.append(name)
        seen.add(name)
    if repeated:
        raise InputError(f"{where}: feature(s) {_names(dict.fromkeys(repeated))} appear more than once; "
                         "give each feature one weight")
    features = list(features)
    unknown = [n for n in names if n not in set(features)]
    if unknown:
        raise InputError(f"{where}: {len(unknown)} name(s) are not features of this run: {_names(unknown)}; "
                         "fix the names or the feature selection (input.features, input.exclude)")
    lacking = [f for f in features if f not in seen]
    if lacking:
        raise InputError(f"{where}: {len(lacking)} feature(s) of the run have no weight: {_names(lacking)}; "
                         "add a row for each (weight 1 leaves a feature as it is)")
    bad = [names[i] for i in np.flatnonzero(~np.isfinite(weights) | (weights < 0))]
    if bad:
        raise InputError(f"{where}: weight of {_names(bad)} is negative, NaN or infinite; "
                         "feature weights must be finite numbers >= 0")
    by_name = dict(zip(names, weights))
    out = tuple(float(by_name[f]) for f in features)
    if not any(out):
        raise InputError(f"{where}: every weight is 0, which leaves nothing to analyse; give some "
                         "features a positive weight")
    return out
