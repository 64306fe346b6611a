"""Bad row or feature weights: exit 2, one ``error:`` line naming the file, row, column or names, nothing written.

Run through ``pcapipe.cli.main`` in this process (the subprocess path of the
same contract is covered by tests/test_errors.py).
"""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import make_config, write_parquet, write_toml
from pcapipe import cli

ROWS = 40


def _data(d, w, files=2, row_group=15, **kw):
    x = np.random.default_rng(0).standard_normal((ROWS, 4))
    return write_parquet(os.path.join(d, "data"), x, files=files, row_group=row_group, keep={"w": w}, **kw)


def _ok_weights():
    return np.linspace(0.5, 2.0, ROWS)


def _cfg(d, inp=None, model=None):
    return make_config(os.path.join(d, "data"), os.path.join(d, "out"), input=dict({"row_weight": "w"}, **(inp or {})),
                       model=dict({"components": 2}, **(model or {})))


def _with(value, row):
    """Weights that are fine except ``value`` at global row ``row``."""
    w = _ok_weights().astype(object)
    w[row] = value
    return w


def _bad_row(value):
    def build(d):
        # row 27 overall = file part-001 (rows 20..39), row 7 of that file, in its first row group
        w = _with(value, 27)
        x = np.random.default_rng(0).standard_normal((ROWS, 4))
        write_parquet(os.path.join(d, "data"), x, files=2, row_group=15,
                      keep={"w": pa.array([None if v is None else float(v) for v in w], pa.float64())})
        return _cfg(d)
    return build


def _all_zero(d):
    _data(d, np.zeros(ROWS))
    return _cfg(d)


def _sum_one(d):
    _data(d, np.full(ROWS, 1.0 / ROWS))
    return _cfg(d)


def _text_weights(d):
    _data(d, np.array([str(v) for v in _ok_weights()]))
    return _cfg(d)


def _absent_in_one_file(d):
    x = np.random.default_rng(0).standard_normal((ROWS, 4))
    write_parquet(os.path.join(d, "data"), x[:20], keep={"w": _ok_weights()[:20]}, name="a")
    write_parquet(os.path.join(d, "data"), x[20:], name="b")
    return _cfg(d)


def _no_such_column(d):
    _data(d, _ok_weights())
    return _cfg(d, inp={"row_weight": "weights"})


def _weight_as_feature(d):
    _data(d, _ok_weights())
    return _cfg(d, inp={"features": ["f*", "w"]})


def _weight_is_vector(d):
    _data(d, _ok_weights())
    return _cfg(d, inp={"vector_column": "w", "row_weight": "w"})


def _table(rows, suffix=".csv", columns=("feature", "weight")):
    def build(d):
        _data(d, _ok_weights())
        path = os.path.join(d, "fw" + suffix)
        df = pd.DataFrame(rows, columns=list(columns))
        if suffix == ".parquet":
            df.to_parquet(path)
        else:
            df.to_csv(path, index=False)
        return _cfg(d, model={"feature_weights": path})
    return build


def _no_table(d):
    _data(d, _ok_weights())
    return _cfg(d, model={"feature_weights": os.path.join(d, "nothing.csv")})


FULL = [("f0", 1.0), ("f1", 1.0), ("f2", 1.0), ("f3", 1.0)]

# id, builder, words the error line must contain
CASES = [
    ("negative", _bad_row(-1.0), ["part-001.parquet", "row 7", "'w'", "-1.0"]),
    ("nan", _bad_row(float("nan")), ["part-001.parquet", "row 7", "nan"]),
    ("null", _bad_row(None), ["part-001.parquet", "row 7", "'w'"]),
    ("infinite", _bad_row(float("inf")), ["part-001.parquet", "row 7", "inf"]),
    ("all-zero", _all_zero, ["input.row_weight", "'w'", "positive weight"]),
    ("sum-at-most-one", _sum_one, ["input.row_weight", "sum to 1", "above 1"]),
    ("not-numeric", _text_weights, ["part-000.parquet", "'w'", "not numeric"]),
    ("absent-in-a-file", _absent_in_one_file, ["b-000.parquet", "'w'", "missing"]),
    ("no-such-column", _no_such_column, ["input.row_weight", "'weights'", "does not exist"]),
    ("also-a-feature", _weight_as_feature, ["input.features", "'w'", "never a feature"]),
    ("also-the-vector", _weight_is_vector, ["input.row_weight", "vector_column"]),
    ("table-unknown-name", _table(FULL + [("f9", 1.0), ("g", 2.0)]), ["fw.csv", "'f9'", "'g'", "not features"]),
    ("table-missing-feature", _table(FULL[:2]), ["fw.csv", "'f2'", "'f3'", "no weight"]),
    ("table-repeated", _table(FULL + [("f1", 2.0)]), ["fw.csv", "'f1'", "more than once"]),
    ("table-negative", _table(FULL[:3] + [("f3", -0.5)], ".parquet"), ["fw.parquet", "'f3'", "negative"]),
    ("table-all-zero", _table([(n, 0.0) for n, _ in FULL]), ["fw.csv", "every weight is 0"]),
    ("table-columns", _table(FULL, columns=("name", "weight")), ["fw.csv", "'feature'", "feature, weight"]),
    ("table-suffix", _table(FULL, ".txt"), ["fw.txt", ".parquet or .csv"]),
    ("table-absent", _no_table, ["nothing.csv", "no such file"]),
]


def _snapshot(path):
    return sorted((r, tuple(sorted(f))) for r, _, f in os.walk(path)) if os.path.isdir(path) else None


@pytest.mark.usefixtures("restore_logging")
@pytest.mark.parametrize("builder, words", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_weights_one_error_line_nothing_written(tmp_path, capsys, builder, words):
    d = str(tmp_path)
    cfg = builder(d)
    out = cfg["output"]["directory"]
    code = cli.main(["run", write_toml(os.path.join(d, "c.toml"), cfg)])
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.startswith("error:")]
    assert code == 2, err
    assert len(lines) == 1 and "Traceback" not in err, err
    for word in words:
        assert word in lines[0], (word, lines[0])
    assert _snapshot(out) is None
    assert not os.path.exists(out + ".incomplete")
