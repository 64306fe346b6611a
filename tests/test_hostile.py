"""Hostile input, config and output: nothing is ever lost or corrupted (issue 10).

One table, ``CASES``: each row builds a directory (data written by the suite or by
other real Parquet writers, a config, maybe a previous run or something in the
way) and runs the real command line on it.  Every row asserts the exit status,
the words of the one ``error:`` line (no traceback), that every file that was
there before is byte-identical afterwards (inputs, config, a previous run), and
that nothing new is left on disk apart from a successful run's own directory
(no stray ``.incomplete``).
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import make_config, run_cli, write_parquet, write_toml


@dataclass
class Setup:
    """What a builder made: the config to run, the run directory it names, extra CLI args."""

    config: str
    output: str
    args: tuple[str, ...] = ()


@dataclass
class Case:
    build: Callable[[str], Setup]
    status: int                        # exit status of every command
    words: tuple[str, ...] = ()        # all in the one error: line (status 2)
    commands: tuple[str, ...] = ("check", "run")
    expect: Callable | None = None     # further checks of a successful run: expect(d, setup, outputs)
    extra: dict = field(default_factory=dict)


# ---------------------------------------------------------------- helpers

def _data(d, rows=60, cols=4, seed=0, sub="data", **kw):
    x = np.random.default_rng(seed).standard_normal((rows, cols)) * np.arange(cols, 0, -1)
    return write_parquet(os.path.join(d, sub), x, **kw)


def _config(d, out, paths=("data",), where=None, **sections):
    """Write the config (relative paths resolve against its directory) and return the Setup."""
    sections.setdefault("model", {}).setdefault("components", 2)
    cfg = make_config(list(paths)[0], out, **sections)
    cfg["input"]["paths"] = list(paths)
    where = where or d
    os.makedirs(where, exist_ok=True)
    path = write_toml(os.path.join(where, "cfg.toml"), cfg)
    return Setup(path, os.path.normpath(os.path.join(where, out)))


def _previous_run(d, name="prev", components=2):
    """A finished run of pcapipe at d/name, made in-process (faster than a subprocess)."""
    _data(d, sub="old-data", seed=7)
    pcapipe.run(make_config(os.path.join(d, "old-data"), os.path.join(d, name),
                            model={"components": components}))
    return os.path.join(d, name)


def _snapshot(root) -> dict:
    """Every file and symlink below ``root``: a hash of the bytes, or the link target."""
    out = {}
    for top, dirs, files in os.walk(root):
        for name in dirs + files:
            p = os.path.join(top, name)
            rel = os.path.relpath(p, root)
            if os.path.islink(p):
                out[rel] = "link:" + os.readlink(p)
            elif os.path.isfile(p):
                with open(p, "rb") as f:
                    out[rel] = hashlib.sha256(f.read()).hexdigest()
    return out


def _manifest(output) -> dict:
    with open(os.path.join(output, "manifest.json")) as f:
        return json.load(f)


# ------------------------------------------------------ 1. data loss, 7. path in the way

def b_out_is_input_dir(d):
    _data(d)
    return _config(d, "data", output={"overwrite": True})


def b_out_is_dot(d):
    _data(d)
    return _config(d, ".", output={"overwrite": True})


def b_out_is_parent(d):
    _data(d)
    return _config(d, "..", paths=["../data/*.parquet"], where=os.path.join(d, "conf"),
                   output={"overwrite": True})


def b_out_inside_input_dir(d):
    _data(d)
    return _config(d, "data/run")


def b_out_reached_by_glob(d):
    _data(d)
    return _config(d, "data/runs/a", paths=["data/**/*.parquet"])


def b_out_contains_config(d):
    _data(d)
    os.makedirs(os.path.join(d, "proj"))
    with open(os.path.join(d, "proj", "notes.txt"), "w") as f:
        f.write("mine")
    return _config(d, "..", paths=[os.path.join(d, "data")], where=os.path.join(d, "proj", "conf"),
                   output={"overwrite": True})


def b_out_symlink_to_input(d):
    _data(d)
    os.symlink(os.path.join(d, "data"), os.path.join(d, "alias"))
    return _config(d, "alias", output={"overwrite": True})


def b_out_holds_input_via_symlink(d):
    # PCA of an earlier run's scores, written back over that run
    prev = _previous_run(d)
    os.makedirs(os.path.join(d, "data"))
    os.symlink(os.path.join(prev, "scores", "part-00000.parquet"), os.path.join(d, "data", "s.parquet"))
    return _config(d, "prev", paths=["data/*.parquet"], output={"overwrite": True})


def b_out_is_input_file(d):
    _data(d)
    return _config(d, "data/part-000.parquet", paths=["data/part-000.parquet"], output={"overwrite": True})


def b_out_holds_feature_weights(d):
    # the feature weight table is an input too
    _data(d)
    os.makedirs(os.path.join(d, "tables"))
    pq.write_table(pa.table({"feature": [f"f{i}" for i in range(4)], "weight": [1.0, 2.0, 1.0, 0.5]}),
                   os.path.join(d, "tables", "w.parquet"))
    return _config(d, "tables", model={"feature_weights": "tables/w.parquet"}, output={"overwrite": True})


def b_overwrite_foreign_dir(d):
    _data(d)
    os.makedirs(os.path.join(d, "out", "sub"))
    with open(os.path.join(d, "out", "notes.txt"), "w") as f:
        f.write("a week of work")
    return _config(d, "out", output={"overwrite": True})


def b_overwrite_foreign_manifest(d):
    _data(d)
    os.makedirs(os.path.join(d, "out"))
    with open(os.path.join(d, "out", "manifest.json"), "w") as f:
        json.dump({"project": "another tool's manifest"}, f)
    return _config(d, "out", output={"overwrite": True})


def b_existing_run_no_overwrite(d):
    _previous_run(d)
    _data(d)
    return _config(d, "prev")


def b_overwrite_previous_run(d):
    _previous_run(d, components=2)
    _data(d)
    return _config(d, "prev", model={"components": 1}, output={"overwrite": True})


def b_overwrite_symlink_to_run(d):
    # "latest" points at an earlier run: overwrite replaces the link, the earlier run stays
    _previous_run(d, components=2)
    os.symlink("prev", os.path.join(d, "latest"))
    _data(d)
    return _config(d, "latest", model={"components": 1}, output={"overwrite": True})


def e_replaced(d, setup, outputs):
    m = _manifest(setup.output)
    assert m["components"] == 1 and m["inputs"][0]["path"].startswith(os.path.join(d, "data"))


def b_bad_config_over_previous_run(d):
    _previous_run(d)
    _data(d)
    return _config(d, "prev", model={"components": 9}, output={"overwrite": True})


def b_incomplete_is_file(d):
    _data(d)
    with open(os.path.join(d, "out.incomplete"), "w") as f:
        f.write("not a directory")
    return _config(d, "out")


def b_incomplete_foreign_dir(d):
    _data(d)
    os.makedirs(os.path.join(d, "out.incomplete"))
    with open(os.path.join(d, "out.incomplete", "draft.txt"), "w") as f:
        f.write("mine")
    return _config(d, "out", output={"overwrite": True})


# ------------------------------------------- 2. writers' leftovers, 3. one file reached twice

def _rows_are(n, skipped=None, duplicates=None):
    """A successful case: check and run both see exactly n rows, and check says what it left out."""
    def expect(d, setup, outputs):
        report = outputs["check"].stdout
        assert f"rows        {n}\n" in report, report
        for word, count in (("skipped", skipped), ("duplicates", duplicates)):
            lines = [ln for ln in report.splitlines() if ln.startswith(word)]
            assert lines == ([] if count is None else [lines[0]]), report
            if count is not None:
                assert lines[0].split()[1] == str(count), lines
                assert word in outputs["run"].stderr or "read once" in outputs["run"].stderr
        assert _manifest(setup.output)["rows"] == n
    return expect


def _spark_table(d, glob_pattern=False):
    """The layout Spark's file committer leaves (from memory): part files, _SUCCESS, .crc
    checksums, and a failed task attempt's part file under _temporary/."""
    rng = np.random.default_rng(3)
    table = os.path.join(d, "table")
    os.makedirs(table)
    for i, rows in enumerate((50, 44)):
        x = rng.standard_normal((rows, 3))
        name = f"part-{i:05d}-8c4e7f3a-1b2d-4e5f-9a0b-c1d2e3f4a5b6-c000.snappy.parquet"
        pq.write_table(pa.table({"a": x[:, 0], "b": x[:, 1], "c": x[:, 2]}), os.path.join(table, name))
        with open(os.path.join(table, f".{name}.crc"), "wb") as f:
            f.write(b"crc\0\0\0\0")
    open(os.path.join(table, "_SUCCESS"), "w").close()
    attempt = os.path.join(table, "_temporary", "0", "_temporary", "attempt_202612020101_0003_m_000001_7")
    os.makedirs(attempt)
    x = rng.standard_normal((13, 3))  # 13 of 107 rows: the "n off by 12%" of the issue
    pq.write_table(pa.table({"a": x[:, 0], "b": x[:, 1], "c": x[:, 2]}),
                   os.path.join(attempt, "part-00001-8c4e7f3a-1b2d-4e5f-9a0b-c1d2e3f4a5b6-c000.snappy.parquet"))
    return _config(d, "out", paths=["table/**/*.parquet" if glob_pattern else "table"])


