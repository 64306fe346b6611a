"""Run a whole job: config -> plan -> moments -> operator -> solver -> run directory.

This module wires the others together (the input checks on the moments are
in :mod:`pcapipe.screening`, the preprocessing conventions in
:mod:`pcapipe.conventions`); the statistics conventions of the outputs (see
README, "Run directory"):

* covariance denominator n - 1; ``scale = true`` divides by the ddof=1
  standard deviation, so the matrix is exactly the correlation matrix;
* ``std_error = eigenvalue * sqrt(2 / n)``: the large-sample standard error of
  a sample eigenvalue, North, Bell, Cahalan & Moeng (1982), "Sampling errors
  in the estimation of empirical orthogonal functions", Mon. Wea. Rev. 110;
* each loading vector is flipped so its entry of largest magnitude is positive;
  this and the preprocessing conventions live in :mod:`pcapipe.conventions`.
"""

from __future__ import annotations

import contextlib
import logging
import os
import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from ._version import __version__
from .alarms import FirstBlock, every_eigenvalue, fit_limits, monitor_spec
from .compute import Runner, cores
from .config import Config, load_config, resolve_path
from .checkpoint import Checkpoint, job_identity, merge_overrides, saved_overrides
from .errors import InputError, OutputError
from .decomposition import SolverResult
from .eigen import eigensolve, start_count
from .failures import resume_command, settle
from .guards import moment_warnings
from .methods import CACHE_SHARE, MethodChoice, choose_method
from .moments import Moments, covariance_from
from .operators import DataOperator, DenseOperator, MatrixFreeOperator
from .outputs import build_tables, component_names, manifest_for
from .passes import DataPasses
from .plan import Plan, make_plan
from .scoring import alarm_totals
from .screening import moments_pass, preprocessing, screened
from .conventions import orient, total_variance
from .weighted import feature_weight_array, weight_features
from .writer import RunWriter, partial_dir_for

__all__ = ["run", "prepare", "Prepared", "check_components"]

log = logging.getLogger("pcapipe")



@dataclass
class Prepared:
    """A validated config and its plan, before any value is decoded."""

    cfg: Config
    plan: Plan
    writer: RunWriter
    timings: dict = field(default_factory=dict)


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
    # the output must not overlap the inputs or the config (checked before a byte is read)
    read = [*cfg.input.paths, *([cfg.model.feature_weights] if cfg.model.feature_weights else [])]
    writer.check_overlap([resolve_path(cfg, p) for p in read], cfg.source if os.path.isfile(cfg.source) else None)
    writer.check()
    plan = make_plan(cfg)
    writer.check_inputs([f.path for f in plan.files])
    if plan.n_rows < 2:
        raise InputError(f"input.paths: the input has {plan.n_rows} row(s) in {len(plan.files)} file(s); "
                         "PCA needs at least 2 rows: add rows or files to input.paths")
    check_components(cfg.model.components, plan.n_rows, plan.n_features)
    return Prepared(cfg, plan, writer, {"plan_seconds": time.perf_counter() - t0})


