"""Planning: file resolution, feature selection, schema checks and blocks, from footers only."""

from __future__ import annotations

import logging
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from pcapipe.config import load_config
from pcapipe.errors import InputError
from pcapipe.plan import Block, feature_names_for, make_plan, resolve_inputs
from conftest import make_config, write_parquet


def _plan(paths, tmp_path, **input_keys):
    cfg = make_config(paths, tmp_path / "out", input=input_keys)
    cfg["input"]["paths"] = paths if isinstance(paths, list) else [paths]
    return make_plan(load_config(cfg))


def _write(path, **columns):
    os.makedirs(os.path.dirname(path), exist_ok=True)
    pq.write_table(pa.table(columns), path)
    return str(path)


# ------------------------------------------------------------ resolve_inputs

def test_resolve_sorted_files_dirs_globs(tmp_path):
    for name in ("c", "a", "b"):
        _write(str(tmp_path / "d" / f"{name}.parquet"), x=[1.0])
    _write(str(tmp_path / "d" / "sub" / "z.parquet"), x=[1.0])
    _write(str(tmp_path / "e" / "y.parquet"), x=[1.0])
    with open(tmp_path / "d" / "README.txt", "w") as f:
        f.write("not data")
    got = resolve_inputs(["e/y.parquet", "d", "d/*.parquet"], str(tmp_path))
    # a directory contributes its *.parquet files recursively; duplicates merge; order is sorted
    assert got == sorted(str(tmp_path / p) for p in
                         ("d/a.parquet", "d/b.parquet", "d/c.parquet", "d/sub/z.parquet", "e/y.parquet"))


def test_resolve_glob_matching_dataset_directory(tmp_path):
    # Datasets written as table.parquet/part-*.parquet are directories with a .parquet name.
    _write(str(tmp_path / "t1.parquet" / "part-0.parquet"), x=[1.0])
    _write(str(tmp_path / "t2.parquet" / "part-0.parquet"), x=[1.0])
    got = resolve_inputs(["*.parquet"], str(tmp_path))
    assert got == [str(tmp_path / "t1.parquet" / "part-0.parquet"), str(tmp_path / "t2.parquet" / "part-0.parquet")]


@pytest.mark.parametrize("pattern", [
    "missing.parquet",   # a plain file name
    "nothere/*.parquet",  # a glob
    "emptydir",          # a directory without Parquet files
])
def test_resolve_pattern_matching_nothing(tmp_path, pattern):
    os.makedirs(tmp_path / "emptydir")
    with pytest.raises(InputError, match=rf"input\.paths: '{pattern.replace('*', '[*]')}' matches no file"):
        resolve_inputs([pattern], str(tmp_path))


def test_resolve_absolute_and_home(tmp_path, monkeypatch):
    path = _write(str(tmp_path / "a.parquet"), x=[1.0])
    assert resolve_inputs([path], "/nonexistent") == [path]
    monkeypatch.setenv("HOME", str(tmp_path))
    assert resolve_inputs(["~/a.parquet"], "/nonexistent") == [path]


# ------------------------------------------------------------ features

def _columns_file(tmp_path):
    n = 12
    rng = np.random.default_rng(0)
    return _write(str(tmp_path / "data" / "a.parquet"),
                  id=np.arange(n), ch_0=rng.standard_normal(n), ch_1=rng.standard_normal(n),
                  ch_bad=rng.standard_normal(n), other=rng.integers(0, 5, n).astype(np.int32),
                  name=[f"n{i}" for i in range(n)])


@pytest.mark.parametrize("keys, expected", [
    # default: every numeric column (integers included) not in keep, in schema order
    ({"keep": ["id"]}, ("ch_0", "ch_1", "ch_bad", "other")),
    # default without keep: the integer id is a feature too
    ({}, ("id", "ch_0", "ch_1", "ch_bad", "other")),
    # by glob
    ({"features": ["ch_*"]}, ("ch_0", "ch_1", "ch_bad")),
    # glob minus exclude
    ({"features": ["ch_*"], "exclude": ["*bad"]}, ("ch_0", "ch_1")),
    # several patterns keep the schema's order, not the patterns'
    ({"features": ["other", "ch_0"]}, ("ch_0", "other")),
    # default with exclude
    ({"keep": ["id"], "exclude": ["ch_*"]}, ("other",)),
])
def test_feature_selection(tmp_path, keys, expected):
    plan = _plan(_columns_file(tmp_path), tmp_path, **keys)
    assert plan.features == expected
    assert plan.columns == expected
    assert plan.keep == tuple(keys.get("keep", ()))
    assert plan.vector_column == ""


