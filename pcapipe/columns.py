"""Which columns a run reads: feature selection, keep and row-weight columns, checked against schemas.

Schema-only checks (no file is opened here): the features chosen by
``input.features`` / ``input.exclude`` (or every numeric column by default),
the ``keep`` and ``row_weight`` columns, and each later file's schema against
the first file's.  Every error names the file and the column and says what to
change.  :mod:`pcapipe.plan` calls these while it reads the footers.
"""

from __future__ import annotations

import fnmatch
import logging
import re

import pyarrow as pa

from .config import Config
from .errors import InputError
from .monitor import STAT_COLUMNS  # the columns the scores hold beside keep and PC1..PCk
from .reader import is_numeric as _is_numeric

__all__ = ["PANDAS_INDEX", "feature_names_for", "select_features", "default_left_out", "matches", "is_list",
           "preview", "check_keep_names", "check_keep", "check_row_weight", "check_file_schema"]

log = logging.getLogger("pcapipe")

# pandas.DataFrame.to_parquet stores a non-default index as these columns: not measurements.
PANDAS_INDEX = re.compile(r"__index_level_[0-9]+__")
_PANDAS_INDEX = PANDAS_INDEX


def is_list(t: pa.DataType) -> bool:
    return pa.types.is_fixed_size_list(t) or pa.types.is_list(t) or pa.types.is_large_list(t)


def _not_numeric(path: str, name: str, t: pa.DataType) -> InputError:
    if is_list(t):
        hint = "a list column is read with input.vector_column, not input.features"
    elif pa.types.is_struct(t) or pa.types.is_map(t):
        hint = "nested columns cannot be features; write their fields as numeric columns"
    else:
        hint = "cast it to a number, or leave it out of input.features (or add it to input.exclude)"
    return InputError(f"{path}: column {name!r} has type {t}, not numeric; {hint}")


def feature_names_for(column: str, length: int) -> tuple[str, ...]:
    """Names of the entries of a vector column, as used in loadings and features."""
    return tuple(f"{column}[{i}]" for i in range(length))


def _match(name: str, pattern: str, names) -> bool:
    """Glob match, except that a pattern which is exactly a column's name (``br[0]``) means that column."""
    return name == pattern if pattern in names else fnmatch.fnmatchcase(name, pattern)


def matches(name: str, patterns, names) -> bool:
    return any(_match(name, p, names) for p in patterns)


def check_keep_names(cfg: Config) -> None:
    """A keep column must not share its name with a column pcapipe adds to the scores."""
    comp = cfg.model.components
    pcs = f"PC1..PC{comp}" if isinstance(comp, int) else "PC1, PC2, ..."
    for name in cfg.input.keep:
        pc = re.fullmatch(r"PC([1-9][0-9]*)", name)
        if name in STAT_COLUMNS or (pc and (not isinstance(comp, int) or int(pc.group(1)) <= comp)):
            raise InputError(
                f"input.keep: column {name!r} has the name of a column the scores get ({pcs}, "
                f"{', '.join(STAT_COLUMNS)}); leave it out of input.keep, or rename it in the data"
            )


def check_keep(cfg: Config, schema: pa.Schema, path: str) -> None:
    for name in cfg.input.keep:
        if schema.get_field_index(name) < 0:
            raise InputError(f"{path}: input.keep column {name!r} does not exist; columns are "
                             f"{preview(schema.names)}; fix or remove it in input.keep")


