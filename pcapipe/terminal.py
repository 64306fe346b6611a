"""Text for the terminal: ``pcapipe check`` (the plan) and ``pcapipe describe`` (a run)."""

from __future__ import annotations

import math

import numpy as np

from .compute import cores, physical_memory
from .config import format_size, parse_memory
from .errors import InputError
from .formats import BEYOND, SPECTRUM_HEADERS, flag, FLAG_NOTES, percent, sig, spectrum_cells, spectrum_shown
from .methods import choose_method
from .weighted import weights_text

__all__ = ["check", "check_report", "describe_text", "describe_json", "top_loadings", "spectrum_table"]


def _local_memory(cfg) -> tuple[int, int, str]:
    kind = cfg.compute.scheduler
    budget = parse_memory(cfg.compute.memory_limit)
    if kind.startswith("tcp://"):
        return 1, budget or 4 << 30, "per worker of the cluster (assumed 4 GiB unless memory_limit is set)"
    workers = 1 if kind == "synchronous" else (cfg.compute.workers or cores())
    return workers, budget or int(physical_memory() * 0.5 / workers), "per worker"


def _contact_cluster(cfg):
    """Contact a ``tcp://`` scheduler as ``run`` does (same deadline, compute.connect_timeout).

    Returns ``(workers, memory per worker, threads, text, error)``; on failure the
    plan assumes one worker of 4 GiB (or compute.memory_limit) and ``error`` says why.
    """
    from .compute import Runner
    from .errors import ClusterError

    try:
        with Runner(cfg.compute) as runner:
            info = runner.info
    except ClusterError as e:
        memory = parse_memory(cfg.compute.memory_limit) or 4 << 30
        return 1, memory, 1, (f"NOT contacted: {e} (this plan assumes 1 worker of "
                              f"{format_size(memory)})"), e
    text = (f"contacted: {info.workers} worker(s) on {info.hosts} host(s), {info.total_threads} thread(s), "
            f"{format_size(info.memory_per_worker)} per worker (the smallest limit)")
    return info.workers, info.memory_per_worker, info.total_threads, text, None


def check_report(config, overrides=()) -> str:
    """Validate the config and plan the run; return the summary ``pcapipe check`` prints."""
    return check(config, overrides)[0]


def check(config, overrides=()):
    """``pcapipe check``: the plan as text, and the error that makes it not ok (or None).

    With a ``tcp://`` scheduler the cluster is contacted; if it does not answer,
    the text says so plainly and the error is the one ``run`` would raise.
    """
    from .engine import prepare
    from .layout import layout_for

    p = prepare(config, overrides)
    plan, cfg = p.plan, p.cfg
    n, d = plan.n_rows, plan.n_features
    error = None
    verdict = "NOT ok: the cluster did not answer (see compute above); nothing was written"
    if cfg.compute.scheduler.startswith("tcp://"):
        workers, memory, threads, compute_text, error = _contact_cluster(cfg)
        memory_note = "per worker"
    else:
        workers, memory, memory_note = _local_memory(cfg)
        threads = min(cores(), workers)
        compute_text = f"{workers} worker(s), {format_size(memory)} {memory_note}"
        if cfg.compute.scheduler == "local-cluster":
            from .cluster import MIN_WORKER_MEMORY, check_worker_memory
            from .errors import ClusterError

            try:  # run refuses this before starting a worker: say it here too
                check_worker_memory(memory, workers)
            except ClusterError as e:
                error = e
                verdict = (f"NOT ok: {format_size(memory)} per worker is below the local-cluster minimum of "
                           f"{format_size(MIN_WORKER_MEMORY)}, which run refuses: raise compute.memory_limit "
                           "or lower compute.workers; nothing was written")
    comp = cfg.model.components
    k = comp if isinstance(comp, int) else min(d, max(2, cfg.model.oversample))
    block = min(d, k + cfg.model.oversample)
    choice = choose_method(cfg.model.method, n, d, block, plan.total_bytes, memory, workers, threads,
                           k=k, can_cache=cfg.compute.scheduler != "processes",
                           client_memory=memory * (1 if cfg.compute.scheduler.startswith("tcp://") else workers),
                           held_itemsize=plan.held_itemsize)
    shared = cfg.compute.scheduler in ("threads", "synchronous")
    accumulator = 8 * d * d if choice.method == "covariance" else 2 * 8 * d * block
    # the direct method holds the raw rows (weight column too) and the stacked matrix (passes.read_once)
    held = 8 * n * (d + (1 if plan.row_weight else 0)) + 8 * n * d if choice.method == "direct" else 0
    layout = layout_for(plan.pieces(), d, workers=workers, memory_per_worker=memory,
                        cores=max(1, min(cores(), workers)) if shared else 1, shared=shared, accumulator=accumulator,
                        cached=held, weighted=bool(plan.row_weight))
    lines = [
        f"config      {cfg.source}",
        f"files       {len(plan.files)} ({format_size(plan.total_bytes)}), {len(plan.blocks)} blocks (row groups)",
        *_input_notes(plan),
        f"rows        {n}",
        f"features    {d}" + (f" from vector column {plan.vector_column!r}" if plan.vector_column else
                              f": {', '.join(plan.features[:6])}{', ...' if d > 6 else ''}"),
        f"keep        {', '.join(plan.keep) or '(none)'}",
        f"weights     rows: {plan.row_weight or '(none)'}; features: {cfg.model.feature_weights or '(none)'}",
        f"components  {comp}" + ("" if isinstance(comp, int) else " of the variance"),
        f"method      {choice.method}: {choice.reason}",
        f"compute     {cfg.compute.scheduler}, {compute_text}",
        f"memory      {layout.estimate.describe()}; {len(layout.tasks)} task(s), batches of "
        f"{layout.batch_rows} rows, {layout.in_flight} at once x {layout.threads} thread(s)"
        + (f"; wide row groups decoded whole by column slices (blocks up to {format_size(layout.sliced_bytes)})"
           if layout.sliced_bytes else ""),
        f"output      {p.writer.directory}",
        *_feature_notes(plan),
        "ok: nothing was written" if error is None else verdict,
    ]
    return "\n".join(lines), error


