"""Plan a run: resolve input files, read footers and schemas, select features, cut blocks.

Nothing is decoded here: only Parquet footers are read, so planning a
terabyte of files costs a few milliseconds per file.  Every check that can be
made from the schema is made here, before any dask graph exists, so a bad
column fails in seconds instead of an hour into the run.
"""

from __future__ import annotations

import fnmatch
import glob
import os
from dataclasses import dataclass

import pyarrow as pa
import pyarrow.parquet as pq

from .config import Config, resolve_path
from .errors import InputError

__all__ = ["FileInfo", "Block", "Plan", "make_plan", "resolve_inputs", "feature_names_for"]


@dataclass(frozen=True)
class FileInfo:
    """One input file as planned: identity (for resume checks) and row groups."""

    path: str
    size: int
    mtime_ns: int
    n_rows: int
    row_group_rows: tuple[int, ...]


@dataclass(frozen=True)
class Block:
    """One unit of work: a whole row group of one file."""

    index: int
    file_index: int
    path: str
    row_group: int
    n_rows: int


@dataclass(frozen=True)
class Plan:
    """Everything the engine needs to know before reading a single value.

    ``columns`` are the Parquet columns holding features (one per feature, or
    the single vector column); ``features`` are the feature names used in the
    outputs (``name[i]`` for the entries of a vector column).
    """

    files: tuple[FileInfo, ...]
    blocks: tuple[Block, ...]
    features: tuple[str, ...]
    columns: tuple[str, ...]
    vector_column: str
    keep: tuple[str, ...]
    itemsize: int

    @property
    def n_rows(self) -> int:
        return sum(f.n_rows for f in self.files)

    @property
    def n_features(self) -> int:
        return len(self.features)

    @property
    def total_bytes(self) -> int:
        return sum(f.size for f in self.files)

    def inputs_record(self) -> list[dict]:
        """The inputs as recorded in the manifest and checked on resume."""
        return [
            {"path": f.path, "bytes": f.size, "mtime_ns": f.mtime_ns, "rows": f.n_rows}
            for f in self.files
        ]


def resolve_inputs(patterns, base_dir: str) -> list[str]:
    """Resolve files, directories and globs to a sorted list of Parquet files.

    Directories contribute every ``*.parquet`` file below them.  Each pattern
    must match at least one file, so a typo is not silently ignored.
    """
    found: set[str] = set()
    for pattern in patterns:
        path = pattern if os.path.isabs(os.path.expanduser(pattern)) else os.path.join(base_dir, pattern)
        path = os.path.expanduser(path)
        if os.path.isdir(path):
            hits = glob.glob(os.path.join(glob.escape(path), "**", "*.parquet"), recursive=True)
        elif glob.has_magic(path):
            hits = [h for h in glob.glob(path, recursive=True) if os.path.isfile(h)]
        else:
            hits = [path] if os.path.isfile(path) else []
        if not hits:
            raise InputError(
                f"input.paths: {pattern!r} matches no file (looked in {os.path.dirname(path) or '.'}); "
                "check the path, relative paths resolve against the config file's directory"
            )
        found.update(os.path.abspath(h) for h in hits)
    return sorted(found)


def _open_footer(path: str) -> pq.ParquetFile:
    try:
        return pq.ParquetFile(path)
    except (OSError, pa.ArrowException) as e:
        raise InputError(
            f"{path}: not a readable Parquet file ({_one_line(e)}); re-copy it or remove it from input.paths"
        ) from e


def _one_line(e: BaseException) -> str:
    text = str(e).strip().splitlines()
    return text[0] if text else type(e).__name__


def _is_numeric(t: pa.DataType) -> bool:
    return pa.types.is_integer(t) or pa.types.is_floating(t)


def _vector_length(path: str, pf: pq.ParquetFile, column: str, schema: pa.Schema) -> int:
    t = schema.field(column).type
    if pa.types.is_fixed_size_list(t):
        inner = t.value_type
        length = t.list_size
    elif pa.types.is_list(t) or pa.types.is_large_list(t):
        inner = t.value_type
        length = -1
    else:
        raise InputError(
            f"{path}: input.vector_column {column!r} has type {t}, expected a list of floats; "
            "name a list column or use input.features for scalar columns"
        )
    if not _is_numeric(inner):
        raise InputError(
            f"{path}: input.vector_column {column!r} holds {inner}, expected floats or integers"
        )
    if length < 0:
        # Variable-length list: the length is checked on every row when the data
        # are read; here take it from the first row with a tiny read.
        first = pf.read_row_group(0, columns=[column]).column(0) if pf.metadata.num_row_groups else None
        if first is None or len(first) == 0:
            raise InputError(f"{path}: input.vector_column {column!r} has no rows to take its length from")
        value = first[0]
        if not value.is_valid:
            raise InputError(f"{path}: input.vector_column {column!r} row 0 is null; every row needs a vector")
        length = len(value)
    if length < 1:
        raise InputError(f"{path}: input.vector_column {column!r} holds empty vectors")
    return length


