"""The preprocessing conventions, in one place: shift, scale, missing rule, trace, sign of loadings.

The run (:mod:`pcapipe.engine`), new rows (:mod:`pcapipe.project`) and the
derived tables of a finished run (:mod:`pcapipe.result`) all call these
functions, so a row is transformed, and the total variance counted, the same
way wherever it is scored (README, "Run directory"):

* the analysed row is ``(x - shift) * factor``: ``shift`` the feature's mean
  (``model.center``) or 0; ``factor`` ``1 / std`` (``model.scale``, ddof=1,
  so the covariance is exactly the correlation matrix) times the feature
  weight (``model.feature_weights``), or 1;
* a gap imputed by ``impute-mean`` holds the feature's mean, i.e.
  ``(mean - shift) * factor`` after the transform (0 when centred);
* the matrix about zero (``model.center = false``) is the second moment
  ``C + n / (n - 1) mu mu^T`` with the covariance denominator ``n - 1`` (n the
  rows, or the sum of frequency weights), so its trace, the total variance,
  adds ``n / (n - 1) mu_j^2`` to each variance;
* each loading vector is flipped so that its entry of largest magnitude is
  positive (eigenvectors are defined up to sign; this makes runs comparable).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Transform", "missing_rule", "analysed_factor", "transform_for", "about_zero", "total_variance",
           "orient"]

# input.missing (the config's names) -> what a Transform does with a gap
_RULES = {"fail": "fail", "drop-rows": "drop", "impute-mean": "impute"}


@dataclass(frozen=True)
class Transform:
    """Preprocessing applied to each row: ``(x - shift) * inv_scale``, then missing handling.

    ``missing`` says what to do with a non-finite value: ``"impute"`` (put
    ``fill``, the feature's mean after the transform: 0 when centered),
    ``"drop"`` (the row is left out of sums and gets NaN scores), ``"fail"``
    (an error, for projecting new rows), or ``"none"`` (the moments pass
    proved there are none, so no check is spent).
    """

    shift: np.ndarray
    inv_scale: np.ndarray | None
    missing: str
    fill: np.ndarray | None = None


def missing_rule(configured: str, seen: bool = True) -> str:
    """The :class:`Transform` rule for ``input.missing = configured``.

    ``seen`` is False when the moments pass found no gap in the run's own
    rows: then no check is spent (``"none"``).  New rows always get the rule.
    """
    return _RULES[configured] if seen else "none"


def analysed_factor(scale_used: np.ndarray, scale: bool, feature_weights=None) -> np.ndarray | None:
    """The per-feature factor applied after centring, or None when it is 1.

    ``1 / scale_used`` when ``scale`` (the ddof=1 standard deviations), times
    the feature weights when given.
    """
    inv = (1.0 / scale_used) if scale else None
    if feature_weights is None:
        return inv
    f = np.asarray(feature_weights, dtype=np.float64)
    return f if inv is None else inv * f


def transform_for(mean: np.ndarray, scale_used: np.ndarray, *, center: bool, scale: bool, feature_weights,
                  missing: str) -> Transform:
    """The row transform of a model with these per-feature ``mean`` and ``scale_used``.

    ``missing`` is a :func:`missing_rule` value.
    """
    shift = mean if center else np.zeros_like(mean)
    inv = analysed_factor(scale_used, scale, feature_weights)
    # an imputed entry is the feature's mean: 0 once centred, but not without centring
    fill = (mean - shift) * (inv if inv is not None else 1.0)
    return Transform(shift, inv, missing, fill)


def about_zero(total: float) -> float:
    """``n / (n - 1)``: the weight of ``mu mu^T`` in the second moment about zero, ``C + n/(n-1) mu mu^T``."""
    return total / (total - 1)


def total_variance(variance: np.ndarray, mean: np.ndarray, total: float, *, center: bool, scale=None,
                   feature_weights=None) -> float:
    """The trace of the matrix decomposed: the total variance that shares are taken of.

    ``variance`` has denominator ``total - 1``; without centring each
    feature adds ``total / (total - 1) mean^2``; then divided by ``scale^2``
    (when scaling) and multiplied by the squared feature weights.
    """
    var = variance
    if not center:
        var = var + mean**2 * about_zero(total)
    if scale is not None:
        var = var / scale**2
    if feature_weights is not None:
        var = var * np.asarray(feature_weights, dtype=np.float64) ** 2
    return float(var.sum())


def orient(vectors: np.ndarray) -> np.ndarray:
    """Flip each column so that its entry of largest magnitude is positive."""
    idx = np.argmax(np.abs(vectors), axis=0)
    signs = np.sign(vectors[idx, np.arange(vectors.shape[1])])
    signs[signs == 0] = 1.0
    return vectors * signs