def _feature_notes(plan) -> list[str]:
    """Columns the default selection left out, and the guard-rail warnings the footers allow."""
    lines = []
    if plan.left_out:
        shown = ", ".join(f"{n} ({why})" for n, why in plan.left_out[:8])
        more = f", ... ({len(plan.left_out)} in all)" if len(plan.left_out) > 8 else ""
        lines.append(f"left out    {len(plan.left_out)} column(s) not selected as features: {shown}{more}; "
                     "name columns in input.features to choose, cast booleans and decimals to float to use them")
    lines += [f"warning     {text}" for text in plan.hints]
    return lines


def _input_notes(plan) -> list[str]:
    """What the file search left out, so a surprising row count can be explained."""
    lines = []
    if plan.skipped:
        lines.append(f"skipped     {len(plan.skipped)} Parquet file(s) under names starting with _ or . "
                     f"(writers' leftovers, e.g. {plan.skipped[0]})")
    if plan.duplicates:
        path, same = plan.duplicates[0]
        lines.append(f"duplicates  {len(plan.duplicates)} path(s) reach a file already listed (symlink or "
                     f"hardlink), read once: e.g. {path} = {same}")
    return lines


def _check_top(top: int) -> None:
    if not isinstance(top, int) or isinstance(top, bool) or top < 0:
        raise InputError(f"--top: {top!r} is not a count; give 0 (no loadings) or more")


def top_loadings(res, top: int) -> dict[str, list[tuple[str, float, float]]]:
    """Per component, the ``top`` features of largest |loading|: ``(feature, loading, correlation)``.

    ``correlation`` is :attr:`pcapipe.Result.correlation_loadings`, the
    correlation of the feature with the component's scores.  Ties keep the
    feature order of the run.
    """
    _check_top(top)
    corr = res.correlation_loadings
    out = {}
    for pc in res.loadings.columns:
        col = res.loadings[pc]
        idx = np.argsort(-np.abs(col.to_numpy()), kind="stable")[:top]
        out[pc] = [(str(col.index[i]), float(col.iloc[i]), float(corr[pc].iloc[i])) for i in idx]
    return out


