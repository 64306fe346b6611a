"""Peak memory of ``pcapipe run`` on data several times ``compute.memory_limit``.

The runs happen in child processes, and each child's peak RSS is its
``ru_maxrss`` from ``os.wait4``, read by a tiny wrapper interpreter: Linux
carries the RSS high-water mark of the forking process into a child across
fork + exec, so measured straight from pytest (which holds the test data) a
child would report at least pytest's own RSS (``RUSAGE_CHILDREN`` has the
same problem, and also keeps the maximum over all children so far).

The bound is ``baseline + 4 * memory_limit``, where ``baseline`` is the peak
RSS of a child that only imports what ``pcapipe run`` imports, measured in
the same test.  Why 4x: the run has 2 worker threads (``compute.workers = 2``
is pinned, so the bound does not depend on the machine), each allowed
``memory_limit`` by contract; the other 2x are slack for what the budget does
not size: pyarrow decodes a row group's pages whole (~2.5x the row group's
bytes per reading thread whatever the batch size, so the row groups here are
kept at 8 MB), the allocators keeping freed pages, and the solver's small
arrays.  Measured when written: baseline ~120-140 MiB, runs ~180 MiB above
it, bound 256 MiB above it.

The bound is meaningful: the data are ~400 MB on disk and 381 MiB decoded
as float64, so a full read (or caching the decoded blocks) needs at least
baseline + 381 MiB, more than the bound; ``test_naive_full_read_exceeds_the_bound``
checks that a plain ``read_table`` + ``to_numpy`` of the same files does
exceed it (it peaks near 1.1 GB), so the assertion can fail.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import ROOT

LIMIT_MIB = 64
N_ROWS, N_FEATURES, FILES, ROW_GROUP = 500_000, 100, 4, 10_000
# leading eigenvalues well apart and a flat unit tail: the solver converges in a
# handful of passes, so re-reading ~420 MB per pass stays within the time budget
LEADING = (20.0, 10.0, 5.0)

_WRAPPER = """
import json, os, subprocess, sys
proc = subprocess.Popen([sys.executable, *sys.argv[2:]])
_, status, usage = os.wait4(proc.pid, 0)
with open(sys.argv[1], "w") as f:
    json.dump({"code": os.waitstatus_to_exitcode(status), "maxrss_kib": usage.ru_maxrss}, f)
"""

_IMPORTS_ONLY = "import pcapipe, pcapipe.cli, pcapipe.engine, pcapipe.result, dask.threaded, threadpoolctl"

_NAIVE_READ = """
import sys, numpy as np, pyarrow.parquet as pq
parts = [pq.read_table(p).to_pandas().to_numpy(dtype=np.float64) for p in sys.argv[1:]]
x = np.concatenate(parts)
print(float(x[:, 0].sum()))
"""


def _peak_rss_mib(argv, tmp_path, name) -> tuple[float, subprocess.CompletedProcess]:
    out = tmp_path / f"{name}.rusage.json"
    proc = subprocess.run([sys.executable, "-c", _WRAPPER, str(out), *map(str, argv)], capture_output=True,
                          text=True, cwd=ROOT, timeout=300)
    assert out.exists(), proc.stderr
    with open(out) as f:
        r = json.load(f)
    assert r["code"] == proc.returncode == 0, proc.stderr
    return r["maxrss_kib"] / 1024, proc


@pytest.fixture(scope="module")
def big_data(tmp_path_factory):
    """~400 MB of float64 scalar columns: 4 files of 125 000 rows, row groups of 10 000 rows (8 MB)."""
    directory = tmp_path_factory.mktemp("memory-data")
    rng = np.random.default_rng(20240)
    q, _ = np.linalg.qr(rng.standard_normal((N_FEATURES, N_FEATURES)))
    sd = np.sqrt(np.r_[LEADING, np.ones(N_FEATURES - len(LEADING))])
    per_file = N_ROWS // FILES
    for i in range(FILES):
        x = np.asfortranarray((rng.standard_normal((per_file, N_FEATURES)) * sd) @ q.T + 10.0)
        table = pa.table({f"f{j:03d}": x[:, j] for j in range(N_FEATURES)})
        # no compression: the on-disk size is the data size, whatever the codec does
        pq.write_table(table, directory / f"part-{i}.parquet", row_group_size=ROW_GROUP, compression="none")
    return directory


@pytest.fixture(scope="module")
def baseline_mib(tmp_path_factory):
    """Peak RSS of a child that imports what ``pcapipe run`` imports and does nothing else."""
    mib, _ = _peak_rss_mib(["-c", _IMPORTS_ONLY], tmp_path_factory.mktemp("baseline"), "baseline")
    return mib


def _bound(baseline: float) -> float:
    return baseline + 4 * LIMIT_MIB


def _config(path, data_dir, out_dir, method: str) -> None:
    path.write_text(f"""
