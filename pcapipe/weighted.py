"""Weighted statistics: frequency weights on rows, multiplicative weights on features.

Row weights (``input.row_weight``) are *frequency* weights: a row of weight
``w_i`` counts as ``w_i`` copies of itself, so with ``W = sum(w)``::

    mean = sum_i w_i x_i / W
    C    = sum_i w_i (x_i - mean)(x_i - mean)^T / (W - 1)

and integer weights give exactly the unweighted answer on the data with each
row repeated ``w_i`` times (numpy's ``np.cov(..., fweights=w)``).  Other
conventions differ only by a scalar factor on C, so loadings, shares and
scores' directions are the same and only eigenvalues are rescaled:

* reliability (analytic) weights, numpy's ``np.cov(..., aweights=w)``:
  denominator ``W - W2 / W`` with ``W2 = sum(w^2)``; multiply our eigenvalues
  by ``(W - 1) / (W - W2 / W)`` (:func:`reliability_factor`);
* weights normalised to a distribution (population form): denominator ``W``;
  multiply by ``(W - 1) / W``.

Rows of weight 0 add nothing to the sums (they still get scores).

The moments are computed per batch about the batch's weighted mean, with the
corrected two-pass rule (Chan, Golub & LeVeque 1983, Am. Stat. 37, eq. 1.7,
weighted), and merged by the weighted Chan-Golub-LeVeque update in
:func:`pcapipe.moments.merge` (West 1979, "Updating mean and variance
estimates: an improved method", Comm. ACM 22; Schubert & Gertz 2018,
"Numerically stable parallel computation of (co-)variance", SSDBM).

Feature weights (``model.feature_weights``) multiply each preprocessed
feature (after centring and any scaling): with ``F = diag(f)`` the matrix
decomposed is ``F C F``, and scores are ``(F x~) @ loadings``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError
from .moments import Moments, _gram

__all__ = ["WeightedBatch", "weighted_center", "weighted_batch_moments", "weight_features", "reliability_factor", "check_total_weight",
           "feature_weight_array", "weights_record", "weights_text"]


def _missing_rows(x, w, missing, fill):
    """Apply the missing rule; returns ``x, w`` and the per-feature counts, valid weight and mean."""
    n_all, d = x.shape
    finite = np.isfinite(x)
    miss = (~finite).sum(axis=0).astype(np.int64)
    valid_weight = w @ finite
    valid_mean = (w @ np.where(finite, x, 0.0)) / np.where(valid_weight > 0, valid_weight, 1.0)
    if missing == "impute-mean" and fill is not None:
        x = np.where(finite, x, fill)
    else:
        ok = finite.all(axis=1)
        x, w = x[ok], w[ok]
    return x, w, miss, valid_weight, valid_mean


@dataclass
class WeightedBatch:
    """One batch's rows of positive weight, centred and scaled: ``xc = sqrt(w) (x - mean0)``.

    ``mean`` is the corrected weighted mean ``mean0 + r`` and the batch's
    co-moment is ``xc^T xc - total r r^T`` (corrected two-pass, Chan, Golub
    & LeVeque 1983, eq. 1.7, weighted); ``xc`` is None when no row is left.
    """

    xc: np.ndarray | None
    rows: int                 # rows of positive weight that enter the sums
    total: float
    total2: float
    mean: np.ndarray
    r: np.ndarray
    missing: np.ndarray
    valid_weight: np.ndarray  # weight of the finite values per feature
    valid_mean: np.ndarray
    rows_seen: int


def weighted_center(x: np.ndarray, w: np.ndarray, missing: str, fill: np.ndarray | None = None) -> WeightedBatch:
    """Apply the missing rule and centre one weighted batch about its weighted mean, in place.

    Parameters
    ----------
    x : ndarray (n, d) float64
        May hold NaN/inf.  Overwritten when writable.
    w : ndarray (n,)
        Row weights, finite and >= 0 (the reader checks them).
    missing, fill
        As in :func:`pcapipe.moments.batch_moments`.
    """
    n_all, d = x.shape
    w = np.asarray(w, dtype=np.float64)
    miss = np.zeros(d, dtype=np.int64)
    valid_weight = valid_mean = None
    if not np.isfinite(x.sum(axis=0)).all():
        x, w, miss, valid_weight, valid_mean = _missing_rows(x, w, missing, fill)
    pos = w > 0
    if not pos.all():
        x, w = x[pos], w[pos]  # weight 0: no part in the fit
    total = float(w.sum())
    if x.shape[0] == 0:
        zero = np.zeros(d)
        return WeightedBatch(None, 0, 0.0, 0.0, zero, zero, miss,
                             valid_weight if valid_weight is not None else zero.copy(),
                             valid_mean if valid_mean is not None else zero.copy(), n_all)
    if not x.flags.writeable:
        x = x.copy()
    mean = (w @ x) / total
    x -= mean
    root = np.sqrt(w)
    x *= root[:, None]
    # corrected two-pass: remove the rounding error of the first mean
    r = (root @ x) / total
    return WeightedBatch(x, x.shape[0], total, float(w @ w), mean + r, r, miss,
                         valid_weight if valid_weight is not None else np.full(d, total),
                         valid_mean if valid_mean is not None else mean + r, n_all)


def weighted_batch_moments(x: np.ndarray, w: np.ndarray, full: bool, missing: str,
                           fill: np.ndarray | None = None) -> Moments:
    """Weighted moments of one decoded batch (frequency weights).

    ``x``, ``w``, ``missing`` and ``fill`` as in :func:`weighted_center`;
    ``full`` as in :func:`pcapipe.moments.batch_moments`.

    Returns
    -------
    Moments
        ``n`` counts the rows of positive weight that entered the sums;
        ``weight`` and ``weight2`` are the sums of their weights and squares.

    Notes
    -----
    ``M2 = (sqrt(w) xc)^T (sqrt(w) xc)`` goes to BLAS ``syrk`` like the
    unweighted Gram: the only extra work is one n x d scaling.
    """
    d = x.shape[1]
    b = weighted_center(x, w, missing, fill)
    part = Moments.empty(d, full, weighted=True)
    if b.xc is not None:
        m2 = _gram(b.xc) if full else np.einsum("ij,ij->j", b.xc, b.xc)
        m2 -= (np.outer(b.r, b.r) if full else b.r * b.r) * b.total
        part = Moments(b.rows, b.mean, m2, b.missing, np.zeros(d, np.int64), np.zeros(d), b.rows_seen,
                       weight=b.total, weight2=b.total2)
    part.missing = b.missing
    part.valid_n = b.rows_seen - b.missing
    part.valid_weight = b.valid_weight
    part.valid_mean = b.valid_mean
    part.rows_seen = b.rows_seen
    return part


def weight_features(c: np.ndarray, f: np.ndarray | None) -> np.ndarray:
    """``F C F`` for ``F = diag(f)``; ``c`` unchanged when there are no feature weights."""
    if f is None:
        return c
    return c * f[:, None] * f[None, :]


def reliability_factor(total: float, total2: float) -> float:
    """Factor from our eigenvalues (denominator ``W - 1``) to reliability weights (``W - W2/W``).

    ``np.cov(x, aweights=w) == (W - 1) / (W - W2 / W) * np.cov(x, fweights=w)``
    for integer ``w`` (numpy documentation of ``cov``, "aweights").
    """
    return (total - 1.0) / (total - total2 / total)


def feature_weight_array(weights) -> np.ndarray | None:
    """The plan's feature weights as an array (None when there are none)."""
    return None if weights is None else np.asarray(weights, dtype=np.float64)


