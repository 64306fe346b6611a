"""Child process for the non-pcapipe contenders of the benchmark.

``python contenders.py SPEC.json`` runs one contender described by the JSON
spec and writes ``spec["out"]`` (an ``.npz`` with ``values``, ``vectors``
when there are any, and ``info``, a JSON string with inner timings and the
passes over the data).  pcapipe itself is run through its command line by
``bench.py``, so it is measured exactly as a user runs it.

Contenders
----------
floor-read   read + decode every block to numpy with pyarrow, ``workers``
             threads over the blocks, batches of ``batch_rows`` rows.
floor-gram   the same plus the float64 Gram ``X^T X`` by BLAS ``dsyrk``
             (no centering), one accumulator per thread.
sk-pca-eigh  scikit-learn ``PCA(svd_solver="covariance_eigh")`` on the whole
             data set loaded in memory (stored dtype kept).
sk-pca-rand  scikit-learn ``PCA(svd_solver="randomized", random_state=0)``.
sk-ipca      scikit-learn ``IncrementalPCA.partial_fit`` on streamed batches.
dask-svdc    ``dask.array.linalg.svd_compressed(x - mean, k, n_power_iter=4,
             compute=True)`` on a dask array of row groups (re-read each pass).
"""

from __future__ import annotations

import json
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pyarrow.parquet as pq

__all__ = ["main"]


def _blocks(paths):
    out = []
    for path in paths:
        md = pq.ParquetFile(path).metadata
        out += [(path, rg, md.row_group(rg).num_rows) for rg in range(md.num_row_groups)]
    return out


def _decode(batch, layout: str, d: int, as_f64: bool, buf: np.ndarray | None = None):
    """A batch as numpy: column views (floor-read) or one float64 matrix (Gram).

    ``buf``: a reusable float64 buffer of at least the batch's rows; the floor
    reuses one per thread, since a fresh 32 MiB array is mmapped and page-faulted
    anew each time (glibc's mmap threshold tops out at 32 MiB), which is not
    part of the work.
    """
    n = batch.num_rows
    if layout == "vector":
        col = batch.column(0)
        x = col.flatten().to_numpy().reshape(n, d)
        if not as_f64 or x.dtype == np.float64:
            return x
        out = np.empty((n, d)) if buf is None else buf.reshape(-1)[: n * d].reshape(n, d)
        out[...] = x
        return out
    if not as_f64:
        return [c.to_numpy() for c in batch.columns]
    x = np.empty((n, d), order="F") if buf is None else buf[:n]
    for j, c in enumerate(batch.columns):
        x[:, j] = c.to_numpy()
    return x


