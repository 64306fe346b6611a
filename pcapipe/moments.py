"""Numerically stable first and second moments, merged pairwise.

Each batch contributes ``(n, mean, M2)`` computed about its own mean; two
partial results are merged with the pairwise update of Chan, Golub & LeVeque
(1979), "Updating formulae and a pairwise algorithm for computing sample
variances", in COMPSTAT 1982 / Stanford tech. report STAN-CS-79-773::

    n    = na + nb
    mean = ma + (mb - ma) * nb / n
    M2   = M2a + M2b + (mb - ma)(mb - ma)^T * na * nb / n

This never forms ``sum(x x^T) - n mu mu^T``, which loses every digit when the
mean is large next to the spread (a mean of 1e8 with unit spread cancels 16
digits in float64).  ``M2`` is the full d x d co-moment matrix (``full=True``,
the covariance method: assembled by BLAS ``syrk``) or only its diagonal.

Per-feature missing counts (NaN, +-inf, nulls) are carried along, and so are
per-feature means over the finite values, which ``impute-mean`` needs.

Inside a task, batches are folded into ONE :class:`Accumulator` as they
arrive: the batch's Gram is added to the running ``M2`` in place by BLAS
``dsyrk`` (``beta = 1``) and the two rank-one corrections by ``dsyr``, so a
task holds one ``d x d`` matrix whatever the number of batches (memory
``8 d^2`` bytes for the covariance method, ``O(d)`` otherwise).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg.blas import dsyr, dsyrk

from .conventions import about_zero

__all__ = ["Moments", "Accumulator", "batch_moments", "merge", "merge_into", "tree_merge",
           "covariance_from"]


@dataclass
class Moments:
    """Partial moments of a set of rows.

    Attributes
    ----------
    n : int
        Rows that entered ``mean`` and ``m2``.
    mean : ndarray (d,)
    m2 : ndarray (d, d) or (d,)
        Co-moment about the mean; for (d, d) only the upper triangle is
        relied on (``symmetric()`` mirrors it).
    missing : ndarray (d,) int64
        Non-finite values seen per feature (in all rows, used or not).
    valid_n, valid_mean : ndarray (d,)
        Count and mean of the finite values per feature.
    rows_seen : int
        All rows read, including dropped ones.
    weight, weight2 : float or None
        Sum and sum of squares of the row weights of the rows in ``mean`` and
        ``m2`` (:mod:`pcapipe.weighted`); None when the rows are unweighted,
        which counts each row once.
    valid_weight : ndarray (d,) or None
        Weighted rows: the weight of the finite values per feature, the
        weights behind ``valid_mean``.
    """

    n: int
    mean: np.ndarray
    m2: np.ndarray
    missing: np.ndarray
    valid_n: np.ndarray
    valid_mean: np.ndarray
    rows_seen: int
    weight: float | None = None
    weight2: float | None = None
    valid_weight: np.ndarray | None = None

    @classmethod
    def empty(cls, d: int, full: bool, weighted: bool = False) -> "Moments":
        z = np.zeros(d)
        return cls(0, z.copy(), np.zeros((d, d)) if full else z.copy(),
                   np.zeros(d, dtype=np.int64), np.zeros(d, dtype=np.int64), z.copy(), 0,
                   *((0.0, 0.0, z.copy()) if weighted else ()))

    @property
    def total(self) -> float:
        """What the denominator counts: the sum of the row weights, or the rows used."""
        return float(self.n) if self.weight is None else self.weight

    @property
    def full(self) -> bool:
        return self.m2.ndim == 2

    def symmetric(self) -> np.ndarray:
        """The full symmetric co-moment matrix (or the diagonal vector)."""
        if not self.full:
            return self.m2
        upper = np.triu(self.m2)
        return upper + np.triu(upper, 1).T

    def variance(self) -> np.ndarray:
        """Per-feature variance with denominator n - 1 (weighted: sum(w) - 1)."""
        diag = np.diag(self.m2) if self.full else self.m2
        return diag / max(self.total - 1, 1)


def _gram(xc: np.ndarray) -> np.ndarray:
    """``xc^T xc`` without copying ``xc`` (numpy hands ``a.T @ a`` on one buffer to BLAS ``syrk``)."""
    return xc.T @ xc


def _finite_rows(x: np.ndarray, missing: str, fill):
    """Apply the missing rule; returns (rows to use, missing counts, mean of finite values or None)."""
    n_all, d = x.shape
    # A column sum is finite exactly when the column is (barring overflow, which
    # then takes the slow path too), so clean batches never build a mask.
    if np.isfinite(x.sum(axis=0)).all():
        return x, np.zeros(d, dtype=np.int64), None
    finite = np.isfinite(x)
    miss = (~finite).sum(axis=0).astype(np.int64)
    valid_mean = np.where(finite, x, 0.0).sum(axis=0) / np.maximum(n_all - miss, 1)
    if missing == "impute-mean" and fill is not None:
        return np.where(finite, x, fill), miss, valid_mean
    return x[finite.all(axis=1)], miss, valid_mean


def _center(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Center ``x`` in place about its mean; returns (centered x, mean, correction r).

    Corrected two-pass: the rounding error of the first mean is removed with
    the mean of the centered values, ``r`` (Chan, Golub & LeVeque 1983,
    "Algorithms for computing the sample variance", Am. Stat. 37, eq. 1.7);
    the co-moment is then ``xc^T xc - n r r^T`` about ``mean + r``.
    """
    if not x.flags.writeable:
        x = x.copy()
    n = x.shape[0]
    mean = x.sum(axis=0) / n
    x -= mean
    r = x.sum(axis=0) / n
    return x, mean + r, r


