"""Property tests of the numerical core: random shapes, chunkings, scalings and offsets vs numpy.

Hypothesis draws the shape, the split points, the scale and the offset; the
values themselves come from numpy.random.default_rng(seed) with a drawn seed.
"""

import numpy as np
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

from pcapipe.moments import batch_moments, covariance_from, merge, tree_merge
from pcapipe.solver import solve

SETTINGS = settings(max_examples=50, deadline=None)


@st.composite
def _chunked_data(draw):
    n = draw(st.integers(3, 200))
    d = draw(st.integers(1, 12))
    seed = draw(st.integers(0, 2**32 - 1))
    log_scale = draw(st.integers(-3, 6))
    # offsets up to 1e8 times the spread (the cancellation the moments pass guards against)
    log_offset = draw(st.integers(-3, log_scale + 8))
    sign = draw(st.sampled_from([-1.0, 1.0]))
    cuts = draw(st.lists(st.integers(1, n - 1), unique=True, max_size=min(12, n - 1)))
    combine = draw(st.sampled_from(["tree", "fold"]))
    rng = np.random.default_rng(seed)
    spread = 10.0**log_scale * 10.0 ** rng.uniform(-1, 1, d)  # unequal column scales
    mix = np.linalg.qr(rng.standard_normal((d, d)))[0] if d > 1 else np.ones((1, 1))
    x = (rng.standard_normal((n, d)) * spread) @ mix + sign * 10.0**log_offset * rng.uniform(0.5, 1.0, d)
    return x, np.r_[0, sorted(cuts), n].astype(int), combine


@SETTINGS
@given(_chunked_data(), st.booleans())
def test_merged_moments_match_numpy(case, full):
    x, bounds, combine = case
    n, d = x.shape
    parts = [batch_moments(x[a:b].copy(), full, "fail") for a, b in zip(bounds[:-1], bounds[1:])]
    if combine == "tree":
        m = tree_merge(parts)
    else:
        m = parts[0]
        for p in parts[1:]:
            m = merge(m, p)
    assert m.n == n
    assert (np.abs(m.mean - x.mean(axis=0)) <= 1e-13 * np.abs(x).max(axis=0)).all()
    # Reference on data shifted by a data value: the covariance does not depend on
    # the shift, and near the offset the shift is exact (Sterbenz's lemma, P. H.
    # Sterbenz 1974, "Floating-Point Computation"); numpy's np.cov then centers again.
    ref = np.atleast_2d(np.cov(x - x[0], rowvar=False, ddof=1))
    sd = np.sqrt(np.diag(ref))
    if full:
        c = covariance_from(m, center=True, scale=None)
        # entrywise, relative to the spreads of the two features (1e-6 is the
        # accuracy the assignment asks for at an offset of 1e8 spreads)
        assert (np.abs(c - ref) <= 1e-6 * np.outer(sd, sd)).all()
    np.testing.assert_allclose(m.variance(), np.diag(ref), rtol=1e-6)


@st.composite
def _psd_problem(draw):
    d = draw(st.integers(1, 12))
    k = draw(st.integers(1, d))
    oversample = draw(st.integers(0, 4))
    depth = draw(st.sampled_from([1, 2, 8]))
    seed = draw(st.integers(0, 2**32 - 1))
    log_scale = draw(st.integers(-6, 6))
    rng = np.random.default_rng(seed)
    # eigenvalue ratios in [0.5, 0.95]: distinct eigenvalues, gaps of at least 5%
    values = 10.0**log_scale * np.cumprod(np.r_[1.0, rng.uniform(0.5, 0.95, d - 1)])
    q = np.linalg.qr(rng.standard_normal((d, d)))[0]
    return (q * values) @ q.T, k, oversample, depth, seed


@SETTINGS
@given(_psd_problem())
def test_solver_matches_eigh_on_random_psd_matrices(problem):
    c, k, oversample, depth, seed = problem
    d = c.shape[0]
    tol = 1e-9
    res = solve(lambda v: c @ v, d, k, tolerance=tol, max_iterations=5000, oversample=oversample,
                rng=np.random.default_rng(seed), depth=depth)
    w, v = np.linalg.eigh(c)  # numpy reference
    w, v = w[::-1], v[:, ::-1]
    assert res.converged.all()
    assert res.values.shape == (k,) and res.vectors.shape == (d, k)
    np.testing.assert_allclose(res.vectors.T @ res.vectors, np.eye(k), rtol=0, atol=1e-12)
    # eigenvalues: relative 1e-9, with a floor at the rounding level of eigh itself (~eps * lambda_1)
    np.testing.assert_allclose(res.values, w[:k], rtol=1e-9, atol=1e-12 * w[0])
    r = c @ res.vectors - res.vectors * res.values
    assert (np.linalg.norm(r, axis=0) <= tol * res.values[0] * (1 + 1e-6)).all()
    if k < d:
        # Davis & Kahan (1970), "The rotation of eigenvectors by a perturbation. III",
        # SIAM J. Numer. Anal. 7, sin-theta theorem: sin(largest angle) <= ||R||_2 / delta,
        # delta = distance of the Ritz values to the unwanted spectrum
        delta = res.values[-1] - w[k]
        bound = np.linalg.norm(r, 2) / delta
        angle = np.max(scipy.linalg.subspace_angles(res.vectors, v[:, :k]))
        assert np.sin(angle) <= bound * (1 + 1e-6) + 1e-12
