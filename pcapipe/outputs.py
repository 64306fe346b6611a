"""The tables and the manifest of a run directory (what each file holds).

File layout and column names are part of the user-facing contract (README,
"Run directory"); :mod:`pcapipe.result` reads exactly what this writes.
"""

from __future__ import annotations

import datetime as _dt
import platform

import numpy as np
import pyarrow as pa

from .config import config_to_dict
from .weighted import weights_record
from .writer import FORMAT_VERSION

__all__ = ["build_tables", "manifest_for", "component_names", "package_versions"]


def component_names(k: int) -> list[str]:
    return [f"PC{i + 1}" for i in range(k)]


def build_tables(plan, m, res, vectors, std, scale_used, total_variance) -> dict[str, pa.Table]:
    """components.parquet, loadings.parquet and features.parquet as Arrow tables."""
    k = vectors.shape[1]
    names = component_names(k)
    values = res.values
    n = m.total  # weighted rows: the sum of the (frequency) weights
    ratio = values / total_variance if total_variance > 0 else np.full(k, np.nan)
    components = pa.table({
        "component": names,
        "explained_variance": values,
        "explained_variance_ratio": ratio,
        "cumulative_ratio": np.cumsum(ratio),
        "singular_value": np.sqrt(np.maximum(values, 0.0) * (n - 1)),
        "residual_norm": res.residual_norms,
        "std_error": values * np.sqrt(2.0 / n),
        "converged": res.converged,
        "gap": res.gaps,
    })
    loadings = pa.table({"feature": list(plan.features), **{nm: vectors[:, j] for j, nm in enumerate(names)}})
    features = pa.table({
        "feature": list(plan.features),
        "mean": m.mean,
        "std": std,
        "scale_used": scale_used,
        "missing": m.missing.astype(np.int64),
        "weight": np.ones(plan.n_features) if plan.feature_weights is None else np.asarray(plan.feature_weights),
    })
    return {"components.parquet": components, "loadings.parquet": loadings, "features.parquet": features}


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
        "n_rows_read": int(m.rows_seen),
        "n_samples": int(m.n),
        "weights": weights_record(p.plan, m, p.cfg.model.feature_weights),
        "n_features": int(p.plan.n_features),
        "n_components": int(res.values.size),
        "total_variance": float(total_variance),
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