def _syrk_into(c: np.ndarray | None, xc: np.ndarray) -> np.ndarray:
    """``c += xc^T xc`` on the upper triangle, in place (``c`` Fortran-ordered), no copy of ``xc``."""
    beta = 0.0 if c is None else 1.0
    if xc.flags.f_contiguous:
        return dsyrk(1.0, xc, beta=beta, c=c, trans=1, overwrite_c=1)
    # a C-ordered (n, d) batch is the Fortran-ordered (d, n) transpose: C = A A^T
    return dsyrk(1.0, np.ascontiguousarray(xc).T, beta=beta, c=c, trans=0, overwrite_c=1)


class Accumulator:
    """Moments of a stream of batches, folded into one set of arrays in place.

    The fold of a batch ``b`` into the running ``a`` is the Chan-Golub-LeVeque
    update with ``M2_b`` never materialised: ``M2 += xc^T xc`` (BLAS ``dsyrk``,
    ``beta = 1``), ``M2 -= n_b r r^T`` and ``M2 += (n_a n_b / n) delta delta^T``
    (BLAS ``dsyr``), where ``xc`` is the batch centered about its own mean.
    Memory: one ``d x d`` float64 matrix (``full``) or ``O(d)``, plus the batch.

    Parameters
    ----------
    d : int
    full : bool
        Accumulate the ``d x d`` co-moment (covariance method) or its diagonal.
    missing, fill
        As in :func:`batch_moments`.

    weighted : bool
        Batches come with row weights (frequency weights,
        :mod:`pcapipe.weighted`): each enters as ``sqrt(w) xc`` about its
        weighted mean into the same ``dsyrk`` call, and the update uses the
        weight totals instead of row counts (West 1979; Schubert & Gertz
        2018, eq. 22-23), so a weighted task also holds one ``d x d`` matrix.
    """

    def __init__(self, d: int, full: bool, missing: str = "fail", fill: np.ndarray | None = None,
                 weighted: bool = False):
        self.d, self.full, self.missing, self.fill = d, full, missing, fill
        self._m = Moments.empty(d, False, weighted=weighted)
        self._m.m2 = None  # allocated by the first non-empty batch

    def add(self, x: np.ndarray, weights: np.ndarray | None = None) -> None:
        """Fold the ``(n, d)`` float64 batch ``x`` in (``x`` may be overwritten)."""
        if weights is not None:
            self._add_weighted(x, weights)
            return
        m = self._m
        n_all = x.shape[0]
        x, miss, valid_mean = _finite_rows(x, self.missing, self.fill)
        nb = x.shape[0]
        bvalid = n_all - miss
        m.rows_seen += n_all
        m.missing += miss
        if nb:
            xc, mean_b, r = _center(x)
            if valid_mean is None:  # no missing values: every row is valid
                valid_mean = mean_b
            self._fold(xc, m.n, nb, mean_b, r)
            m.n += nb
        if valid_mean is not None:
            m.valid_mean = _merge_means(m.valid_n, m.valid_mean, bvalid, valid_mean)
        m.valid_n = m.valid_n + bvalid

    def _add_weighted(self, x: np.ndarray, weights: np.ndarray) -> None:
        """Fold a batch of frequency-weighted rows: ``sqrt(w) xc`` into the same ``dsyrk`` (weighted totals)."""
        from .weighted import weighted_center

        if self._m.weight is None and self._m.rows_seen == 0:  # made unweighted, first batch weighted
            self._m = Moments.empty(self.d, False, weighted=True)
            self._m.m2 = None
        m = self._m
        if m.weight is None:
            raise ValueError("Accumulator.add: row weights after unweighted batches")
        b = weighted_center(x, weights, self.missing, self.fill)
        m.rows_seen += b.rows_seen
        m.missing += b.missing
        if b.xc is not None:
            self._fold(b.xc, m.weight, b.total, b.mean, b.r)
            m.n += b.rows
            m.weight += b.total
            m.weight2 += b.total2
        m.valid_mean = _merge_means(m.valid_weight, m.valid_mean, b.valid_weight, b.valid_mean)
        m.valid_weight = m.valid_weight + b.valid_weight
        m.valid_n = m.valid_n + (b.rows_seen - b.missing)

    def _fold(self, xc: np.ndarray, wa: float, wb: float, mean_b: np.ndarray, r: np.ndarray) -> None:
        """Chan-Golub-LeVeque fold of a centred batch of total ``wb`` (rows or weight) into a running ``wa``."""
        m = self._m
        w = wa + wb
        delta = mean_b - m.mean
        if self.full:
            m.m2 = _syrk_into(m.m2, xc)
            m.m2 = dsyr(-float(wb), r, a=m.m2, overwrite_a=1)
            if wa:
                m.m2 = dsyr(wa * wb / w, delta, a=m.m2, overwrite_a=1)
        else:
            part = np.einsum("ij,ij->j", xc, xc) - wb * r * r
            m.m2 = part if m.m2 is None else m.m2 + part + delta * delta * (wa * wb / w)
        m.mean = m.mean + delta * (wb / w) if wa else mean_b.copy()

    def result(self) -> Moments:
        """The moments so far (the accumulator's own arrays, not copies)."""
        m = self._m
        if m.m2 is None:
            m.m2 = np.zeros((self.d, self.d), order="F") if self.full else np.zeros(self.d)
        return m


