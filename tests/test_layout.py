"""Tasks, batches and memory on any Parquet layout: the accumulator, grouping, parallel decode, the estimate."""

from __future__ import annotations

import glob
import logging
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from conftest import make_config, write_parquet

import pcapipe
from pcapipe.compute import Runner
from pcapipe.config import ComputeConfig
from pcapipe.errors import InputError
from pcapipe.layout import AUTO_WORKING_SET, Piece, layout_for
from pcapipe.moments import Accumulator
from pcapipe.passes import DataPasses
from pcapipe.plan import make_plan
from pcapipe.reader import ReadSpec, iter_block, iter_task
from pcapipe.tasks import Transform
from pcapipe.terminal import check_report


def _spread(rng, n, d):
    return rng.standard_normal((n, d)) @ rng.standard_normal((d, d)) + 5.0


# ------------------------------------------------------------------ the accumulator

@pytest.mark.parametrize("order", ["F", "C"])  # scalar columns decode Fortran-ordered, vectors C-ordered
def test_accumulator_folds_batches_into_the_numpy_covariance(rng, order):
    x = _spread(rng, 1000, 12)
    acc = Accumulator(12, full=True)
    for a, b in [(0, 1), (1, 300), (300, 301), (301, 777), (777, 1000)]:  # uneven, including 1-row batches
        acc.add(np.array(x[a:b], order=order))
    m = acc.result()
    # reference: numpy's two-pass covariance in float64
    np.testing.assert_allclose(m.symmetric() / (m.n - 1), np.cov(x, rowvar=False), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(m.mean, x.mean(axis=0), rtol=1e-14)
    assert m.n == m.rows_seen == 1000


def test_accumulator_holds_one_matrix_whatever_the_batches(rng):
    x = _spread(rng, 400, 6)
    acc = Accumulator(6, full=True)
    acc.add(x[:200].copy(order="F"))
    first = acc.result().m2
    acc.add(x[200:].copy(order="F"))
    assert acc.result().m2 is first  # folded in place, not a new d x d per batch


def test_accumulator_missing_rows_and_diagonal(rng):
    x = _spread(rng, 300, 5)
    x[[3, 150, 299], [0, 2, 4]] = np.nan
    full, diag = Accumulator(5, True, "drop-rows"), Accumulator(5, False, "drop-rows")
    for a in range(0, 300, 64):
        full.add(x[a:a + 64].copy())
        diag.add(x[a:a + 64].copy())
    ok = np.isfinite(x).all(axis=1)
    ref = np.cov(x[ok], rowvar=False)  # numpy on the complete rows
    np.testing.assert_allclose(full.result().symmetric() / (ok.sum() - 1), ref, rtol=1e-12)
    np.testing.assert_allclose(diag.result().m2 / (ok.sum() - 1), np.diag(ref), rtol=1e-12)
    assert full.result().missing.tolist() == [1, 0, 1, 0, 1]
    np.testing.assert_allclose(full.result().valid_mean, np.nanmean(x, axis=0), rtol=1e-13)


# ------------------------------------------------------------------ float32 centred in float64

def test_float32_column_with_a_large_mean_is_centred_in_float64(tmp_path, rng):
    """A float32 column of mean 1e4 and unit spread: centring in float32 would keep ~3 digits of the spread."""
    x = (rng.standard_normal((4000, 3)) * [1.0, 0.5, 2.0] + 1e4).astype(np.float32)
    write_parquet(tmp_path / "d", x, row_group=1000)
    res = pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run",
                                  model={"components": 3, "method": "matrix-free", "tolerance": 1e-12},
                                  output={"directory": str(tmp_path / "run"), "report": False, "scores": True}))
    ref = x.astype(np.float64)  # numpy float64 reference on the stored float32 values
    ref_c = ref - ref.mean(axis=0)
    values = np.linalg.eigvalsh(np.cov(ref, rowvar=False))[::-1]
    np.testing.assert_allclose(res.spectrum["eigenvalue"].to_numpy()[:3], values, rtol=1e-9)
    scores = res.scores().compute()[["PC1", "PC2", "PC3"]].to_numpy()
    np.testing.assert_allclose(np.abs(scores), np.abs(ref_c @ res.loadings.to_numpy()), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("vector", [None, "fixed"])
def test_matrix_free_reads_the_files_once_and_holds_float32_as_stored(tmp_path, rng, caplog, vector):
    """Held rows: one read of the files, float32 kept as stored, every later pass from memory, exact."""
    x = (rng.standard_normal((3000, 12)) * np.linspace(3.0, 0.5, 12) + 1e4).astype(np.float32)
    write_parquet(tmp_path / "d", x, files=3, row_group=500, vector=vector)
    cfg = make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run",
                      model={"components": 3, "method": "matrix-free", "tolerance": 1e-12},
                      input={"vector_column": "emb"} if vector else {})
    with caplog.at_level(logging.INFO, logger="pcapipe"):
        res = pcapipe.run(cfg)
    passes = [r.getMessage() for r in caplog.records if r.getMessage().startswith("pass ")]
    assert "read into memory" in passes[0], passes
    solver = [p for p in passes[1:] if "scores" not in p]  # the scores pass writes per input file
    assert len(solver) >= 2 and all("held rows" in p for p in solver), passes
    assert "float32 as stored" in res.manifest["blocks_cached"]
    ref = np.cov(x.astype(np.float64), rowvar=False)  # numpy, float64, on the stored values
    np.testing.assert_allclose(res.spectrum["eigenvalue"].to_numpy()[:3], np.linalg.eigvalsh(ref)[::-1][:3],
                               rtol=1e-10)


