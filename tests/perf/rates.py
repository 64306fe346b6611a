"""Measure the machine rates behind the ``auto`` cost model (pcapipe/methods.py).

    python tests/perf/rates.py [--repeats 3]

Prints one line per rate and the constants to paste into ``pcapipe/methods.py``
(``RATES``).  Each rate is the best of ``--repeats`` runs (the machine is shared;
the best run is the least disturbed one) on all cores the process may use:

* ``decode``: decoded float64 bytes per second per core, pcapipe's own reader
  (``reader.iter_block``) on a 200k x 256 float32 Parquet file (zstd);
* ``gemm``: flops per second per core of ``X^T (X V)`` (4 n d b flops), the
  matrix-free product, X 100k x 1024, b = 32;
* ``syrk``: flops per second per core of ``X^T X`` (n d^2 flops), the
  covariance pass, X 50k x 1024;
* ``eigh_subset``: seconds / d^3 of ``scipy.linalg.eigh`` by index subset
  (d = 2000, top 100), the covariance method's decomposition;
* ``eigh_full``: seconds / d^3 of a full ``scipy.linalg.eigh`` (d = 1000), the
  direct method's Gram and the solver's Rayleigh-Ritz;
* ``svd``: seconds / (n d^2) of a thin ``scipy.linalg.svd`` (20k x 500).

Not collected by pytest; nothing here asserts anything.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import scipy.linalg as sl

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(os.path.dirname(HERE)))

from pcapipe.reader import ReadSpec, iter_block  # noqa: E402

CORES = len(os.sched_getaffinity(0))


def _best(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def _decode_rate(rng, repeats: int) -> float:
    n, d = 200_000, 256
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "x.parquet")
        x = rng.standard_normal((n, d)).astype(np.float32)
        cols = [f"c{j}" for j in range(d)]
        pq.write_table(pa.table({c: x[:, j] for j, c in enumerate(cols)}), path, row_group_size=n,
                       compression="zstd")
        spec = ReadSpec(tuple(cols), "", d, 32768, ())

        def read():
            for _ in iter_block(path, 0, spec):
                pass

        t = _best(read, repeats)
    # one task decodes one row group on one core
    return 8 * n * d / t


def measure(repeats: int) -> dict:
    rng = np.random.default_rng(0)
    out = {"decode": _decode_rate(rng, repeats)}
    x = rng.standard_normal((100_000, 1024))
    v = rng.standard_normal((1024, 32))
    out["gemm"] = 4 * x.shape[0] * 1024 * 32 / _best(lambda: x.T @ (x @ v), repeats) / CORES
    x = x[:50_000]
    out["syrk"] = x.shape[0] * 1024**2 / _best(lambda: x.T @ x, repeats) / CORES
    a = rng.standard_normal((2100, 2000))
    c = a.T @ a
    out["eigh_subset"] = _best(lambda: sl.eigh(c, subset_by_index=[1900, 1999]), repeats) / 2000**3
    c = c[:1000, :1000]
    out["eigh_full"] = _best(lambda: sl.eigh(c, driver="evd"), repeats) / 1000**3
    a = rng.standard_normal((20_000, 500))
    out["svd"] = _best(lambda: sl.svd(a, full_matrices=False), repeats) / (20_000 * 500**2)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args(argv)
    rates = measure(args.repeats)
    print(f"# {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}, {CORES} cores, "
          f"load average {os.getloadavg()[0]:.1f}, best of {args.repeats}")
    for key, value in rates.items():
        print(f"{key:12s} {value:.4g}")
    print("RATES = {" + ", ".join(f'"{k}": {v:.3g}' for k, v in rates.items()) + "}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
