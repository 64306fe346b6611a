"""Control limits for Hotelling's T^2 and the squared prediction error (SPE).

A row is an alarm when its T^2 or its SPE exceeds the limit at confidence
``monitor.confidence``.  The limits assume that the rows are independent
draws from one multivariate normal distribution; autocorrelated rows (sensor
telemetry sampled faster than it changes) cross them more often than
``1 - confidence``.

T^2 on k retained components of a model fitted on n rows (Tracy, Young &
Mason 1992, "Multivariate control charts for individual observations",
J. Quality Technology 24(2), eqs. 5 and 7; Jackson 1991, "A User's Guide to
Principal Components", Wiley, sec. 1.7.2):

* a new row, independent of the fit::

      T2_lim = k (n - 1) (n + 1) / (n (n - k)) * F_{k, n-k}(confidence)

* a row of the training data itself (it helped estimate the model)::

      T2_lim = (n - 1)^2 / n * Beta_{k/2, (n-k-1)/2}(confidence)

SPE from theta_i = sum over the discarded eigenvalues of lambda^i:

* Box (1954), "Some theorems on quadratic forms applied in the study of
  analysis of variance problems, I", Ann. Math. Statist. 25, thm. 3.1, as
  used for SPE by Nomikos & MacGregor (1995), "Multivariate SPC charts for
  monitoring batch processes", Technometrics 37(1), eq. 16: SPE ~ g chi2_h
  with the first two moments matched, ``g = theta_2 / theta_1``,
  ``h = theta_1^2 / theta_2``.  This is the limit pcapipe's alarms use, for
  every method: it needs theta_1 and theta_2 only, which every method knows
  or estimates.
* Jackson & Mudholkar (1979), "Control procedures for residuals associated
  with principal component analysis", Technometrics 21(3), eq. 3.4::

      h0 = 1 - 2 theta_1 theta_3 / (3 theta_2^2)
      SPE_lim = theta_1 [z sqrt(2 theta_2 h0^2) / theta_1 + 1
                         + theta_2 h0 (h0 - 1) / theta_1^2] ^ (1 / h0)

  recorded beside it when every eigenvalue is known (theta_3 exact).

The matrix-free method never forms C: theta_1 is exact (trace minus the
retained eigenvalues) and theta_2 = trace(R^2), R = C - V diag(lambda) V^T, is
estimated from the solver's first block (:func:`estimate_theta2`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = ["t2_limit_new", "t2_limit_training", "spe_limit_box", "spe_limit_jackson_mudholkar",
           "thetas_from_eigenvalues", "thetas_from_matrix", "estimate_theta2", "Theta2Estimate", "INTERVAL",
           "control_limits", "T2_REFERENCE", "SPE_REFERENCE", "JM_REFERENCE"]

T2_REFERENCE = ("Tracy, Young & Mason (1992), J. Quality Technology 24(2), eqs. 5 and 7; "
                "Jackson (1991), A User's Guide to Principal Components, sec. 1.7.2")
SPE_REFERENCE = ("Box (1954), Ann. Math. Statist. 25, thm. 3.1; Nomikos & MacGregor (1995), "
                 "Technometrics 37(1), eq. 16")
JM_REFERENCE = "Jackson & Mudholkar (1979), Technometrics 21(3), eq. 3.4"


def t2_limit_new(k: int, n: int, confidence: float) -> float:
    """T^2 limit for a new row: ``k (n-1)(n+1) / (n (n-k)) F_{k,n-k}(confidence)``."""
    if n <= k:
        return float("nan")
    return float(k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(confidence, k, n - k))


def t2_limit_training(k: int, n: int, confidence: float) -> float:
    """T^2 limit for a training row: ``(n-1)^2 / n * Beta_{k/2,(n-k-1)/2}(confidence)``."""
    if n - k - 1 <= 0:
        return float("nan")
    return float((n - 1) ** 2 / n * stats.beta.ppf(confidence, k / 2, (n - k - 1) / 2))


def spe_limit_box(theta1: float, theta2: float, confidence: float) -> float:
    """Box's scaled chi-square limit ``g chi2_h(confidence)``, ``g = theta2/theta1``, ``h = theta1^2/theta2``."""
    if not (theta1 > 0 and theta2 > 0):
        return 0.0
    return float(theta2 / theta1 * stats.chi2.ppf(confidence, theta1**2 / theta2))