def batch_moments(x: np.ndarray, full: bool, missing: str, fill: np.ndarray | None = None,
                  weights: np.ndarray | None = None) -> Moments:
    """Moments of one decoded batch.

    Parameters
    ----------
    x : ndarray (n, d) float64
        May hold NaN/inf.  Overwritten (centered in place) when writable.
    full : bool
        Assemble the d x d co-moment (covariance method) or only its diagonal.
    missing : {"fail", "drop-rows", "impute-mean"}
        ``fail`` and ``drop-rows`` leave rows with a non-finite value out of
        the moments (``fail`` is raised by the caller from the counts).
        ``impute-mean`` replaces them by ``fill`` when it is given, else drops
        the rows (the first of the two passes impute-mean needs).
    fill : ndarray (d,), optional
    weights : ndarray (n,), optional
        Row weights (finite, >= 0): computed by
        :func:`pcapipe.weighted.weighted_batch_moments` instead.
    """
    if weights is not None:
        from .weighted import weighted_batch_moments

        return weighted_batch_moments(x, weights, full, missing, fill)
    acc = Accumulator(x.shape[1], full, missing, fill)
    acc.add(x)
    return acc.result()


def _merge_means(na, ma, nb, mb):
    n = na + nb
    with np.errstate(invalid="ignore", divide="ignore"):
        # n may be a sum of weights below 1, so no max(n, 1) guard
        w = np.where(n > 0, nb / np.where(n > 0, n, 1), 0.0)
    return ma + (mb - ma) * w