def _solver_depth(d: int, block: int, memory: int) -> int:
    # basis + image of depth blocks must stay well inside a quarter of the budget
    fit = int(memory // (4 * 2 * 8 * max(1, d) * max(1, block)))
    return max(1, min(8, fit))


def run(config, overrides=(), resume: bool = False, runner: Runner | None = None):
    """Run the job described by ``config`` and return its :class:`~pcapipe.result.Result`.

    Parameters
    ----------
    config : str, Path, Mapping or Config
        A TOML file, or a dict of the same shape.
    overrides : sequence of str
        ``"section.key=value"`` overrides (the command line's ``--set``).
    resume : bool
        Continue an interrupted run from its last complete pass
        (:mod:`pcapipe.checkpoint`).
    runner : Runner, optional
        An already open scheduler connection to reuse (several configs over
        one cluster connection); by default one is opened for this run.

    Raises
    ------
    PcapipeError
        Bad config or input (nothing is left behind), or a checkpoint that
        does not fit this job.
    """
    from .result import load

    overrides = list(overrides)
    if resume and not isinstance(config, Config):
        # the overrides of the interrupted run first; those given now come on top
        found = load_config(config, overrides)
        overrides = merge_overrides(saved_overrides(partial_dir_for(resolve_path(found, found.output.directory))),
                                    overrides)
    p = prepare(config, overrides)
    ckpt = Checkpoint(p.writer.partial, job_identity(p.cfg, p.plan), overrides)
    if resume:
        ckpt.load(p.cfg.source)
    elif ckpt.exists and not p.cfg.output.overwrite:
        raise OutputError(
            f"output.directory: an unfinished run of {p.writer.directory} is in {p.writer.partial}; "
            "continue it with --resume, or set output.overwrite = true to start again"
        )
    p.writer.start(keep_partial=resume)
    try:
        with contextlib.ExitStack() as stack:
            if runner is None:
                runner = stack.enter_context(Runner(p.cfg.compute))
            manifest = _Job(p, runner, ckpt).execute()
        directory = p.writer.finish(manifest)
    except BaseException as e:
        instead = settle(p, ckpt, e, overrides)
        if instead is None:
            raise
        raise instead from e
    log.info("wrote %s", directory)
    return load(directory)


class _Job:
    """The stages of one run; each stage checkpoints what the next needs."""

    def __init__(self, p: Prepared, runner: Runner, ckpt: Checkpoint):
        self.p, self.runner, self.ckpt = p, runner, ckpt
        self.state = ckpt.state
        self.timings = dict(self.state.get("timings", {}), **p.timings)
        self.resumed = self.state.get("stage")
        self.rows = None  # the direct method's raw rows, held from the one read to the decomposition
        self.hold_note = None  # how the matrix-free method's rows were held (or why not)

    def _choose(self):
        p, info = self.p, self.runner.info
        d, n = p.plan.n_features, p.plan.n_rows
        comp = p.cfg.model.components
        k_guess = start_count(comp, d, p.cfg.model.oversample)
        self.block = min(d, k_guess + p.cfg.model.oversample)
        if "method" in self.state:
            return MethodChoice(self.state["method"], self.state["method_reason"], self.state["method_estimates"])
        # the direct method gathers the rows in this process: locally the whole budget, else one worker's
        client = info.memory_per_worker * (1 if self.runner.distributed else info.workers)
        return choose_method(p.cfg.model.method, n, d, self.block, p.plan.total_bytes,
                             info.memory_per_worker, info.workers, self._cores(), k=k_guess,
                             can_cache=info.scheduler != "processes", client_memory=client,
                             held_itemsize=p.plan.held_itemsize)

    def _cores(self) -> int:
        # a cluster's threads are all cores at work; locally no more than this machine has
        return self.runner.parallelism if self.runner.distributed else min(cores(), self.runner.parallelism)

    def execute(self) -> dict:
        p, runner = self.p, self.runner
        info = runner.info
        runner.probe(p.plan.files[0].path)
        choice = self._choose()
        log.info("method: %s (%s)", choice.method, choice.reason)
        d = p.plan.n_features
        passes = DataPasses(p.plan, runner, full=choice.method == "covariance")
        passes.count = self.state.get("passes", 0)
        m = self._moments(passes, choice)
        warned = moment_warnings(p.plan, m, p.cfg.model.scale, p.cfg.model.center)  # row ids, one dominant feature
        for text in warned:
            log.warning("%s", text)
        transform, std, scale_used = preprocessing(p.cfg, p.plan, m)
        res, trace, cache = self._solve(passes, choice, m, transform, scale_used)
        vectors = orient(res.vectors)
        t = time.perf_counter()
        limits = fit_limits(choice.method, p.cfg.monitor.confidence, m.total, trace, res.values, vectors,
                            matrix=getattr(self.op, "matrix", None), all_values=every_eigenvalue(res, trace),
                            probe=self.probe)
        self.timings["limits_seconds"] = time.perf_counter() - t
        t = time.perf_counter()
        score_rows, alarms = None, None
        if p.cfg.output.scores:
            written = passes.scores(transform, vectors, component_names(vectors.shape[1]),
                                    p.writer.path("scores"), monitor_spec(limits, res.values, training=True))
            score_rows, alarms = [w.rows for w in written], alarm_totals(written)
        self.timings["scores_seconds"] = time.perf_counter() - t
        self.timings["total_seconds"] = sum(v for k, v in self.timings.items() if k != "total_seconds")
        for name, table in build_tables(p.plan, m, res, vectors, std, scale_used, trace).items():
            p.writer.write_table(name, table)
        extra = {"resumed": self.state.get("resumes", []), "warnings": warned, "limits": limits,
                 "monitor": {"time": p.cfg.monitor.time, "training_alarms": alarms}}
        manifest = manifest_for(p, m, res, choice, trace, passes.count, cache, info, self.timings,
                                score_rows, version=__version__, extra=extra)
        if p.cfg.output.report:
            from .report import build_report

            t = time.perf_counter()
            try:
                manifest["report"] = build_report(p.writer.partial, manifest)
            except Exception as e:  # a plotting failure must not throw away a finished computation
                log.warning("the report could not be built (%s: %s); the results are complete, "
                            "rebuild it with: pcapipe report %s", type(e).__name__, e, p.writer.directory)
                manifest["report"] = {"requested": True, "written": False,
                                      "note": f"failed: {type(e).__name__}: {e}; rebuild with pcapipe report"}
            seconds = time.perf_counter() - t
            manifest["timings"]["report_seconds"] = round(seconds, 4)
            # the run's total counts the report too (the page itself shows the figures' share of it)
            manifest["timings"]["total_seconds"] = round(manifest["timings"]["total_seconds"] + seconds, 4)
        else:
            manifest["report"] = {"requested": False, "written": False}
        return manifest

    def _save(self, stage: str, choice, passes, **arrays) -> None:
        self.ckpt.save(stage, method=choice.method, method_reason=choice.reason,
                       method_estimates=choice.estimates, passes=passes.count, timings=self.timings,
                       resumes=self.state.get("resumes", []), **arrays)

    def _moments(self, passes: DataPasses, choice) -> Moments:
        if self.resumed:
            self.state.setdefault("resumes", []).append({"from_stage": self.resumed,
                                                         "passes_before": self.state.get("passes", 0)})
            log.info("resuming from the checkpoint after stage %r", self.resumed)
            return self.ckpt.moments()
        t = time.perf_counter()
        mode = self.p.cfg.input.missing
        if choice.method == "direct":
            # one read: the raw rows stay in memory and the moments come from them
            self.rows, first = passes.read_once(mode)
            m = screened(self.p.cfg, self.p.plan, first, lambda fill: passes.rows_moments(self.rows, mode, fill))
        elif choice.method == "matrix-free" and (first := self._hold(passes, mode)) is not None:
            # one read: the rows stay in worker memory for every product, the moments come with them
            m = screened(self.p.cfg, self.p.plan, first, lambda fill: passes.moments(False, mode, fill=fill))
        else:
            m = moments_pass(self.p.cfg, self.p.plan, passes, full=choice.method == "covariance")
        preprocessing(self.p.cfg, self.p.plan, m)  # bad input (constant features) must fail before a checkpoint exists
        self.timings["moments_seconds"] = time.perf_counter() - t
        self._save("moments", choice, passes, moments=m)
        return m

    def _hold(self, passes: DataPasses, missing: str):
        """Hold the rows for the matrix-free products when they fit; their moments, or None."""
        t = time.perf_counter()
        self.hold_note, m = _maybe_hold(passes, self.runner, missing)
        self.timings["cache_seconds"] = self.timings.get("cache_seconds", 0.0) + time.perf_counter() - t
        return m

    def _solve(self, passes, choice, m, transform, scale_used):
        p = self.p
        scale = scale_used if p.cfg.model.scale else None
        d = p.plan.n_features
        fw = feature_weight_array(p.plan.feature_weights)
        trace = total_variance(m.variance(), m.mean, m.total, center=p.cfg.model.center, scale=scale,
                               feature_weights=fw)
        cache = {"covariance": "not needed (one pass)",
                 "direct": "not needed (rows held in memory for the decomposition)"}.get(choice.method)
        solved = self.state.get("stage") == "solved"
        if choice.method == "covariance":
            op = DenseOperator(weight_features(covariance_from(m, p.cfg.model.center, scale), fw))
        elif choice.method == "direct":
            # the rows exactly as the matrix-free product sees them (weighted rows as sqrt(w) x)
            t = time.perf_counter()
            if not solved and self.rows is None:  # resumed after the moments: read the rows again
                self.rows, _ = passes.read_once(p.cfg.input.missing)
            op = None if solved else DataOperator(passes.preprocessed(self.rows, transform, m.n), m.total, trace)
            self.rows = None
            self.timings["decode_seconds"] = self.timings.get("decode_seconds", 0.0) + time.perf_counter() - t
        else:
            op = MatrixFreeOperator(lambda v: passes.product(transform, v), m.total, trace, d)
        self.op, self.probe = op, None
        if solved:
            return self._solution(), trace, self.state.get("cache", cache)
        if choice.method == "matrix-free":
            if not passes.held and self.hold_note is None:  # resumed after the moments: hold the rows now
                self._hold(passes, p.cfg.input.missing)
            cache = self.hold_note
        t = time.perf_counter()
        res = self._iterate(op, passes, choice)
        passes.release()
        self.timings["solver_seconds"] = self.timings.get("solver_seconds", 0.0) + time.perf_counter() - t
        self.state["cache"] = cache
        self._save("solved", choice, passes, solution=_solution_arrays(res))
        return res, op.trace, cache

    def _iterate(self, op, passes, choice) -> SolverResult:
        p = self.p
        depth = _solver_depth(p.plan.n_features, self.block, self.runner.info.memory_per_worker)
        rng = np.random.default_rng(p.cfg.model.seed)
        resume_state = None
        if self.state.get("stage") == "solver":
            resume_state = self.ckpt.solver_state()
            rng.bit_generator.state = self.state["rng"]

        # the matrix-free SPE limit needs the solver's random first block (no extra pass)
        first = FirstBlock(op) if choice.method == "matrix-free" and resume_state is None else None

        def checkpoint(solver):
            if choice.method == "matrix-free":
                self.state["rng"] = solver.rng.bit_generator.state
                self._save("solver", choice, passes, solver=solver.state, probe=first and first.probe())

        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            mc = p.cfg.model
            res = eigensolve(first or op, mc.components, tolerance=mc.tolerance, max_iterations=mc.max_iterations,
                             oversample=mc.oversample, rng=rng, depth=depth, state=resume_state,
                             callback=checkpoint)
        self.probe = first.probe() if first is not None else self.ckpt.probe()
        for w in caught:
            log.warning("%s", w.message)
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        return res

    def _solution(self) -> SolverResult:
        a = self.ckpt.solution()
        self.probe = self.ckpt.probe()
        return SolverResult(a["values"], a["vectors"], a["residual_norms"], a["converged"], a["gaps"],
                            int(a["iterations"]), int(a["matvecs"]), a["history"], int(a["depth"]),
                            int(a["block"]), **{f: str(a[f]) if f == "method" else a[f] for f in _EXTRA if f in a})


def _solution_arrays(res: SolverResult) -> dict:
    return {"values": res.values, "vectors": res.vectors, "residual_norms": res.residual_norms,
            "converged": res.converged, "gaps": res.gaps, "iterations": np.array(res.iterations),
            "matvecs": np.array(res.matvecs), "history": res.history, "depth": np.array(res.depth),
            "block": np.array(res.block), **{f: getattr(res, f) for f in _EXTRA}}


_EXTRA = ("method", "extra_values", "extra_residuals", "extra_converged")


def _maybe_hold(passes: DataPasses, runner, missing: str) -> tuple[str, Moments | None]:
    """Hold the raw rows in memory for the matrix-free passes when they fit: (what was done, their moments)."""
    held = passes.held_bytes()
    total = runner.info.memory_per_worker * runner.info.workers
    if runner.info.scheduler == "processes":
        return "re-read every pass (the processes scheduler cannot keep rows in worker memory)", None
    if held > CACHE_SHARE * total:
        return (f"re-read every pass (the rows, {held / 2**20:.0f} MiB in memory, exceed {CACHE_SHARE:.0%} of the "
                f"{total / 2**20:.0f} MiB memory budget)"), None
    m = passes.hold(missing)
    if m is None:
        return (f"re-read every pass (the rows, {held / 2**20:.0f} MiB in memory, do not fit the memory estimate "
                "next to the product tasks)"), None
    kind = "float32 as stored" if passes.plan.held_itemsize == 4 else "float64"
    return f"rows read once and held in worker memory ({held / 2**20:.0f} MiB, {kind})", m