[input]
paths = ["{data_dir}/*.parquet"]
[model]
components = {len(LEADING)}
method = "{method}"
tolerance = 1e-6
[compute]
scheduler = "threads"
workers = 2
memory_limit = "{LIMIT_MIB}MiB"
progress = false
[output]
directory = "{out_dir}"
scores = true
report = false
""")


def test_data_is_at_least_five_times_the_limit(big_data):
    size = sum(p.stat().st_size for p in big_data.glob("*.parquet"))
    assert size >= 5 * LIMIT_MIB * 2**20
    assert N_ROWS * N_FEATURES * 8 > 4 * LIMIT_MIB * 2**20  # decoded, it would not fit the bound


def test_naive_full_read_exceeds_the_bound(big_data, baseline_mib, tmp_path):
    """The control: the bound separates bounded streaming from reading everything."""
    files = sorted(big_data.glob("*.parquet"))
    peak, _ = _peak_rss_mib(["-c", _NAIVE_READ, *files], tmp_path, "naive")
    assert peak > _bound(baseline_mib), (peak, baseline_mib)


@pytest.fixture(scope="module")
def runs(big_data, tmp_path_factory):
    """Both methods run once under the limit: {method: (peak RSS MiB, manifest, eigenvalues, stderr)}."""
    out = {}
    for method in ("covariance", "matrix-free"):
        tmp = tmp_path_factory.mktemp(method)
        _config(tmp / "run.toml", big_data, tmp / "out", method)
        peak, proc = _peak_rss_mib(["-m", "pcapipe", "run", "-q", tmp / "run.toml"], tmp, method)
        with open(tmp / "out" / "manifest.json") as f:
            manifest = json.load(f)
        spectrum = pq.read_table(tmp / "out" / "spectrum.parquet")
        values = spectrum.filter(spectrum.column("retained")).column("eigenvalue").to_numpy()  # PC1..PCk
        out[method] = (peak, manifest, values, proc.stderr)
    return out


@pytest.mark.parametrize("method", ["covariance", "matrix-free"])
def test_peak_rss_is_bounded_by_the_memory_limit(runs, baseline_mib, method):
    peak, manifest, _, stderr = runs[method]
    assert manifest["method"] == method
    assert manifest["rows"] == N_ROWS
    assert manifest["converged"], manifest["components_converged"]
    assert manifest["scores"]["rows"] == N_ROWS
    assert peak <= _bound(baseline_mib), (
        f"peak RSS {peak:.0f} MiB > baseline {baseline_mib:.0f} MiB + 4 x {LIMIT_MIB} MiB; stderr: {stderr}")


def test_matrix_free_rereads_instead_of_caching(runs):
    _, manifest, _, _ = runs["matrix-free"]
    # 381 MiB decoded exceed 40% of the 2 x 64 MiB budget: blocks must be re-read, not kept
    assert manifest["blocks_cached"].startswith("re-read"), manifest["blocks_cached"]
    # moments, at least two operator applications, scores: each one a read of the files
    assert manifest["passes_over_data"] >= 4


def test_both_methods_agree_under_the_limit(runs):
    """Small batches and re-reads must not change the answer."""
    # a relative residual of 1e-6 * theta_1 (= 2e-5 here) bounds each eigenvalue
    # error by r^2 / gap ~ (2e-5)^2 / 5 ~ 1e-10, i.e. ~2e-11 relative (quadratic
    # residual bound, Parlett, The Symmetric Eigenvalue Problem, ch. 11; from memory)
    np.testing.assert_allclose(runs["matrix-free"][2], runs["covariance"][2], rtol=1e-9)


# ---------------------------------------------------------------- pyarrow's default 1Mi-row row groups
#
# One file as `pyarrow.parquet.write_table` writes it by default: row groups of 1Mi rows, 1 MiB data
# pages and a 1 MB dictionary page per column.  Streaming one row group holds ~2.7 MB of pyarrow
# buffers per column whatever the batch size (measured, DEVELOPERS.md "Memory"), so with 160 columns
# one task needs ~450 MB and two at once ~900 MB: under memory_limit = "256MiB" x 2 workers the
# planner must run the row groups one at a time (each with both cores), and the peak must stay
# within workers x memory_limit + layout.FIXED_OVERHEAD.

BIG_ROWS, BIG_COLS, BIG_LIMIT_MIB = 2 * 1024 * 1024, 160, 256

_TWO_STREAMS = """
import sys, threading, numpy as np, pyarrow.parquet as pq
def stream(rg):
    pf = pq.ParquetFile(sys.argv[1], pre_buffer=False, buffer_size=1 << 16)
    for b in pf.iter_batches(batch_size=6553, row_groups=[rg], use_threads=False):
        x = np.empty((b.num_rows, b.num_columns), order="F")
        for j, c in enumerate(b.columns):
            x[:, j] = c.to_numpy()
