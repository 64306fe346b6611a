"""Synthetic Parquet data whose *sample* covariance has a chosen spectrum.

Rows are ``x = (z - zbar) A + mu`` with ``z`` standard normal.  The first of
two passes over the (seeded, chunk-by-chunk reproducible) ``z`` measures its
sample covariance ``S``; with ``A = S^{-1/2} diag(sqrt(lam)) Q^T`` (``Q`` a
random orthogonal matrix) the sample covariance of ``x`` is exactly
``Q diag(lam) Q^T`` up to rounding, so the eigenvalue gaps we design are the
gaps the solvers see (with plain Gaussian rows the sampling error
``lam * sqrt(2/n)``, North et al. 1982, would swamp a 1e-3 gap).  float32
cases are rounded when written, which is why the accuracy reference is
recomputed from the stored files (:func:`reference`), in float64, in chunks.

Spectra (eigenvalue index j from 0):

* tall (d = 256, k = 10): ``50 * 0.7**j`` for j < 10 (50 .. 2.0, ratio 0.7),
  then a bulk ``(j - 9) ** -0.5`` (1.0 .. 0.064).
* wide (d = 2048, k = 10): ``30 * 0.9**j`` for j < 10 (30 .. 11.6, ratio
  0.9), then a heavy, slowly decaying bulk ``8 * (1 + (j - 10) / 10) ** -0.5``
  (8.0 .. 0.7, ~90% of the variance), the shape of embedding spectra; it is
  what makes randomized range finders with few power iterations come out low
  while the leading ten stay separated (gap 11.6 -> 8.0).
* degenerate (d = 512, k = 10): six separated ``20 * 0.7**j`` (20 .. 3.4),
  then the top of a dense noise bulk ``1.5 * 0.999**(j - 6)`` (relative
  gaps 1e-3 all the way down, 1.5 .. 0.9): PC7-PC10 sit inside it and
  cannot be certified in a few passes.

Means are ``mu_j = 3 + (j mod 7)`` so centering is exercised.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import asdict, dataclass

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

__all__ = ["Case", "CASES", "case_for", "spectrum", "ensure_data", "reference", "data_paths",
           "read_batches"]

_FORMAT = 3  # bump when the generator changes, so stale scratch data are rebuilt


@dataclass(frozen=True)
class Case:
    """One synthetic data set."""

    name: str
    n: int
    d: int
    dtype: str
    layouts: tuple[str, ...]   # "scalar" (one column per feature) and/or "vector"
    files: int
    row_group: int
    k: int
    seed: int
    k_separated: int           # leading components separated from the rest

    def key(self) -> str:
        text = json.dumps({**asdict(self), "format": _FORMAT}, sort_keys=True)
        return hashlib.sha256(text.encode() + spectrum(self).tobytes()).hexdigest()[:16]


CASES = {
    "tall": Case("tall", 1_000_000, 256, "float64", ("scalar",), 8, 62_500, 10, 1, 10),
    "wide": Case("wide", 200_000, 2048, "float32", ("scalar", "vector"), 8, 12_500, 10, 2, 10),
    "degenerate": Case("degenerate", 200_000, 512, "float64", ("scalar",), 8, 12_500, 10, 3, 6),
}


def case_for(name: str, quick: bool) -> Case:
    """The full-size case, or 1/10 of its rows (and row groups) for ``--quick``."""
    c = CASES[name]
    if not quick:
        return c
    return Case(c.name, c.n // 10, c.d, c.dtype, c.layouts, c.files, c.row_group // 10, c.k, c.seed,
                c.k_separated)


def spectrum(case: Case) -> np.ndarray:
    """The designed eigenvalues, largest first (see the module docstring)."""
    j = np.arange(case.d, dtype=float)
    if case.name == "tall":
        return np.where(j < 10, 50 * 0.7**j, np.maximum(j - 9, 1) ** -0.5)
    if case.name == "wide":
        return np.where(j < 10, 30 * 0.9**j, 8 * (1 + np.maximum(j - 10, 0) / 10) ** -0.5)
    return np.where(j < 6, 20 * 0.7**j, 1.5 * 0.999 ** np.maximum(j - 6, 0))


def _chunks(case: Case):
    """(file index, start row, rows) of every row group, in order."""
    per_file = case.n // case.files
    for fi in range(case.files):
        for start in range(0, per_file, case.row_group):
            yield fi, fi * per_file + start, min(case.row_group, per_file - start)


def _z(case: Case, start: int, rows: int) -> np.ndarray:
    # One generator per chunk, keyed by its first row: both passes see the same z
    # (Q uses the key 10**12, beyond any row number).
    return np.random.default_rng([case.seed, start]).standard_normal((rows, case.d))


def _mixing(case: Case) -> tuple[np.ndarray, np.ndarray]:
    """``zbar`` and ``A`` such that ``(z - zbar) A`` has sample covariance Q diag(lam) Q^T."""
    d = case.d
    total = np.zeros(d)
    gram = np.zeros((d, d))
    for _, start, rows in _chunks(case):
        z = _z(case, start, rows)
        total += z.sum(axis=0)
        gram += z.T @ z
    zbar = total / case.n
    s = (gram - case.n * np.outer(zbar, zbar)) / (case.n - 1)
    w_val, w_vec = np.linalg.eigh(s)
    inv_sqrt = (w_vec / np.sqrt(w_val)) @ w_vec.T
    q, _ = np.linalg.qr(np.random.default_rng([case.seed, 10**12]).standard_normal((d, d)))
    return zbar, inv_sqrt @ (np.sqrt(spectrum(case))[:, None] * q.T)


def data_paths(root: str, case: Case, layout: str) -> list[str]:
    base = os.path.join(root, f"{case.name}-{case.n}-{layout}")
    return [os.path.join(base, f"part-{fi:03d}.parquet") for fi in range(case.files)]


def _table(x: np.ndarray, layout: str, dtype) -> pa.Table:
    if layout == "scalar":
        xf = np.asfortranarray(x, dtype=dtype)
        return pa.table({f"f{j:04d}": xf[:, j] for j in range(x.shape[1])})
    flat = pa.array(np.ascontiguousarray(x, dtype=dtype).ravel())
    return pa.table({"emb": pa.FixedSizeListArray.from_arrays(flat, x.shape[1])})


def ensure_data(root: str, case: Case, log=print) -> None:
    """Write the case's files under ``root`` unless a matching copy is there."""
    stamp = os.path.join(root, f"{case.name}-{case.n}.json")
    want = {"key": case.key(), "layouts": list(case.layouts)}
    if os.path.exists(stamp):
        with open(stamp) as f:
            if json.load(f) == want and all(os.path.exists(p) for lay in case.layouts
                                            for p in data_paths(root, case, lay)):
                return
    log(f"generating {case.name}: {case.n} x {case.d} {case.dtype} {'+'.join(case.layouts)}")
    zbar, a = _mixing(case)
    mu = 3.0 + (np.arange(case.d) % 7)
    writers = {}
    try:
        for fi, start, rows in _chunks(case):
            x = (_z(case, start, rows) - zbar) @ a + mu
            for layout in case.layouts:
                path = data_paths(root, case, layout)[fi]
                table = _table(x, layout, np.dtype(case.dtype))
                if (layout, fi) not in writers:
                    os.makedirs(os.path.dirname(path), exist_ok=True)
                    # plain encoding: a dictionary is useless on continuous floats
                    writers[(layout, fi)] = pq.ParquetWriter(path, table.schema, compression="snappy",
                                                             use_dictionary=False)
                writers[(layout, fi)].write_table(table, row_group_size=rows)
    finally:
        for w in writers.values():
            w.close()
    with open(stamp, "w") as f:
        json.dump(want, f)