def spe_limit_jackson_mudholkar(theta1: float, theta2: float, theta3: float, confidence: float) -> float:
    """Jackson & Mudholkar's normal approximation to the SPE quantile (eq. 3.4)."""
    if not (theta1 > 0 and theta2 > 0):
        return 0.0
    h0 = 1.0 - 2.0 * theta1 * theta3 / (3.0 * theta2**2)
    z = stats.norm.ppf(confidence)
    base = z * np.sqrt(2.0 * theta2 * h0**2) / theta1 + 1.0 + theta2 * h0 * (h0 - 1.0) / theta1**2
    return float(theta1 * base ** (1.0 / h0))


def thetas_from_eigenvalues(values: np.ndarray, k: int) -> tuple[float, float, float]:
    """``theta_i = sum_{j > k} lambda_j^i``, i = 1..3, from every eigenvalue (largest first)."""
    rest = np.clip(np.asarray(values, dtype=float)[k:], 0.0, None)
    return float(rest.sum()), float((rest**2).sum()), float((rest**3).sum())


def thetas_from_matrix(c: np.ndarray, vectors: np.ndarray, values: np.ndarray) -> tuple[float, float]:
    """theta_1 and theta_2 of the discarded part ``R = C - V diag(lambda) V^T``, formed explicitly.

    ``trace(R)`` and ``||R||_F^2`` are sums of the discarded eigenvalues and
    their squares; forming R (O(d^2 k)) avoids ``||C||_F^2 - sum lambda^2``,
    which loses every digit when the discarded part is small.
    """
    r = c - (vectors * values) @ vectors.T
    return float(np.trace(r)), float(np.sum(r * r))


@dataclass(frozen=True)
class Theta2Estimate:
    """theta_2 estimated from random probes, and how precisely.

    ``std_error`` is estimated from the spread of the per-probe terms;
    ``std_bound`` is a guaranteed upper bound on the true standard deviation;
    ``low``/``high`` is the approximate ``INTERVAL`` interval (Student t with
    ``probes - 1`` degrees of freedom), clipped to what theta_1 and lambda_k
    allow (see :func:`estimate_theta2`).
    """

    value: float
    std_error: float
    std_bound: float
    low: float
    high: float
    probes: int


INTERVAL = 0.99


def estimate_theta2(q: np.ndarray, cq: np.ndarray, vectors: np.ndarray, values: np.ndarray,
                    theta1: float) -> Theta2Estimate:
    """Estimate ``theta_2 = trace(R^2)``, ``R = C - V diag(lambda) V^T``, without another pass.

    The solver's first block ``Q`` (d x b) is an orthonormal basis of the span
    of a Gaussian matrix, i.e. of a uniformly distributed b-dimensional
    subspace, and the first operator application gives ``C Q`` for free.  For
    such a ``Q``, ``E[Q Q^T] = (b/d) I``, so ``(d/b) trace(Q^T A Q)`` is an
    unbiased estimate of ``trace(A)`` (Hutchinson 1989, Commun. Statist.
    Simula. 18, with orthonormal instead of independent probes).  With
    ``A = R^2`` and ``R Q = C Q - V diag(lambda) V^T Q``::

        theta_2 ~= mean_j a_j,   a_j = d ||R q_j||^2

    From the second moments of a uniformly random rank-b projection (derived;
    checked by simulation in tests/test_limits.py)::

        Var(a_j)      = V1 = 2 d / (d + 2) * (||A||_F^2 - trace(A)^2 / d)
        Cov(a_i, a_j) = -V1 / (d - 1)
        Var(estimate) = V1 (d - b) / (b (d - 1))

    so the sample variance ``s^2`` of the a_j has expectation ``V1 d/(d-1)``
    and ``s^2 (d - b) / (b d)`` estimates the variance of the estimate
    (``std_error``).  A guaranteed bound (``std_bound``) follows from
    ``||A||_F^2 = sum_{j>k} lambda_j^4 <= min(lambda_k^2, theta_2) theta_2``:
    every discarded eigenvalue is at most lambda_k, and at most sqrt(theta_2).

    Parameters
    ----------
    q, cq : ndarray (d, b)
        The first block and the operator applied to it.
    vectors, values : the retained eigenpairs (d x k, k).
    theta1 : float
        The exact sum of the discarded eigenvalues (bounds the estimate).
    """
    d, b = q.shape
    k = values.size
    rq = cq - (vectors * values) @ (vectors.T @ q)
    terms = d * np.sum(rq * rq, axis=0)
    lam_k = float(values[-1]) if k else float("inf")
    # what theta_1 allows: d-k equal eigenvalues give the least, lambda_k-sized ones the most
    lo_bound = theta1**2 / max(d - k, 1)
    hi_bound = min(theta1 * lam_k, theta1**2)
    est = float(np.clip(terms.mean(), lo_bound, hi_bound))
    if d <= b or b < 2:
        return Theta2Estimate(est, 0.0, 0.0, est, est, b)
    std = float(np.sqrt(terms.var(ddof=1) * (d - b) / (b * d)))
    factor = 2.0 * d * (d - b) / (b * (d - 1) * (d + 2))
    bound = float(np.sqrt(factor * min(lam_k**2, est) * est))
    half = float(stats.t.ppf(0.5 + INTERVAL / 2, b - 1)) * std
    return Theta2Estimate(est, std, bound, max(lo_bound, est - half), min(hi_bound, est + half), b)


