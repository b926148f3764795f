"""Principal Component Pursuit (inexact ALM) against the published result and numpy.linalg.svd."""

from __future__ import annotations


import numpy as np
import pytest

from shiftsieve.models.pcp import principal_component_pursuit


def _low_rank_plus_sparse(n, rank, corrupted, seed):
    """Candes, Li, Ma & Wright 2011, section 4.1 (Table 1) setup, from memory: L0 = X Y^T with X, Y
    n x r of i.i.d. N(0, 1/n) entries; S0 with a uniformly random support of the given size and
    independent random signs +-1."""
    rng = np.random.default_rng(seed)
    L0 = rng.normal(0.0, np.sqrt(1.0 / n), (n, rank)) @ rng.normal(0.0, np.sqrt(1.0 / n), (rank, n))
    S0 = np.zeros((n, n))
    idx = rng.choice(n * n, corrupted, replace=False)
    S0.flat[idx] = rng.choice([-1.0, 1.0], idx.size)
    return L0, S0


@pytest.mark.parametrize("n, seed", [(100, 0), (200, 1)])
def test_exact_recovery_at_low_rank_and_sparse_corruption(n, seed):
    # Candes, Li, Ma & Wright 2011 (J. ACM 58(3), "Robust principal component analysis?"),
    # Table 1: rank(L0) = 0.05 n, ||S0||_0 = 0.05 n^2, lam = 1/sqrt(n): the recovered L has the
    # true rank and ||L - L0||_F / ||L0||_F of order 1e-6 (their n = 500..3000; ours is smaller).
    rank = n // 20
    L0, S0 = _low_rank_plus_sparse(n, rank, n * n // 20, seed)
    res = principal_component_pursuit(L0 + S0)
    assert res.converged
    assert np.linalg.norm(res.low_rank - L0) / np.linalg.norm(L0) < 1e-5
    # numpy.linalg.svd: rank and singular values of the recovered L against those of L0.
    s, s0 = np.linalg.svd(res.low_rank, compute_uv=False), np.linalg.svd(L0, compute_uv=False)
    assert int(np.sum(s > 1e-6 * s[0])) == rank
    np.testing.assert_allclose(s[:rank], s0[:rank], rtol=1e-5)
    # The support of S0 is recovered (entries of S0 are +-1; a recovered entry counts above 1e-3).
    np.testing.assert_array_equal(np.abs(res.sparse) > 1e-3, S0 != 0)
    np.testing.assert_allclose(res.sparse, S0, atol=1e-4)


def test_no_recovery_at_high_rank_and_dense_corruption():
    # Counter-check: the phase diagram of Candes et al. 2011 (Fig. 1(a), from memory) shows
    # failure for rank 0.4 n with 40 % of the entries corrupted; PCP then returns a different
    # split (large error, inflated rank), even though it converges to its own optimum.
    n = 100
    L0, S0 = _low_rank_plus_sparse(n, 40, 4000, 2)
    res = principal_component_pursuit(L0 + S0)
    assert np.linalg.norm(res.low_rank - L0) / np.linalg.norm(L0) > 0.5
    s = np.linalg.svd(res.low_rank, compute_uv=False)
    assert int(np.sum(s > 1e-6 * s[0])) > 40


def test_rectangular_matrix_default_lambda_and_iteration_report():
    # Samples as rows (tall): lam defaults to 1/sqrt(max(n1, n2)) (Candes et al. 2011, Theorem 1.1),
    # so passing that value explicitly gives the same split.
    rng = np.random.default_rng(3)
    L0 = rng.standard_normal((300, 3)) @ rng.standard_normal((3, 60))
    S0 = np.where(rng.random((300, 60)) < 0.03, 8.0, 0.0)
    res = principal_component_pursuit(L0 + S0)
    same = principal_component_pursuit(L0 + S0, lam=1.0 / np.sqrt(300))
    np.testing.assert_array_equal(res.low_rank, same.low_rank)
    assert res.converged and res.n_iter == same.n_iter
    assert np.linalg.norm(res.low_rank - L0) / np.linalg.norm(L0) < 1e-5
    short = principal_component_pursuit(L0 + S0, max_iter=2)
    assert not short.converged and short.n_iter == 2


@pytest.mark.parametrize("kwargs, message", [
    ({"M": np.ones(5)}, "M must be 2-D"),
    ({"M": np.full((3, 3), np.nan)}, "M contains NaN"),
    ({"M": np.zeros((0, 3))}, "at least one row"),
    ({"M": np.ones((3, 3)), "lam": 0.0}, "lam must be a positive"),
    ({"M": np.ones((3, 3)), "mu": -1.0}, "mu must be a positive"),
    ({"M": np.ones((3, 3)), "tol": 0.0}, "tol must be a positive"),
    ({"M": np.ones((3, 3)), "max_iter": 0}, "max_iter must be an integer"),
])
def test_bad_input_is_a_clear_value_error(kwargs, message):
    M = kwargs.pop("M")
    with pytest.raises(ValueError, match=message):
        principal_component_pursuit(M, **kwargs)

