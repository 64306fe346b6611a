"""pcapipe on the Parquet layouts users have, each against that layout's own floor.

    python tests/perf/layouts.py [--quick] [--only tall,wide,emb,small] [--scratch DIR] [--code DIR] [--scores]

Shapes (``--quick``: 1/10 of the rows, 1/10 of the small files):

* ``tall``   1M x 256 float64, scalar columns
* ``wide``   50k x 10,000 float32, scalar columns
* ``emb``    100k x 4096 float32, one fixed-size-list vector column
* ``small``  5,000 files of 200 x 64 float64, against ten files of the same rows

Layouts (the same rows each time): ``rg32k`` (files of 100k rows in 32k-row
groups), ``file100k`` (one row group per 100k-row file, what pandas/pyarrow
write for files that size), ``pa-default`` (one file, pyarrow's default
1Mi-row groups), ``duckdb`` and ``polars`` (one file written by each with its
default settings).  Generation needs duckdb and polars (benchmark-only).

Contenders, each in a fresh child process (``measure.py``: wall time, peak
RSS of the child):

* ``floor``: read + decode + Gram -- each row group read whole with pyarrow's
  threads (streamed when over 256 MiB), 8 MiB float64 Fortran batches, BLAS
  ``dsyrk`` into one accumulator: what the layout costs to read and multiply
  at all, with no memory limit;
* ``pcapipe covariance`` at ``memory_limit = "auto"``;
* ``pcapipe covariance`` at ``memory_limit = "256MiB"`` x 2 workers (the
  memory target: peak <= 512 MiB + layout.FIXED_OVERHEAD);
* with ``--scores``, for the small files: ``auto`` writing scores (one part per input file).

Prints a markdown table with the ratio to the floor beside each pcapipe row
and the machine's other load during each child (the ``others`` column: cores
busy with other work; the machine is shared).  Not collected by pytest.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, HERE)

import measure  # noqa: E402

SHAPES = {  # name: (rows, d, dtype, vector, k)
    "tall": (1_000_000, 256, np.float64, False),
    "wide": (50_000, 10_000, np.float32, False),
    "emb": (100_000, 4096, np.float32, True),
}
LAYOUTS = ("rg32k", "file100k", "pa-default", "duckdb", "polars")
_CHUNK = 100_000

_FLOOR = r"""
import sys, numpy as np, pyarrow as pa, pyarrow.parquet as pq
from scipy.linalg.blas import dsyrk
paths, d, vector = sys.argv[3:], int(sys.argv[1]), sys.argv[2] == "1"
rows = max(1024, (8 << 20) // (8 * d))
c = None
def batches(pf):
    for rg in range(pf.metadata.num_row_groups):
        if pf.metadata.row_group(rg).total_byte_size <= 256 << 20:  # whole row group, pyarrow's threads
            t = pf.read_row_group(rg, use_threads=True)
            yield from (t.slice(i, rows) for i in range(0, t.num_rows, rows))
        else:  # too large to hold: pyarrow's streaming reader
            yield from pf.iter_batches(batch_size=rows, row_groups=[rg], use_threads=True)
for p in paths:
    for b in batches(pq.ParquetFile(p)):
        if vector:
            col = b.column(0)
            col = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
            x = col.flatten().to_numpy().reshape(b.num_rows, d).astype(np.float64)
            a, trans = x.T, 0
        else:
            x = np.empty((b.num_rows, d), order="F")
            for j, col in enumerate(b.columns):
                x[:, j] = col.to_numpy()
            a, trans = x, 1
        x -= x.mean(axis=0)
        c = dsyrk(1.0, a, beta=0.0 if c is None else 1.0, c=c, trans=trans, overwrite_c=1)
print(float(np.trace(c)))
"""


def _rows(rng, n, d, dtype):
    """A few strong directions plus noise, chunk by chunk (reproducible for a seed)."""
    basis = np.random.default_rng(99).standard_normal((8, d))
    z = rng.standard_normal((n, 8)) * [40, 30, 20, 10, 8, 6, 4, 2]
    return (z @ basis + rng.standard_normal((n, d)) + 3.0).astype(dtype)


def _table(x: np.ndarray, vector: bool) -> pa.Table:
    if vector:
        return pa.table({"emb": pa.FixedSizeListArray.from_arrays(pa.array(x.ravel()), x.shape[1])})
    return pa.table({f"f{j}": x[:, j] for j in range(x.shape[1])})


def _generate(root: str, shape: str, n: int, d: int, dtype, vector: bool, log) -> None:
    """Write every layout of one shape (skipped when present)."""
    base = os.path.join(root, shape)
    done = os.path.join(base, "done.json")
    if os.path.exists(done):
        return
    shutil.rmtree(base, ignore_errors=True)
    for layout in ("rg32k", "file100k"):
        os.makedirs(os.path.join(base, layout))
    rng = np.random.default_rng(1)
    parts = []
    for i, start in enumerate(range(0, n, _CHUNK)):
        t = _table(_rows(rng, min(_CHUNK, n - start), d, dtype), vector)
        pq.write_table(t, os.path.join(base, "rg32k", f"part-{i:03d}.parquet"), row_group_size=32_768)
        pq.write_table(t, os.path.join(base, "file100k", f"part-{i:03d}.parquet"), row_group_size=_CHUNK)
        parts.append(t)
        log(f"  {shape}: rows {start + t.num_rows}/{n}")
    whole = pa.concat_tables(parts)
    del parts
    for layout in ("pa-default", "duckdb", "polars"):
        os.makedirs(os.path.join(base, layout))
    pq.write_table(whole, os.path.join(base, "pa-default", "data.parquet"))
    import polars as pl

    pl.from_arrow(whole).write_parquet(os.path.join(base, "polars", "data.parquet"))
    del whole
    import duckdb

    src = os.path.join(base, "file100k", "*.parquet")
    duckdb.sql(f"COPY (SELECT * FROM read_parquet('{src}')) TO '{os.path.join(base, 'duckdb', 'data.parquet')}' "
               "(FORMAT parquet)")
    with open(done, "w") as f:
        json.dump({"n": n, "d": d}, f)


def _generate_small(root: str, files: int, log) -> None:
    base = os.path.join(root, "small")
    if os.path.exists(os.path.join(base, "done.json")):
        return
    shutil.rmtree(base, ignore_errors=True)
    os.makedirs(os.path.join(base, "files-many"))
    os.makedirs(os.path.join(base, "files-ten"))
    x = _rows(np.random.default_rng(2), files * 200, 64, np.float64)
    for i in range(files):
        pq.write_table(_table(x[i * 200:(i + 1) * 200], False), os.path.join(base, "files-many", f"p{i:05d}.parquet"))
    for i, part in enumerate(np.array_split(x, 10)):
        pq.write_table(_table(part, False), os.path.join(base, "files-ten", f"p{i:02d}.parquet"))
    log(f"  small: {files} files")
    with open(os.path.join(base, "done.json"), "w") as f:
        json.dump({"files": files}, f)


def _config(path: str, data: str, out: str, vector: bool, memory: str, workers: int, scores: bool = False) -> None:
    sys.path.insert(0, os.path.dirname(HERE))
    from conftest import write_toml

    write_toml(path, {
        "input": {"paths": [data], **({"vector_column": "emb"} if vector else {})},
        "model": {"components": 10, "method": "covariance"},
        "compute": {"scheduler": "threads", "workers": workers, "memory_limit": memory, "progress": False},
        "output": {"directory": out, "scores": scores, "report": False, "overwrite": True},
    })


def _run(label: str, argv, env, logs: str, timeout: float, rows: list, case: str, layout: str) -> dict:
    # `python -m pcapipe` imports pcapipe from the working directory before PYTHONPATH: run the
    # child in the checkout measured, or --code would measure whatever checkout we started in
    code = env["PYTHONPATH"].split(os.pathsep)[0]
    r = measure.run_child(argv, env, os.path.join(logs, f"{case}-{layout}-{label}".replace(" ", "_")), timeout,
                          cwd=code)
    status = "ok" if r.returncode == 0 else ("timeout" if r.timed_out else f"exit {r.returncode}")
    if r.returncode != 0:
        status += ": " + (r.stderr.strip().splitlines() or [""])[-1][:160]
    row = {"case": case, "layout": layout, "contender": label, "wall": r.wall_seconds, "cpu": r.cpu_seconds,
           "rss": r.peak_rss_mb, "others": r.others_cores, "status": status}
    rows.append(row)
    print(f"{case:6s} {layout:11s} {label:28s} {r.wall_seconds:7.2f} s cpu {r.cpu_seconds:7.2f} s {r.peak_rss_mb:7.0f} MB "
          f"others {r.others_cores:.1f}  {status}", flush=True)
    return row


def _bench_layout(case, layout, paths_glob, d, vector, env, scratch, rows, timeout, scores=False, no_floor=False):
    logs = os.path.join(scratch, "logs")
    os.makedirs(logs, exist_ok=True)
    files = sorted(__import__("glob").glob(paths_glob))
    floor = {"status": "skipped"} if no_floor else \
        _run("floor: read+decode+Gram", [sys.executable, "-c", _FLOOR, d, int(vector), *files], env, logs,
             timeout, rows, case, layout)
    runs = [("auto", 0, False), ("256MiB", 2, False)] + ([("auto", 0, True)] if scores else [])
    for memory, workers, with_scores in runs:
        tag = f"{memory}{'-scores' if with_scores else ''}"
        cfg = os.path.join(scratch, "configs", f"{case}-{layout}-{tag}.toml")
        os.makedirs(os.path.dirname(cfg), exist_ok=True)
        _config(cfg, paths_glob, os.path.join(scratch, "runs", f"{case}-{layout}-{tag}"), vector, memory, workers,
                with_scores)
        row = _run(f"pcapipe cov {memory}" + (" x 2" if workers else "") + (" + scores" if with_scores else ""),
                   [sys.executable, "-m", "pcapipe", "run", "-q", cfg], env, logs, timeout, rows, case, layout)
        ok = floor["status"] == "ok" and row["status"] == "ok"
        row["ratio"] = row["wall"] / floor["wall"] if ok else float("nan")
        row["cpu_ratio"] = row["cpu"] / floor["cpu"] if ok else float("nan")


def _table_md(rows) -> str:
    out = ["| case | layout | contender | wall s | CPU s | wall / floor | CPU / floor | peak RSS MB | others (cores) "
           "| status |", "|---|---|---|---|---|---|---|---|---|---|"]

    def ratio(r, key):
        return f"{r[key]:.2f}x" if key in r and r[key] == r[key] else ""

    for r in rows:
        out.append(f"| {r['case']} | {r['layout']} | {r['contender']} | {r['wall']:.2f} | {r['cpu']:.2f} | "
                   f"{ratio(r, 'ratio')} | {ratio(r, 'cpu_ratio')} | {r['rss']:.0f} | {r['others']:.1f} | "
                   f"{r['status']} |")
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--only", default="tall,wide,emb,small")
    ap.add_argument("--layouts", default=",".join(LAYOUTS))
    ap.add_argument("--scratch", default=os.path.join(tempfile.gettempdir(), "pcapipe-layouts"))
    ap.add_argument("--code", default=REPO, help="the pcapipe checkout to measure")
    ap.add_argument("--timeout", type=float, default=1800)
    ap.add_argument("--generate-only", action="store_true", help="write the data, run nothing")
    ap.add_argument("--scores", action="store_true", help="also run `auto` with scores (small files only)")
    ap.add_argument("--no-floor", action="store_true", help="pcapipe only (a before/after comparison)")
    args = ap.parse_args(argv)
    scale = 10 if args.quick else 1
    root = os.path.join(args.scratch, "quick" if args.quick else "full")
    env = measure.child_env(os.path.abspath(args.code))
    rows: list[dict] = []
    t0 = time.time()
    for case in args.only.split(","):
        if case == "small":
            files = 5000 // scale
            _generate_small(root, files, print)
            if args.generate_only:
                continue
            for layout in ("files-many", "files-ten"):
                _bench_layout(case, layout, os.path.join(root, "small", layout, "*.parquet"), 64, False, env,
                              args.scratch, rows, args.timeout, scores=args.scores, no_floor=args.no_floor)
            continue
        n, d, dtype, vector = SHAPES[case]
        _generate(root, case, n // scale, d, dtype, vector, print)
        if args.generate_only:
            continue
        for layout in args.layouts.split(","):
            _bench_layout(case, layout, os.path.join(root, case, layout, "*.parquet"), d, vector, env,
                          args.scratch, rows, args.timeout, no_floor=args.no_floor)
    text = _table_md(rows)
    print(text)
    out = os.path.join(HERE, "results")
    os.makedirs(out, exist_ok=True)
    with open(os.path.join(out, "layouts-quick.md" if args.quick else "layouts-full.md"), "w") as f:
        f.write(f"<!-- {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime(t0))}, {len(os.sched_getaffinity(0))} "
                f"cores -->\n{text}\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