def control_limits(k: int, n: int, d: int, confidence: float, theta1: float, theta2: float,
                   theta3: float | None = None, theta2_estimate: Theta2Estimate | None = None) -> dict:
    """The manifest's ``limits`` record: T^2 (new rows, training rows) and SPE, with formulas and sources.

    ``theta2_estimate`` marks theta_2 as estimated; the SPE limit is then
    also given as the range it takes over theta_2's approximate 99% interval.
    """
    spe = spe_limit_box(theta1, theta2, confidence)
    record = {
        "confidence": confidence,
        "t2": t2_limit_new(k, n, confidence),
        "t2_training": t2_limit_training(k, n, confidence),
        "spe": spe,
        "t2_formula": "new rows: k (n-1)(n+1) / (n (n-k)) F_{k,n-k}(confidence); "
                      "training rows: (n-1)^2 / n Beta_{k/2,(n-k-1)/2}(confidence)",
        "t2_reference": T2_REFERENCE,
        "spe_formula": "g chi2_h(confidence), g = theta2/theta1, h = theta1^2/theta2",
        "spe_reference": SPE_REFERENCE,
        "theta": [theta1, theta2] + ([theta3] if theta3 is not None else []),
        "rows": n, "components": k, "features": d,
        "estimated": theta2_estimate is not None,
        "assumes": "independent rows from one multivariate normal distribution; autocorrelated rows "
                   "(telemetry) cross the limits more often than 1 - confidence",
    }
    if theta3 is not None:
        record["spe_jackson_mudholkar"] = spe_limit_jackson_mudholkar(theta1, theta2, theta3, confidence)
        record["spe_jackson_mudholkar_reference"] = JM_REFERENCE
    if theta2_estimate is not None:
        e = theta2_estimate
        record["precision"] = {
            "theta2_std_error": e.std_error, "theta2_std_bound": e.std_bound, "probes": e.probes,
            "theta2_interval": [e.low, e.high], "interval": INTERVAL,
            "spe_low": spe_limit_box(theta1, e.low, confidence),
            "spe_high": spe_limit_box(theta1, e.high, confidence),
            "note": "theta2 estimated from the solver's first random block (no extra pass); its standard "
                    "error estimated from the spread of the probes (theta2_std_bound: a guaranteed bound); "
                    "spe_low/spe_high: the limit at the ends of theta2's approximate 99% interval "
                    "(Student t)",
        }
    return _plain(record)


def _plain(value):
    """JSON-able: floats as float, NaN as None."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_plain(v) for v in value]
    if isinstance(value, (float, np.floating)):
        return None if not np.isfinite(value) else float(value)
    if isinstance(value, np.integer):
        return int(value)
    return value