threads = [threading.Thread(target=stream, args=(rg,)) for rg in (0, 1)]
[t.start() for t in threads]
[t.join() for t in threads]
"""


@pytest.fixture(scope="module")
def default_row_groups(tmp_path_factory):
    directory = tmp_path_factory.mktemp("pyarrow-default")
    rng = np.random.default_rng(5)
    cols = {f"c{j:03d}": rng.standard_normal(BIG_ROWS, dtype=np.float32) + j for j in range(BIG_COLS)}
    pq.write_table(pa.table(cols), directory / "data.parquet")  # pyarrow's defaults, on purpose
    md = pq.read_metadata(directory / "data.parquet")
    assert md.num_row_groups == 2 and md.row_group(0).num_rows == 1024 * 1024
    return directory


def _bound_big(baseline: float) -> float:
    from pcapipe.layout import FIXED_OVERHEAD

    # the fixed overhead includes the imports' baseline (~140 MiB), so this is generous by it;
    # what it must catch is the second task's ~450 MB
    return 2 * BIG_LIMIT_MIB + FIXED_OVERHEAD / 2**20


@pytest.mark.slow
def test_two_row_groups_at_once_would_exceed_the_bound(default_row_groups, baseline_mib, tmp_path):
    """The control: what the planner avoids does break the bound."""
    peak, _ = _peak_rss_mib(["-c", _TWO_STREAMS, default_row_groups / "data.parquet"], tmp_path, "two")
    assert peak > _bound_big(baseline_mib), peak


@pytest.mark.slow
def test_default_row_groups_stay_within_the_budget(default_row_groups, baseline_mib, tmp_path):
    cfg = tmp_path / "run.toml"
    cfg.write_text(f"""
[input]
paths = ["{default_row_groups}/*.parquet"]
[model]
components = 3
method = "covariance"
[compute]
scheduler = "threads"
workers = 2
memory_limit = "{BIG_LIMIT_MIB}MiB"
progress = false
[output]
directory = "{tmp_path / 'out'}"
scores = false
report = false
""")
    peak, proc = _peak_rss_mib(["-m", "pcapipe", "run", "-q", cfg], tmp_path, "run")
    with open(tmp_path / "out" / "manifest.json") as f:
        assert json.load(f)["rows"] == BIG_ROWS
    assert peak <= _bound_big(baseline_mib), (peak, proc.stderr)
