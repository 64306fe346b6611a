"""Decode blocks of Parquet into float64 arrays, inside dask tasks.

The reader knows Parquet and nothing about linear algebra.  A block (one row
group) is streamed as record batches of at most ``batch_rows`` rows, so a
task's memory is bounded by the batch, not by the row group.  Each batch is
decoded straight into one float64 buffer: scalar columns fill a
Fortran-ordered buffer column by column (contiguous writes, and the layout
BLAS ``syrk``/``gemm`` want); a vector column is reshaped from its child
buffer without per-row Python work.  An optional affine transform
``(x - shift) * inv_scale`` is fused into that single write, computed in
float64 whatever the column's type (a float32 column with mean 1e4 keeps its
digits on every numpy, value-based casting or not).

A dask task reads a :class:`~pcapipe.layout.Task` (:func:`iter_task`):
small row groups are gathered into full batches before decoding, and a
task given several threads decodes a streamed row group column-parallel
(one pyarrow stream per share of the columns, filling one buffer).  A row
group of a wide table (``spec.sliced_bytes``) is decoded whole-height into
one buffer, one slice of columns per pyarrow read: streaming it in batches
costs pyarrow a fixed price per column and batch, which at 10,000 columns
is most of the read (3x the sliced read, measured in DEVELOPERS.md).
"""

from __future__ import annotations

import functools
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .errors import InputError
from .layout import SLICE_BYTES, WHOLE_ROW_GROUP_BYTES

__all__ = ["ReadSpec", "iter_block", "iter_file", "iter_task", "open_file", "batch_to_array", "is_numeric", "one_line",
           "split_weights"]


def is_numeric(t: pa.DataType) -> bool:
    """Arrow types the reader decodes to float64 (integers and floats)."""
    return pa.types.is_integer(t) or pa.types.is_floating(t)


def one_line(e: BaseException) -> str:
    """An exception's message on one line (pyarrow's span several), or its type's name."""
    return " ".join(str(e).split()) or type(e).__name__


@dataclass(frozen=True)
class ReadSpec:
    """What to decode: the feature columns, how wide, and how many rows at a time.

    ``threads`` > 1 decodes a streamed row group column-parallel; a row
    group of scalar columns whose decoded float64 block takes at most
    ``sliced_bytes`` is decoded whole, a slice of columns per read
    (:func:`iter_block`; 0: never); other row groups up to ``whole_bytes``
    (uncompressed) are read in one call and cut into batches, larger ones
    streamed.

    With a ``weight_column`` the decoded batch has ``n_features + 1`` columns,
    the last holding the row weights (checked finite and >= 0, never
    transformed); :func:`split_weights` separates them.
    """

    columns: tuple[str, ...]
    vector_column: str
    n_features: int
    batch_rows: int
    keep: tuple[str, ...] = ()
    weight_column: str = ""
    threads: int = 1
    whole_bytes: int = WHOLE_ROW_GROUP_BYTES
    sliced_bytes: int = 0

    @property
    def read_columns(self) -> list[str]:
        """The Parquet columns decoded: features, then the weight column."""
        return [*self.columns, *([self.weight_column] if self.weight_column else [])]


def split_weights(x: np.ndarray, spec: ReadSpec) -> tuple[np.ndarray, np.ndarray | None]:
    """``(features, row weights)`` of a decoded batch; the weights are None without a weight column."""
    if not spec.weight_column:
        return x, None
    d = spec.n_features
    return x[:, :d], x[:, d]


