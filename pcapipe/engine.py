"""Run a whole job: config -> plan -> moments -> operator -> solver -> run directory.

This module wires the others together and owns the statistics conventions
of the outputs (see README, "Run directory"):

* covariance denominator n - 1; ``scale = true`` divides by the ddof=1
  standard deviation, so the matrix is exactly the correlation matrix;
* ``singular_value = sqrt((n - 1) * eigenvalue)``;
* ``std_error = eigenvalue * sqrt(2 / n)``: the large-sample standard error of
  a sample eigenvalue, North, Bell, Cahalan & Moeng (1982), "Sampling errors
  in the estimation of empirical orthogonal functions", Mon. Wea. Rev. 110;
* each loading vector is flipped so its entry of largest magnitude is positive.
"""

from __future__ import annotations

import logging
import os
import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from ._version import __version__
from .compute import Runner, _cores
from .config import Config, load_config, resolve_path
from .errors import InputError
from .moments import Moments, covariance_from
from .operators import DenseOperator, MatrixFreeOperator, choose_method
from .outputs import build_tables, manifest_for
from .passes import DataPasses
from .plan import Plan, make_plan
from .solver import SolverResult, solve
from .tasks import Transform
from .writer import RunWriter

__all__ = ["run", "prepare", "Prepared", "batch_rows_for", "check_components"]

log = logging.getLogger("pcapipe")

_BATCH_BYTES = 32 << 20  # decoded batch size; bigger buys nothing in BLAS, costs memory


@dataclass
class Prepared:
    """A validated config and its plan, before any value is decoded."""

    cfg: Config
    plan: Plan
    writer: RunWriter
    timings: dict = field(default_factory=dict)


