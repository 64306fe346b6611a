"""The cost model behind ``model.method = "auto"``: which method for this shape.

Pure arithmetic on the plan's numbers (no data is read), so ``pcapipe check``
shows the same choice as ``pcapipe run`` and tests can assert it for any shape.

Three methods (DESIGN.md, "covariance operator"):

* ``covariance``: one pass assembling the d x d matrix with ``syrk``
  (``n d^2`` flops), then LAPACK ``eigh`` by index subset (``~c d^3``);
  holds one d x d accumulator per task in flight plus the merge and the copy
  LAPACK works on.
* ``direct``: one pass keeping the preprocessed n x d rows on the client, then
  an exact decomposition: the n x n Gram of the rows (``n^2 d`` flops) and its
  ``eigh`` when n < d, else a thin SVD (``~c n d^2``).  Needs the decoded data
  twice (the blocks and the stacked matrix) within the client's memory.
* ``matrix-free``: a moments pass, then ``A`` operator applications of
  ``4 n d b`` flops each (b = k + oversample), each re-decoding the data
  unless the rows are held in worker memory (read once, raw, float32 when
  stored so; when they take at most 40% of the cluster's memory), plus one
  Rayleigh-Ritz per application on a basis of up to ``depth * b`` vectors.

The rates are constants measured on the development machine (2 cores,
2026-12-02) by ``tests/perf/rates.py``; see DEVELOPERS.md, "Benchmarks".  They
only need to be right within a factor of about two: the choice flips where
two estimates cross, and both scale alike on a faster machine.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["MethodChoice", "choose_method", "dense_eigen_cost", "RATES", "EXPECTED_APPLICATIONS", "CACHE_SHARE"]

# Measured by tests/perf/rates.py on 2026-12-02 04:19 UTC (best of 5, 2 cores, load average 12.5:
# the machine was shared, so every rate is low by a similar factor; the choice depends on ratios).
RATES = {
    "decode": 1.93e8,        # decoded float64 bytes / s / core (pcapipe reader, float32 zstd Parquet)
    "gemm": 5.1e9,           # flops / s / core of X^T (X V)
    "syrk": 1.11e10,         # flops / s / core of X^T X (n d^2 flops)
    "eigh_subset": 1.36e-9,  # s / d^3, scipy.linalg.eigh of the top 5% by index (d = 2000)
    "eigh_full": 7.33e-9,    # s / d^3, full scipy.linalg.eigh (divide and conquer, d = 1000)
    "svd": 8.27e-9,          # s / (n d^2), thin scipy.linalg.svd (20k x 500)
}
# Operator applications the block Krylov solver needs for separated components at
# tolerance 1e-9, measured on the benchmark shapes (8-10 at 1e-6, 12-14 at 1e-9; DEVELOPERS.md).
EXPECTED_APPLICATIONS = 14
# Share of the cluster's memory the decoded blocks may take when kept between passes.
CACHE_SHARE = 0.4
_DEPTH = 8  # Krylov depth of the solver (engine._solver_depth), for the Rayleigh-Ritz cost


# The block Krylov solver replaces LAPACK on an in-memory matrix only when its estimate is this
# many times cheaper: the estimate assumes separated components (EXPECTED_APPLICATIONS), and a
# clustered spectrum can take ~20x more applications (common practice, no source: a margin).
_KRYLOV_MARGIN = 20.0


def dense_eigen_cost(d: int, k: int, block: int, cores: int) -> tuple[str, float]:
    """How the covariance method decomposes its in-memory d x d matrix, and the seconds it takes.

    ``("lapack", s)``: ``scipy.linalg.eigh`` (by index subset when k <= d/4),
    ``c d^3``; its reduction to tridiagonal form reads the whole matrix once
    per column, which at d = 10,000 costs minutes.  ``("krylov", s)``: the
    block Krylov solver on the matrix, ``EXPECTED_APPLICATIONS`` products of
    ``2 d^2 b`` flops plus their Rayleigh-Ritz, chosen when at least
    ``_KRYLOV_MARGIN`` times cheaper (few components of a large matrix).
    """
    eigh_c = RATES["eigh_full"] if k > d // 4 else RATES["eigh_subset"]
    lapack = eigh_c * d**3
    basis = _DEPTH * block
    per = (2.0 * d * d * block + 4.0 * d * basis * basis) / (RATES["gemm"] * max(1, cores))
    krylov = EXPECTED_APPLICATIONS * (per + RATES["eigh_full"] * basis**3)
    return ("krylov", krylov) if _KRYLOV_MARGIN * krylov < lapack else ("lapack", lapack)


@dataclass(frozen=True)
class MethodChoice:
    """The method used, why, and the estimates behind the choice."""

    method: str
    reason: str
    estimates: dict = field(default_factory=dict)


def _estimates(n, d, k, block, workers, cores, memory_per_worker, can_cache, client_memory,
               held_itemsize=8) -> dict:
    flops = lambda rate: rate * cores  # noqa: E731 - the whole machine's rate
    decoded = 8.0 * n * d
    read = decoded / (RATES["decode"] * cores)
    # covariance: one accumulator per task in flight on a worker, the merge, LAPACK's copy
    tasks_per_worker = max(1, cores // max(1, workers))
    cov_memory = 8.0 * d * d * (tasks_per_worker + 2)
    cov_fits = cov_memory <= 0.5 * memory_per_worker
    t_cov = read + n * d * d / flops(RATES["syrk"]) + dense_eigen_cost(d, k, block, cores)[1]
    # direct: the blocks and the stacked matrix on the client
    direct_memory = 2 * decoded + 8.0 * min(n, d) ** 2
    direct_fits = direct_memory <= 0.5 * client_memory
    if n < d:
        t_direct = read + n * n * d / flops(RATES["syrk"]) + RATES["eigh_full"] * n**3 + 2.0 * n * d * k / flops(RATES["gemm"])
    else:
        t_direct = read + RATES["svd"] * n * d * d
    # matrix-free: one read, then moments and applications from held rows when they fit
    held = float(held_itemsize) * n * d
    cached = can_cache and held <= CACHE_SHARE * memory_per_worker * workers
    apps = EXPECTED_APPLICATIONS
    product = 4.0 * n * d * block / flops(RATES["gemm"])
    basis = _DEPTH * block
    ritz = 4.0 * d * basis * basis / flops(RATES["gemm"]) + RATES["eigh_full"] * basis**3
    t_mf = read + apps * (product + ritz + (0.0 if cached else read))
    return {
        "decoded_bytes": int(decoded), "covariance_memory_bytes": int(cov_memory),
        "direct_memory_bytes": int(direct_memory), "memory_per_worker": int(memory_per_worker),
        "client_memory": int(client_memory), "covariance_fits": bool(cov_fits),
        "direct_fits": bool(direct_fits), "matrix_free_cached": bool(cached),
        "held_bytes": int(held),
        "covariance_seconds": round(t_cov, 3), "direct_seconds": round(t_direct, 3),
        "matrix_free_seconds": round(t_mf, 3), "expected_applications": apps,
        "k": int(k), "block": int(block), "cores": int(cores), "rates": dict(RATES),
    }


def choose_method(requested: str, n: int, d: int, block: int, data_bytes: int,
                  memory_per_worker: int, workers: int, cores: int, *, k: int | None = None,
                  can_cache: bool = True, client_memory: int | None = None,
                  held_itemsize: int = 8) -> MethodChoice:
    """Pick ``covariance``, ``direct`` or ``matrix-free`` by estimated time within memory.

    Parameters
    ----------
    requested : str
        ``model.method``; anything but ``"auto"`` is obeyed (and recorded).
    n, d : int
        Rows and features.
    block : int
        Solver block, ``k + oversample``.
    data_bytes : int
        Bytes of the input files (recorded; the estimates use the decoded size).
    memory_per_worker, workers, cores : int
        The compute budget: bytes per worker, workers, and threads at work.
    k : int, optional
        Components wanted (default ``block - 8``).
    can_cache : bool
        Whether rows can be held in worker memory (not with processes).
    client_memory : int, optional
        Memory the client may use for the direct method (default: one worker's).
    held_itemsize : int
        Bytes per value of held rows (4 when every feature is stored as float32).

    Returns
    -------
    MethodChoice
        The method, a one-line reason naming the deciding numbers, and every
        estimate (seconds, bytes, the rates used).
    """
    k = max(1, block - 8) if k is None else k
    client_memory = memory_per_worker if client_memory is None else client_memory
    est = _estimates(n, d, k, block, workers, max(1, cores), memory_per_worker, can_cache, client_memory,
                     held_itemsize)
    est["input_bytes"] = int(data_bytes)
    if requested != "auto":
        return MethodChoice(requested, f"model.method = {requested} in the config", est)
    times = {"matrix-free": est["matrix_free_seconds"]}
    if est["covariance_fits"]:
        times["covariance"] = est["covariance_seconds"]
    if est["direct_fits"]:
        times["direct"] = est["direct_seconds"]
    best = min(times, key=lambda m: (times[m], m != "covariance"))
    others = ", ".join(f"{m} ~{t:.3g} s" for m, t in sorted(times.items(), key=lambda kv: kv[1]) if m != best)
    # a method left out for memory is named only when it would have been faster
    left_out = []
    if not est["covariance_fits"] and est["covariance_seconds"] < times[best]:
        left_out.append(f"covariance (~{est['covariance_seconds']:.3g} s) is left out: its {d} x {d} "
                        f"matrices need ~{est['covariance_memory_bytes'] / 2**20:.0f} MiB, more than half "
                        f"of the {memory_per_worker / 2**20:.0f} MiB per worker")
    if not est["direct_fits"] and est["direct_seconds"] < times[best]:
        left_out.append(f"direct (~{est['direct_seconds']:.3g} s) is left out: the decoded rows need "
                        f"~{est['direct_memory_bytes'] / 2**20:.0f} MiB, more than half of the "
                        f"{client_memory / 2**20:.0f} MiB available")
    reason = f"{best} is estimated fastest (~{times[best]:.3g} s; {others or 'no other method fits'})"
    if best == "matrix-free":
        reason += "; rows held in memory" if est["matrix_free_cached"] else "; data re-read every pass"
    if left_out:
        reason += "; " + "; ".join(left_out)
    return MethodChoice(best, reason, est)