def _weights_into(out: np.ndarray, arr, where: str, column: str, first_row: int) -> None:
    """Decode the row weights into ``out``; a null, negative, NaN or infinite weight is an error naming its row."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    if arr.null_count:
        arr = pc.cast(arr, pa.float64()).fill_null(np.nan)
    out[:] = arr.to_numpy(zero_copy_only=False)
    if out.size and out.min() >= 0 and np.isfinite(out.max()):  # NaN fails the first test
        return
    i = int(np.flatnonzero(~(np.isfinite(out) & (out >= 0)))[0])
    raise InputError(f"{where}: input.row_weight column {column!r}, row {first_row + i}: weight {float(out[i])!r} is "
                     "not a finite number >= 0; fix the row, or give it weight 0 to leave it out of the fit")


def _column_into(out: np.ndarray, arr: pa.ChunkedArray | pa.Array, shift, inv_scale) -> None:
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    if arr.null_count:
        arr = pc.cast(arr, pa.float64()).fill_null(np.nan)
    values = arr.to_numpy(zero_copy_only=False)
    if shift is None:
        out[:] = values
    else:
        # dtype: the subtraction itself in float64 (numpy 1.x would do float32 - scalar in float32)
        np.subtract(values, shift, out=out, dtype=np.float64, casting="unsafe")
        if inv_scale is not None:
            out *= inv_scale


def _vector_array(arr, n_features: int, where: str, first_row: int) -> np.ndarray:
    """Reshape a list column into ``(n, d)``; ``where`` names file and column for errors."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    if arr.null_count:
        row = first_row + int(pc.index(pc.is_null(arr), True).as_py())
        raise InputError(f"{where}: row {row} is null; every row needs a vector: drop or fill the "
                         "null rows")
    if pa.types.is_fixed_size_list(arr.type):
        if arr.type.list_size != n_features:
            raise InputError(f"{where}: holds vectors of {arr.type.list_size} values, expected "
                             f"{n_features}; every vector needs the same length")
    else:
        lengths = pc.list_value_length(arr).to_numpy(zero_copy_only=False)
        bad = np.flatnonzero(lengths != n_features)
        if bad.size:
            raise InputError(
                f"{where}: row {first_row + int(bad[0])} has {int(lengths[bad[0]])} values, expected "
                f"{n_features} like the first row; every vector needs the same length: fix or drop "
                "the ragged rows"
            )
    flat = arr.flatten()
    if flat.null_count:
        flat = pc.cast(flat, pa.float64()).fill_null(np.nan)
    values = flat.to_numpy(zero_copy_only=False)
    return values.reshape(len(arr), n_features)


def batch_to_array(batch, spec: ReadSpec, where: str, shift=None, inv_scale=None,
                   first_row: int = 0) -> np.ndarray:
    """Decode a record batch (or table) to an ``(n, d)`` float64 array.

    Parameters
    ----------
    batch : pyarrow.RecordBatch or pyarrow.Table
        Holds the columns of ``spec``.
    spec : ReadSpec
    where : str
        The file (or frame) named in error messages.
    shift, inv_scale : ndarray of shape (d,), optional
        When given, the result is ``(x - shift) * inv_scale``, computed in the
        same write as the decode.
    first_row : int
        Row number of the batch's first row in its file, for error messages.

    Returns
    -------
    ndarray
        float64, Fortran-ordered for scalar columns, C-ordered for a vector
        column.  Missing values (nulls) are NaN.

    Raises
    ------
    InputError
        A vector column has a null row or a vector of the wrong length.
    """
    n = batch.num_rows
    if spec.weight_column:
        return _with_weights(batch, spec, where, shift, inv_scale, first_row)
    if spec.vector_column:
        x = _vector_array(batch.column(spec.vector_column), spec.n_features,
                          f"{where}: column {spec.vector_column!r}", first_row)
        if x.dtype != np.float64 or shift is not None:
            x64 = np.empty(x.shape, dtype=np.float64)
            if shift is None:
                x64[...] = x
            else:
                np.subtract(x, shift, out=x64, dtype=np.float64, casting="unsafe")
                if inv_scale is not None:
                    x64 *= inv_scale
            x = x64
        return x
    out = np.empty((n, spec.n_features), dtype=np.float64, order="F")
    for j, name in enumerate(spec.columns):
        _column_into(
            out[:, j],
            batch.column(name),
            None if shift is None else shift[j],
            None if inv_scale is None else inv_scale[j],
        )
    return out


