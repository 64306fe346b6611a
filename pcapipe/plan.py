"""Plan a run: resolve input files, read footers and schemas, select features, cut blocks.

The column selection and the schema checks are in :mod:`pcapipe.columns`.

Nothing is decoded here: only Parquet footers are read, so planning a
terabyte of files costs a few milliseconds per file.  Every check that can be
made from the schema is made here, before any dask graph exists, so a bad
column fails in seconds instead of an hour into the run.
"""

from __future__ import annotations

import hashlib
import logging
import os
from dataclasses import dataclass
from typing import NamedTuple

import pyarrow as pa
import pyarrow.parquet as pq

from .columns import (PANDAS_INDEX, check_file_schema, check_keep, check_keep_names, check_row_weight,
                      default_left_out, feature_names_for, is_list, matches, preview, select_features)
from .config import Config, resolve_path
from .discover import find_inputs, resolve_inputs
from .errors import InputError
from .weight_table import read_feature_weights
from .guards import FooterStats
from .layout import Piece, footer_costs, leaf_columns
from .reader import is_numeric as _is_numeric
from .reader import one_line as _one_line

log = logging.getLogger("pcapipe")

# Bytes read from the end of a file to reach its footer in one read (pyarrow reads as much).
_TAIL_BYTES = 64 << 10

__all__ = ["FileInfo", "Block", "Plan", "make_plan", "resolve_inputs", "feature_names_for",
           "footer_fingerprint"]