def batch_rows_for(n_features: int, memory_per_worker: int) -> int:
    """Rows per decoded batch: ~32 MiB, or less when the worker budget is small."""
    budget = min(_BATCH_BYTES, max(memory_per_worker // 16, 1 << 20))
    return int(max(256, budget // (8 * max(1, n_features))))


def check_components(components, n: int, d: int) -> None:
    """``model.components`` must be in [1, min(n, d)] (an int) or a fraction in (0, 1)."""
    if isinstance(components, int) and not 1 <= components <= min(n, d):
        raise InputError(
            f"model.components: {components} is more than the data allow: min(rows, features) = "
            f"min({n}, {d}) = {min(n, d)}; ask for at most that many, or a fraction like 0.9"
        )


def prepare(config, overrides=()) -> Prepared:
    """Load and validate the config, plan the inputs, check the output directory."""
    t0 = time.perf_counter()
    cfg = config if isinstance(config, Config) else load_config(config, overrides)
    writer = RunWriter(resolve_path(cfg, cfg.output.directory), cfg.output.overwrite)
    writer.check()
    plan = make_plan(cfg)
    if plan.n_rows < 2:
        raise InputError(f"input.paths: the input has {plan.n_rows} row(s); PCA needs at least 2")
    check_components(cfg.model.components, plan.n_rows, plan.n_features)
    return Prepared(cfg, plan, writer, {"plan_seconds": time.perf_counter() - t0})


def _missing_error(plan: Plan, m: Moments) -> InputError:
    idx = np.flatnonzero(m.missing)
    worst = idx[np.argsort(-m.missing[idx], kind="stable")][:5]
    listed = ", ".join(f"{plan.features[i]} ({int(m.missing[i])})" for i in worst)
    more = f" and {idx.size - worst.size} more" if idx.size > worst.size else ""
    return InputError(
        f"input: missing or non-finite values in {idx.size} feature(s): {listed}{more}; "
        'set input.missing = "drop-rows" or "impute-mean", or clean the data'
    )


def _moments_pass(p: Prepared, passes: DataPasses, full: bool) -> Moments:
    mode = p.cfg.input.missing
    m = passes.moments(full, mode)
    if m.missing.any():
        if mode == "fail":
            raise _missing_error(p.plan, m)
        log.info("missing values in %d feature(s): %s", int((m.missing > 0).sum()), mode)
        if mode == "impute-mean":
            m = passes.moments(full, mode, fill=m.valid_mean)
    if m.n < 2:
        raise InputError(f"input: {m.n} row(s) left after input.missing = {mode!r}; PCA needs at least 2")
    return m


def _preprocessing(p: Prepared, m: Moments) -> tuple[Transform, np.ndarray, np.ndarray]:
    """The per-feature shift and scale, and the transform the tasks apply."""
    std = np.sqrt(m.variance())
    mean = m.mean
    if p.cfg.model.scale:
        flat = std <= 8 * np.finfo(float).eps * np.maximum(np.abs(mean), 1e-300)
        if flat.any():
            names = [p.plan.features[i] for i in np.flatnonzero(flat)[:5]]
            raise InputError(
                f"input: feature(s) {', '.join(names)} are constant ({int(flat.sum())} in all) and cannot "
                "be scaled to unit variance; leave them out with input.exclude or set model.scale = false"
            )
        scale_used = std
    else:
        scale_used = np.ones_like(std)
    missing = "none"
    if m.missing.any():
        missing = "zero" if p.cfg.input.missing == "impute-mean" else "drop"
    shift = mean if p.cfg.model.center else np.zeros_like(mean)
    inv = (1.0 / scale_used) if p.cfg.model.scale else None
    return Transform(shift, inv, missing), std, scale_used


def _solve(p: Prepared, op, rng, depth: int, callback=None) -> SolverResult:
    mc = p.cfg.model
    d = p.plan.n_features
    kwargs = dict(tolerance=mc.tolerance, max_iterations=mc.max_iterations, oversample=mc.oversample,
                  depth=depth, callback=callback)
    comp = mc.components
    if isinstance(comp, int):
        return solve(op.matmat, d, comp, rng=rng, **kwargs)
    # A fraction of the variance: grow k until the cumulative share reaches it,
    # warm-starting each round from the vectors already found.
    k, start = min(d, max(2, mc.oversample)), None
    while True:
        res = solve(op.matmat, d, k, rng=rng, start=start, **kwargs)
        share = np.cumsum(res.values) / op.trace
        hit = np.flatnonzero(share >= comp - 1e-12)
        if hit.size or k == d:
            keep = int(hit[0]) + 1 if hit.size else k
            return _truncate(res, keep)
        k, start = min(d, 2 * k), res.vectors


def _truncate(res: SolverResult, k: int) -> SolverResult:
    return SolverResult(res.values[:k], res.vectors[:, :k], res.residual_norms[:k], res.converged[:k],
                        res.gaps[:k], res.iterations, res.matvecs, res.history[:, :k], res.depth, res.block)


def _orient(vectors: np.ndarray) -> np.ndarray:
    """Flip each column so that its entry of largest magnitude is positive."""
    idx = np.argmax(np.abs(vectors), axis=0)
    signs = np.sign(vectors[idx, np.arange(vectors.shape[1])])
    signs[signs == 0] = 1.0
    return vectors * signs


def _solver_depth(d: int, block: int, memory: int) -> int:
    # basis + image of depth blocks must stay well inside a quarter of the budget
    fit = int(memory // (4 * 2 * 8 * max(1, d) * max(1, block)))
    return max(1, min(8, fit))


def run(config, overrides=(), resume: bool = False):
    """Run the job described by ``config`` and return its :class:`~pcapipe.result.Result`.

    Parameters
    ----------
    config : str, Path, Mapping or Config
        A TOML file, or a dict of the same shape.
    overrides : sequence of str
        ``"section.key=value"`` overrides (the command line's ``--set``).
    resume : bool
        Continue from the checkpoint of an interrupted run (see ``checkpoint``).
    """
    from .result import load

    p = prepare(config, overrides)
    t_start = time.perf_counter()
    timings = dict(p.timings)
    with Runner(p.cfg.compute) as runner:
        info = runner.info
        d, n = p.plan.n_features, p.plan.n_rows
        comp = p.cfg.model.components
        k_guess = comp if isinstance(comp, int) else min(d, max(2, p.cfg.model.oversample))
        block = min(d, k_guess + p.cfg.model.oversample)
        choice = choose_method(p.cfg.model.method, n, d, block, p.plan.total_bytes,
                               info.memory_per_worker, info.workers, min(_cores(), runner.parallelism))
        log.info("method: %s (%s)", choice.method, choice.reason)
        p.writer.start()
        passes = DataPasses(p.plan, runner, batch_rows_for(d, info.memory_per_worker))
        t = time.perf_counter()
        m = _moments_pass(p, passes, full=choice.method == "covariance")
        timings["moments_seconds"] = time.perf_counter() - t
        transform, std, scale_used = _preprocessing(p, m)
        if choice.method == "covariance":
            c = covariance_from(m, p.cfg.model.center, scale_used if p.cfg.model.scale else None)
            op = DenseOperator(c)
            cache = "not needed (one pass)"
        else:
            trace = _trace(m, p.cfg.model.center, scale_used if p.cfg.model.scale else None)
            op = MatrixFreeOperator(lambda v: passes.product(transform, v), m.n, trace, d)
            cache = _maybe_cache(passes, runner, transform, m.n, d)
        rng = np.random.default_rng(p.cfg.model.seed)
        t = time.perf_counter()
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            res = _solve(p, op, rng, _solver_depth(d, block, info.memory_per_worker))
        for w in caught:
            log.warning("%s", w.message)
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        timings["solver_seconds"] = time.perf_counter() - t
        passes.release()
        vectors = _orient(res.vectors)
        t = time.perf_counter()
        score_rows = None
        if p.cfg.output.scores:
            names = [f"PC{i + 1}" for i in range(vectors.shape[1])]
            score_rows = passes.scores(transform, vectors, names, p.writer.path("scores"))
        timings["scores_seconds"] = time.perf_counter() - t
        timings["total_seconds"] = time.perf_counter() - t_start + timings["plan_seconds"]
        tables = build_tables(p.plan, m, res, vectors, std, scale_used, op.trace)
        for name, table in tables.items():
            p.writer.write_table(name, table)
        manifest = manifest_for(p, m, res, choice, op.trace, passes.count, cache, info, timings,
                                score_rows, version=__version__)
    directory = p.writer.finish(manifest)
    log.info("wrote %s", directory)
    return load(directory)


def _trace(m: Moments, center: bool, scale) -> float:
    var = m.variance()
    if not center:
        var = var + m.mean**2 * (m.n / (m.n - 1))
    if scale is not None:
        var = var / scale**2
    return float(var.sum())


def _maybe_cache(passes: DataPasses, runner, transform, n: int, d: int) -> str:
    decoded = 8 * n * d
    total = runner.info.memory_per_worker * runner.info.workers
    if runner.info.scheduler == "processes":
        return "re-read every pass (the processes scheduler cannot keep blocks in worker memory)"
    if decoded > 0.4 * total:
        return (f"re-read every pass (decoded data {decoded / 2**20:.0f} MiB exceed 40% of the "
                f"{total / 2**20:.0f} MiB memory budget)")
    passes.cache(transform)
    return f"decoded blocks kept in worker memory ({decoded / 2**20:.0f} MiB)"