def test_fused_shift_of_float32_is_exact_in_float64(tmp_path, rng):
    x = (rng.standard_normal((64, 2)) + 1e4).astype(np.float32)
    (path,) = write_parquet(tmp_path, x)
    shift = np.array([1e4 + 0.1, 1e4 - 0.3])
    (got, _), = list(iter_block(path, 0, ReadSpec(("f0", "f1"), "", 2, 1000), shift))
    np.testing.assert_array_equal(got, x.astype(np.float64) - shift)  # no float32 rounding on the way


# ------------------------------------------------------------------ grouping and parallel decode

def test_small_files_are_grouped_into_few_tasks_in_file_order(tmp_path, rng):
    x = _spread(rng, 6000, 4)
    write_parquet(tmp_path / "d", x, files=60)
    cfg = make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run")
    plan = make_plan(pcapipe.config.load_config(cfg))
    layout = layout_for(plan.pieces(), 4, workers=2, memory_per_worker=1 << 30, cores=2, shared=True)
    assert len(layout.tasks) == 1 and len(layout.tasks[0].pieces) == 60
    spec = ReadSpec(plan.columns, "", 4, layout.batch_rows, whole_bytes=layout.whole_bytes)
    got = np.concatenate(list(iter_task(layout.tasks[0].pieces, spec)))
    np.testing.assert_array_equal(got, x)  # every row, in file order
    assert [p.path for p in layout.tasks[0].pieces] == sorted(glob.glob(str(tmp_path / "d" / "*")))


def test_a_large_row_group_is_a_task_of_its_own():
    pieces = [Piece(0, "a", 0, 100, 800, 1000), Piece(0, "a", 1, 10_000_000, 80 << 20, 1 << 20),
              Piece(1, "b", 0, 100, 800, 1000)]
    layout = layout_for(pieces, 1, workers=2, memory_per_worker=1 << 30, cores=2, shared=True)
    assert [[p.row_group for p in t.pieces] for t in layout.tasks] == [[0], [1], [0]]


def test_column_parallel_decode_gives_the_serial_values(tmp_path, rng):
    x = rng.standard_normal((5000, 9))
    (path,) = write_parquet(tmp_path, x)
    columns = tuple(f"f{j}" for j in range(9))
    shift, inv = x.mean(axis=0), 1 / x.std(axis=0)
    serial = ReadSpec(columns, "", 9, 700, whole_bytes=0)  # whole_bytes 0: stream the row group
    parallel = ReadSpec(columns, "", 9, 700, threads=2, whole_bytes=0)
    a = np.concatenate([b for b, _ in iter_block(path, 0, serial, shift, inv)])
    b = np.concatenate([b for b, _ in iter_block(path, 0, parallel, shift, inv)])
    np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(a, (x - shift) * inv)


@pytest.fixture(scope="module")
def one_row_group(tmp_path_factory):
    rng = np.random.default_rng(7)
    x = rng.standard_normal((30_000, 24)) @ rng.standard_normal((24, 24))
    d = tmp_path_factory.mktemp("one-rg")
    write_parquet(d, x, row_group=30_000)
    return d, x


