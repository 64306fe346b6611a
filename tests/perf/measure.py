"""Run one benchmark contender in a fresh process: wall time and peak RSS of that child.

Peak RSS is ``ru_maxrss`` from ``os.wait4``, taken by a small wrapper
process (``python measure.py RESULT.json -- ARGV...``) rather than by the
benchmark itself: Linux carries the RSS high-water mark of the forking
process into the child across ``fork``/``vfork`` + ``exec``, so a child of
the benchmark (which holds the reference data) would report at least the
benchmark's own RSS.  The wrapper is a fresh interpreter of ~10 MB, so what
its child reports is the child's own.  ``ru_maxrss`` is in KiB on Linux and
covers the child and the descendants it waited for.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from dataclasses import dataclass

__all__ = ["ChildResult", "run_child", "child_env"]


@dataclass
class ChildResult:
    """How one child process went."""

    argv: list
    returncode: int
    wall_seconds: float
    peak_rss_mb: float
    stdout: str
    stderr: str
    timed_out: bool
    cpu_seconds: float = float("nan")
    others_cores: float = float("nan")


def _busy_jiffies() -> tuple[int, int]:
    """(busy, total) CPU ticks of the whole machine since boot, from /proc/stat."""
    try:
        with open("/proc/stat") as f:
            fields = [int(v) for v in f.readline().split()[1:]]
    except OSError:
        return 0, 0
    total = sum(fields[:8])
    return total - fields[3] - fields[4], total


def child_env(extra_path: str) -> dict:
    """The one environment every contender runs with (the parent's, plus PYTHONPATH)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (extra_path, env.get("PYTHONPATH", "")) if p)
    env.setdefault("PYTHONHASHSEED", "0")
    return env


def run_child(argv, env: dict, log_path: str, timeout: float, cwd: str | None = None) -> ChildResult:
    """Run ``argv`` under the wrapper; stdout/stderr go to ``log_path``.out/.err."""
    result_path = log_path + ".rusage.json"
    if os.path.exists(result_path):
        os.remove(result_path)
    wrapped = [sys.executable, os.path.abspath(__file__), result_path, "--", *map(str, argv)]
    busy0, _ = _busy_jiffies()
    with open(log_path + ".out", "w") as out, open(log_path + ".err", "w") as err:
        proc = subprocess.Popen(wrapped, stdout=out, stderr=err, env=env, cwd=cwd, start_new_session=True)
        timed_out = False
        try:
            proc.wait(timeout)
        except subprocess.TimeoutExpired:
            timed_out = True
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
        except BaseException:
            # the benchmark is interrupted: take the contender (its own session) down with it
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
            raise
    busy1, _ = _busy_jiffies()
    with open(log_path + ".out") as f:
        stdout = f.read()
    with open(log_path + ".err") as f:
        stderr = f.read()
    if timed_out or not os.path.exists(result_path):
        return ChildResult(list(map(str, argv)), proc.returncode or -9, timeout, float("nan"), stdout,
                           stderr, timed_out)
    with open(result_path) as f:
        r = json.load(f)
    # CPU the rest of the machine used meanwhile: a contended run is visible in the table
    busy = (busy1 - busy0) / os.sysconf("SC_CLK_TCK")
    others = max(0.0, busy - r["cpu_seconds"]) / max(r["wall_seconds"], 1e-9)
    return ChildResult(list(map(str, argv)), r["returncode"], r["wall_seconds"], r["maxrss_kb"] / 1024,
                       stdout, stderr, False, r["cpu_seconds"], others)


def _wrap(result_path: str, argv) -> int:
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    code = os.waitstatus_to_exitcode(status)
    with open(result_path, "w") as f:
        json.dump({"returncode": code, "wall_seconds": wall, "maxrss_kb": usage.ru_maxrss,
                   "cpu_seconds": usage.ru_utime + usage.ru_stime}, f)
    return code


if __name__ == "__main__":
    sep = sys.argv.index("--")
    sys.exit(_wrap(sys.argv[1], sys.argv[sep + 1:]))
