"""The "every bad input" contract: exit 2, one ``error:`` line that names the file,
column or key and says what to do, no traceback, and nothing written.

Each row of ``CASES`` builds one bad input in its own directory and runs
``pcapipe run`` on it in a subprocess; the important ones are also run through
``pcapipe.run`` to check the exception type.
"""

from __future__ import annotations

import os
import struct

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import pcapipe
from conftest import make_config, run_cli, toml_text, write_parquet

# ---------------------------------------------------------------- builders
# Each builder gets an empty directory and returns (config dict, extra CLI
# args); the config's output directory is always <dir>/out.


def _data(d, rows=40, cols=4, seed=0, **kw):
    x = np.random.default_rng(seed).standard_normal((rows, cols))
    return write_parquet(os.path.join(d, "data"), x, **kw), x


def _cfg(d, paths=None, **sections):
    return make_config(paths or os.path.join(d, "data"), os.path.join(d, "out"), **sections)


def _two_components(d, **sections):
    """Data-pass cases: components small enough that the plan-time checks pass."""
    model = dict(sections.pop("model", {}), components=2)
    return _cfg(d, model=model, **sections)


def b_no_match(d):
    return _cfg(d, paths=os.path.join(d, "nothere", "*.parquet")), []


def b_random_bytes(d):
    os.makedirs(os.path.join(d, "data"))
    with open(os.path.join(d, "data", "junk.parquet"), "wb") as f:
        f.write(np.random.default_rng(1).bytes(500))
    return _cfg(d), []


