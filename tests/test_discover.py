"""Input discovery: which files a pattern names (skip rule for _ and ., one read per real file)."""

from __future__ import annotations

import os

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from pcapipe.discover import find_inputs

LAYOUT = ("d/a.parquet", "d/_b.parquet", "d/.c.parquet", "d/_tmp/e.parquet", "d/sub/f.parquet",
          "d/.hidden/g.parquet", "_staging/h.parquet")


@pytest.fixture
def tree(tmp_path):
    for rel in LAYOUT:
        os.makedirs(os.path.dirname(tmp_path / rel), exist_ok=True)
        pq.write_table(pa.table({"x": [1.0]}), tmp_path / rel)
    return tmp_path


@pytest.mark.parametrize("patterns, files, skipped", [
    # a directory: _ and . names below it are left out, at any depth
    (["d"], ["d/a.parquet", "d/sub/f.parquet"], ["d/.c.parquet", "d/.hidden/g.parquet", "d/_b.parquet",
                                                   "d/_tmp/e.parquet"]),
    # a recursive glob follows the same rule
    (["d/**/*.parquet"], ["d/a.parquet", "d/sub/f.parquet"], ["d/_b.parquet", "d/_tmp/e.parquet"]),
    # a glob that asks for _ names gets them
    (["d/_*.parquet"], ["d/_b.parquet"], []),
    # names spelled out are read: a file and a directory starting with _
    (["d/_b.parquet", "_staging"], ["_staging/h.parquet", "d/_b.parquet"], []),
])
def test_skip_rule(tree, patterns, files, skipped):
    found = find_inputs(patterns, str(tree))
    assert list(found.files) == [str(tree / f) for f in files]
    assert list(found.skipped) == [str(tree / f) for f in skipped]


def test_one_read_per_real_file(tree):
    os.symlink(tree / "d" / "a.parquet", tree / "d" / "sub" / "link.parquet")
    os.link(tree / "d" / "sub" / "f.parquet", tree / "d" / "hard.parquet")
    os.symlink(tree / "d", tree / "d" / "sub" / "loop")  # a directory loop must end
    os.symlink("a.parquet", tree / "d" / "0.parquet")  # sorts first, but the file's own name is kept
    found = find_inputs(["d", "d/a.parquet"], str(tree))
    assert list(found.files) == [str(tree / "d" / "a.parquet"), str(tree / "d" / "hard.parquet")]
    assert list(found.duplicates) == [(str(tree / "d/0.parquet"), str(tree / "d/a.parquet")),
                                      (str(tree / "d/sub/f.parquet"), str(tree / "d/hard.parquet")),
                                      (str(tree / "d/sub/link.parquet"), str(tree / "d/a.parquet"))]


def test_only_skipped_files_is_an_error_that_says_so(tree):
    from pcapipe.errors import InputError

    with pytest.raises(InputError, match=r"'d/\*/e.parquet' matches no file.*; 1 file.* starting with _ or . "
                                         "were skipped"):
        find_inputs(["d/a.parquet", "d/*/e.parquet"], str(tree))