def merge(a: Moments, b: Moments) -> Moments:
    """Chan-Golub-LeVeque pairwise merge of two partial results.

    The update is written with the totals ``a.total``, ``b.total`` (rows, or
    sums of row weights), which makes it the weighted form of the same update
    (West 1979, Comm. ACM 22; Schubert & Gertz 2018, SSDBM, eq. 22-23).
    """
    if (a.weight is None) != (b.weight is None):
        raise ValueError("merge: one part is weighted and the other is not")
    weighted = a.weight is not None
    wa, wb = a.total, b.total
    if wa == 0:
        mean, m2 = b.mean, b.m2
    elif wb == 0:
        mean, m2 = a.mean, a.m2
    else:
        w = wa + wb
        delta = b.mean - a.mean
        mean = a.mean + delta * (wb / w)
        f = wa * wb / w
        m2 = a.m2 + b.m2 + (np.outer(delta, delta) * f if a.full else delta * delta * f)
    valid_a = a.valid_weight if weighted else a.valid_n
    valid_b = b.valid_weight if weighted else b.valid_n
    return Moments(
        n=a.n + b.n,
        mean=mean,
        m2=m2,
        missing=a.missing + b.missing,
        valid_n=a.valid_n + b.valid_n,
        valid_mean=_merge_means(valid_a, a.valid_mean, valid_b, b.valid_mean),
        rows_seen=a.rows_seen + b.rows_seen,
        weight=a.weight + b.weight if weighted else None,
        weight2=a.weight2 + b.weight2 if weighted else None,
        valid_weight=a.valid_weight + b.valid_weight if weighted else None,
    )


def merge_into(a: Moments, b: Moments) -> Moments:
    """:func:`merge` that updates ``a``'s co-moment in place (no third ``d x d`` matrix).

    For tree-reduction nodes, whose inputs are used once.
    """
    if a.n == 0 or b.n == 0 or not a.full or a.weight is not None or b.weight is not None:
        return merge(a, b)
    n = a.n + b.n
    delta = b.mean - a.mean
    m2 = a.m2 if a.m2.flags.f_contiguous else np.asfortranarray(a.m2)
    m2 += b.m2
    m2 = dsyr(a.n * b.n / n, delta, a=m2, overwrite_a=1)
    return Moments(n=n, mean=a.mean + delta * (b.n / n), m2=m2, missing=a.missing + b.missing,
                   valid_n=a.valid_n + b.valid_n,
                   valid_mean=_merge_means(a.valid_n, a.valid_mean, b.valid_n, b.valid_mean),
                   rows_seen=a.rows_seen + b.rows_seen)


def tree_merge(parts):
    """Merge a sequence pairwise, in a fixed order independent of the scheduler."""
    parts = list(parts)
    if not parts:
        raise ValueError("tree_merge needs at least one part")
    while len(parts) > 1:
        parts = [merge(parts[i], parts[i + 1]) if i + 1 < len(parts) else parts[i]
                 for i in range(0, len(parts), 2)]
    return parts[0]


def covariance_from(m: Moments, center: bool, scale: np.ndarray | None) -> np.ndarray:
    """The matrix the solver works on, from full moments.

    ``M2 / (n - 1)`` (about the mean), or ``(M2 + n mu mu^T) / (n - 1)``
    (about zero) when ``center`` is false; then divided on both sides by
    ``scale`` (the standard deviations) when given, which makes it exactly the
    correlation matrix.  Weighted rows: ``n`` is the sum of the weights.
    """
    t = m.total
    c = m.symmetric() / (t - 1)
    if not center:
        c = c + np.outer(m.mean, m.mean) * about_zero(t)
    if scale is not None:
        c = c / scale[:, None] / scale[None, :]
    return c