def check_total_weight(plan, m: Moments) -> None:
    """The row weights must leave something to fit: a sum above 1 (the denominator is ``sum(w) - 1``).

    A sum within 1e-6 of 1 counts as 1: weights normalised to a distribution
    sum to 1 only up to rounding, and ``sum(w) - 1`` would then be noise.

    Raises
    ------
    InputError
        Every weight is 0 (on the rows kept), or they sum to 1 or less.
    """
    where = f"input.row_weight: column {plan.row_weight!r}"
    if m.n == 0:
        raise InputError(f"{where}: no row with a positive weight is left of the {m.rows_seen} rows read "
                         f"({len(plan.files)} file(s)); at least two rows need a positive weight")
    # weights normalised to sum to 1 land a few ulps either side of it: both are refused
    if m.total - 1.0 <= 1e-6:
        raise InputError(f"{where}: the weights sum to {m.total:.6g}, but frequency weights (denominator "
                         "sum(w) - 1) need a sum above 1: give counts, e.g. multiply normalised weights "
                         "by the number of rows")


def weights_record(plan, m: Moments, feature_weights_path: str) -> dict:
    """What the manifest says about the weights (README "Weights")."""
    rec = {"row_weight": plan.row_weight or None, "feature_weights": feature_weights_path or None}
    if m.weight is not None:
        rec.update({
            "convention": "frequency: covariance denominator sum(w) - 1",
            "sum": m.weight, "sum_of_squares": m.weight2,
            "rows_with_positive_weight": int(m.n),
            # multiply eigenvalues by this for the reliability-weight convention (numpy aweights)
            "to_reliability_weights": reliability_factor(m.weight, m.weight2),
        })
    return rec


def weights_text(rec: dict | None) -> str:
    """One line saying whether and how the data were weighted (manifest "weights")."""
    rec = rec or {}
    parts = []
    if rec.get("row_weight"):
        parts.append(f"rows weighted by column {rec['row_weight']!r} (frequency weights, sum {rec.get('sum', 0):.6g}, "
                     f"{rec.get('rows_with_positive_weight')} rows with weight > 0)")
    if rec.get("feature_weights"):
        parts.append(f"features weighted by {rec['feature_weights']} (after centring and scaling)")
    return "; ".join(parts) if parts else "none (unweighted)"
