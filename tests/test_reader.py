"""Decoding Parquet blocks into float64 arrays: layouts, dtypes, nulls, batching, the fused transform."""

from __future__ import annotations

import os
import struct

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from pcapipe.errors import InputError
from pcapipe.reader import ReadSpec, batch_to_array, iter_block, iter_file
from conftest import count_stream_calls, write_parquet


def _spec(d, vector=False, batch_rows=1 << 16, keep=()):
    columns = ("emb",) if vector else tuple(f"f{j}" for j in range(d))
    return ReadSpec(columns, "emb" if vector else "", d, batch_rows, tuple(keep))


def _read_all(path, spec, **kw):
    groups = range(pq.ParquetFile(path).metadata.num_row_groups)
    return np.concatenate([x for x, _ in iter_file(path, groups, spec, **kw)], axis=0)


@pytest.fixture
def x(rng):
    return rng.standard_normal((37, 5))


def test_fixed_and_list_vectors_decode_alike(tmp_path, x):
    (fixed,) = write_parquet(str(tmp_path / "fixed"), x, vector="fixed", row_group=10)
    (lst,) = write_parquet(str(tmp_path / "list"), x, vector="list", row_group=10)
    (scalar,) = write_parquet(str(tmp_path / "scalar"), x, row_group=10)
    a = _read_all(fixed, _spec(5, vector=True))
    b = _read_all(lst, _spec(5, vector=True))
    c = _read_all(scalar, _spec(5))
    # every layout holds the same float64 values, exactly
    np.testing.assert_array_equal(a, x)
    np.testing.assert_array_equal(b, x)
    np.testing.assert_array_equal(c, x)


@pytest.mark.parametrize("vector", [None, "fixed", "list"])
def test_float32_becomes_float64(tmp_path, x, vector):
    (path,) = write_parquet(str(tmp_path), x, vector=vector, dtype=np.float32)
    got = _read_all(path, _spec(5, vector=vector is not None))
    assert got.dtype == np.float64
    # exactly the float32 values, widened (no rounding on the way)
    np.testing.assert_array_equal(got, x.astype(np.float32).astype(np.float64))


def test_scalar_layout_is_fortran(tmp_path, x):
    (path,) = write_parquet(str(tmp_path), x)
    (got, _), = list(iter_block(path, 0, _spec(5)))
    assert got.flags.f_contiguous


def test_nulls_become_nan_in_scalar_columns():
    table = pa.table({"f0": pa.array([1.0, None, 3.0]), "f1": pa.array([None, 5, 6], pa.int32())})
    got = batch_to_array(table, _spec(2), "t")
    expected = np.array([[1.0, np.nan], [np.nan, 5.0], [3.0, 6.0]])
    np.testing.assert_array_equal(got, expected)  # assert_array_equal treats NaN == NaN


def test_null_entries_inside_vectors_become_nan():
    table = pa.table({"emb": pa.array([[1.0, None], [3.0, 4.0]], pa.list_(pa.float64(), 2))})
    got = batch_to_array(table, _spec(2, vector=True), "t")
    np.testing.assert_array_equal(got, [[1.0, np.nan], [3.0, 4.0]])


