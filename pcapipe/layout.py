"""Cut the planned row groups into tasks and size them to the memory budget.

The plan (:mod:`pcapipe.plan`) knows each row group's rows and, from the
footers, what decoding it costs; this module decides, before anything is
read:

* which row groups each dask task reads (small row groups and small files
  are grouped, in file order, so 5,000 files of 200 rows are a handful of
  tasks; a large row group is a task of its own);
* how many rows a task decodes at a time (``batch_rows``);
* how many tasks run at once (``in_flight``) and how many threads each task
  uses for decoding and BLAS (``threads``), so that a file with one huge
  row group still keeps every core busy;
* which row groups are decoded whole by column slices (``sliced_bytes``)
  rather than streamed; at ``memory_limit = "auto"`` (half the machine's
  memory) the tasks in flight hold at most ``AUTO_WORKING_SET``, which is
  where a larger working set stopped paying off;
* the memory this costs, as a :class:`MemoryEstimate` that ``pcapipe check``
  prints and that refuses a layout which cannot fit.

Grouping depends only on the plan and the batch size (never on the number of
workers), so the tree reduction over tasks, and hence the result, is the same
whatever ran it.

The memory model (measured, see DEVELOPERS.md "Memory"): a task streaming a
row group holds, per feature column, pyarrow's decompressed page, its
compressed copy and the column's dictionary page, about
``1.25 * (min(chunk, 1 MiB) + dictionary) + min(chunk, 64 KiB)`` (the
last term is the 64 KiB read buffer; pages of at most
1 MiB are what pyarrow, polars and DuckDB write by default); a row group read
whole costs about ``4.5x`` its uncompressed bytes (the Arrow table, the pages
and the allocator's slack: 1M x 256 float64 in 32k-row groups, two tasks,
peak 764 MB); one decoded by column slices costs its float64 block plus
``4.5x`` one slice per decoding thread; the decoded batch costs
twice its float64 bytes (the Arrow batch and the float64 buffer; with row
weights one more column, plus the fold's copy of the rows of positive weight);
the covariance accumulator ``8 d^2``.  The run's peak is then at most
``in_flight * task + held accumulators + cached blocks + FIXED_OVERHEAD``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .config import format_size
from .errors import InputError

__all__ = ["Piece", "Task", "MemoryEstimate", "Layout", "footer_costs", "leaf_columns", "layout_for", "FIXED_OVERHEAD",
           "WHOLE_ROW_GROUP_BYTES", "SLICE_BYTES", "AUTO_WORKING_SET"]

# Peak RSS of a process that imported what `pcapipe run` imports (136 MiB measured,
# numpy 2.4 / pyarrow 26 / dask 2026.8 / scipy 1.17) plus room for the allocators'
# retained pages, the thread stacks and the solver's small arrays.  Measured: see
# DEVELOPERS.md "Memory" (tests/test_memory.py checks runs against it).
FIXED_OVERHEAD = 256 << 20
# A row group up to this size (uncompressed, feature columns) may be read in one
# call and sliced: ~2.5x faster than the streaming reader on wide tables.
WHOLE_ROW_GROUP_BYTES = 64 << 20
# A row group of scalar features is decoded whole-height, a slice of SLICE_BYTES (float64) of
# columns per pyarrow read, when the decoded block takes at most half of a task's memory and the
# run still fits the budget; else streamed in batches.  Streaming costs pyarrow a fixed price per
# column and batch and ~1-2.6 MB of buffers per column: 10k x 10,000 float32, one thread, 2.0 s
# streamed in 838-row batches vs 0.64 s by slices; one 100k x 256 float64 row group 0.21-0.25 s
# and 290 MB by 16 MiB slices vs 0.37-0.66 s and 522 MB streamed vs 1.1-2.2 s and 876 MB read in
# one call (peak over an idle interpreter; DEVELOPERS.md, "Memory").  Slices of 4 MiB hold less
# than 16 MiB ones and are no slower: 124,576 x 256 float64, 270 vs 340 MB, 0.17 vs 0.18 s;
# 10k x 10,000 float32, 795 vs 840 MB, 0.70 vs 1.45 s (one thread, warm cache).
SLICE_BYTES = 4 << 20
# At memory_limit = "auto" the budget is half the machine's memory; the tasks in flight then hold
# at most this much (a block up to it decoded by slices; fewer tasks, each with more threads):
# one task on two threads read the tall layouts as fast as two tasks (DEVELOPERS.md, "Layouts").
AUTO_WORKING_SET = 384 << 20
# pyarrow / polars / DuckDB default data page size (at most): the streaming
# reader holds about one page per column.
_PAGE_BYTES = 1 << 20
_READ_BUFFER = 64 << 10
# Peak bytes per uncompressed byte of a row group read whole (measured, see the module docstring).
_WHOLE_FACTOR = 4.5
# Rows a task should hold at least, counted in decoded bytes: below this the
# per-task cost (a dask task, a tree node, a footer) shows; measured on 5,000
# files of 200 x 64 (DEVELOPERS.md).
_TASK_BYTES = 32 << 20
# Decoded batch target (8 MiB of float64): BLAS is as fast as with 32 MiB and the
# process peaks ~300 MB lower (1M x 256 float64, DEVELOPERS.md).
_BATCH_BYTES = 8 << 20


@dataclass(frozen=True)
class Piece:
    """One row group of one file, with what the footer says it costs to decode."""

    file_index: int
    path: str
    row_group: int
    n_rows: int
    nbytes: int          # uncompressed bytes of the feature columns
    stream_bytes: int    # estimated pyarrow buffers when streamed (all feature columns)


@dataclass(frozen=True)
class Task:
    """One dask task: row groups read in this order (file order, row order kept)."""

    index: int
    pieces: tuple[Piece, ...]

    @property
    def n_rows(self) -> int:
        return sum(p.n_rows for p in self.pieces)


@dataclass(frozen=True)
class MemoryEstimate:
    """What a run holds at its peak, in bytes, and what it may hold."""

    reader: int          # pyarrow buffers of one task
    batch: int           # one decoded batch
    accumulator: int     # one task's partial result (d x d for covariance)
    task: int            # reader + batch + accumulator
    in_flight: int
    held: int            # partial results waiting in the tree reduction
    cached: int          # decoded blocks kept between passes
    total: int           # in_flight * task + held + cached
    budget: int          # workers x memory_limit
    overhead: int        # FIXED_OVERHEAD

    def fits(self) -> bool:
        return self.total <= self.budget

    def describe(self) -> str:
        cached = f" + cached {format_size(self.cached)}" if self.cached else ""
        return (f"~{format_size(self.total)} of {format_size(self.budget)} budget (+{format_size(self.overhead)} "
                f"fixed): {self.in_flight} task(s) x {format_size(self.task)} (reader {format_size(self.reader)}, "
                f"batch {format_size(self.batch)}, accumulator {format_size(self.accumulator)}), held partials "
                f"{format_size(self.held)}{cached}")

    def record(self) -> dict:
        return {k: getattr(self, k) for k in ("reader", "batch", "accumulator", "task", "in_flight", "held",
                                             "cached", "total", "budget", "overhead")}


@dataclass(frozen=True)
class Layout:
    """How the passes read the plan: tasks, batch size, concurrency, and the memory estimate."""

    tasks: tuple[Task, ...]
    batch_rows: int
    in_flight: int
    threads: int
    whole_bytes: int     # row groups up to this many bytes are read in one call
    estimate: MemoryEstimate
    sliced_bytes: int = 0  # larger row groups decoded whole by column slices when at most this (float64)


def leaf_columns(md, columns) -> tuple[tuple[int, bool], ...]:
    """``(leaf index, nested)`` of the Parquet leaf columns under the top-level ``columns``.

    Depends only on the file's schema, so the planner reuses it for files
    with an equal ``md.schema``.
    """
    wanted = set(columns)
    paths = [md.schema.column(i).path.split(".") for i in range(md.num_columns)]
    return tuple((i, len(paths[i]) > 1) for i in range(md.num_columns) if paths[i][0] in wanted)


def footer_costs(md, columns, leaves=None) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """Per row group: uncompressed bytes of ``columns`` and the streaming reader's buffers.

    ``md`` is a ``pyarrow.parquet.FileMetaData``; ``columns`` the top-level
    column names read (a vector column counts its leaf column); ``leaves``
    their :func:`leaf_columns`, when already known.
    """
    if leaves is None:
        leaves = leaf_columns(md, columns)
    nbytes, stream = [], []
    for r in range(md.num_row_groups):
        rg = md.row_group(r)
        total = buffers = 0
        for i, nested in leaves:
            c = rg.column(i)
            size = c.total_uncompressed_size
            dictionary = 0
            if c.has_dictionary_page and c.dictionary_page_offset is not None:
                dictionary = max(0, c.data_page_offset - c.dictionary_page_offset)
            total += size
            # A list column's pages are not bounded by 1 MiB (DuckDB writes a 1.5 GB chunk of
            # 4096-float vectors in very few: a run streaming it peaked at 2.3 GB), so its whole
            # chunk counts.
            page = size if nested else min(size, _PAGE_BYTES)
            buffers += int(1.25 * (page + dictionary)) + min(size, _READ_BUFFER)
        nbytes.append(total)
        stream.append(buffers)
    return tuple(nbytes), tuple(stream)


def batch_rows_for(n_features: int, memory_per_task: int | None = None) -> int:
    """Rows per decoded batch: 8 MiB, but at least d rows (up to 64 MiB), less when memory is short.

    Wide tables need the floor: each batch costs one Python call per scalar
    column and a BLAS call whose efficiency falls with fewer rows than d.
    Measured on 12500 x 2048 float32 blocks, one thread: 2048-row batches are
    3x faster than 512-row ones.
    """
    d = max(1, n_features)
    cap = 8 * _BATCH_BYTES
    budget = _BATCH_BYTES
    if memory_per_task is not None:
        budget = min(_BATCH_BYTES, max(memory_per_task // 16, 1 << 20))
        cap = min(cap, memory_per_task // 8)  # the batch costs twice its float64 bytes
    return int(max(64, budget // (8 * d), min(d, cap // (8 * d))))


def _group(pieces, target_rows: int, whole: int) -> tuple[Task, ...]:
    """Consecutive small pieces grouped until ``target_rows``; a large piece stays alone."""
    tasks, current, rows = [], [], 0
    for p in pieces:
        if p.n_rows >= target_rows or p.nbytes > whole:
            if current:
                tasks.append(Task(len(tasks), tuple(current)))
                current, rows = [], 0
            tasks.append(Task(len(tasks), (p,)))
            continue
        current.append(p)
        rows += p.n_rows
        if rows >= target_rows:
            tasks.append(Task(len(tasks), tuple(current)))
            current, rows = [], 0
    if current:
        tasks.append(Task(len(tasks), tuple(current)))
    return tuple(tasks)


def _is_sliced(p: Piece, d: int, whole: int, sliced: int) -> bool:
    return 8 * p.n_rows * d <= sliced


def _task_bytes(task: Task, batch_rows: int, d: int, whole: int, sliced: int = 0,
                threads: int = 1, weighted: bool = False) -> tuple[int, int]:
    """(reader buffers, batch bytes) of one task at its costliest piece.

    A piece decoded by column slices holds its whole float64 block (once: the
    slices are written straight into it) and, per decoding thread, pyarrow's
    buffers for one slice.  Row weights widen the batch by one column, and
    folding a weighted batch copies its rows of positive weight once.
    """
    rows = min(batch_rows, task.n_rows)
    reader, batch = 0, 2 * 8 * rows * (d + 1) + 8 * rows * d if weighted else 2 * 8 * rows * d
    for p in task.pieces:
        if _is_sliced(p, d, whole, sliced):
            share = min(1.0, SLICE_BYTES / (8.0 * p.n_rows * d)) * max(1, threads)
            reader = max(reader, int(_WHOLE_FACTOR * p.nbytes * min(1.0, share)))
            batch = max(batch, 8 * p.n_rows * d)
        else:
            reader = max(reader, int(_WHOLE_FACTOR * p.nbytes) if p.nbytes <= whole else p.stream_bytes)
    if len(task.pieces) > 1:  # small pieces are gathered into one batch before decoding
        reader = max(reader, int(_WHOLE_FACTOR * sum(p.nbytes for p in task.pieces)
                                  * min(1.0, batch_rows / task.n_rows)))
    return reader, batch


def _fits(estimate: MemoryEstimate, shared: bool, memory_per_worker: int) -> bool:
    return estimate.fits() and (shared or estimate.task <= memory_per_worker)


def _sized(tasks, d, batch_rows, whole, sliced, workers, cores, shared, budget, accumulator,
           cached, weighted=False, working_set=None) -> tuple[MemoryEstimate, int]:
    """The memory estimate of running ``tasks`` (as many at once as fit), and the costliest task's index."""
    # a lone task in a shared process decodes its slices on up to every core
    costs = [_task_bytes(t, batch_rows, d, whole, sliced, cores if shared else 1, weighted)
             for t in tasks] or [(0, 0)]
    worst = max(range(len(costs)), key=lambda i: sum(costs[i]))
    reader, batch = costs[worst]
    task = reader + batch + accumulator
    held = accumulator * (2 + math.ceil(math.log2(max(1, len(tasks)))))
    in_flight = max(1, min(workers, len(tasks)))
    if shared:
        while in_flight > 1 and (in_flight * task + held + cached > budget
                                 or (working_set and in_flight * task > working_set)):
            in_flight -= 1
    return MemoryEstimate(reader, batch, accumulator, task, in_flight, held, cached,
                          in_flight * task + held + cached, budget, FIXED_OVERHEAD), worst