def _with_weights(batch, spec: ReadSpec, where: str, shift, inv_scale, first_row: int) -> np.ndarray:
    """The features and, as one more column, the row weights, in one Fortran-ordered buffer."""
    d = spec.n_features
    out = np.empty((batch.num_rows, d + 1), dtype=np.float64, order="F")
    plain = ReadSpec(spec.columns, spec.vector_column, d, spec.batch_rows, spec.keep)
    if spec.vector_column:
        out[:, :d] = batch_to_array(batch, plain, where, shift, inv_scale, first_row)
    else:
        for j, name in enumerate(spec.columns):
            _column_into(out[:, j], batch.column(name), None if shift is None else shift[j],
                         None if inv_scale is None else inv_scale[j])
    _weights_into(out[:, d], batch.column(spec.weight_column), where, spec.weight_column, first_row)
    return out


@functools.lru_cache(maxsize=256)
def _row_group_starts(path: str, mtime_ns: int) -> tuple[int, ...]:
    """First row of each row group, read once per file and process (not once per block)."""
    md = pq.read_metadata(path)
    sizes = [md.row_group(i).num_rows for i in range(md.num_row_groups)]
    return tuple(int(v) for v in np.cumsum([0] + sizes[:-1]))


def open_file(path: str) -> pq.ParquetFile:
    """Open a Parquet file for streaming; an unreadable one raises :class:`InputError` naming it."""
    try:
        # pre_buffer would hold the whole row group; a small read buffer streams the pages
        return pq.ParquetFile(path, pre_buffer=False, buffer_size=1 << 16)
    except (OSError, pa.ArrowException) as e:
        raise InputError(f"{path}: cannot be read as Parquet ({one_line(e)}); re-copy the file, or "
                         "leave it out of input.paths") from e


def _check_columns(path: str, pf: pq.ParquetFile, columns) -> None:
    present = set(pf.schema_arrow.names)  # schema_arrow is rebuilt on every access: read it once
    gone = [c for c in columns if c not in present]
    if gone:
        raise InputError(f"{path}: column {gone[0]!r} is gone; the file changed after the run was "
                         "planned, start the run again")


def _decode_error(path: str, row_group, e: BaseException) -> InputError:
    return InputError(f"{path} (row group {row_group}): cannot be decoded ({one_line(e)}); the file "
                      "may be truncated or corrupt: re-copy it, or leave it out of input.paths")


def _parallel_stream(path: str, row_group: int, spec: ReadSpec, shift, inv_scale,
                     first_row: int = 0) -> Iterator[np.ndarray]:
    """Stream a row group of scalar columns with ``spec.threads`` pyarrow readers at once.

    Each thread owns an interleaved share of the columns and its own file
    handle; all use the same batch size, so their batches cover the same rows
    and fill one Fortran-ordered float64 buffer.  pyarrow and the numpy copy
    release the GIL, so the shares decode on separate cores.  The row weights
    (``spec.weight_column``) join the last share and fill the last column;
    ``first_row`` (the row group's first row in its file) names a bad weight's row.
    """
    k = spec.threads
    d = spec.n_features
    names = spec.read_columns  # features, then the weight column
    shares = [list(range(i, len(names), k)) for i in range(k)]
    streams = [open_file(path).iter_batches(batch_size=spec.batch_rows, row_groups=[row_group],
                                            columns=[names[j] for j in share], use_threads=False)
               for share in shares]
    row = first_row

    def fill(i: int, out: np.ndarray) -> int:
        batch = next(streams[i], None)
        if batch is None:
            return 0
        for col, j in zip(batch.columns, shares[i]):
            if j == d:  # the row weights: checked, never transformed
                _weights_into(out[:batch.num_rows, d], col, path, spec.weight_column, row)
                continue
            _column_into(out[:batch.num_rows, j], col, None if shift is None else shift[j],
                         None if inv_scale is None else inv_scale[j])
        return batch.num_rows

    with ThreadPoolExecutor(k, thread_name_prefix="pcapipe-decode") as pool:
        while True:
            out = np.empty((spec.batch_rows, len(names)), order="F")
            rows = list(pool.map(fill, range(k), [out] * k))
            if not rows[0]:
                return
            row += rows[0]
            yield out if rows[0] == spec.batch_rows else out[:rows[0]]


