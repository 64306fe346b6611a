"""The run's monitoring stage: control limits of a fitted model and alarm counts.

The engine calls :func:`fit_limits` between the solver and the scores pass
(no extra pass over the data for any method) and :func:`count_alarms` after
the scores are written.  :class:`FirstBlock` records the solver's first
operator application, from which the matrix-free method estimates theta_2
(:func:`pcapipe.limits.estimate_theta2`).
"""

from __future__ import annotations

import glob
import logging
import os

import numpy as np
import pyarrow.parquet as pq

from .limits import Theta2Estimate, control_limits, estimate_theta2, thetas_from_eigenvalues, thetas_from_matrix
from .monitor import MonitorSpec

__all__ = ["FirstBlock", "fit_limits", "every_eigenvalue", "monitor_spec", "count_alarms"]

log = logging.getLogger("pcapipe")


class FirstBlock:
    """An operator that passes every call through and keeps the first block and its image.

    The solver starts from an orthonormal basis of a Gaussian block; ``C Q``
    of that block is the random probe the theta_2 estimate needs.
    """

    def __init__(self, op):
        self.op = op
        self.trace = op.trace
        self.n_features = op.n_features
        self.q = None
        self.cq = None

    def matmat(self, v: np.ndarray) -> np.ndarray:
        w = self.op.matmat(v)
        if self.q is None:
            self.q, self.cq = np.array(v, dtype=float), np.array(w, dtype=float)
        return w

    def probe(self) -> dict | None:
        """``{"q", "cq"}`` when the first block is orthonormal (as a random start is), else None."""
        if self.q is None:
            return None
        gram = self.q.T @ self.q
        if not np.allclose(gram, np.eye(gram.shape[0]), atol=1e-8):
            return None
        return {"q": self.q, "cq": self.cq}


def fit_limits(method: str, confidence: float, n: int, trace: float, values: np.ndarray, vectors: np.ndarray,
               matrix: np.ndarray | None = None, all_values: np.ndarray | None = None,
               probe: dict | None = None) -> dict:
    """Control limits of the fitted model, from what the method knows about the discarded eigenvalues.

    Parameters
    ----------
    method : str
        For the record only.
    confidence : float
    n : int
        Rows used in the fit.
    trace : float
        Total variance (exact for every method).
    values, vectors : the k retained eigenpairs.
    matrix : ndarray (d, d), optional
        The covariance matrix (covariance method): theta_1, theta_2 exact.
    all_values : ndarray (d,), optional
        Every eigenvalue (theta_1..3 exact, Jackson-Mudholkar recorded too).
    probe : dict, optional
        The solver's first block and its image (matrix-free): theta_2 estimated.
    """
    d, k = vectors.shape
    estimate: Theta2Estimate | None = None
    theta3 = None
    if all_values is not None and all_values.size == d:
        theta1, theta2, theta3 = thetas_from_eigenvalues(all_values, k)
        source = "every eigenvalue (exact)"
    elif matrix is not None:
        theta1, theta2 = thetas_from_matrix(matrix, vectors, values)
        source = "the covariance matrix minus the retained part (exact)"
    else:
        theta1 = max(trace - float(values.sum()), 0.0)
        if k == d:
            theta2, source = 0.0, "no discarded eigenvalue"
        elif probe is not None:
            estimate = estimate_theta2(probe["q"], probe["cq"], vectors, values, theta1)
            theta2 = estimate.value
            source = f"estimated from the solver's first block of {estimate.probes} random vectors"
            if estimate.probes >= d:  # the block spans every direction: trace(R^2) is exact
                estimate, source = None, f"the solver's first block spans all {d} directions (exact)"
        else:
            # no probe (resumed in the middle of the iteration): the widest theta_2 theta_1 allows
            lo, hi = theta1**2 / max(d - k, 1), min(theta1 * float(values[-1]), theta1**2)
            theta2 = float(np.sqrt(lo * hi))
            estimate = Theta2Estimate(theta2, (hi - lo) / 2, (hi - lo) / 2, lo, hi, 0)
            source = "bounded only (resumed run: the solver's first block was not kept)"
    record = control_limits(k, n, d, confidence, theta1, theta2, theta3, estimate)
    record["method"] = method
    record["theta_source"] = source
    log.info("control limits at %.3g: T2 %.4g (new rows), %.4g (training rows), SPE %.4g%s", confidence,
             record["t2"] or np.nan, record["t2_training"] or np.nan, record["spe"],
             " (estimated)" if estimate is not None else "")
    return record


def every_eigenvalue(res, trace: float) -> np.ndarray | None:
    """Retained and other eigenvalues of a solver result, when they are every eigenvalue.

    Exact only when the method determined them (LAPACK: the extra values are
    flagged converged) and they account for the whole trace (a list cut
    short, or Ritz estimates, do not).
    """
    extra = getattr(res, "extra_values", None)
    if extra is None or not np.size(extra) or not np.all(getattr(res, "extra_converged", False)):
        return None
    every = np.concatenate([res.values, extra])
    if abs(float(every.sum()) - trace) > 1e-8 * max(abs(trace), np.finfo(float).tiny):
        return None
    return every


def monitor_spec(limits: dict, values: np.ndarray, training: bool) -> MonitorSpec:
    """The score writer's spec: training rows use the beta T^2 limit, new rows the F limit."""
    t2 = limits["t2_training"] if training else limits["t2"]
    return MonitorSpec(np.asarray(values, dtype=float), np.inf if t2 is None else float(t2),
                       float(limits["spe"]))


def count_alarms(paths) -> dict:
    """Rows over each limit in score parts (reads only the two alarm columns)."""
    if isinstance(paths, str):
        paths = sorted(glob.glob(os.path.join(paths, "part-*.parquet")))
    rows = t2 = spe = both = 0
    for path in paths:
        table = pq.read_table(path, columns=["t2_alarm", "spe_alarm"])
        a = table.column("t2_alarm").to_numpy(zero_copy_only=False)
        b = table.column("spe_alarm").to_numpy(zero_copy_only=False)
        rows += a.size
        t2 += int(a.sum())
        spe += int(b.sum())
        both += int((a | b).sum())
    return {"rows": rows, "t2_alarms": t2, "spe_alarms": spe, "any_alarm": both}
