"""The tables and the manifest of a run directory (what each file holds).

File layout and column names are part of the user-facing contract (README,
"Run directory"); :mod:`pcapipe.result` reads exactly what this writes.
"""

from __future__ import annotations

import datetime as _dt
import platform

import numpy as np
import pyarrow as pa

from .config import config_to_dict, resolve_path
from .weighted import weights_record
from .writer import FORMAT_VERSION

__all__ = ["build_tables", "spectrum_table", "variance_record", "manifest_for", "component_names", "package_versions"]


def component_names(k: int) -> list[str]:
    return [f"PC{i + 1}" for i in range(k)]


def spectrum_table(values, residuals, converged, gaps, retained, n: int, total_variance: float) -> pa.Table:
    """spectrum.parquet: one row per eigenvalue, largest first.

    ``share = eigenvalue / total_variance`` (the trace); ``std_error =
    eigenvalue * sqrt(2 / n)``, the large-sample standard error of a sample
    eigenvalue for independent rows (North, Bell, Cahalan & Moeng 1982,
    Mon. Wea. Rev. 110).
    """
    values = np.asarray(values, dtype=float)
    share = values / total_variance if total_variance > 0 else np.full(values.size, np.nan)
    return pa.table({
        "component": component_names(values.size),
        "eigenvalue": values,
        "share": share,
        "cumulative_share": np.cumsum(share),
        "residual": np.asarray(residuals, dtype=float),
        "std_error": values * np.sqrt(2.0 / n),
        "converged": np.asarray(converged, dtype=bool),
        "gap": np.asarray(gaps, dtype=float),
        "retained": np.asarray(retained, dtype=bool),
    })


def build_tables(plan, m, res, vectors, std, scale_used, total_variance) -> dict[str, pa.Table]:
    """spectrum.parquet, loadings.parquet and features.parquet as Arrow tables."""
    k = vectors.shape[1]
    names = component_names(k)
    s = res.spectrum()
    spectrum = spectrum_table(s["values"], s["residuals"], s["converged"], s["gaps"], s["retained"],
                              m.total, total_variance)  # weighted rows: the sum of the (frequency) weights
    loadings = pa.table({"feature": list(plan.features), **{nm: vectors[:, j] for j, nm in enumerate(names)}})
    features = pa.table({
        "feature": list(plan.features),
        "mean": m.mean,
        "std": std,
        "scale_used": scale_used,
        "missing": m.missing.astype(np.int64),
        "weight": np.ones(plan.n_features) if plan.feature_weights is None else np.asarray(plan.feature_weights),
    })
    return {"spectrum.parquet": spectrum, "loadings.parquet": loadings, "features.parquet": features}


def variance_record(res, total_variance: float) -> dict:
    """How the total variance (the trace) splits: retained, listed in spectrum.parquet, not listed.

    ``not_listed`` is the variance left unexplained by every eigenvalue listed
    (0 up to rounding when the method listed all d); it is what a reader of
    the spectrum cannot see.
    """
    values = res.spectrum()["values"]
    k = res.values.size
    total = float(total_variance)
    listed = float(values.sum())
    rest = total - listed
    if abs(rest) <= 1e-12 * max(abs(total), np.finfo(float).tiny) * max(1, values.size):
        rest = 0.0  # rounding of a complete spectrum, not variance
    share = (lambda v: v / total if total > 0 else float("nan"))
    return {"total": total, "retained": float(values[:k].sum()), "listed": listed, "not_listed": rest,
            "retained_share": share(float(values[:k].sum())), "not_listed_share": share(rest),
            "eigenvalues_listed": int(values.size), "eigenvalues_retained": int(k)}


def package_versions(own: str) -> dict:
    """Versions of Python and the libraries that computed the run (read without importing them)."""
    from importlib.metadata import PackageNotFoundError, version

    out = {"pcapipe": own, "python": platform.python_version()}
    for name in ("numpy", "scipy", "pandas", "pyarrow", "dask", "distributed"):
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = None
    return out


def manifest_for(p, m, res, choice, total_variance, passes, cache, info, timings, score_rows,
                 version: str, extra: dict | None = None) -> dict:
    """The manifest of a finished run (written last)."""
    history = np.where(np.isnan(res.history), None, res.history).tolist() if res.history.size else []
    manifest = {
        "format_version": FORMAT_VERSION,
        "status": "complete",
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "versions": package_versions(version),
        "config": config_to_dict(p.cfg),
        "config_source": p.cfg.source,
        "inputs": p.plan.inputs_record(),
        "rows_read": int(m.rows_seen),
        "rows": int(m.n),
        "weights": weights_record(p.plan, m, p.cfg.model.feature_weights and
                                  resolve_path(p.cfg, p.cfg.model.feature_weights)),
        "features": int(p.plan.n_features),
        "components": int(res.values.size),
        "total_variance": float(total_variance),
        "variance": variance_record(res, total_variance),
        "method": choice.method,
        "method_reason": choice.reason,
        "method_estimates": choice.estimates,
        "blocks_cached": cache,
        "passes_over_data": int(passes),
        "solver": {
            "algorithm": "block power iteration with Rayleigh-Ritz, Krylov basis, locking",
            "block_size": int(res.block),
            "krylov_depth": int(res.depth),
            "iterations": int(res.iterations),
            "operator_applications": int(res.matvecs),
            "tolerance": p.cfg.model.tolerance,
            "residual_history": history,
        },
        "converged": bool(res.converged.all()),
        "components_converged": [bool(c) for c in res.converged],
        "compute": info.record(),
        "scores": {"written": score_rows is not None,
                   "parts": len(score_rows) if score_rows is not None else 0,
                   "rows": int(sum(score_rows)) if score_rows is not None else 0},
        "timings": {k: round(v, 4) for k, v in timings.items()},
    }
    if extra:
        manifest.update(extra)
    return manifest