def test_integer_columns_accepted(tmp_path):
    path = _write(str(tmp_path / "i.parquet"), a=np.arange(5, dtype=np.int8), b=np.arange(5, dtype=np.uint64),
                  c=np.arange(5, dtype=np.float32))
    plan = _plan(path, tmp_path)
    assert plan.features == ("a", "b", "c")
    assert plan.itemsize == 8  # the widest column, uint64


def test_exclude_matching_nothing_warns(tmp_path, caplog):
    with caplog.at_level(logging.WARNING, logger="pcapipe"):
        plan = _plan(_columns_file(tmp_path), tmp_path, features=["ch_*"], exclude=["zzz*"])
    assert plan.features == ("ch_0", "ch_1", "ch_bad")
    assert "'zzz*' removes no feature column" in caplog.text


@pytest.mark.parametrize("keys, words", [
    # a pattern matching no column lists the columns
    ({"features": ["x*"]}, ["'x*' matches no column", "columns are id, ch_0", "fix input.features"]),
    # a pattern matching only a keep column says so
    ({"features": ["id"], "keep": ["id"]}, ["'id' matches only input.keep column(s) id"]),
    # a string column named
    ({"features": ["name"]}, ["'name' has type string, not numeric", "cast it"]),
    # everything excluded
    ({"exclude": ["*"]}, ["no numeric feature columns selected", "input.exclude=['*']"]),
    # keep column that does not exist
    ({"keep": ["ident"]}, ["input.keep column 'ident' does not exist", "fix or remove it in input.keep"]),
])
def test_feature_errors(tmp_path, keys, words):
    with pytest.raises(InputError) as info:
        _plan(_columns_file(tmp_path), tmp_path, **keys)
    for word in words:
        assert word in str(info.value)
    assert "a.parquet" in str(info.value)


@pytest.mark.parametrize("keep, components, clash", [
    ("PC2", 2, True),      # written as the second score column
    ("PC3", 2, False),     # not written with k = 2
    ("PC3", 0.5, True),    # a fraction of the variance may need any k
    ("pc1", 2, False),     # column names are case-sensitive
    ("PC01", 2, False),    # not a name pcapipe writes
    ("spe", 2, True),      # a monitoring column of the scores (DESIGN.md)
])
def test_keep_column_named_like_a_score_column(tmp_path, keep, components, clash):
    path = _write(str(tmp_path / "k.parquet"), **{keep: np.arange(4), "a": np.ones(4), "b": np.arange(4.0) ** 2})
    cfg = make_config(path, tmp_path / "out", input={"keep": [keep]}, model={"components": components})
    if clash:
        with pytest.raises(InputError, match=f"input.keep: column '{keep}' has the name of a column the scores"):
            make_plan(load_config(cfg))
    else:
        assert make_plan(load_config(cfg)).keep == (keep,)


# ------------------------------------------------------------ blocks and files

def test_blocks_are_row_groups(tmp_path):
    x = np.random.default_rng(1).standard_normal((50, 3))
    paths = write_parquet(str(tmp_path / "data"), x, files=2, row_group=10)
    plan = _plan(str(tmp_path / "data"), tmp_path)
    # 25 rows per file in row groups of 10: 10, 10, 5
    assert [f.row_group_rows for f in plan.files] == [(10, 10, 5), (10, 10, 5)]
    assert [f.path for f in plan.files] == paths
    assert [f.n_rows for f in plan.files] == [25, 25]
    assert plan.n_rows == 50 and plan.n_features == 3
    assert plan.blocks[0] == Block(0, 0, paths[0], 0, 10)
    assert plan.blocks[5] == Block(5, 1, paths[1], 2, 5)
    assert [b.index for b in plan.blocks] == list(range(6))
    assert plan.total_bytes == sum(os.path.getsize(p) for p in paths)
    rec = plan.inputs_record()
    assert rec[1]["path"] == paths[1] and rec[1]["rows"] == 25 and rec[1]["bytes"] == os.path.getsize(paths[1])


