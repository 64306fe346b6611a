"""Text for the terminal: ``pcapipe check`` (the plan) and ``pcapipe describe`` (a run)."""

from __future__ import annotations

import numpy as np

from .compute import _cores, physical_memory
from .config import parse_memory
from .operators import choose_method

__all__ = ["check_report", "describe_text", "describe_json", "top_loadings"]


def _size(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if n < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n}"


def _local_memory(cfg) -> tuple[int, int, str]:
    kind = cfg.compute.scheduler
    budget = parse_memory(cfg.compute.memory_limit)
    if kind.startswith("tcp://"):
        return 1, budget or 4 << 30, "per worker of the cluster (assumed 4 GiB unless memory_limit is set)"
    workers = 1 if kind == "synchronous" else (cfg.compute.workers or _cores())
    return workers, budget or int(physical_memory() * 0.5 / workers), "per worker"


def check_report(config, overrides=()) -> str:
    """Validate the config and plan the run; return the summary ``pcapipe check`` prints."""
    from .engine import batch_rows_for, prepare

    p = prepare(config, overrides)
    plan, cfg = p.plan, p.cfg
    n, d = plan.n_rows, plan.n_features
    workers, memory, memory_note = _local_memory(cfg)
    comp = cfg.model.components
    k = comp if isinstance(comp, int) else min(d, max(2, cfg.model.oversample))
    block = min(d, k + cfg.model.oversample)
    choice = choose_method(cfg.model.method, n, d, block, plan.total_bytes, memory, workers, min(_cores(), workers))
    batch = batch_rows_for(d, memory)
    task_bytes = batch * d * 8 * 3 + (8 * d * d * 3 if choice.method == "covariance" else 8 * d * block * 2)
    lines = [
        f"config      {cfg.source}",
        f"files       {len(plan.files)} ({_size(plan.total_bytes)}), {len(plan.blocks)} blocks (row groups)",
        f"rows        {n}",
        f"features    {d}" + (f" from vector column {plan.vector_column!r}" if plan.vector_column else
                              f": {', '.join(plan.features[:6])}{', ...' if d > 6 else ''}"),
        f"keep        {', '.join(plan.keep) or '(none)'}",
        f"components  {comp}" + ("" if isinstance(comp, int) else " of the variance"),
        f"method      {choice.method}: {choice.reason}",
        f"compute     {cfg.compute.scheduler}, {workers} worker(s), {_size(memory)} {memory_note}",
        f"memory      ~{_size(task_bytes)} per task (batches of {batch} rows)",
        f"output      {p.writer.directory}",
        "ok: nothing was written",
    ]
    return "\n".join(lines)


def top_loadings(res, top: int) -> dict[str, list[tuple[str, float]]]:
    """The ``top`` features of largest |loading| for each component."""
    out = {}
    for pc in res.loadings.columns:
        col = res.loadings[pc]
        idx = np.argsort(-np.abs(col.to_numpy()), kind="stable")[:top]
        out[pc] = [(str(col.index[i]), float(col.iloc[i])) for i in idx]
    return out


def describe_json(res, top: int) -> dict:
    comp = res.components.reset_index()
    return {
        "directory": res.directory,
        "n_samples": res.manifest["n_samples"],
        "n_features": res.manifest["n_features"],
        "method": res.manifest["method"],
        "converged": res.manifest["converged"],
        "total_variance": res.manifest["total_variance"],
        "components": comp.to_dict(orient="records"),
        "top_loadings": {pc: [{"feature": f, "loading": v} for f, v in rows]
                         for pc, rows in top_loadings(res, top).items()},
    }


def describe_text(res, top: int) -> str:
    m = res.manifest
    head = (f"{res.directory}\n{m['n_samples']} rows x {m['n_features']} features, method {m['method']}, "
            f"{m['passes_over_data']} pass(es) over the data, "
            f"{'converged' if m['converged'] else 'NOT all components converged'}\n")
    cols = ["explained_variance", "explained_variance_ratio", "cumulative_ratio", "residual_norm", "std_error"]
    header = f"{'component':<10}{'variance':>14}{'ratio':>10}{'cumulative':>12}{'residual':>12}{'std_error':>12}"
    rows = [header]
    for name, r in res.components[cols].iterrows():
        rows.append(f"{name:<10}{r.iloc[0]:>14.6g}{r.iloc[1]:>10.4f}{r.iloc[2]:>12.4f}"
                    f"{r.iloc[3]:>12.2e}{r.iloc[4]:>12.4g}")
    parts = [head, "\n".join(rows), "", f"top {top} loadings"]
    for pc, items in top_loadings(res, top).items():
        parts.append(f"{pc}: " + ", ".join(f"{f} {v:+.3f}" for f, v in items))
    return "\n".join(parts)