@pytest.mark.parametrize("compute", [
    {"scheduler": "synchronous"},                                   # one task at a time
    {"scheduler": "threads", "workers": 2},                         # the lone task gets 2 decode threads
    {"scheduler": "threads", "workers": 2, "memory_limit": "48MiB"},  # whole reads off: streamed in parallel
])
def test_one_row_group_results_do_not_depend_on_the_scheduler(one_row_group, tmp_path, compute):
    d, x = one_row_group
    ref = pcapipe.run(make_config(str(d / "*.parquet"), tmp_path / "ref", model={"components": 3},
                                  compute={"scheduler": "synchronous", "memory_limit": "48MiB"}))
    res = pcapipe.run(make_config(str(d / "*.parquet"), tmp_path / "run", model={"components": 3},
                                  compute={**compute, "progress": False}))
    if compute.get("memory_limit") == "48MiB":  # same batches: bit-identical
        np.testing.assert_array_equal(res.spectrum["eigenvalue"].to_numpy(), ref.spectrum["eigenvalue"].to_numpy())
    # against numpy in float64
    np.testing.assert_allclose(res.spectrum["eigenvalue"].to_numpy()[:3],
                               np.linalg.eigvalsh(np.cov(x, rowvar=False))[::-1][:3], rtol=1e-10)


def test_read_once_holds_every_row_in_file_order_with_the_moments_pass_numbers(tmp_path, rng):
    x = _spread(rng, 3000, 5)
    write_parquet(tmp_path / "d", x, files=7, row_group=128)
    cfg = pcapipe.config.load_config(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run"))
    plan = make_plan(cfg)
    with Runner(ComputeConfig(scheduler="threads", workers=2, progress=False)) as runner:
        passes = DataPasses(plan, runner)
        ref = passes.moments(False, "fail")
        parts, m = passes.read_once("fail")
        assert passes.count == 2  # one pass each
        np.testing.assert_array_equal(np.concatenate(parts), x)  # raw, in file order
        # the same batches folded in the same tree: the moments pass's numbers, bit for bit
        for field in ("mean", "m2", "valid_mean"):
            np.testing.assert_array_equal(getattr(m, field), getattr(ref, field))
        assert (m.n, m.rows_seen) == (ref.n, ref.rows_seen) == (3000, 3000)
        t = Transform(x.mean(axis=0), None, "none")
        got = passes.preprocessed(parts, t, m.n)
    assert parts == []  # handed over, nothing else held
    np.testing.assert_allclose(got, x - x.mean(axis=0), rtol=0, atol=1e-12)


# ------------------------------------------------------------------ the estimate refuses what cannot fit

def test_a_layout_that_cannot_fit_is_refused_before_reading(tmp_path, rng):
    x = rng.standard_normal((20_000, 200))
    (path,) = write_parquet(tmp_path / "d", x)  # one row group of 32 MB, 200 columns
    cfg = make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run",
                      compute={"scheduler": "threads", "workers": 2, "memory_limit": "1MiB", "progress": False})
    with pytest.raises(InputError, match=r"part-000\.parquet: reading it needs .*compute\.memory_limit"):
        pcapipe.run(cfg)
    assert not os.path.exists(tmp_path / "run")
    with pytest.raises(InputError, match="memory_limit"):
        check_report(cfg)


def test_check_shows_the_memory_estimate(tmp_path, rng):
    write_parquet(tmp_path / "d", rng.standard_normal((500, 4)), files=3)
    text = check_report(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", model={"components": 2},
                                    compute={"scheduler": "threads", "workers": 2, "memory_limit": "64MiB"}))
    line = next(ln for ln in text.splitlines() if ln.startswith("memory"))
    assert "of 128.0 MiB budget" in line and "1 task(s)" in line, line


def test_in_flight_is_lowered_rather_than_exceeding_the_budget():
    # each task streams a row group needing ~100 MiB of reader buffers; two at once exceed 2 x 64 MiB
    pieces = [Piece(0, "a", i, 1_000_000, 800 << 20, 100 << 20) for i in range(4)]
    layout = layout_for(pieces, 100, workers=2, memory_per_worker=64 << 20, cores=2, shared=True)
    assert layout.in_flight == 1 and layout.threads == 2
    assert layout.estimate.total <= layout.estimate.budget
    with pytest.raises(InputError, match="memory_limit"):  # separate worker processes cannot pool memory
        layout_for(pieces, 100, workers=2, memory_per_worker=64 << 20, cores=2, shared=False)


# ------------------------------------------------------------------ wide row groups, by column slices