def test_empty_row_groups_make_no_block(tmp_path):
    path = str(tmp_path / "e.parquet")
    schema = pa.schema([("a", pa.float64())])
    with pq.ParquetWriter(path, schema) as w:
        w.write_table(pa.table({"a": pa.array([], pa.float64())}))
        w.write_table(pa.table({"a": [1.0, 2.0, 3.0]}))
    plan = _plan(path, tmp_path)
    assert plan.files[0].row_group_rows == (0, 3)
    assert [(b.row_group, b.n_rows) for b in plan.blocks] == [(1, 3)]


def test_numeric_types_may_differ_between_files(tmp_path):
    # int64 in one file and float64 in another decode alike: accepted
    _write(str(tmp_path / "d" / "a.parquet"), v=np.arange(3, dtype=np.int64))
    _write(str(tmp_path / "d" / "b.parquet"), v=np.arange(3, dtype=np.float64))
    assert _plan(str(tmp_path / "d"), tmp_path).n_rows == 6


@pytest.mark.parametrize("second, words", [
    # a missing feature column names both files
    ({"v": np.arange(3.0)}, ["b.parquet: column 'w' is missing, but", "a.parquet has it"]),
    # a missing keep column (drift of identifiers)
    ({"w": np.arange(3.0)}, ["b.parquet: column 'id' is missing"]),
    # a type change float -> string
    ({"id": np.arange(3), "w": ["1", "2", "3"]}, ["b.parquet: column 'w' has type string", "make the types agree"]),
    # a keep column changing kind, int -> string
    ({"id": ["a", "b", "c"], "w": np.arange(3.0)}, ["column 'id' has type string"]),
])
def test_schema_drift(tmp_path, second, words):
    _write(str(tmp_path / "d" / "a.parquet"), id=np.arange(3), w=np.arange(3.0))
    _write(str(tmp_path / "d" / "b.parquet"), **second)
    with pytest.raises(InputError) as info:
        _plan(str(tmp_path / "d"), tmp_path, keep=["id"])
    for word in words:
        assert word in str(info.value)


# ------------------------------------------------------------ vector columns

@pytest.mark.parametrize("kind", ["fixed", "list"])
def test_vector_column_plan(tmp_path, kind):
    x = np.random.default_rng(2).standard_normal((8, 4)).astype(np.float32)
    write_parquet(str(tmp_path / "data"), x, vector=kind)
    plan = _plan(str(tmp_path / "data"), tmp_path, vector_column="emb")
    assert plan.columns == ("emb",)
    assert plan.features == feature_names_for("emb", 4) == ("emb[0]", "emb[1]", "emb[2]", "emb[3]")
    assert plan.vector_column == "emb"
    assert plan.itemsize == 4


def test_vector_fixed_and_list_mix_between_files(tmp_path):
    x = np.random.default_rng(3).standard_normal((6, 3))
    write_parquet(str(tmp_path / "d"), x[:3], vector="list", name="a")
    write_parquet(str(tmp_path / "d"), x[3:], vector="fixed", name="b")
    assert _plan(str(tmp_path / "d"), tmp_path, vector_column="emb").n_features == 3


@pytest.mark.parametrize("values, words", [
    # not a list
    (pa.array([1.0, 2.0]), ["has type double, expected a list", "input.features"]),
    # a list of strings
    (pa.array([["a"], ["b"]]), ["holds string, expected floats", "cast"]),
    # first row null: the length cannot be learnt
    (pa.array([None, [1.0, 2.0]]), ["row 0 is null", "drop or fill"]),
    # empty vectors
    (pa.array([[], []], pa.list_(pa.float64())), ["holds empty vectors"]),
])
def test_vector_column_errors(tmp_path, values, words):
    path = _write(str(tmp_path / "v.parquet"), emb=values)
    with pytest.raises(InputError) as info:
        _plan(path, tmp_path, vector_column="emb")
    assert "v.parquet: input.vector_column 'emb'" in str(info.value)
    for word in words:
        assert word in str(info.value)