def feature_names_for(column: str, length: int) -> tuple[str, ...]:
    """Names of the entries of a vector column, as used in loadings and features."""
    return tuple(f"{column}[{i}]" for i in range(length))


def _select_features(cfg: Config, schema: pa.Schema, path: str) -> tuple[str, ...]:
    keep = set(cfg.input.keep)
    names = [n for n in schema.names if n not in keep]
    if cfg.input.features:
        chosen = [n for n in names if any(fnmatch.fnmatchcase(n, p) for p in cfg.input.features)]
        for p in cfg.input.features:
            if not any(fnmatch.fnmatchcase(n, p) for n in names):
                raise InputError(
                    f"{path}: input.features pattern {p!r} matches no column; columns are {_preview(names)}"
                )
        bad = [n for n in chosen if not _is_numeric(schema.field(n).type)]
        if bad:
            n = bad[0]
            raise InputError(
                f"{path}: column {n!r} has type {schema.field(n).type}, not numeric; "
                "cast it, or leave it out with input.exclude"
            )
    else:
        chosen = [n for n in names if _is_numeric(schema.field(n).type)]
    chosen = [n for n in chosen if not any(fnmatch.fnmatchcase(n, p) for p in cfg.input.exclude)]
    if not chosen:
        raise InputError(
            f"{path}: no numeric feature columns selected (input.features={list(cfg.input.features)}, "
            f"input.exclude={list(cfg.input.exclude)}); columns are {_preview(schema.names)}"
        )
    return tuple(chosen)


def _preview(names, limit: int = 8) -> str:
    names = list(names)
    shown = ", ".join(names[:limit])
    return shown + (f", ... ({len(names)} in all)" if len(names) > limit else "")


def _check_file_schema(path, schema, columns, keep, types, vector_column):
    for name in (*columns, *keep):
        if schema.get_field_index(name) < 0:
            role = "keep" if name in keep else "feature"
            raise InputError(
                f"{path}: {role} column {name!r} is missing; every input file needs the same columns"
            )
    for name in columns:
        t = schema.field(name).type
        if t != types[name]:
            ok = (_is_numeric(t) and _is_numeric(types[name])) if not vector_column else False
            if not ok:
                raise InputError(
                    f"{path}: column {name!r} has type {t}, but the first file has {types[name]}; "
                    "make the types agree across files"
                )


def make_plan(cfg: Config) -> Plan:
    """Resolve the inputs of ``cfg`` and check every file's schema.

    Raises
    ------
    InputError
        A pattern matches nothing, a file is not Parquet, a column is missing,
        not numeric, or differs in type between files.
    """
    paths = resolve_inputs(cfg.input.paths, cfg.base_dir)
    first = _open_footer(paths[0])
    schema0 = first.schema_arrow
    vec = cfg.input.vector_column
    if vec:
        if schema0.get_field_index(vec) < 0:
            raise InputError(
                f"{paths[0]}: input.vector_column {vec!r} is not a column; columns are {_preview(schema0.names)}"
            )
        length = _vector_length(paths[0], first, vec, schema0)
        columns: tuple[str, ...] = (vec,)
        features = feature_names_for(vec, length)
        itemsize = schema0.field(vec).type.value_type.bit_width // 8
    else:
        columns = _select_features(cfg, schema0, paths[0])
        features = columns
        itemsize = max(schema0.field(c).type.bit_width // 8 for c in columns)
    types = {c: schema0.field(c).type for c in columns}
    files, blocks = [], []
    for fi, path in enumerate(paths):
        pf = first if fi == 0 else _open_footer(path)
        _check_file_schema(path, pf.schema_arrow, columns, cfg.input.keep, types, vec)
        md = pf.metadata
        rg_rows = tuple(md.row_group(i).num_rows for i in range(md.num_row_groups))
        st = os.stat(path)
        files.append(FileInfo(path, st.st_size, st.st_mtime_ns, md.num_rows, rg_rows))
        for rg, n in enumerate(rg_rows):
            if n:
                blocks.append(Block(len(blocks), fi, path, rg, n))
    return Plan(tuple(files), tuple(blocks), features, columns, vec, tuple(cfg.input.keep), max(itemsize, 1))