def read_batches(paths, layout: str, d: int, batch_rows: int):
    """Float64 (rows, d) batches of the files, in order (used by the reference and IPCA)."""
    for path in paths:
        pf = pq.ParquetFile(path)
        for batch in pf.iter_batches(batch_size=batch_rows, use_threads=True):
            if layout == "vector":
                col = batch.column(0)
                x = col.flatten().to_numpy().reshape(len(col), d)
            else:
                x = np.column_stack([c.to_numpy() for c in batch.columns])
            yield np.asarray(x, dtype=np.float64)


def reference(root: str, case: Case, files: int | None = None) -> dict:
    """Eigen-decomposition of the exact sample covariance of the stored data (float64, chunked).

    ``files``: only the first that many files (the growth series); default all.
    """
    layout = case.layouts[0]
    files = files or case.files
    path = os.path.join(root, f"{case.name}-{case.n}-{case.key()}-reference-{files}.npz")
    if os.path.exists(path):
        with np.load(path) as z:
            return {k: z[k] for k in z.files}
    shift = None
    n, total, gram = 0, np.zeros(case.d), np.zeros((case.d, case.d))
    rows = max(1024, (128 << 20) // (8 * case.d))  # 128 MiB batches
    for x in read_batches(data_paths(root, case, layout)[:files], layout, case.d, rows):
        if shift is None:
            shift = x.mean(axis=0)  # sums about a nearby point do not cancel
        x -= shift
        n += x.shape[0]
        total += x.sum(axis=0)
        gram += x.T @ x
    m = total / n
    c = (gram - n * np.outer(m, m)) / (n - 1)
    values, vectors = np.linalg.eigh(c)
    order = np.argsort(values)[::-1]
    out = {"values": values[order], "vectors": vectors[:, order], "mean": m + shift,
           "designed": spectrum(case)}
    np.savez(path, **out)
    return out