def _sliced_block(path: str, row_group: int, n_rows: int, spec: ReadSpec, shift, inv_scale) -> np.ndarray:
    """A row group of scalar columns decoded whole-height into one Fortran-ordered float64 buffer.

    Columns are read ``SLICE_BYTES`` of float64 at a time (one pyarrow call
    per slice; ``spec.threads`` readers take every k-th slice, each with its
    own file handle), so pyarrow holds one slice at a time per thread.
    """
    out = np.empty((n_rows, spec.n_features), order="F")
    step = max(1, SLICE_BYTES // (8 * max(1, n_rows)))
    starts = list(range(0, len(spec.columns), step))
    k = max(1, min(spec.threads, len(starts)))

    def fill(i: int) -> None:
        pf = open_file(path)
        for j0 in starts[i::k]:
            table = pf.read_row_group(row_group, columns=list(spec.columns[j0:j0 + step]), use_threads=False)
            if table.num_rows != n_rows:
                raise InputError(f"{path} (row group {row_group}): holds {table.num_rows} rows, the footer "
                                 f"said {n_rows}; the file changed after the run was planned, start it again")
            for j, col in enumerate(table.columns, j0):
                _column_into(out[:, j], col, None if shift is None else shift[j],
                             None if inv_scale is None else inv_scale[j])

    if k == 1:
        fill(0)
    else:
        with ThreadPoolExecutor(k, thread_name_prefix="pcapipe-decode") as pool:
            list(pool.map(fill, range(k)))
    return out


def _sliced(rg_meta, spec: ReadSpec) -> bool:
    """Whether a row group is decoded whole, by column slices (see :class:`ReadSpec`)."""
    return (not (spec.vector_column or spec.weight_column)
            and 8 * rg_meta.num_rows * spec.n_features <= spec.sliced_bytes)


def iter_block(path: str, row_group: int, spec: ReadSpec, shift=None, inv_scale=None,
               with_keep: bool = False, whole: bool = False,
               pf: pq.ParquetFile | None = None) -> Iterator[tuple[np.ndarray, pa.RecordBatch | None]]:
    """Stream one row group as decoded batches.

    ``whole`` reads the row group in one call whatever its size (for a caller
    that keeps the whole decoded block anyway); otherwise a row group is
    decoded whole by column slices when ``spec.sliced_bytes`` allows (one
    batch, the keep columns beside it), else read in one call up to
    ``spec.whole_bytes``, else streamed (column-parallel when
    ``spec.threads`` > 1 and there are no keep columns to carry).

    Yields ``(x, keep_batch)`` where ``keep_batch`` holds the keep columns
    when ``with_keep`` is true (else None).  ``pf`` is the file already
    opened by :func:`open_file` (a small file's cost is mostly its opening).

    Raises
    ------
    InputError
        The file cannot be opened or decoded (truncated, corrupt pages), lost
        a column since it was planned, or holds a bad vector.
    """
    pf = pf or open_file(path)
    columns = list(dict.fromkeys([*spec.read_columns, *(spec.keep if with_keep else ())]))
    _check_columns(path, pf, columns)
    try:
        # Only vector and weight errors name a row, so other blocks skip the row-group offsets.
        named = spec.vector_column or spec.weight_column
        row = _row_group_starts(path, os.stat(path).st_mtime_ns)[row_group] if named else 0
        meta = pf.metadata.row_group(row_group)
        if not whole and _sliced(meta, spec):
            x = _sliced_block(path, row_group, meta.num_rows, spec, shift, inv_scale)
            # keep columns (identifiers, a time) are few: read in one call beside the block
            yield x, pf.read_row_group(row_group, columns=list(spec.keep)) if with_keep else None
            return
        if whole or meta.total_byte_size <= spec.whole_bytes:
            table = pf.read_row_group(row_group, columns=columns, use_threads=spec.threads > 1)
            batches = (table.slice(i, spec.batch_rows) for i in range(0, table.num_rows, spec.batch_rows))
        elif (spec.threads > 1 and not (with_keep or spec.vector_column)
              and len(spec.columns) >= 2 * spec.threads):
            for x in _parallel_stream(path, row_group, spec, shift, inv_scale, row):
                yield x, None
            return
        else:
            batches = pf.iter_batches(batch_size=spec.batch_rows, row_groups=[row_group],
                                      columns=columns, use_threads=False)
        for batch in batches:
            x = batch_to_array(batch, spec, path, shift, inv_scale, first_row=row)
            row += batch.num_rows
            keep = batch.select(list(spec.keep)) if with_keep else None
            yield x, keep
    except (OSError, pa.ArrowException) as e:
        raise _decode_error(path, row_group, e) from e


def iter_file(path: str, row_groups, spec: ReadSpec, shift=None, inv_scale=None,
              with_keep: bool = False, pf: pq.ParquetFile | None = None):
    """Stream the given row groups of one file in order (row order kept), opening it once."""
    pf = pf or open_file(path)
    for rg in row_groups:
        yield from iter_block(path, rg, spec, shift, inv_scale, with_keep, pf=pf)


def _small_table(piece, spec: ReadSpec) -> pa.Table:
    pf = open_file(piece.path)
    try:
        table = pf.read_row_group(piece.row_group, columns=spec.read_columns, use_threads=False)
    except (OSError, pa.ArrowException) as e:
        raise _decode_error(piece.path, piece.row_group, e) from e
    if table.num_columns != len(spec.read_columns):  # pyarrow leaves out a name it does not find
        _check_columns(piece.path, pf, spec.read_columns)
    return table


def _check_weights(table: pa.Table, piece, spec: ReadSpec) -> None:
    """The row weights of one small row group, checked with its file and first row for the error message."""
    values = np.empty(table.num_rows)
    try:
        _weights_into(values, table.column(spec.weight_column), piece.path, spec.weight_column, 0)
    except InputError:  # only now read where the row group starts (a footer read per file otherwise)
        first = _row_group_starts(piece.path, os.stat(piece.path).st_mtime_ns)[piece.row_group]
        _weights_into(values, table.column(spec.weight_column), piece.path, spec.weight_column, first)
        raise


def _gathered(tables: list, spec: ReadSpec, shift, inv_scale) -> Iterator[np.ndarray]:
    """Decode small row groups (of several files) as full batches: one Arrow concat, not one decode each."""
    try:
        table = pa.concat_tables(tables, promote_options="permissive")
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # types that do not unify: decode one by one
        for t in tables:
            yield batch_to_array(t, spec, "input", shift, inv_scale)
        return
    for i in range(0, table.num_rows, spec.batch_rows):
        yield batch_to_array(table.slice(i, spec.batch_rows), spec, "input", shift, inv_scale)


def iter_task(pieces, spec: ReadSpec, shift=None, inv_scale=None) -> Iterator[np.ndarray]:
    """Decoded batches of one task's row groups (:class:`pcapipe.layout.Piece`), in order.

    Row groups smaller than a batch (and small enough to read whole) are
    gathered until a batch is full; the others are streamed by
    :func:`iter_block`.  A vector column is decoded file by file, so that its
    errors name the file and row; gathered row weights are checked row group
    by row group before they are gathered, for the same reason.
    """
    pending, rows = [], 0
    gather = not spec.vector_column
    for p in pieces:
        if gather and p.n_rows < spec.batch_rows and p.nbytes <= spec.whole_bytes:
            pending.append(_small_table(p, spec))
            if spec.weight_column:  # checked here, where the error can still name the file and row
                _check_weights(pending[-1], p, spec)
            rows += p.n_rows
            if rows >= spec.batch_rows:
                yield from _gathered(pending, spec, shift, inv_scale)
                pending, rows = [], 0
            continue
        if pending:
            yield from _gathered(pending, spec, shift, inv_scale)
            pending, rows = [], 0
        for x, _ in iter_block(p.path, p.row_group, spec, shift, inv_scale):
            yield x
    if pending:
        yield from _gathered(pending, spec, shift, inv_scale)
