"""What monitoring (T2, SPE, alarms, control limits) costs on top of a run with scores.

    python tests/perf/bench_monitor.py [--quick] [--repeat 3] [--baseline REV] [--scratch DIR]

Runs ``pcapipe run`` with ``output.scores = true`` on the benchmark's tall case
(``datagen.py``: 1M x 256 float64, or 1/10 of the rows with ``--quick``) for
the covariance and the matrix-free method, each in a fresh child process, once
with the package before monitoring existed (``--baseline``, default: the
parent of the commit that added ``pcapipe/limits.py``) and once with the
working tree, both unpacked with ``git archive`` so that nothing changes under
the measurement.  Prints wall time, the run's own total and scores-stage
times, passes over the data and peak RSS; the fastest of ``--repeat`` runs is
kept.  Nothing here asserts timings (the target, under 10% more time and no
extra pass for the covariance method, is read off the table).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(os.path.dirname(HERE))
sys.path.insert(0, HERE)

import datagen  # noqa: E402
import measure  # noqa: E402


def _snapshot(rev: str, scratch: str) -> str:
    """The package at ``rev`` (or the working tree for "tree") unpacked under ``scratch``."""
    if rev == "tree":
        return REPO
    sha = subprocess.run(["git", "rev-parse", "--short", rev], cwd=REPO, capture_output=True, text=True,
                         check=True).stdout.strip()
    dest = os.path.join(scratch, f"code-{sha}")
    if not os.path.isdir(os.path.join(dest, "pcapipe")):
        os.makedirs(dest, exist_ok=True)
        archive = subprocess.run(["git", "archive", "--format=tar", sha, "pcapipe"], cwd=REPO,
                                 capture_output=True, check=True).stdout
        subprocess.run(["tar", "-x", "-C", dest], input=archive, check=True)
    return dest


def _default_baseline() -> str:
    added = subprocess.run(["git", "log", "--diff-filter=A", "--format=%H", "--", "pcapipe/limits.py"], cwd=REPO,
                           capture_output=True, text=True, check=True).stdout.split()
    if not added:
        raise SystemExit("no commit adds pcapipe/limits.py; give --baseline REV")
    return added[-1] + "^"


def _run(code: str, label: str, paths, method: str, case, root: str, repeat: int) -> dict:
    sys.path.insert(0, os.path.dirname(HERE))
    from conftest import write_toml

    cfg = os.path.join(root, "configs", f"{label}.toml")
    out = os.path.join(root, "runs", label)
    write_toml(cfg, {"input": {"paths": paths},
                     "model": {"components": case.k, "method": method, "tolerance": 1e-9},
                     "compute": {"scheduler": "threads", "progress": False},
                     "output": {"directory": out, "scores": True, "overwrite": True, "report": False}})
    best = None
    for _ in range(repeat):
        # cwd outside the repository: "python -m" puts the cwd first on sys.path, ahead of PYTHONPATH
        res = measure.run_child([sys.executable, "-m", "pcapipe", "run", cfg], measure.child_env(code),
                                os.path.join(root, "logs", label), timeout=1800, cwd=root)
        if res.returncode != 0:
            raise SystemExit(f"{label}: exit {res.returncode}: {res.stderr.strip().splitlines()[-1:]}")
        with open(os.path.join(out, "manifest.json")) as f:
            man = json.load(f)
        # has_limits: which package really ran
        row = {"label": label, "has_limits": "limits" in man, "wall": res.wall_seconds, "rss": res.peak_rss_mb,
               "others": res.others_cores,
               "total": man["timings"]["total_seconds"], "scores": man["timings"].get("scores_seconds", 0.0),
               "limits": man["timings"].get("limits_seconds", 0.0), "passes": man["passes_over_data"],
               "estimated": (man.get("limits") or {}).get("estimated")}
        if best is None or row["wall"] < best["wall"]:
            best = row
    return best


def _inner_ab(paths, case, rounds: int, root: str) -> None:
    """In-process A/B of the score writer on the same files: without and with the monitoring columns.

    The two variants alternate ``rounds`` times and the fastest of each is
    kept, so a machine shared with other work affects both alike; the
    difference is what T2/SPE/alarms add to the scores pass, and
    ``count_alarms`` is the read-back of the two alarm columns.
    """
    import time

    import numpy as np

    sys.path.insert(0, REPO)
    from pcapipe.alarms import count_alarms
    from pcapipe.monitor import MonitorSpec
    from pcapipe.reader import ReadSpec, batch_rows_for
    from pcapipe.tasks import Transform, scores_task

    d, k = case.d, case.k
    spec = ReadSpec(tuple(f"f{j:04d}" for j in range(d)), "", d, batch_rows_for(d))
    loadings, _ = np.linalg.qr(np.random.default_rng(0).standard_normal((d, k)))
    t = Transform(np.zeros(d), None, "none")
    mon = MonitorSpec(np.linspace(50.0, 2.0, k), 23.2, 40.0)
    names = tuple(f"PC{i + 1}" for i in range(k))
    out = os.path.join(root, "out-ab")
    os.makedirs(out, exist_ok=True)
    best = {"plain": np.inf, "monitoring": np.inf, "count_alarms": np.inf}
    for _ in range(rounds):
        for label, m in (("plain", None), ("monitoring", mon)):
            t0 = time.perf_counter()
            parts = [scores_task(p, list(range(pq_groups(p))), spec, t, loadings, names,
                                 os.path.join(out, f"{label}-{i}.parquet"), 0, m) for i, p in enumerate(paths)]
            best[label] = min(best[label], time.perf_counter() - t0)
            del parts
        t0 = time.perf_counter()
        count_alarms([os.path.join(out, f"monitoring-{i}.parquet") for i in range(len(paths))])
        best["count_alarms"] = min(best["count_alarms"], time.perf_counter() - t0)
    rows = sum(pq_rows(p) for p in paths)
    extra = best["monitoring"] - best["plain"] + best["count_alarms"]
    print(f"\nscore writer A/B, {rows} rows x {d} in {len(paths)} file(s), k = {k}, fastest of {rounds} "
          f"(one thread): plain {best['plain']:.3f} s, with t2/spe/alarms {best['monitoring']:.3f} s "
          f"({best['monitoring'] / best['plain']:.3f}x), alarm count read-back {best['count_alarms']:.3f} s; "
          f"extra {extra:.3f} s = {extra / best['plain']:.1%} of the scores pass")


def pq_groups(path: str) -> int:
    import pyarrow.parquet as pq

    return pq.ParquetFile(path).metadata.num_row_groups


def pq_rows(path: str) -> int:
    import pyarrow.parquet as pq

    return pq.ParquetFile(path).metadata.num_rows


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="1/10 of the rows")
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--baseline", default=None, help="git revision without monitoring")
    p.add_argument("--code", default="HEAD", help="git revision with monitoring, or 'tree'")
    p.add_argument("--scratch", default="/tmp/pcapipe-bench")
    p.add_argument("--methods", default="covariance,matrix-free")
    p.add_argument("--ab-only", action="store_true", help="only the in-process A/B of the score writer")
    p.add_argument("--rounds", type=int, default=7, help="A/B rounds")
    args = p.parse_args(argv)
    case = datagen.case_for("tall", args.quick)
    root = os.path.join(args.scratch, "quick" if args.quick else "full")
    for sub in ("configs", "runs", "logs"):
        os.makedirs(os.path.join(root, sub), exist_ok=True)
    datagen.ensure_data(root, case)
    paths = datagen.data_paths(root, case, "scalar")
    _inner_ab(paths[:2], case, args.rounds, root)
    if args.ab_only:
        return 0
    codes = {"before": _snapshot(args.baseline or _default_baseline(), args.scratch),
             "monitoring": _snapshot(args.code, args.scratch)}
    rows = []
    for method in args.methods.split(","):
        for version, code in codes.items():
            rows.append(dict(_run(code, f"monitor-{method}-{version}", paths, method, case, root, args.repeat),
                             method=method, version=version))
            print(json.dumps(rows[-1]), flush=True)
    print(f"\ntall {case.n} x {case.d} {case.dtype}, scores written, fastest of {args.repeat}")
    print("| method | version | wall s | run total s | scores stage s | limits s | passes | peak RSS MB | others |")
    print("|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        if r["has_limits"] != (r["version"] == "monitoring"):
            raise SystemExit(f"{r['label']}: the wrong package ran (limits in manifest: {r['has_limits']})")
        print(f"| {r['method']} | {r['version']} | {r['wall']:.2f} | {r['total']:.2f} | {r['scores']:.2f} | "
              f"{r['limits']:.3f} | {r['passes']} | {r['rss']:.0f} | {r['others']:.2f} |")
    for method in args.methods.split(","):
        a, b = (next(r for r in rows if r["method"] == method and r["version"] == v) for v in codes)
        print(f"{method}: wall {b['wall'] / a['wall']:.3f}x, run total {b['total'] / a['total']:.3f}x, "
              f"scores stage {b['scores'] / max(a['scores'], 1e-9):.3f}x, passes {a['passes']} -> {b['passes']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