def _finite(v):
    """JSON has no NaN: None instead (strict parsers reject NaN)."""
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def describe_json(res, top: int) -> dict:
    """What ``pcapipe describe --json`` prints: the spectrum and the top loadings, NaN as null."""
    m = res.manifest
    model = m["config"]["model"]
    spec = res.spectrum.reset_index()
    records = [{k: _finite(v.item() if hasattr(v, "item") else v) for k, v in row.items()}
               for row in spec.to_dict(orient="records")]
    return {
        "directory": res.directory,
        "rows": m["rows"],
        "features": m["features"],
        "components": m["components"],
        "center": bool(model.get("center", True)),
        "scale": bool(model.get("scale", False)),
        "method": m["method"],
        "converged": m["converged"],
        "tolerance": model.get("tolerance"),
        "total_variance": _finite(m["total_variance"]),
        "spectrum": records,
        "top_loadings": {pc: [{"feature": f, "loading": _finite(v), "correlation": _finite(r)} for f, v, r in rows]
                         for pc, rows in top_loadings(res, top).items()},
    }


_WIDTHS = (12, 10, 12, 11, 11, 10)  # right-aligned columns after the component name


def spectrum_table(res, beyond: int = BEYOND) -> str:
    """The spectrum as aligned text: the retained rows, a rule, then ``beyond`` more eigenvalues.

    A row ends in ``*`` (retained, did not converge) or ``~`` (an estimate beyond k).
    """
    spec = res.spectrum
    shown, hidden = spectrum_shown(spec, beyond)
    k = int(spec["retained"].sum())
    header = f"{'component':<10}" + "".join(f"{h:>{w}}" for h, w in zip(SPECTRUM_HEADERS, _WIDTHS))
    lines = [header]
    for i, ((name, r), cells) in enumerate(zip(shown.iterrows(), spectrum_cells(shown))):
        if i == k:
            lines.append(f"{'-' * 3} k = {k} retained above; not retained below {'-' * 3}")
        mark = flag(r)
        row = f"{name:<10}" + "".join(f"{c:>{w}}" for c, w in zip(cells, _WIDTHS)) + (f" {mark}" if mark else "")
        lines.append(row.rstrip())
    v = res.manifest.get("variance", {})
    if hidden:
        lines.append(f"... {hidden} more eigenvalue(s) in spectrum.parquet (describe --beyond {len(spec) - k} shows all)")
    if v:
        lines.append(f"variance not listed: {sig(v['not_listed'], 3)} ({percent(v['not_listed_share'], 3)} of the total)"
                     if v.get("not_listed") else f"all {v.get('eigenvalues_listed')} eigenvalues listed: "
                     "their sum is the total variance")
    marks = {flag(r) for _, r in shown.iterrows()} - {""}
    lines += [FLAG_NOTES[mk] for mk in sorted(marks)]
    return "\n".join(lines)


def _loadings_table(res, top: int) -> str:
    rows = top_loadings(res, top)
    width = max([len("feature")] + [len(f) for items in rows.values() for f, _, _ in items])
    lines = [f"{'component':<10}{'feature':<{width + 2}}{'loading':>9}{'correlation':>13}"]
    for pc, items in rows.items():
        for i, (f, v, r) in enumerate(items):
            lines.append(f"{pc if i == 0 else '':<10}{f:<{width + 2}}{v:>+9.3f}{r:>+13.3f}")
    return "\n".join(lines)


def describe_text(res, top: int, beyond: int = BEYOND) -> str:
    """What ``pcapipe describe`` prints: a headline, the spectrum table (``beyond`` eigenvalues past k)
    and the top loadings."""
    _check_top(top)
    m = res.manifest
    model = m["config"]["model"]
    kind = "correlation PCA (scaled)" if model.get("scale") else "covariance PCA"
    if not model.get("center", True):
        kind += ", not centred"
    spec = res.spectrum
    bad = [str(pc) for pc, ok in spec.loc[spec["retained"], "converged"].items() if not ok]
    state = "converged" if m["converged"] else f"NOT converged: {', '.join(bad) or 'see the manifest'}"
    parts = [
        res.directory,
        f"{m['rows']} rows x {m['features']} features, {kind}, method {m['method']}, "
        f"{m['passes_over_data']} pass(es) over the data, {state}",
        f"total variance {m['total_variance']:.6g}; residual = ||C v - theta v||, "
        f"tolerance {model.get('tolerance')} x the first eigenvalue",
        f"weights: {weights_text(m.get('weights'))}",
        "",
        spectrum_table(res, beyond),
    ]
    if top:
        parts += ["", f"top {min(top, m['features'])} loadings per component "
                  "(correlation: of the feature with the component's scores)", _loadings_table(res, top)]
    return "\n".join(parts)