def test_a_wide_row_group_decoded_by_column_slices_gives_the_streamed_values(tmp_path, rng, monkeypatch):
    import pcapipe.reader as reader

    x = rng.standard_normal((1500, 1100)).astype(np.float32)
    (path,) = write_parquet(tmp_path, x)
    columns = tuple(f"f{j}" for j in range(1100))
    shift, inv = x.mean(axis=0, dtype=np.float64), 1 / x.std(axis=0, dtype=np.float64)
    monkeypatch.setattr(reader, "SLICE_BYTES", 8 * 1500 * 100)  # 100 columns per read: 11 slices
    streamed = ReadSpec(columns, "", 1100, 400, whole_bytes=0)
    want = np.concatenate([b for b, _ in iter_block(path, 0, streamed, shift, inv)])
    for threads in (1, 2):  # two readers take alternate slices of the one buffer
        sliced = ReadSpec(columns, "", 1100, 400, whole_bytes=0, sliced_bytes=8 * 1500 * 1100, threads=threads)
        blocks = [b for b, _ in iter_block(path, 0, sliced, shift, inv)]
        assert len(blocks) == 1 and blocks[0].flags.f_contiguous  # the whole row group, one buffer
        np.testing.assert_array_equal(blocks[0], want)
    # a block larger than sliced_bytes is streamed in batches as before
    small = ReadSpec(columns, "", 1100, 400, whole_bytes=0, sliced_bytes=8 * 1500 * 1100 - 1)
    assert [b.shape[0] for b, _ in iter_block(path, 0, small)] == [400, 400, 400, 300]


def test_wide_row_groups_are_sliced_only_when_the_block_fits_the_budget():
    # 50k x 2000 float32: a 400 MB row group, 800 MB (763 MiB) decoded
    pieces = [Piece(i, f"p{i}", 0, 50_000, 400 << 20, 100 << 20) for i in range(3)]
    roomy = layout_for(pieces, 2000, workers=2, memory_per_worker=6 << 30, cores=2, shared=True)
    assert roomy.sliced_bytes == (6 << 30) // 2
    assert roomy.estimate.batch == 8 * 50_000 * 2000  # the whole decoded block counts, once
    assert roomy.estimate.in_flight == 2 and roomy.estimate.total <= roomy.estimate.budget
    # more than half of a task's memory: streamed, one batch at a time
    tight = layout_for(pieces, 2000, workers=2, memory_per_worker=1 << 30, cores=2, shared=True)
    assert tight.sliced_bytes == 0 and tight.estimate.batch == 2 * 8 * tight.batch_rows * 2000
    # the block would fit half a task, but not next to 700 MiB of cached rows: streamed instead of refused
    crowded = layout_for(pieces, 2000, workers=1, memory_per_worker=1600 << 20, cores=2, shared=True,
                         accumulator=8 * 2000 * 2000, cached=700 << 20)
    assert crowded.sliced_bytes == 0 and crowded.estimate.fits()
    # narrow tables too (faster and leaner than streaming, DEVELOPERS.md "Layouts"), but not a vector
    # column or row weights; at memory_limit = "auto" a block over half the working set is streamed
    narrow = [Piece(0, "a", 0, 400_000, 400 << 20, 3 << 20)]
    kw = dict(workers=2, memory_per_worker=6 << 30, cores=2, shared=True)
    assert layout_for(narrow, 256, **kw).sliced_bytes == (6 << 30) // 2
    assert layout_for(narrow, 256, sliceable=False, **kw).sliced_bytes == 0
    assert layout_for(narrow, 256, working_set=AUTO_WORKING_SET, **kw).sliced_bytes == 0


def test_a_wide_one_row_group_run_is_exact_and_scheduler_independent(tmp_path, monkeypatch):
    import pcapipe.reader as reader

    calls = []
    real = reader._sliced_block
    monkeypatch.setattr(reader, "_sliced_block", lambda *a: calls.append(a[1]) or real(*a))
    rng = np.random.default_rng(11)
    x = rng.standard_normal((2000, 1024)) * np.linspace(3, 0.5, 1024) + 7.0
    write_parquet(tmp_path / "d", x)  # one 16 MiB row group: above whole_bytes at 256 MiB, decoded by slices
    cfg = {"model": {"components": 3, "method": "covariance"}, "output": {"scores": False}}
    ref = pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "ref", **cfg,
                                  compute={"scheduler": "synchronous", "memory_limit": "256MiB"}))
    assert calls == [0]  # the one pass read its one row group by slices (one reader thread)
    text = check_report(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "chk", **cfg,
                                    compute={"scheduler": "synchronous", "memory_limit": "256MiB"}))
    assert "decoded whole by column slices" in text  # check says how the row group will be read
    # threads: the lone task reads alternate slices on two threads
    res = pcapipe.run(make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", **cfg,
                                  compute={"scheduler": "threads", "workers": 2, "memory_limit": "256MiB"}))
    assert calls == [0, 0]
    np.testing.assert_array_equal(res.spectrum["eigenvalue"].to_numpy(), ref.spectrum["eigenvalue"].to_numpy())
    np.testing.assert_allclose(res.spectrum["eigenvalue"].to_numpy()[:3],
                               np.linalg.eigvalsh(np.cov(x, rowvar=False))[::-1][:3], rtol=1e-10)