@pytest.mark.parametrize("batch_rows", [1, 7, 64, 1000])
def test_batch_rows_bounds_batches(tmp_path, rng, batch_rows):
    data = rng.standard_normal((300, 3))
    (path,) = write_parquet(str(tmp_path), data)  # one row group of 300 rows
    sizes, parts = [], []
    for got, _ in iter_block(path, 0, _spec(3, batch_rows=batch_rows)):
        sizes.append(got.shape[0])
        parts.append(got)
    assert max(sizes) <= batch_rows
    assert sum(sizes) == 300
    assert len(sizes) == -(-300 // batch_rows)
    np.testing.assert_array_equal(np.concatenate(parts), data)


@pytest.mark.parametrize("vector", [None, "fixed", "list"])
def test_fused_shift_and_scale(tmp_path, x, vector):
    (path,) = write_parquet(str(tmp_path), x, vector=vector, row_group=16)
    shift = np.array([0.5, -1.0, 2.0, 0.0, 1e3])
    inv_scale = np.array([2.0, 0.5, 1.0, 4.0, 1e-3])
    spec = _spec(5, vector=vector is not None, batch_rows=8)
    got = _read_all(path, spec, shift=shift, inv_scale=inv_scale)
    np.testing.assert_allclose(got, (x - shift) * inv_scale, rtol=1e-15, atol=0)
    # shift alone (scale = false)
    np.testing.assert_allclose(_read_all(path, spec, shift=shift), x - shift, rtol=1e-15, atol=0)


def test_integer_columns_with_shift(tmp_path):
    path = str(tmp_path / "i.parquet")
    pq.write_table(pa.table({"f0": np.arange(5, dtype=np.int64), "f1": np.arange(5, dtype=np.int8)}), path)
    got = _read_all(path, _spec(2), shift=np.array([2.0, 0.5]), inv_scale=np.array([1.0, 2.0]))
    np.testing.assert_array_equal(got, np.c_[np.arange(5) - 2.0, (np.arange(5) - 0.5) * 2.0])


def test_keep_columns_come_with_rows(tmp_path, x):
    ids = np.arange(100, 137)
    (path,) = write_parquet(str(tmp_path), x, keep={"id": ids}, row_group=10)
    spec = _spec(5, batch_rows=4, keep=("id",))
    got_ids = []
    for _, keep in iter_file(path, range(4), spec, with_keep=True):
        got_ids += keep.column("id").to_pylist()
    assert got_ids == ids.tolist()
    assert all(k is None for _, k in iter_block(path, 0, spec))


# ------------------------------------------------------------ errors while decoding

def _vector_file(path, rows, row_group):
    pq.write_table(pa.table({"emb": pa.array(rows)}), path, row_group_size=row_group)
    return str(path)


def test_ragged_row_named_by_its_row_in_the_file(tmp_path):
    rows = [[float(i), 1.0, 2.0] for i in range(30)]
    rows[23] = [1.0, 2.0, 3.0, 4.0]
    path = _vector_file(tmp_path / "r.parquet", rows, row_group=10)
    spec = _spec(3, vector=True, batch_rows=4)
    # row 23 is in row group 2 (rows 20-29), in its first batch (rows 20-23)
    with pytest.raises(InputError) as info:
        list(iter_block(path, 2, spec))
    msg = str(info.value)
    assert "r.parquet: column 'emb': row 23 has 4 values, expected 3" in msg
    assert "fix or drop" in msg
    # the other row groups are fine
    assert sum(b.shape[0] for b, _ in iter_block(path, 1, spec)) == 10


def test_null_vector_row_named(tmp_path):
    rows = [[float(i), 1.0] for i in range(12)]
    rows[9] = None
    path = _vector_file(tmp_path / "n.parquet", rows, row_group=6)
    with pytest.raises(InputError, match=r"n\.parquet: column 'emb': row 9 is null; .*drop or fill"):
        list(iter_block(path, 1, _spec(2, vector=True, batch_rows=2)))


def test_fixed_size_of_wrong_width():
    table = pa.table({"emb": pa.array([[1.0, 2.0]], pa.list_(pa.float64(), 2))})
    with pytest.raises(InputError, match="holds vectors of 2 values, expected 3"):
        batch_to_array(table, _spec(3, vector=True), "t")


def test_corrupt_pages_give_input_error(tmp_path, x):
    (path,) = write_parquet(str(tmp_path), x)
    raw = bytearray(open(path, "rb").read())
    # Parquet layout: "PAR1", pages, footer, 4-byte little-endian footer length, "PAR1"
    footer = struct.unpack("<I", raw[-8:-4])[0]
    raw[4: len(raw) - 8 - footer] = b"\xab" * (len(raw) - 12 - footer)
    with open(path, "wb") as f:
        f.write(raw)
    with pytest.raises(InputError) as info:
        list(iter_block(path, 0, _spec(5)))
    msg = str(info.value)
    assert "(row group 0): cannot be decoded" in msg and "re-copy it" in msg
    assert "\n" not in msg
    assert info.value.__cause__ is not None


def test_file_replaced_after_planning(tmp_path, x):
    (path,) = write_parquet(str(tmp_path), x)
    pq.write_table(pa.table({"other": [1.0]}), path)
    with pytest.raises(InputError, match="column 'f0' is gone; the file changed"):
        list(iter_block(path, 0, _spec(5)))


def test_small_file_replaced_after_planning(tmp_path):
    # small row groups are gathered into one batch; a lost column is still named
    from pcapipe.layout import Piece
    from pcapipe.reader import iter_task

    paths = [str(tmp_path / f"p{i}.parquet") for i in range(2)]
    for p in paths:
        pq.write_table(pa.table({"f0": [1.0, 2.0], "f1": [3.0, 4.0]}), p)
    pieces = [Piece(i, p, 0, 2, 32, 64) for i, p in enumerate(paths)]
    assert np.array_equal(np.vstack(list(iter_task(pieces, _spec(2)))), [[1, 3], [2, 4], [1, 3], [2, 4]])
    pq.write_table(pa.table({"f0": [1.0, 2.0]}), paths[1])
    with pytest.raises(InputError, match=r"p1\.parquet: column 'f1' is gone; the file changed"):
        list(iter_task(pieces, _spec(2)))


def test_file_not_parquet(tmp_path):
    path = str(tmp_path / "junk.parquet")
    with open(path, "wb") as f:
        f.write(os.urandom(64))
    with pytest.raises(InputError, match=r"junk\.parquet: cannot be read as Parquet"):
        list(iter_block(path, 0, _spec(1)))


# -- row weights on the fast paths: small row groups gathered, one row group decoded column-parallel ---
def _weighted_spec(d, batch_rows, threads=1, whole_bytes=64 << 20):
    return ReadSpec(tuple(f"f{j}" for j in range(d)), "", d, batch_rows, weight_column="w", threads=threads,
                    whole_bytes=whole_bytes)


def _pieces(paths):
    from pcapipe.layout import Piece

    return [Piece(i, p, rg, pq.ParquetFile(p).metadata.row_group(rg).num_rows, 1, 1)
            for i, p in enumerate(paths) for rg in range(pq.ParquetFile(p).metadata.num_row_groups)]


def test_weighted_small_row_groups_are_gathered_and_a_bad_weight_still_names_its_file_and_row(tmp_path, rng):
    from pcapipe.reader import iter_task

    x = rng.standard_normal((180, 3))
    w = rng.uniform(0, 2, 180)
    paths = write_parquet(tmp_path / "d", x, files=6, keep={"w": w})  # 6 files of 30 rows
    batches = list(iter_task(_pieces(paths), _weighted_spec(3, 64)))
    # gathered across files (3 x 30 rows, then sliced at 64), not six batches of 30
    assert [b.shape for b in batches] == [(64, 4), (26, 4), (64, 4), (26, 4)]
    np.testing.assert_array_equal(np.concatenate(batches), np.column_stack([x, w]))
    w[3 * 30 + 7] = -1.0  # the 4th file, its row 7
    paths = write_parquet(tmp_path / "bad", x, files=6, keep={"w": w})
    with pytest.raises(InputError, match=r"part-003\.parquet: input\.row_weight column 'w', row 7: weight -1\.0"):
        list(iter_task(_pieces(paths), _weighted_spec(3, 64)))


def test_weighted_row_group_decodes_column_parallel_like_serial(tmp_path, rng, monkeypatch):
    from pcapipe import reader

    x = rng.standard_normal((5000, 8))
    w = rng.uniform(0, 2, 5000)
    (path,) = write_parquet(tmp_path / "d", x, keep={"w": w}, row_group=2000)  # row groups of 2000, 2000, 1000
    calls = count_stream_calls(monkeypatch)
    serial = list(reader.iter_task(_pieces([path]), _weighted_spec(8, 700, threads=1, whole_bytes=0)))
    assert calls == []
    parallel = list(reader.iter_task(_pieces([path]), _weighted_spec(8, 700, threads=2, whole_bytes=0)))
    assert [rg for _, rg in calls] == [0, 1, 2]  # every row group streamed by two readers at once
    assert [b.shape for b in parallel] == [b.shape for b in serial]
    np.testing.assert_array_equal(np.concatenate(parallel), np.column_stack([x, w]))
    w[2000 + 1456] = np.nan  # second row group: the error names the row in the file
    (path,) = write_parquet(tmp_path / "bad", x, keep={"w": w}, row_group=2000)
    with pytest.raises(InputError, match=r"input\.row_weight column 'w', row 3456: weight nan"):
        list(reader.iter_task(_pieces([path]), _weighted_spec(8, 700, threads=2, whole_bytes=0)))