def b_truncated(d):
    (path,), _ = _data(d)
    with open(path, "rb") as f:
        raw = f.read()
    with open(path, "wb") as f:
        f.write(raw[: len(raw) // 2])
    return _cfg(d), []


def b_corrupt_pages(d):
    # Footer intact, data pages overwritten: planning succeeds, decoding fails.
    (path,), _ = _data(d)
    with open(path, "rb") as f:
        raw = bytearray(f.read())
    # Parquet layout: data ... footer, 4-byte little-endian footer length, "PAR1".
    footer = struct.unpack("<I", raw[-8:-4])[0]
    raw[4: len(raw) - 8 - footer] = b"\xab" * (len(raw) - 12 - footer)
    with open(path, "wb") as f:
        f.write(raw)
    return _two_components(d), []


def _two_files(d, second: dict):
    os.makedirs(os.path.join(d, "data"))
    x = np.random.default_rng(2).standard_normal((20, 2))
    pq.write_table(pa.table({"f0": x[:, 0], "f1": x[:, 1]}), os.path.join(d, "data", "a.parquet"))
    pq.write_table(pa.table(second), os.path.join(d, "data", "b.parquet"))
    return _cfg(d, model={"components": 1}), []


def b_drift_missing(d):
    return _two_files(d, {"f0": np.arange(20.0)})


def b_drift_type(d):
    return _two_files(d, {"f0": np.arange(20.0), "f1": [str(i) for i in range(20)]})


def _mixed(d):
    os.makedirs(os.path.join(d, "data"))
    n = 20
    pq.write_table(pa.table({"f0": np.arange(n, dtype=float), "name": [f"n{i}" for i in range(n)],
                             "s": pa.array([{"a": float(i), "b": 1.0} for i in range(n)])}),
                   os.path.join(d, "data", "mixed.parquet"))


def b_non_numeric(d):
    _mixed(d)
    return _cfg(d, input={"features": ["f0", "name"]}, model={"components": 1}), []


def b_struct(d):
    _mixed(d)
    return _cfg(d, input={"features": ["f0", "s"]}, model={"components": 1}), []


def _vectors(d, values):
    os.makedirs(os.path.join(d, "data"))
    pq.write_table(pa.table({"emb": pa.array(values)}), os.path.join(d, "data", "vec.parquet"))
    return _two_components(d, input={"vector_column": "emb"}), []


def b_ragged(d):
    rows = [[1.0, float(i), 3.0 * i] for i in range(20)]
    rows[10] = [1.0, 2.0]
    return _vectors(d, rows)


def b_null_vector(d):
    rows = [[1.0, float(i), 3.0 * i] for i in range(20)]
    rows[5] = None
    return _vectors(d, rows)


def b_not_list(d):
    return _vectors(d, np.arange(20.0))


def b_nan_fail(d):
    x = np.random.default_rng(3).standard_normal((40, 4))
    x[3, 1], x[5, 1], x[7, 2] = np.nan, np.inf, np.nan
    write_parquet(os.path.join(d, "data"), x)
    return _two_components(d), []


def b_constant_scaled(d):
    x = np.random.default_rng(4).standard_normal((40, 4))
    x[:, 2] = 3.5
    write_parquet(os.path.join(d, "data"), x)
    return _two_components(d, model={"scale": True}), []


def _components(value):
    def build(d):
        _data(d)
        return _cfg(d, model={"components": value}), []
    return build


def b_one_row(d):
    _data(d, rows=1)
    return _cfg(d, model={"components": 1}), []


def b_two_rows_one_dropped(d):
    x = np.random.default_rng(5).standard_normal((2, 3))
    x[1, 0] = np.nan
    write_parquet(os.path.join(d, "data"), x)
    return _cfg(d, input={"missing": "drop-rows"}, model={"components": 1}), []


def b_toml_syntax(d):
    _data(d)
    path = os.path.join(d, "bad.toml")
    with open(path, "w") as f:
        f.write(f'[input]\npaths = ["{d}/data"]\n[model]\ncomponents = = 2\n')
    return path, []


def b_unknown_key(d):
    _data(d)
    return _cfg(d, model={"componets": 2}), []


def b_wrong_type(d):
    _data(d)
    return _cfg(d, model={"center": "yes"}), []


def b_bad_set_key(d):
    _data(d)
    return _cfg(d), ["--set", "model.componets=2"]


def b_config_missing(d):
    return os.path.join(d, "nothere.toml"), []


def b_output_exists(d):
    _data(d)
    os.makedirs(os.path.join(d, "out"))
    with open(os.path.join(d, "out", "mine.txt"), "w") as f:
        f.write("do not touch")
    return _cfg(d, model={"components": 2}), []


def b_output_under_file(d):
    _data(d)
    with open(os.path.join(d, "afile"), "w") as f:
        f.write("x")
    cfg = _cfg(d, model={"components": 2})
    cfg["output"]["directory"] = os.path.join(d, "afile", "run")
    return cfg, []


def b_keep_missing(d):
    _data(d)
    return _cfg(d, input={"keep": ["id"]}, model={"components": 2}), []


def b_features_no_match(d):
    _data(d)
    return _cfg(d, input={"features": ["ch_*"]}, model={"components": 2}), []


# id, builder, words the error line must contain (what is named + the remedy)
CASES = [
    # a glob that matches nothing: the pattern is named, and where it looked
    ("no-match", b_no_match, ["input.paths", "nothere/*.parquet", "matches no file", "check the path"]),
    # random bytes with a .parquet name
    ("random-bytes", b_random_bytes, ["junk.parquet", "not a readable Parquet file", "re-copy"]),
    # a real file cut in half: its footer is gone
    ("truncated", b_truncated, ["part-000.parquet", "not a readable Parquet file", "re-copy"]),
    # footer intact, data pages garbage: found during the moments pass
    ("corrupt-pages", b_corrupt_pages, ["part-000.parquet", "cannot be decoded", "re-copy"]),
    # the second file lacks a column the first has
    ("drift-missing-column", b_drift_missing, ["b.parquet", "'f1'", "is missing", "leave it out of input.paths"]),
    # the second file has f1 as strings instead of float64
    ("drift-type", b_drift_type, ["b.parquet", "'f1'", "string", "make the types agree"]),
    # a string column named in features
    ("non-numeric-feature", b_non_numeric, ["mixed.parquet", "'name'", "not numeric", "cast it"]),
    # a struct column named in features
    ("struct-feature", b_struct, ["mixed.parquet", "'s'", "struct", "nested", "numeric columns"]),
    # vector column with one short row (row 10)
    ("ragged-vector", b_ragged, ["vec.parquet", "'emb'", "row 10", "2 values", "fix or drop"]),
    # vector column with a null row (row 5)
    ("null-vector-row", b_null_vector, ["vec.parquet", "'emb'", "row 5 is null", "drop or fill"]),
    # vector_column names a float column, not a list
    ("vector-not-list", b_not_list, ["vec.parquet", "'emb'", "expected a list", "input.features"]),
    # NaN and inf with missing = "fail": columns and counts named (f1: NaN + inf, f2: NaN)
    ("nan-inf-fail", b_nan_fail, ["f1 (2)", "f2 (1)", "input.missing", "drop-rows"]),
    # a constant column cannot be scaled to unit variance
    ("constant-scaled", b_constant_scaled, ["f2", "constant", "input.exclude", "model.scale = false"]),
    # components below 1
    ("components-0", _components(0), ["model.components", "below 1", "integer >= 1"]),
    # components above min(n, d) = min(40, 4)
    ("components-too-many", _components(9), ["model.components", "min(40, 4) = 4", "at most"]),
    # a fraction outside (0, 1), above
    ("components-1.5", _components(1.5), ["model.components", "1.5", "fraction in (0, 1)"]),
    # a fraction outside (0, 1), at zero
    ("components-0.0", _components(0.0), ["model.components", "0.0", "fraction in (0, 1)"]),
    # a single row: no covariance
    ("one-row", b_one_row, ["1 row", "at least 2"]),
    # two rows, drop-rows removes one
    ("two-rows-one-dropped", b_two_rows_one_dropped, ["1 row", "drop-rows", "at least 2"]),
    # TOML syntax error: file, line and column (line 4, column 14 of the text written)
    ("toml-syntax", b_toml_syntax, ["bad.toml:4:14", "TOML syntax error"]),
    # a misspelt key: the nearest valid key is suggested
    ("unknown-key", b_unknown_key, ["model.componets", "did you mean model.components"]),
    # a string where a boolean belongs
    ("wrong-type", b_wrong_type, ["model.center", "expected true or false", "center = true"]),
    # a misspelt key in --set
    ("bad-set-key", b_bad_set_key, ["--set", "model.componets", "did you mean model.components"]),
    # the config file itself does not exist
    ("config-missing", b_config_missing, ["config file not found", "nothere.toml"]),
    # an existing run directory without overwrite
    ("output-exists", b_output_exists, ["output.directory", "already exists", "output.overwrite = true"]),
    # the output's parent is a regular file (chmod would not stop root)
    ("output-under-file", b_output_under_file, ["output.directory", "afile", "choose a directory"]),
    # a keep column that does not exist
    ("keep-missing", b_keep_missing, ["input.keep", "'id'", "fix or remove it in input.keep"]),
    # a features pattern that matches no column
    ("features-no-match", b_features_no_match, ["input.features", "'ch_*'", "fix input.features"]),
]


def _write_config(d, cfg) -> str:
    if isinstance(cfg, str):
        return cfg
    path = os.path.join(d, "config.toml")
    with open(path, "w") as f:
        f.write(toml_text(cfg))
    return path


def _output_of(cfg, d) -> str:
    if isinstance(cfg, dict):
        return cfg["output"]["directory"]
    return os.path.join(d, "out")


def _snapshot(path):
    if not os.path.isdir(path):
        return None
    return sorted((root, tuple(sorted(files))) for root, _, files in os.walk(path))


@pytest.mark.parametrize("builder, words", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_input_cli(tmp_path, builder, words):
    d = str(tmp_path)
    cfg, extra = builder(d)
    out = _output_of(cfg, d)
    before = _snapshot(out)
    proc = run_cli("run", _write_config(d, cfg), *extra)
    errors = [line for line in proc.stderr.splitlines() if line.startswith("error:")]
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr
    assert len(errors) == 1, proc.stderr
    for word in words:
        assert word in errors[0], (word, errors[0])
    # Nothing written: no run directory (or the one in the way, untouched), no partial sibling.
    assert _snapshot(out) == before
    assert not os.path.exists(out + ".incomplete")
    assert proc.stdout == ""


# ------------------------------------------------------- the Python API

API_CASES = [
    # pattern matches nothing
    ("no-match", b_no_match, pcapipe.InputError),
    # random bytes
    ("random-bytes", b_random_bytes, pcapipe.InputError),
    # corrupt data pages, found while decoding
    ("corrupt-pages", b_corrupt_pages, pcapipe.InputError),
    # type drift between files
    ("drift-type", b_drift_type, pcapipe.InputError),
    # ragged vectors
    ("ragged-vector", b_ragged, pcapipe.InputError),
    # NaN with missing = "fail"
    ("nan-inf-fail", b_nan_fail, pcapipe.InputError),
    # constant feature with scale = true
    ("constant-scaled", b_constant_scaled, pcapipe.InputError),
    # components > min(n, d)
    ("components-too-many", _components(9), pcapipe.InputError),
    # components outside (0, 1) as a fraction
    ("components-1.5", _components(1.5), pcapipe.ConfigError),
    # misspelt key
    ("unknown-key", b_unknown_key, pcapipe.ConfigError),
    # one row
    ("one-row", b_one_row, pcapipe.InputError),
    # existing output directory
    ("output-exists", b_output_exists, pcapipe.OutputError),
    # output below a regular file
    ("output-under-file", b_output_under_file, pcapipe.OutputError),
    # keep column missing
    ("keep-missing", b_keep_missing, pcapipe.InputError),
]


@pytest.mark.parametrize("builder, kind", [c[1:] for c in API_CASES], ids=[c[0] for c in API_CASES])
def test_bad_input_api(tmp_path, builder, kind):
    d = str(tmp_path)
    cfg, extra = builder(d)
    out = _output_of(cfg, d)
    before = _snapshot(out)
    with pytest.raises(kind) as info:
        pcapipe.run(cfg, extra[1::2])
    assert "\n" not in str(info.value)
    assert _snapshot(out) == before
    assert not os.path.exists(out + ".incomplete")


def test_toml_error_api_names_line_and_column(tmp_path):
    cfg, _ = b_toml_syntax(str(tmp_path))
    with pytest.raises(pcapipe.ConfigError, match=r"bad\.toml:4:14: TOML syntax error"):
        pcapipe.run(cfg)


def test_error_chained_from_cause(tmp_path):
    # Typed errors keep the library's exception as their cause (raise ... from e).
    cfg, _ = b_random_bytes(str(tmp_path))
    with pytest.raises(pcapipe.InputError) as info:
        pcapipe.run(cfg)
    assert info.value.__cause__ is not None


def test_drop_rows_leaves_enough(tmp_path):
    # The same two-row data with one more good row runs: the check counts rows left, not rows read.
    x = np.random.default_rng(5).standard_normal((3, 3))
    x[1, 0] = np.nan
    write_parquet(str(tmp_path / "data"), x)
    cfg = make_config(str(tmp_path / "data"), tmp_path / "out", input={"missing": "drop-rows"},
                      model={"components": 1}, output={"scores": False})
    res = pcapipe.run(cfg)
    assert res.manifest["rows"] == 2
    assert res.manifest["features"] == 3