def _floor(spec, gram: bool):
    from scipy.linalg import blas
    from threadpoolctl import threadpool_limits

    d, layout = spec["d"], spec["layout"]
    acc, bufs = {}, {}

    def work(block):
        path, rg, _ = block
        pf = pq.ParquetFile(path)
        key = threading.get_ident()
        if gram and key not in bufs:
            bufs[key] = np.empty((spec["batch_rows"], d), order="F")
        for batch in pf.iter_batches(batch_size=spec["batch_rows"], row_groups=[rg], use_threads=False):
            x = _decode(batch, layout, d, gram, bufs.get(key))
            if gram:
                c = acc.get(key)
                if x.flags.f_contiguous:
                    c = blas.dsyrk(1.0, x, trans=1, beta=1.0, c=c, lower=0, overwrite_c=1) if c is not None \
                        else blas.dsyrk(1.0, x, trans=1, lower=0)
                else:
                    c = blas.dsyrk(1.0, x.T, trans=0, beta=1.0, c=c, lower=0, overwrite_c=1) if c is not None \
                        else blas.dsyrk(1.0, x.T, trans=0, lower=0)
                acc[key] = c
        return 0

    workers = spec["workers"]
    with threadpool_limits(limits=max(1, spec["cores"] // workers), user_api="blas"):
        with ThreadPoolExecutor(workers) as ex:
            list(ex.map(work, _blocks(spec["paths"])))
    if gram:
        total = sum(acc.values())
        assert np.isfinite(np.trace(total))
    return {}, {"passes": 1}


def _load_all(spec) -> np.ndarray:
    blocks = _blocks(spec["paths"])
    n = sum(b[2] for b in blocks)
    dtype = np.dtype(spec["dtype"])
    x = np.empty((n, spec["d"]), dtype=dtype)
    row = 0
    for path in spec["paths"]:
        for batch in pq.ParquetFile(path).iter_batches(batch_size=spec["batch_rows"]):
            part = _decode(batch, spec["layout"], spec["d"], False)
            if spec["layout"] == "vector":
                x[row:row + len(part)] = part
                row += len(part)
            else:
                for j, c in enumerate(part):
                    x[row:row + c.size, j] = c
                row += part[0].size
    return x


def _sk_pca(spec, solver: str):
    from sklearn.decomposition import PCA

    t = time.perf_counter()
    x = _load_all(spec)
    t_load = time.perf_counter() - t
    kw = {"random_state": 0} if solver == "randomized" else {}
    t = time.perf_counter()
    pca = PCA(n_components=spec["k"], svd_solver=solver, **kw).fit(x)
    return ({"values": pca.explained_variance_, "vectors": pca.components_.T},
            {"load_seconds": t_load, "fit_seconds": time.perf_counter() - t, "passes": 1,
             "fit_dtype": str(pca.components_.dtype)})


def _sk_ipca(spec):
    from sklearn.decomposition import IncrementalPCA

    ipca = IncrementalPCA(n_components=spec["k"])
    batches = 0
    for path in spec["paths"]:
        for batch in pq.ParquetFile(path).iter_batches(batch_size=spec["ipca_rows"]):
            x = _decode(batch, spec["layout"], spec["d"], True)
            ipca.partial_fit(np.ascontiguousarray(x))
            batches += 1
    return ({"values": ipca.explained_variance_, "vectors": ipca.components_.T},
            {"passes": 1, "batches": batches, "batch_rows": spec["ipca_rows"]})


def _dask_svdc(spec):
    import dask
    import dask.array as da
    from threadpoolctl import threadpool_limits

    d, layout, dtype = spec["d"], spec["layout"], np.dtype(spec["dtype"])

    def read(path, rg):
        t = pq.ParquetFile(path).read_row_group(rg, use_threads=False)
        if layout == "vector":
            col = t.column(0).combine_chunks()
            return col.flatten().to_numpy().reshape(len(col), d)
        x = np.empty((t.num_rows, d), dtype=dtype)
        for j in range(d):
            x[:, j] = t.column(j).to_numpy()
        return x

    parts = [da.from_delayed(dask.delayed(read, pure=True)(p, rg), shape=(n, d), dtype=dtype)
             for p, rg, n in _blocks(spec["paths"])]
    x = da.concatenate(parts, axis=0)
    k = spec["k"]
    with dask.config.set(scheduler="threads", num_workers=spec["workers"]), \
            threadpool_limits(limits=max(1, spec["cores"] // spec["workers"]), user_api="blas"):
        mean = x.mean(axis=0, dtype=np.float64).compute().astype(dtype)
        n = x.shape[0]
        _, s, v = da.linalg.svd_compressed(x - mean, k, n_power_iter=4, seed=0, compute=True)
        s, v = dask.compute(s, v)
    values = np.asarray(s, dtype=np.float64) ** 2 / (n - 1)
    # mean 1 + omega 1 + 2 per power iteration + the final projection 1
    return {"values": values, "vectors": np.asarray(v).T}, {"passes": 3 + 2 * 4}


_RUNNERS = {
    "floor-read": lambda s: _floor(s, False),
    "floor-gram": lambda s: _floor(s, True),
    "sk-pca-eigh": lambda s: _sk_pca(s, "covariance_eigh"),
    "sk-pca-rand": lambda s: _sk_pca(s, "randomized"),
    "sk-ipca": _sk_ipca,
    "dask-svdc": _dask_svdc,
}


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    with open(argv[0]) as f:
        spec = json.load(f)
    t = time.perf_counter()
    arrays, info = _RUNNERS[spec["contender"]](spec)
    info["inner_seconds"] = time.perf_counter() - t
    np.savez(spec["out"], info=json.dumps(info), **arrays)
    return 0


if __name__ == "__main__":
    sys.exit(main())