def select_features(cfg: Config, schema: pa.Schema, path: str) -> tuple[str, ...]:
    keep = set(cfg.input.keep)
    weight = cfg.input.row_weight
    if weight and weight in cfg.input.features:
        raise InputError(f"{path}: input.features names the input.row_weight column {weight!r}; the row "
                         "weights are never a feature: remove it from input.features")
    names = [n for n in schema.names if n not in keep and n != weight]
    every = set(schema.names)
    if cfg.input.features:
        for p in cfg.input.features:
            if not any(_match(n, p, every) for n in names):
                held = [n for n in keep if _match(n, p, every)]
                why = (f"matches only input.keep column(s) {', '.join(held)}, which are never features"
                       if held else f"matches no column; columns are {preview(names)}")
                raise InputError(f"{path}: input.features pattern {p!r} {why}; fix input.features")
        chosen = [n for n in names if matches(n, cfg.input.features, every)]
        for n in chosen:
            if not _is_numeric(schema.field(n).type):
                raise _not_numeric(path, n, schema.field(n).type)
    else:
        chosen = [n for n in names if _is_numeric(schema.field(n).type) and not PANDAS_INDEX.fullmatch(n)]
    for p in cfg.input.exclude:
        if not any(_match(n, p, every) for n in chosen):
            # Not an error: one exclude list is often shared by several datasets.
            log.warning("input.exclude pattern %r removes no feature column of %s", p, path)
    chosen = [n for n in chosen if not matches(n, cfg.input.exclude, every)]
    if not chosen:
        raise InputError(
            f"{path}: no numeric feature columns selected (input.features={list(cfg.input.features)}, "
            f"input.exclude={list(cfg.input.exclude)}); columns are {preview(schema.names)}; "
            "name numeric columns in input.features"
        )
    return tuple(chosen)


def default_left_out(cfg: Config, schema: pa.Schema, chosen) -> list[tuple[str, str]]:
    """Default selection: the columns that are neither features nor keep nor excluded, and why."""
    if cfg.input.features or cfg.input.vector_column:
        return []
    every = set(schema.names)
    chosen = set(chosen)  # a tuple's `in` made this O(d^2): 0.73 s of a 1.49 s plan at d = 10,000
    out = []
    for f in schema:
        if (f.name in chosen or f.name in cfg.input.keep or f.name == cfg.input.row_weight
                or matches(f.name, cfg.input.exclude, every)):
            continue
        t = f.type
        why = ("boolean" if pa.types.is_boolean(t) else "decimal" if pa.types.is_decimal(t)
               else "pandas index" if PANDAS_INDEX.fullmatch(f.name) else str(t))
        out.append((f.name, why))
    return out


def preview(names, limit: int = 8) -> str:
    names = list(names)
    shown = ", ".join(names[:limit])
    return shown + (f", ... ({len(names)} in all)" if len(names) > limit else "")


def _same_kind(a: pa.DataType, b: pa.DataType) -> bool:
    """Types that decode alike: any two numeric types, two string types, or lists of numbers."""
    if _is_numeric(a) and _is_numeric(b):
        return True
    text = (pa.types.is_string, pa.types.is_large_string, pa.types.is_string_view)
    if any(f(a) for f in text) and any(f(b) for f in text):
        return True
    if is_list(a) and is_list(b):
        fixed = [t.list_size for t in (a, b) if pa.types.is_fixed_size_list(t)]
        return len(set(fixed)) <= 1 and _is_numeric(a.value_type) and _is_numeric(b.value_type)
    return a == b


def check_file_schema(path: str, schema: pa.Schema, first: str, types: dict, length: int) -> None:
    """Every file needs the first file's columns, with types that decode alike."""
    for name, want in types.items():
        if schema.get_field_index(name) < 0:
            raise InputError(
                f"{path}: column {name!r} is missing, but {first} has it; every input file needs the "
                "same columns: rewrite this file or leave it out of input.paths"
            )
        t = schema.field(name).type
        size_ok = not (length and pa.types.is_fixed_size_list(t) and t.list_size != length)
        if not (_same_kind(t, want) and size_ok):
            raise InputError(
                f"{path}: column {name!r} has type {t}, but {first} has {want}; make the types agree "
                "across files (rewrite this file or leave it out of input.paths)"
            )


def check_row_weight(schema: pa.Schema, column: str, path: str) -> None:
    """``input.row_weight`` must be a numeric column (presence in the other files: check_file_schema)."""
    if schema.get_field_index(column) < 0:
        raise InputError(f"{path}: input.row_weight column {column!r} does not exist; columns are "
                         f"{preview(schema.names)}; fix input.row_weight")
    t = schema.field(column).type
    if not _is_numeric(t):
        raise InputError(f"{path}: input.row_weight column {column!r} has type {t}, not numeric; the row "
                         "weights must be numbers >= 0")
