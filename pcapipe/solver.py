"""Block power iteration with Rayleigh-Ritz, locking and Krylov acceleration.

The solver sees the covariance only through an operator ``matmat(V) -> C @ V``
(one pass over the data for the matrix-free method); it never touches
Parquet.  Each iteration applies the operator exactly once, to one block.

The method is block power (subspace) iteration in which the last ``depth``
power iterates are kept and Rayleigh-Ritz is done over all of them, i.e. a
block Krylov subspace, restarted by keeping the best Ritz vectors:

* Rutishauser (1970), "Simultaneous iteration method for symmetric matrices",
  Numer. Math. 16 -- subspace iteration with Rayleigh-Ritz (``depth = 1``);
* Musco & Musco (2015), "Randomized block Krylov methods for stronger and
  faster approximate singular value decomposition", NeurIPS -- keeping the
  Krylov iterates, which needs far fewer passes than subspace iteration;
* Stathopoulos, Saad & Wu (1998), "Dynamic thick restarting of the Davidson
  and the implicitly restarted Arnoldi methods", SIAM J. Sci. Comput. 19 --
  restarting by keeping Ritz vectors (thick restart);
* Saad (2011), "Numerical Methods for Large Eigenvalue Problems", 2nd ed.,
  SIAM, sections 4.2 (locking / deflation) and 5.2 (Rayleigh-Ritz).

With ``depth = 1`` and a block of one vector this is exactly the power
method: ``v <- C v / ||C v||`` and the Rayleigh quotient ``v^T C v``.

Expansion uses the residuals ``C u - theta u`` of the active Ritz vectors:
they are orthogonal to the current basis (Galerkin condition) and span the
same new directions as ``C Q``, so the subspace is the block Krylov space.
A pair is locked once its relative residual ``||C u - theta u|| / theta_1``
is at most a tenth of ``tolerance`` and every larger pair is locked; the
active basis is kept orthogonal to the locked vectors (deflation).  The run
stops when every wanted pair, locked or not, is within ``tolerance``.

With a fraction of the variance as the target (``fraction``, ``trace``),
``k`` grows inside the same run once every wanted pair is locked and their
share is short of it: the Ritz values of the current basis, lower bounds of
the eigenvalues they approximate (Cauchy interlacing), estimate how many
more are needed.  One counter of operator applications covers the whole run
and ``max_iterations`` bounds it.

Memory: the basis and its image, ``2 * d * depth * block`` floats, plus the
locked vectors.
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .decomposition import SolverResult, gap_to_others, history_array
from .errors import NotConvergedWarning

__all__ = ["SolverResult", "SolverState", "BlockPowerSolver", "solve"]

log = logging.getLogger("pcapipe")

_DROP = 1e-10  # a new direction shorter than this (relative) adds nothing but noise
# Pairs are locked only at a tenth of the tolerance: a vector kept orthogonal to locked
# vectors with residual r cannot get its own residual much below r, so locking at the
# tolerance itself can stall the next pair just above it.  The run still stops as soon as
# every wanted pair, locked or active, is within the tolerance.
_LOCK = 0.1


@dataclass
class SolverState:
    """Everything needed to continue an iteration (saved in checkpoints)."""

    basis: np.ndarray
    image: np.ndarray
    locked: np.ndarray
    locked_values: np.ndarray
    locked_residuals: np.ndarray
    iterations: int = 0
    matvecs: int = 0
    history: list = field(default_factory=list)
    k: int = 0  # pairs wanted now (grows when the target is a fraction of the variance)

    def arrays(self) -> dict:
        """Plain arrays for ``numpy.savez`` (no pickle)."""
        width = max((len(r) for r in self.history), default=0)
        return {"basis": self.basis, "image": self.image, "locked": self.locked,
                "locked_values": self.locked_values, "locked_residuals": self.locked_residuals,
                "iterations": np.array(self.iterations), "matvecs": np.array(self.matvecs),
                "history": history_array(self.history, width), "k": np.array(self.k)}

    @classmethod
    def from_arrays(cls, a) -> "SolverState":
        hist = [[v for v in row if not np.isnan(v)] for row in np.asarray(a["history"])]
        k = int(a["k"]) if "k" in a else 0
        return cls(np.asarray(a["basis"]), np.asarray(a["image"]), np.asarray(a["locked"]),
                   np.asarray(a["locked_values"]), np.asarray(a["locked_residuals"]),
                   int(a["iterations"]), int(a["matvecs"]), hist, k)


def _project_out(p: np.ndarray, bases) -> np.ndarray:
    # Two rounds of classical Gram-Schmidt ("twice is enough", Giraud et al.
    # 2005, Numer. Math. 101) keep the new block orthogonal to working precision.
    for _ in range(2):
        for b in bases:
            if b.shape[1]:
                p = p - b @ (b.T @ p)
    return p


def _orthonormal_block(p: np.ndarray, bases) -> np.ndarray:
    """Orthonormal basis of the part of ``p`` orthogonal to ``bases``.

    Directions that are (numerically) already in the span are dropped, so the
    result may have fewer columns than ``p``, or none.
    """
    if p.shape[1] == 0:
        return p
    norms = np.linalg.norm(p, axis=0)
    p = p / np.where(norms > 0, norms, 1.0)
    p = _project_out(p, bases)
    u, s, _ = np.linalg.svd(p, full_matrices=False)
    u = u[:, s > _DROP]
    if u.shape[1]:
        u = _project_out(u, bases)
        u, _ = np.linalg.qr(u)
    return u


class BlockPowerSolver:
    """Iterate towards the ``k`` largest eigenpairs of a symmetric PSD operator.

    Parameters
    ----------
    matmat : callable
        ``matmat(V) -> C @ V`` for ``V`` of shape (d, m).
    n_features : int
        d.
    k : int
        Number of wanted eigenpairs, ``1 <= k <= d``.
    tolerance : float
        Relative residual ``||C v - theta v|| / theta_1`` at which a pair is
        converged.
    max_iterations : int
        Operator applications allowed (one per iteration).
    oversample : int
        Extra vectors in the block; they speed up the wanted ones when the
        spectrum has no gap right after ``k``.
    rng : numpy.random.Generator
        Source of the random start block.
    depth : int
        Power iterates kept in the basis; 1 is plain subspace iteration.
    start : ndarray (d, m), optional
        Initial block (warm start); random columns complete it.
    fraction, trace : float, optional
        Grow ``k`` until the locked eigenvalues sum to at least
        ``fraction * trace`` (or ``k = d``).
    """

    def __init__(self, matmat: Callable, n_features: int, k: int, *, tolerance: float,
                 max_iterations: int, oversample: int, rng: np.random.Generator,
                 depth: int = 8, start: np.ndarray | None = None,
                 fraction: float | None = None, trace: float | None = None):
        if not 1 <= k <= n_features:
            raise ValueError(f"k must be in [1, {n_features}], got {k}")
        if fraction is not None and not (trace and trace > 0):
            raise ValueError("a fraction of the variance needs the operator's positive trace")
        self.matmat = matmat
        self.d = n_features
        self.k = k
        self.tolerance = tolerance
        self.max_iterations = max_iterations
        self._oversample = oversample
        self.block = min(k + oversample, n_features)
        self.oversample = self.block - k
        self.fraction, self.trace = fraction, trace
        self.depth = max(1, depth)
        self.rng = rng
        self._start = start
        self.state: SolverState | None = None

    # -- state ---------------------------------------------------------------
    def _apply(self, q: np.ndarray) -> np.ndarray:
        w = np.asarray(self.matmat(q), dtype=np.float64)
        self.state.matvecs += 1
        return w

    def initialize(self) -> None:
        """Build the start block and apply the operator to it (one pass)."""
        d, b = self.d, self.block
        p = self.rng.standard_normal((d, b))
        if self._start is not None and self._start.size:
            s = np.asarray(self._start, dtype=np.float64)[:, :b]
            p[:, : s.shape[1]] = s
        empty = np.zeros((d, 0))
        self.state = SolverState(empty, empty, empty.copy(), np.zeros(0), np.zeros(0), k=self.k)
        q = _orthonormal_block(p, [])
        self.state.basis = q
        self.state.image = self._apply(q)

    def resume(self, state: SolverState) -> None:
        """Continue from a saved state."""
        self.state = state
        if state.k > self.k:
            self._set_k(state.k)
        state.k = self.k

    def _set_k(self, k: int) -> None:
        self.k = k
        self.block = min(k + self._oversample, self.d)
        self.oversample = self.block - k

    def _retarget(self, theta: np.ndarray) -> None:
        """With a fraction target, set ``k`` to the count the current estimates need.

        Ritz values are at most the eigenvalues of the same rank (Cauchy
        interlacing), so the count at which locked values plus Ritz values
        reach the fraction is at least the count the true spectrum needs; when
        they do not reach it, the rest of the spectrum is taken as flat at the
        smallest Ritz value (fewer than needed when the spectrum decays).
        """
        st = self.state
        if self.fraction is None:
            return
        locked = st.locked.shape[1]
        share = float(st.locked_values.sum()) / self.trace
        if share >= self.fraction - 1e-12:
            k = locked
        else:
            reach = np.flatnonzero(share + np.cumsum(np.maximum(theta, 0.0)) / self.trace >= self.fraction - 1e-12)
            if reach.size:
                k = locked + int(reach[0]) + 1
            else:
                # beyond the basis, assume the rest is no larger than the last Ritz value:
                # a lower bound on the count still needed for a decaying spectrum
                missing = (self.fraction - share) * self.trace - float(np.maximum(theta, 0.0).sum())
                last = max(float(theta[-1]) if theta.size else 0.0, self.trace * 1e-12)
                k = max(self.k, locked + theta.size + int(np.ceil(missing / last)))
        k = min(self.d, max(k, locked, 1))
        if k != self.k:
            log.debug("variance share %.4g of %.4g with %d components locked: looking for %d",
                      share, self.fraction, locked, k)
            self._set_k(k)
            st.k = k

    # -- one iteration -------------------------------------------------------
    def _ritz(self):
        st = self.state
        h = st.basis.T @ st.image
        h = 0.5 * (h + h.T)
        theta, y = np.linalg.eigh(h)
        order = np.argsort(theta)[::-1]
        theta, y = theta[order], y[:, order]
        u = st.basis @ y
        cu = st.image @ y
        res = cu - u * theta
        return theta, u, cu, np.linalg.norm(res, axis=0), res

    def _reference(self, theta) -> float:
        st = self.state
        top = st.locked_values[0] if st.locked_values.size else (theta[0] if theta.size else 0.0)
        return max(float(top), np.finfo(float).tiny)

    def _lock(self, theta, u, rnorm, ref) -> int:
        """Lock the leading converged pairs; returns how many were locked."""
        st = self.state
        want = self.k - st.locked.shape[1]
        n = 0
        while n < min(want, theta.size) and rnorm[n] <= _LOCK * self.tolerance * ref:
            n += 1
        if n:
            st.locked = np.hstack([st.locked, u[:, :n]])
            st.locked_values = np.concatenate([st.locked_values, theta[:n]])
            st.locked_residuals = np.concatenate([st.locked_residuals, rnorm[:n]])
        return n

    def step(self) -> bool:
        """One Rayleigh-Ritz, lock, expand, apply. Returns True when done."""
        st = self.state
        theta, u, cu, rnorm, res = self._ritz()
        ref = self._reference(theta)
        self._record(theta, rnorm, ref)
        st.iterations += 1
        n_lock = self._lock(theta, u, rnorm, ref)
        theta, u, cu, rnorm, res = theta[n_lock:], u[:, n_lock:], cu[:, n_lock:], rnorm[n_lock:], res[:, n_lock:]
        # The basis must not hold the pairs just locked, or result() would count them twice.
        st.basis, st.image = u, cu
        self._retarget(theta)
        remaining = self.k - st.locked.shape[1]
        if remaining == 0:
            return True
        if theta.size >= remaining and (rnorm[:remaining] <= self.tolerance * ref).all():
            return True
        if st.matvecs >= self.max_iterations:
            return True
        active = min(remaining + self.oversample, theta.size)
        unconverged = rnorm[:active] > self.tolerance * ref
        if self.depth == 1:
            keep_u, keep_cu = np.zeros((self.d, 0)), np.zeros((self.d, 0))
            p = cu[:, :active]
        else:
            room = self.depth * self.block - active
            keep = max(min(theta.size, room), active)
            keep_u, keep_cu = u[:, :keep], cu[:, :keep]
            p = res[:, :active][:, unconverged] if unconverged.any() else res[:, :active]
        q = _orthonormal_block(p, [st.locked, keep_u])
        if q.shape[1] == 0:
            # The basis holds an invariant subspace; fresh random directions
            # are the only way on (needed when the block spans a zero space).
            q = _orthonormal_block(self.rng.standard_normal((self.d, active)), [st.locked, keep_u])
            if q.shape[1] == 0:
                return True
        w = self._apply(q)
        st.basis = np.hstack([keep_u, q])
        st.image = np.hstack([keep_cu, w])
        return False

    def _record(self, theta, rnorm, ref) -> None:
        st = self.state
        row = list(st.locked_residuals / ref)
        want = self.k - len(row)
        row += list(rnorm[:want] / ref)
        row += [np.nan] * (self.k - len(row))
        st.history.append(row[: self.k])
        log.debug("iteration %d: max relative residual %.3g", st.iterations + 1, np.nanmax(row))

    # -- result --------------------------------------------------------------
    def result(self) -> SolverResult:
        """Current best eigenpairs (locked first, then the best active ones)."""
        st = self.state
        theta, u, _, rnorm, _ = self._ritz()
        want = self.k - st.locked.shape[1]
        values = np.concatenate([st.locked_values, theta[:want]])
        vectors = np.hstack([st.locked, u[:, :want]])
        resid = np.concatenate([st.locked_residuals, rnorm[:want]])
        order = np.argsort(values)[::-1]
        values, vectors, resid = values[order], vectors[:, order], resid[order]
        ref = max(values[0], np.finfo(float).tiny) if values.size else 1.0
        converged = resid <= self.tolerance * ref
        every = np.sort(np.concatenate([st.locked_values, theta]))[::-1]
        gaps = np.array([gap_to_others(v, every) / ref for v in values])
        # the block's other Ritz values: estimates of the eigenvalues after k
        extra = slice(want, want + max(self.oversample, 0))
        extra_values, extra_res = theta[extra], rnorm[extra]
        return SolverResult(values, vectors, resid, converged, gaps, st.iterations, st.matvecs,
                            history_array(st.history, self.k), self.depth, self.block,
                            extra_values=extra_values, extra_residuals=extra_res,
                            extra_converged=extra_res <= self.tolerance * ref)


def solve(matmat: Callable, n_features: int, k: int, *, tolerance: float, max_iterations: int,
          oversample: int, rng: np.random.Generator, depth: int = 8, start=None,
          state: SolverState | None = None, callback: Callable | None = None,
          fraction: float | None = None, trace: float | None = None) -> SolverResult:
    """Run :class:`BlockPowerSolver` to convergence or to the iteration limit.

    ``callback(solver)`` is called after every operator application (the
    engine checkpoints there).  With ``fraction`` (and the operator's
    ``trace``), ``k`` is the starting count and grows inside the run; the
    result then holds the smallest count whose eigenvalues reach the fraction
    (the others found move to the extra eigenvalues).  Emits one
    :class:`NotConvergedWarning` naming the retained components that did not
    reach the tolerance, with the residual reached and the gap to their
    neighbours.
    """
    solver = BlockPowerSolver(matmat, n_features, k, tolerance=tolerance, max_iterations=max_iterations,
                              oversample=oversample, rng=rng, depth=depth, start=start,
                              fraction=fraction, trace=trace)
    if state is None:
        solver.initialize()
        if callback:
            callback(solver)
    else:
        solver.resume(state)
    while not solver.step():
        if callback:
            callback(solver)
    res = solver.result()
    if fraction is not None:
        reach = np.flatnonzero(np.cumsum(res.values) / trace >= fraction - 1e-12)
        res = res.retain(int(reach[0]) + 1 if reach.size else res.values.size)
    k = res.values.size
    if not res.converged.all():
        bad = np.flatnonzero(~res.converged)
        ref = max(res.values[0], np.finfo(float).tiny)
        detail = ", ".join(
            f"PC{i + 1} residual {res.residual_norms[i] / ref:.2g} (gap {res.gaps[i]:.2g})" for i in bad
        )
        warnings.warn(
            f"{bad.size} of {k} components did not reach tolerance {tolerance:g} in "
            f"{res.matvecs} operator applications: {detail}; a relative gap this small needs more "
            "iterations (model.max_iterations) or a looser model.tolerance",
            NotConvergedWarning,
            stacklevel=2,
        )
    return res