def b_spark_directory(d):
    return _spark_table(d)


def b_spark_glob(d):
    return _spark_table(d, glob_pattern=True)


def b_spark_failed_job(d):
    # every part file is still under _temporary/: the job never committed
    setup = _spark_table(d)
    for name in os.listdir(os.path.join(d, "table")):
        if name.startswith("part-"):
            os.unlink(os.path.join(d, "table", name))
    return setup


def b_polars_truncated(d):
    import polars as pl

    os.makedirs(os.path.join(d, "data"))
    path = os.path.join(d, "data", "p.parquet")
    pl.DataFrame({"a": np.arange(50.0), "b": np.arange(50.0) ** 0.5}).write_parquet(path)
    with open(path, "r+b") as f:
        f.truncate(os.path.getsize(path) // 2)  # a copy cut short
    return _config(d, "out")


def b_polars_symlink(d):
    import polars as pl

    x = np.random.default_rng(4).standard_normal((70, 3))
    os.makedirs(os.path.join(d, "data"))
    pl.DataFrame({"a": x[:, 0], "b": x[:, 1], "c": x[:, 2]}).write_parquet(os.path.join(d, "data", "p.parquet"))
    os.symlink("p.parquet", os.path.join(d, "data", "q.parquet"))  # a second name for the same file
    return _config(d, "out")


def b_duckdb_hardlink(d):
    import duckdb

    os.makedirs(os.path.join(d, "data", "sub"))
    path = os.path.join(d, "data", "duck.parquet")
    con = duckdb.connect()
    con.execute("SELECT setseed(0.5)")
    con.execute(f"COPY (SELECT random() AS a, random() * 3 AS b, random() * 2 AS c FROM range(80)) TO '{path}'")
    con.close()
    os.link(path, os.path.join(d, "data", "sub", "again.parquet"))
    return _config(d, "out", paths=["data", "data/duck.parquet"])


def b_pandas_default(d):
    import pandas as pd

    x = np.random.default_rng(5).standard_normal((30, 3))
    os.makedirs(os.path.join(d, "data"))
    pd.DataFrame(x, columns=["a", "b", "c"]).to_parquet(os.path.join(d, "data", "frame.parquet"))
    return _config(d, "out")


# ----------------------------------------------------- 4. keep columns named like outputs

def _keep_named(name, components=2):
    def build(d):
        import polars as pl

        x = np.random.default_rng(6).standard_normal((40, 3))
        os.makedirs(os.path.join(d, "data"))
        pl.DataFrame({name: np.arange(40), "a": x[:, 0], "b": x[:, 1], "c": x[:, 2]}).write_parquet(
            os.path.join(d, "data", "p.parquet"))
        return _config(d, "out", input={"keep": [name]}, model={"components": components})
    return build


# ------------------------------------------------ 14. config text and literal column names

def b_config_with_bom(d):
    _data(d)
    setup = _config(d, "out")
    with open(setup.config, "rb") as f:
        text = f.read()
    with open(setup.config, "wb") as f:
        f.write(b"\xef\xbb\xbf" + text)  # as Windows Notepad saves "UTF-8 with BOM"
    return setup


def b_feature_named_like_a_glob(d):
    x = np.random.default_rng(8).standard_normal((30, 3))
    os.makedirs(os.path.join(d, "data"))
    # "br[0]" as a glob would match "br0" only; as a name it is the first column
    pq.write_table(pa.table({"br[0]": x[:, 0], "br0": x[:, 1], "br[1]": x[:, 2]}),
                   os.path.join(d, "data", "b.parquet"))
    return _config(d, "out", input={"features": ["br[0]", "br[1]"]}, model={"components": 1})


def _check_says(*lines):
    def expect(d, setup, outputs):
        for line in lines:
            assert line in outputs["check"].stdout.splitlines(), outputs["check"].stdout
    return expect


# ------------------------------- 11. vector length, 12. what default selection leaves out

def b_vector_first_file_empty(d):
    import polars as pl

    os.makedirs(os.path.join(d, "data"))
    # the first file in sorted order has the column but no rows
    pq.write_table(pa.table({"emb": pa.array([], pa.list_(pa.float64()))}), os.path.join(d, "data", "a.parquet"))
    x = np.random.default_rng(9).standard_normal((25, 4))
    pl.DataFrame({"emb": x.tolist()}).write_parquet(os.path.join(d, "data", "b.parquet"))
    return _config(d, "out", input={"vector_column": "emb"})


def b_duckdb_bool_decimal(d):
    import duckdb

    os.makedirs(os.path.join(d, "data"))
    con = duckdb.connect()
    con.execute("SELECT setseed(0.25)")
    # DuckDB keeps a numeric literal like 12.50 as DECIMAL and writes it as a Parquet decimal
    con.execute(f"""COPY (SELECT random() AS a, random() * 2 AS b, random() > 0.5 AS flag,
                           CAST(round(random() * 100, 2) AS DECIMAL(10, 2)) AS price, 'x' || i AS label
                    FROM range(40) t(i)) TO '{os.path.join(d, "data", "a.parquet")}'""")
    con.execute(f"""COPY (SELECT random() AS a, random() * 2 AS b, random() > 0.5 AS flag,
                           CAST(round(random() * 100, 2) AS DECIMAL(10, 2)) AS price, 'y' || i AS label,
                           random() AS extra
                    FROM range(30) t(i)) TO '{os.path.join(d, "data", "b.parquet")}'""")
    con.close()
    return _config(d, "out", model={"components": 1})


def e_left_out(d, setup, outputs):
    line = [ln for ln in outputs["check"].stdout.splitlines() if ln.startswith("left out")]
    assert len(line) == 1, outputs["check"].stdout
    for word in ("4 column(s)", "flag (boolean)", "price (decimal)", "label (string)",
                 "extra (missing from 1 of 2 files"):
        assert word in line[0], (word, line[0])
    assert "features    2: a, b" in outputs["check"].stdout
    assert "flag (boolean)" in outputs["run"].stderr  # the log says it too (info level)
    assert _manifest(setup.output)["features"] == 2


def b_pandas_filtered_index(d):
    import pandas as pd

    x = np.random.default_rng(10).standard_normal((50, 3))
    frame = pd.DataFrame(x, columns=["a", "b", "c"])
    os.makedirs(os.path.join(d, "data"))
    frame[frame["a"] > -1].to_parquet(os.path.join(d, "data", "f.parquet"))  # keeps the index as a column
    return _config(d, "out")


# ----------------------------------------------------------------- 16. guard rails

def b_row_id_increasing(d):
    import polars as pl

    x = np.random.default_rng(11).standard_normal((90, 3))
    os.makedirs(os.path.join(d, "data"))
    pl.DataFrame({"row": np.arange(90), "a": x[:, 0], "b": x[:, 1], "c": x[:, 2]}).write_parquet(
        os.path.join(d, "data", "p.parquet"), row_group_size=30)
    return _config(d, "out")


def b_row_id_shuffled(d):
    rng = np.random.default_rng(12)
    x = rng.standard_normal((64, 3))
    os.makedirs(os.path.join(d, "data"))
    # one row group, ids 1..64 in random order: only the moments can tell they are distinct
    pq.write_table(pa.table({"id": rng.permutation(64) + 1, "a": x[:, 0], "b": x[:, 1], "c": x[:, 2]}),
                   os.path.join(d, "data", "p.parquet"))
    return _config(d, "out")


def _warned(words, in_check):
    """One guard-rail warning in the run's log and manifest; ``in_check``: the words check must say, or ()."""
    def expect(d, setup, outputs):
        report = [ln for ln in outputs["check"].stdout.splitlines() if ln.startswith("warning")]
        assert (len(report) == 1 and all(w in report[0] for w in in_check)) if in_check else report == [], report
        warnings = _manifest(setup.output)["warnings"]
        assert len(warnings) == 1 and all(w in warnings[0] for w in words), warnings
        assert warnings[0] in outputs["run"].stderr
    return expect


def b_dominant_feature(d):
    x = np.random.default_rng(13).standard_normal((80, 4)) * [1.0, 1.0, 1.0, 40.0]  # e.g. grams next to kilograms
    write_parquet(os.path.join(d, "data"), x)
    return _config(d, "out")


def e_dominant(d, setup, outputs):
    x = pq.read_table(os.path.join(d, "data")).to_pandas().to_numpy()
    var = x.var(axis=0, ddof=1)  # numpy, outside pcapipe
    _warned(("'f3'", f"holds {var[3] / var.sum():.0%} of the total variance", "model.scale = true"),
            in_check=("'f3' holds", "squared value ranges"))(d, setup, outputs)


CASES = [
    # output = the input directory, overwrite = true: used to delete the inputs and exit 0
    ("out-is-input-dir", Case(b_out_is_input_dir, 2, ("output.directory", "is the input path",
                                                      "outside every input path"))),
    # output = the one input file
    ("out-is-input-file", Case(b_out_is_input_file, 2, ("is the input path", "part-000.parquet"))),
    # output = "." (the config's directory, holding data/ and the config)
    ("out-is-dot", Case(b_out_is_dot, 2, ("output.directory", "contains the input path", "data"))),
    # output = a parent of the inputs and of the config
    ("out-is-parent", Case(b_out_is_parent, 2, ("output.directory", "contains the input path"))),
    # output inside an input directory: the next run would read the scores as data
    ("out-inside-input-dir", Case(b_out_inside_input_dir, 2, ("lies inside the input directory",
                                                              "read as input"))),
    # output where a recursive glob of the inputs would find its Parquet files
    ("out-reached-by-glob", Case(b_out_reached_by_glob, 2, ("data/**/*.parquet", "would find its files"))),
    # output = a directory holding the config file (inputs elsewhere)
    ("out-contains-config", Case(b_out_contains_config, 2, ("contains the config file", "cfg.toml"))),
    # output is a symlink to the input directory
    ("out-symlink-to-input", Case(b_out_symlink_to_input, 2, ("alias", "is the input path"))),
    # an input file is a symlink into the previous run that overwrite would replace
    ("out-holds-input-via-symlink", Case(b_out_holds_input_via_symlink, 2,
                                         ("contains the input file", "s.parquet"))),
    # output = the directory of model.feature_weights' table
    ("out-holds-feature-weights", Case(b_out_holds_feature_weights, 2, ("contains the input path", "w.parquet"))),
    # overwrite = true over a directory that is not a pcapipe run: say what is there
    ("overwrite-foreign-dir", Case(b_overwrite_foreign_dir, 2, ("not a pcapipe run", "notes.txt", "sub/",
                                                                "choose another output.directory"))),
    # overwrite = true over someone else's manifest.json
    ("overwrite-foreign-manifest", Case(b_overwrite_foreign_manifest, 2, ("not a pcapipe run",
                                                                          "manifest.json"))),
    # an existing run without overwrite: refused, kept
    ("existing-run-no-overwrite", Case(b_existing_run_no_overwrite, 2, ("already exists",
                                                                        "output.overwrite = true"))),
    # overwrite = true over a finished pcapipe run: replaced (check writes nothing)
    ("overwrite-previous-run", Case(b_overwrite_previous_run, 0, expect=e_replaced)),
    # overwrite = true where the output is a symlink to a finished run: the link is replaced
    ("overwrite-symlink-to-run", Case(b_overwrite_symlink_to_run, 0, expect=e_replaced)),
    # a bad config over a previous run with overwrite = true: the previous run stays intact
    ("bad-config-over-previous-run", Case(b_bad_config_over_previous_run, 2, ("model.components", "at most"))),
    # 7. a plain file where the .incomplete sibling goes
    ("incomplete-is-file", Case(b_incomplete_is_file, 2, ("out.incomplete", "is a file"))),
    # a foreign directory where the .incomplete sibling goes: never emptied
    ("incomplete-foreign-dir", Case(b_incomplete_foreign_dir, 2, ("out.incomplete", "draft.txt",
                                                                  "not written by pcapipe"))),
    # 2. a Spark-style directory: _temporary/.../part-*.parquet of a failed attempt is not data
    ("spark-directory", Case(b_spark_directory, 0, expect=_rows_are(94, skipped=1))),
    # the same table through a recursive glob
    ("spark-glob", Case(b_spark_glob, 0, expect=_rows_are(94, skipped=1))),
    # a Spark job that never committed: only _temporary/ holds part files, and the error says so
    ("spark-failed-job", Case(b_spark_failed_job, 2, ("input.paths", "'table' matches no file",
                                                      "1 file(s) under names starting with _ or . were skipped"))),
    # a truncated polars file: named, nothing written, the file left as it was
    ("polars-truncated", Case(b_polars_truncated, 2, ("p.parquet", "not a readable Parquet file"))),
    # 3. polars' default file and a symlink to it in the same directory: read once
    ("polars-symlink", Case(b_polars_symlink, 0, expect=_rows_are(70, duplicates=1))),
    # DuckDB COPY ... TO, hardlinked below the same directory and also named directly: read once
    ("duckdb-hardlink", Case(b_duckdb_hardlink, 0, expect=_rows_are(80, duplicates=1))),
    # pandas' default to_parquet (a RangeIndex is kept as metadata, not as a column)
    ("pandas-default", Case(b_pandas_default, 0, expect=_rows_are(30))),
    # 4. a keep column named like a score column: the scores could not be read back
    ("keep-named-PC1", Case(_keep_named("PC1"), 2, ("input.keep", "'PC1'", "PC1..PC2", "leave it out"))),
    # a fraction of the variance: any PC<i> may be written
    ("keep-named-PC9-fraction", Case(_keep_named("PC9", 0.9), 2, ("'PC9'", "PC1, PC2, ..."))),
    # the monitoring columns DESIGN.md adds to the scores
    ("keep-named-t2_alarm", Case(_keep_named("t2_alarm"), 2, ("'t2_alarm'", "spe_alarm", "rename it"))),
    # 14. a config saved with a UTF-8 byte-order mark
    ("config-with-bom", Case(b_config_with_bom, 0, commands=("check",), expect=_check_says("rows        60"))),
    # a column named "br[0]" matches itself, not "br0"
    ("feature-named-like-a-glob", Case(b_feature_named_like_a_glob, 0, commands=("check",),
                                       expect=_check_says("features    2: br[0], br[1]"))),
    # 15. absurd compute settings are refused with the limit
    ("workers-absurd", Case(lambda d: (_data(d), _config(d, "out", compute={"workers": 10**18}))[1], 2,
                            ("compute.workers", "not between 0 and 1024"))),
    ("memory-1B", Case(lambda d: (_data(d), _config(d, "out", compute={"memory_limit": "1B"}))[1], 2,
                       ("compute.memory_limit", "below the minimum of 1.0 MiB"))),
    # 11. a list column whose first file has no rows: the length comes from the next file (polars writes
    # large_list, pyarrow list)
    ("vector-first-file-empty", Case(b_vector_first_file_empty, 0,
                                     expect=_check_says("rows        25",
                                                        "features    4 from vector column 'emb'"))),
    # 12. DuckDB's defaults: boolean, decimal and text columns, and a column only the second file has
    ("duckdb-left-out", Case(b_duckdb_bool_decimal, 0, expect=e_left_out)),
    # pandas writes a filtered frame's index as __index_level_0__: not a feature
    ("pandas-index-left-out", Case(b_pandas_filtered_index, 0, commands=("check",),
                                   expect=_check_says("features    3: a, b, c"))),
    # 16. an increasing row id among the features: seen in the footers (three row groups)
    ("row-id-increasing", Case(b_row_id_increasing, 0, expect=_warned(
        ("'row'", "looks like a row id", "0..89", "input.keep"), in_check=("'row'", "looks like a row id")))),
    # a shuffled id in one row group: confirmed by the moments of the run
    ("row-id-shuffled", Case(b_row_id_shuffled, 0, expect=_warned(
        ("'id'", "1..64", "distinct by the moments"), in_check=("'id'", "may be a row id", "1..64")))),
    # one feature with most of the variance and scale = false
    ("dominant-feature", Case(b_dominant_feature, 0, expect=e_dominant)),
]


@pytest.mark.parametrize("case", [c[1] for c in CASES], ids=[c[0] for c in CASES])
def test_hostile(tmp_path, case):
    d = str(tmp_path)
    setup = case.build(d)
    before = _snapshot(d)
    outputs = {}
    for command in case.commands:
        proc = run_cli(command, setup.config, *setup.args)
        outputs[command] = proc
        assert proc.returncode == case.status, (command, proc.stderr)
        assert "Traceback" not in proc.stderr, proc.stderr
        errors = [line for line in proc.stderr.splitlines() if line.startswith("error:")]
        if case.status:
            assert len(errors) == 1, proc.stderr
            for word in case.words:
                assert word in errors[0], (word, errors[0])
            assert _snapshot(d) == before, f"{command} changed files on disk"
        else:
            assert errors == [], proc.stderr
    after = _snapshot(d)
    out_rel = os.path.relpath(setup.output, d)
    produced = case.status == 0 and "run" in case.commands
    for rel, digest in before.items():
        if produced and (rel == out_rel or rel.startswith(out_rel + os.sep)):
            continue  # the run directory that overwrite replaced
        assert after.get(rel) == digest, f"{rel} changed or vanished"
    new = set(after) - set(before)
    assert all(produced and rel.startswith(out_rel + os.sep) for rel in new), sorted(new)
    assert not any(rel.endswith(".incomplete") or ".incomplete" + os.sep in rel for rel in new)
    if produced:
        assert os.path.isfile(os.path.join(setup.output, "manifest.json"))
        assert not os.path.exists(os.path.join(setup.output, ".pcapipe-incomplete"))
    if case.expect:
        case.expect(d, setup, outputs)