@dataclass(frozen=True)
class FileInfo:
    """One input file as planned: identity (for resume checks) and row groups."""

    path: str
    size: int
    mtime_ns: int
    n_rows: int
    row_group_rows: tuple[int, ...]
    row_group_bytes: tuple[int, ...] = ()   # uncompressed bytes of the selected columns
    row_group_stream: tuple[int, ...] = ()  # estimated reader buffers to stream them (layout.footer_costs)
    footer: str = ""  # footer_fingerprint: a file rewritten with the same size and mtime differs here


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
    ``row_weight`` is the column of row weights ("" for none) and
    ``feature_weights`` the weight of each feature (None for none).
    """

    files: tuple[FileInfo, ...]
    blocks: tuple[Block, ...]
    features: tuple[str, ...]
    columns: tuple[str, ...]
    vector_column: str
    keep: tuple[str, ...]
    itemsize: int
    row_weight: str = ""
    feature_weights: tuple[float, ...] | None = None
    skipped: tuple[str, ...] = ()        # files left out: a name below a directory starts with _ or .
    duplicates: tuple[tuple[str, str], ...] = ()  # (path, same file as) reached twice
    left_out: tuple[tuple[str, str], ...] = ()    # default selection: (column, why it is not a feature)
    row_ids: tuple[tuple[str, int, int, bool], ...] = ()  # (feature, min, max, proven) from the footers
    hints: tuple[str, ...] = ()          # guard-rail warnings from the footers (pcapipe check)
    float32: bool = False                # every feature is stored as float32 (or float16): exact in float32

    @property
    def n_rows(self) -> int:
        return sum(f.n_rows for f in self.files)

    @property
    def n_features(self) -> int:
        return len(self.features)

    @property
    def held_itemsize(self) -> int:
        """Bytes per value of rows held in memory: float32 as stored when exact (and unweighted), else float64."""
        return 4 if self.float32 and not self.row_weight else 8

    @property
    def total_bytes(self) -> int:
        return sum(f.size for f in self.files)

    def pieces(self) -> tuple[Piece, ...]:
        """Every non-empty row group in file order, with its footer costs (for :mod:`pcapipe.layout`)."""
        out = []
        for b in self.blocks:
            f = self.files[b.file_index]
            nbytes = f.row_group_bytes[b.row_group] if f.row_group_bytes else 0
            stream = f.row_group_stream[b.row_group] if f.row_group_stream else 0
            out.append(Piece(b.file_index, b.path, b.row_group, b.n_rows, nbytes, stream))
        return tuple(out)

    def inputs_record(self) -> list[dict]:
        """The inputs as recorded in the manifest and checked on resume."""
        return [
            {"path": f.path, "bytes": f.size, "mtime_ns": f.mtime_ns, "rows": f.n_rows, "footer": f.footer}
            for f in self.files
        ]


def _open_footer(path: str) -> pq.ParquetFile:
    try:
        return pq.ParquetFile(path)
    except (OSError, pa.ArrowException) as e:
        raise InputError(
            f"{path}: not a readable Parquet file ({_one_line(e)}); re-copy it or remove it from input.paths"
        ) from e


class _Footer(NamedTuple):
    """What the plan needs of one file: its footer, Arrow schema, size, mtime and footer fingerprint."""

    metadata: pq.FileMetaData
    schema: pa.Schema | None   # None: same Parquet schema and key-value metadata as the previous file
    size: int
    mtime_ns: int
    fingerprint: str


def _read_footer(path: str, previous: _Footer | None) -> _Footer:
    """One open, one read of the file's tail: the footer is hashed and parsed from the same bytes.

    Reading the tail ourselves instead of through ``pq.ParquetFile`` and a
    second open for the fingerprint halves the per-file cost of planning
    5,000 small files (DEVELOPERS.md "Layouts").  Anything unusual (too
    short, no ``PAR1`` at the end) is left to pyarrow, whose error is reported.
    """
    with open(path, "rb") as f:
        st = os.fstat(f.fileno())
        tail = b""
        if st.st_size >= 12:
            f.seek(max(0, st.st_size - _TAIL_BYTES))
            tail = f.read()
        length = int.from_bytes(tail[-8:-4], "little") if len(tail) >= 8 else -1
        if tail[-4:] != b"PAR1" or not 0 < length <= st.st_size - 12:
            return _footer_of(path, _open_footer(path))
        if length + 8 > len(tail):
            f.seek(st.st_size - 8 - length)
            tail = f.read()
    try:
        md = pq.read_metadata(pa.BufferReader(tail))
    except (OSError, pa.ArrowException):
        return _footer_of(path, _open_footer(path))  # pyarrow's own error, naming the file
    schema = None  # the Arrow schema follows from the Parquet schema and the stored key-value metadata
    old = previous.metadata if previous is not None else None
    if old is None or not (md.schema.equals(old.schema) and md.metadata == old.metadata):
        schema = md.schema.to_arrow_schema()
    return _Footer(md, schema, st.st_size, st.st_mtime_ns, hashlib.sha256(tail[-8 - length:-8]).hexdigest()[:32])


def _footer_of(path: str, pf: pq.ParquetFile) -> _Footer:
    """The :class:`_Footer` of a file already opened by pyarrow."""
    st = os.stat(path)
    return _Footer(pf.metadata, pf.schema_arrow, st.st_size, st.st_mtime_ns, footer_fingerprint(path))


def footer_fingerprint(path: str) -> str:
    """SHA-256 (first 32 hex digits) of a Parquet file's footer: its schema, row groups and statistics.

    A Parquet file ends with the footer, its 4-byte little-endian length and
    ``PAR1`` (Apache Parquet format specification, "File format"); the footer
    changes whenever the data do (offsets, sizes, min/max statistics), at the
    cost of one small read.
    """
    with open(path, "rb") as f:
        f.seek(-8, os.SEEK_END)
        length = int.from_bytes(f.read(4), "little")
        f.seek(-8 - length, os.SEEK_END)
        return hashlib.sha256(f.read(length)).hexdigest()[:32]


def _first_vector(path: str, pf: pq.ParquetFile, column: str):
    """The first row of ``column``, decoding one batch rather than a whole row group."""
    for rg in range(pf.metadata.num_row_groups):
        if pf.metadata.row_group(rg).num_rows:
            batch = next(pf.iter_batches(batch_size=1, row_groups=[rg], columns=[column]))
            return batch.column(0)[0]
    raise AssertionError(f"{path} has rows but no row group with rows")  # footers say otherwise


def _file_with_rows(paths, opened: dict, column: str) -> tuple[str, pq.ParquetFile | None]:
    """The first file with rows (its footer is kept in ``opened`` for the planning loop)."""
    for path in paths:
        pf = opened[path] if path in opened else opened.setdefault(path, _open_footer(path))
        if pf.metadata.num_rows:
            schema = pf.schema_arrow
            usable = schema.get_field_index(column) >= 0 and is_list(schema.field(column).type)
            return path, pf if usable else None  # else the schema check names the file
    raise InputError(f"input.vector_column {column!r}: none of the {len(paths)} input file(s) has rows to "
                     "take the vector length from; add files with rows to input.paths")


def _vector_length(paths, opened: dict, column: str, schema: pa.Schema) -> int:
    path = paths[0]
    t = schema.field(column).type
    if not is_list(t):
        raise InputError(
            f"{path}: input.vector_column {column!r} has type {t}, expected a list of floats; "
            "name a list column, or select scalar columns with input.features instead"
        )
    if not _is_numeric(t.value_type):
        raise InputError(
            f"{path}: input.vector_column {column!r} holds {t.value_type}, expected floats or integers; "
            "cast the vectors to float when writing the file"
        )
    if pa.types.is_fixed_size_list(t):
        length = t.list_size
    else:
        # The length of a variable-length list is checked on every row when the
        # data are read; here it is taken from the first row of the first file with rows.
        path, pf = _file_with_rows(paths, opened, column)
        if pf is None:
            return 0
        value = _first_vector(path, pf, column)
        if not value.is_valid:
            raise InputError(f"{path}: input.vector_column {column!r}: row 0 is null; every row needs a "
                             "vector, drop or fill the null rows")
        length = len(value)
    if length < 1:
        raise InputError(f"{path}: input.vector_column {column!r} holds empty vectors; name a column of "
                         "non-empty vectors")
    return length


def make_plan(cfg: Config) -> Plan:
    """Resolve the inputs of ``cfg`` and check every file's schema.

    Only footers are read (and, for a variable-length vector column, the
    first row of the first file with rows, to learn the vector length).

    Raises
    ------
    InputError
        A pattern matches nothing, a file is not Parquet, a column is missing,
        not numeric, or differs in type between files.
    """
    check_keep_names(cfg)
    found = find_inputs(cfg.input.paths, cfg.base_dir)
    paths = found.files
    first = _open_footer(paths[0])
    schema0 = first.schema_arrow
    check_keep(cfg, schema0, paths[0])
    vec = cfg.input.vector_column
    opened = {paths[0]: first}
    length = 0
    if vec:
        if schema0.get_field_index(vec) < 0:
            raise InputError(
                f"{paths[0]}: input.vector_column {vec!r} is not a column; columns are "
                f"{preview(schema0.names)}; fix input.vector_column"
            )
        length = _vector_length(paths, opened, vec, schema0)
        columns: tuple[str, ...] = (vec,)
    else:
        columns = select_features(cfg, schema0, paths[0])
    weight = cfg.input.row_weight
    if weight:
        check_row_weight(schema0, weight, paths[0])
    scan = _Scan(cfg, paths, schema0, columns, length)
    files, blocks = scan.run(opened)
    features = feature_names_for(vec, length) if vec else columns
    types = [schema0.field(vec).type.value_type] if vec else [schema0.field(c).type for c in columns]
    width = max(t.bit_width for t in types)
    left_out = tuple(default_left_out(cfg, schema0, columns)) + scan.left_out()
    if left_out:
        log.info("input.features: %d column(s) left out of the default selection: %s", len(left_out),
                 ", ".join(f"{n} ({why})" for n, why in left_out))
    n_rows = sum(f.n_rows for f in files)
    fw = None
    if cfg.model.feature_weights:
        fw = read_feature_weights(resolve_path(cfg, cfg.model.feature_weights), features)
    return Plan(tuple(files), tuple(blocks), features, columns, vec, tuple(cfg.input.keep), max(width // 8, 1),
                weight, fw, found.skipped, found.duplicates, left_out, scan.stats.row_ids(n_rows),
                tuple(scan.stats.hints(n_rows, cfg.model.scale, paths[0])),
                all(pa.types.is_floating(t) and t.bit_width <= 32 for t in types))


class _Scan:
    """The planning loop over the files: schema checks, row groups, footer statistics.

    With the default feature selection, a numeric column that a later file has
    but the first lacks is left out (and said so); a feature of the first file
    missing from a later one is an error, as with named features.
    """

    def __init__(self, cfg: Config, paths, schema0: pa.Schema, columns, length: int):
        self.cfg, self.paths, self.length = cfg, paths, length
        self.columns = tuple(columns)
        weight = (cfg.input.row_weight,) if cfg.input.row_weight else ()
        self.read_columns = (*self.columns, *weight)  # what the reader decodes, for the footer costs
        self.types = {c: schema0.field(c).type for c in (*columns, *cfg.input.keep, *weight)}
        self.default = not (cfg.input.features or cfg.input.vector_column)
        self.later: dict[str, list[str]] = {}    # numeric columns of later files missing from the first
        self.stats = FooterStats(schema0, () if cfg.input.vector_column else columns)

    def run(self, opened: dict):
        files, blocks = [], []
        footer, leaves = None, None  # the previous file's footer; (Parquet schema, leaf columns)
        for fi, path in enumerate(self.paths):
            pf = opened.pop(path, None)
            footer = _footer_of(path, pf) if pf else _read_footer(path, footer)
            # A file with the previous file's schema needs no per-column checks: same schema, same answer.
            if footer.schema is not None:
                if self.default and fi:
                    self._note_drift(path, footer.schema)
                check_file_schema(path, footer.schema, self.paths[0], self.types, self.length)
            md = footer.metadata
            self.stats.add(md)
            if leaves is None or not md.schema.equals(leaves[0]):
                leaves = (md.schema, leaf_columns(md, self.read_columns))
            rg_rows = tuple(md.row_group(i).num_rows for i in range(md.num_row_groups))
            files.append(FileInfo(path, footer.size, footer.mtime_ns, md.num_rows, rg_rows,
                                  *footer_costs(md, self.read_columns, leaves[1]), footer.fingerprint))
            for rg, n in enumerate(rg_rows):
                if n:
                    blocks.append(Block(len(blocks), fi, path, rg, n))
        return files, blocks

    def _note_drift(self, path: str, schema: pa.Schema) -> None:
        every = set(schema.names)
        for f in schema:
            if (f.name not in self.types and _is_numeric(f.type) and not PANDAS_INDEX.fullmatch(f.name)
                    and not matches(f.name, self.cfg.input.exclude, every)):
                self.later.setdefault(f.name, []).append(path)

    def left_out(self) -> tuple[tuple[str, str], ...]:
        n = len(self.paths)
        return tuple((c, f"missing from {n - len(w)} of {n} files, e.g. {self.paths[0]}")
                     for c, w in self.later.items())