def test_row_weights_count_in_the_estimate(tmp_path, rng):
    """The weight column's reader buffers and its batch column count, and so does the batch copy of the fold."""
    x = _spread(rng, 4000, 6)
    write_parquet(tmp_path / "d", x, files=2, keep={"w": rng.uniform(0, 2, 4000)})
    plans = {}
    for weight in ("", "w"):
        cfg = make_config(str(tmp_path / "d" / "*.parquet"), tmp_path / "run", input={"row_weight": weight, "features": ["f*"]})
        plans[weight] = make_plan(pcapipe.config.load_config(cfg))
    plain, weighted = (plans[k].pieces() for k in ("", "w"))
    # one more column decoded: 2000 rows x 8 bytes more of it per row group (the footers' uncompressed size)
    assert all(b.nbytes > a.nbytes and b.stream_bytes > a.stream_bytes for a, b in zip(plain, weighted))
    args = dict(workers=2, memory_per_worker=1 << 30, cores=2, shared=True, accumulator=8 * 6 * 6)
    a = layout_for(plain, 6, **args).estimate
    b = layout_for(weighted, 6, weighted=True, **args).estimate
    rows = 4000  # both files gathered into one task, under the batch size
    # the decoded batch (Arrow + float64, one more column) and the copy of its rows of positive weight
    assert a.batch == 2 * 8 * rows * 6 and b.batch == 2 * 8 * rows * 7 + 8 * rows * 6
    assert b.total > a.total


def test_auto_decodes_by_slices_within_the_working_set():
    d = 256
    acc = 8 * d * d
    kw = dict(workers=2, memory_per_worker=6 << 30, cores=2, shared=True, accumulator=acc)
    # ten files of one 100k-row group (what pandas/pyarrow write for files this size): streaming
    # one holds ~2.1 MB of pyarrow buffers per column (540 MiB), its decoded block is 205 MB
    files = [Piece(i, f"p{i}", 0, 100_000, 8 * 100_000 * d, 540 << 20) for i in range(10)]
    auto = layout_for(files, d, working_set=AUTO_WORKING_SET, **kw)
    assert auto.sliced_bytes >= 8 * 100_000 * d and auto.estimate.reader < (200 << 20)
    assert (auto.in_flight, auto.threads) == (1, 2)  # one task on both cores, not two at 2 x 350 MB
    assert auto.estimate.in_flight * auto.estimate.task <= AUTO_WORKING_SET
    # 32k-row groups of 64 MiB: read whole they cost 4.5x their bytes; by slices two fit the working set
    groups = [Piece(i // 4, f"q{i // 4}", i % 4, 32_768, 8 * 32_768 * d, 260 << 20) for i in range(12)]
    auto = layout_for(groups, d, working_set=AUTO_WORKING_SET, **kw)
    assert auto.sliced_bytes and auto.in_flight == 2
    assert auto.estimate.in_flight * auto.estimate.task <= AUTO_WORKING_SET
    # one file with pyarrow's default 1Mi-row groups: 2 GiB decoded, streamed
    huge = [Piece(0, "h", 0, 1 << 20, 8 * d << 20, 670 << 20)]
    auto = layout_for(huge, d, working_set=AUTO_WORKING_SET, **kw)
    assert auto.sliced_bytes == 0 and auto.estimate.reader == 670 << 20


def test_sliced_row_group_carries_its_keep_columns(tmp_path, rng):
    x = rng.standard_normal((3000, 5))
    (path,) = write_parquet(tmp_path, x, keep={"id": np.arange(3000), "tag": np.array(["a", "b", "c"] * 1000)})
    columns = tuple(f"f{j}" for j in range(5))
    spec = ReadSpec(columns, "", 5, 700, keep=("id", "tag"), sliced_bytes=1 << 30)
    ((block, kept),) = list(iter_block(path, 0, spec, with_keep=True))  # one block, the keep columns beside
    np.testing.assert_array_equal(block, x)
    assert kept.column("id").to_pylist() == list(range(3000)) and kept.column("tag").to_pylist()[:4] == list("abca")