def layout_for(pieces, d: int, *, workers: int, memory_per_worker: int, cores: int, shared: bool,
               accumulator: int = 0, cached: int = 0, weighted: bool = False, sliceable: bool = True,
               working_set: int | None = None) -> Layout:
    """Group ``pieces`` into tasks and size batches and concurrency to the budget.

    Parameters
    ----------
    pieces : sequence of Piece
        Every non-empty row group of the plan, in file order.
    d : int
        Features.
    workers, memory_per_worker, cores : int
        The budget is ``workers * memory_per_worker``; ``cores`` bounds the
        threads a lone task may use.
    shared : bool
        True when the workers share one process (threads, synchronous): then
        fewer tasks may run at once, each with more threads, to fit.  False
        for separate worker processes, where each worker must fit its share.
    accumulator : int
        Bytes of one task's partial result (``8 d^2`` for the covariance method).
    cached : int
        Bytes of decoded blocks kept in memory between passes.
    weighted : bool
        Rows carry weights (``input.row_weight``): a wider batch and its copy;
        the reader streams such row groups rather than decoding them by slices.
    sliceable : bool
        False for a vector column: streamed, never decoded by column slices.
    working_set : int, optional
        ``AUTO_WORKING_SET`` at ``memory_limit = "auto"``: the tasks in flight
        hold at most this much (at least one task runs), and blocks up to it
        are sliced.

    Raises
    ------
    InputError
        The layout cannot fit the budget even one task at a time; the message
        names the file and says what to change.
    """
    budget = workers * memory_per_worker
    per_task_memory = budget // max(1, workers)
    batch_rows = batch_rows_for(d, per_task_memory)
    # read whole only what costs at most a quarter of a task's memory; stream the rest
    whole = min(WHOLE_ROW_GROUP_BYTES, int(per_task_memory / (4 * _WHOLE_FACTOR)))
    target = max(batch_rows, _TASK_BYTES // (8 * max(1, d)))
    if accumulator:  # each task adds a d x d partial and a merge: give it at least 8 d rows of work
        target = max(target, 8 * d)
    tasks = _group(pieces, target, whole)
    # row groups decoded whole by slices when that fits the budget, else streamed; the limit is
    # per worker, never per run, so that every scheduler cuts the same batches (same result)
    sliced = per_task_memory // 2 if sliceable and not weighted else 0
    if working_set:
        sliced = min(sliced, working_set)
    if not any(_is_sliced(p, d, whole, sliced) for t in tasks for p in t.pieces):
        sliced = 0
    estimate, worst = _sized(tasks, d, batch_rows, whole, sliced, workers, cores, shared, budget, accumulator,
                             cached, weighted, working_set)
    if sliced and not _fits(estimate, shared, memory_per_worker):
        sliced = 0
        estimate, worst = _sized(tasks, d, batch_rows, whole, 0, workers, cores, shared, budget, accumulator,
                                 cached, weighted, working_set)
    if not _fits(estimate, shared, memory_per_worker):
        where = tasks[worst].pieces[0].path if tasks else "input"
        raise InputError(
            f"{where}: reading it needs ~{format_size(estimate.task)} per task ({estimate.describe()}), more "
            f"than compute.memory_limit allows; raise compute.memory_limit (or lower compute.workers), or "
            "rewrite the files with smaller row groups (e.g. 64k rows) or fewer columns")
    in_flight = estimate.in_flight
    threads = max(1, cores // in_flight) if shared else 1
    return Layout(tasks, batch_rows, in_flight, threads, whole, estimate, sliced)