def test_vector_column_not_a_column(tmp_path):
    path = _write(str(tmp_path / "v.parquet"), vec=pa.array([[1.0], [2.0]]))
    with pytest.raises(InputError, match=r"input\.vector_column 'emb' is not a column; columns are vec"):
        _plan(path, tmp_path, vector_column="emb")


def test_vector_fixed_size_differs_between_files(tmp_path):
    write_parquet(str(tmp_path / "d"), np.ones((2, 3)), vector="fixed", name="a")
    write_parquet(str(tmp_path / "d"), np.ones((2, 4)), vector="fixed", name="b")
    with pytest.raises(InputError, match=r"b-000\.parquet: column 'emb' has type fixed_size_list"):
        _plan(str(tmp_path / "d"), tmp_path, vector_column="emb")


@pytest.mark.parametrize("content", [b"", b"PAR1 not really"])
def test_unreadable_file(tmp_path, content):
    path = tmp_path / "bad.parquet"
    path.write_bytes(content)
    with pytest.raises(InputError, match=r"bad\.parquet: not a readable Parquet file .*re-copy it") as info:
        _plan(str(path), tmp_path)
    assert info.value.__cause__ is not None


# ------------------------------------------------------------ footers read by the planning loop

@pytest.mark.parametrize("content", [
    b"",                                             # empty
    b"PAR1 not really",                              # no footer at all
    b"PAR1" + b"\x00" * 40 + (40).to_bytes(4, "little") + b"PAR1",  # a footer of zeros: not thrift
])
def test_unreadable_later_file(tmp_path, content):
    # the planning loop reads every footer after the first itself; a bad one is still named
    _write(str(tmp_path / "d" / "a.parquet"), x=np.arange(3.0))
    (tmp_path / "d" / "b.parquet").write_bytes(content)
    with pytest.raises(InputError, match=r"b\.parquet: not a readable Parquet file .*re-copy it"):
        _plan(str(tmp_path / "d"), tmp_path)


def test_same_parquet_schema_other_arrow_type_is_checked(tmp_path):
    # int64 and duration are the same Parquet column (INT64); only the stored Arrow schema
    # tells them apart, so a file is compared by its Parquet schema *and* that metadata
    _write(str(tmp_path / "d" / "a.parquet"), x=pa.array([1, 2, 3], pa.int64()), y=np.arange(3.0))
    _write(str(tmp_path / "d" / "b.parquet"), x=pa.array([1, 2, 3], pa.duration("s")), y=np.arange(3.0))
    assert pq.ParquetFile(tmp_path / "d" / "a.parquet").metadata.schema.equals(
        pq.ParquetFile(tmp_path / "d" / "b.parquet").metadata.schema)
    with pytest.raises(InputError, match=r"b\.parquet: column 'x' has type duration\[s\], but .*int64"):
        _plan(str(tmp_path / "d"), tmp_path)


@pytest.mark.parametrize("width", [2, 1500])  # a footer of a few hundred bytes; one over 64 KiB
def test_footer_fingerprint_and_costs_from_one_read(tmp_path, width):
    from pcapipe.layout import footer_costs
    from pcapipe.plan import footer_fingerprint

    for name in ("a", "b"):
        _write(str(tmp_path / "d" / f"{name}.parquet"), **{f"c{j}": np.arange(4.0) + j for j in range(width)})
    b = str(tmp_path / "d" / "b.parquet")
    md = pq.read_metadata(b)
    assert (md.serialized_size > 64 << 10) == (width > 2)
    info = _plan(str(tmp_path / "d"), tmp_path).files[1]
    assert info.footer == footer_fingerprint(b)  # the hash of the footer's bytes as stored
    assert (info.row_group_bytes, info.row_group_stream) == footer_costs(md, [f"c{j}" for j in range(width)])
    assert (info.size, info.mtime_ns, info.n_rows) == (os.stat(b).st_size, os.stat(b).st_mtime_ns, 4)
