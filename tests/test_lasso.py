"""Tests of shiftsieve.models.lasso (projected LASSO solved by FISTA).

Every correctness check names its outside reference in a comment beside it.
Reference projector: P_b = M_b - Q Q^T with Q an orthonormal basis of
span(M_b U) from scipy.linalg.orth (SVD), independent of the module's
Gram-pseudo-inverse implementation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.linear_model import Lasso

from shiftsieve.models.lasso import LassoResult, lasso_objective, projected_residual, solve_projected_lasso
from shiftsieve.models.refit import debias, refit_solution

TIGHT = 1e-10  # our tol for reference comparisons


# ---------------------------------------------------------------- helpers


def ref_projector(U: np.ndarray, obs: np.ndarray) -> np.ndarray:
    """Explicit P_b = M_b - Q Q^T, Q = scipy.linalg.orth(M_b U)."""
    M = np.diag(obs.astype(float))
    if U.shape[1] == 0:
        return M
    Q = scipy.linalg.orth(M @ U)
    return M - Q @ Q.T


def make_problem(seed, *, n=60, r=4, B=8, groups=False, masked=False, n_shift=3):
    """z = U w + noise + Phi s with a few large planted shifts; penalty = 3 * d."""
    rng = np.random.default_rng(seed)
    U = np.linalg.qr(rng.standard_normal((n, r)))[0] if r else np.zeros((n, 0))
    d = rng.uniform(0.8, 1.2, n)  # residual scales
    phi = None
    p = n
    pen = 3.0 * d
    if groups:
        size = 10
        G = np.zeros((n, n // size))
        for g in range(n // size):
            G[g * size:(g + 1) * size, g] = 1.0 / math.sqrt(size)  # unit-norm group indicator
        phi = np.hstack([np.eye(n), G])
        p = phi.shape[1]
        pen = np.concatenate([pen, np.full(G.shape[1], 4.0)])
    S = np.zeros((B, p))
    for b in range(B):
        j = rng.choice(n, n_shift, replace=False)
        S[b, j] = rng.choice([-1.0, 1.0], n_shift) * rng.uniform(5.0, 10.0, n_shift)
        if groups and b % 2 == 0:
            S[b, n + rng.integers(p - n)] = rng.choice([-1.0, 1.0]) * rng.uniform(8.0, 15.0)
    shift = S if phi is None else S @ phi.T
    Z = rng.standard_normal((B, r)) @ U.T * 3.0 + rng.standard_normal((B, n)) * d + shift
    mask = None
    if masked:
        mask = rng.random((B, n)) > 0.15
        Z[~mask] = np.nan
    return Z, U, pen, phi, mask, S


def observed(mask, B, n):
    return np.ones((B, n), bool) if mask is None else mask


def sklearn_reference(Z, U, pen, phi, mask):
    """Solve each row with scikit-learn Lasso; return (S_sk, list of (A, y, alpha, cols))."""
    B, n = Z.shape
    phi_m = np.eye(n) if phi is None else phi
    p = phi_m.shape[1]
    pen = np.broadcast_to(pen, (B, p))
    obs = observed(mask, B, n)
    S_sk = np.zeros((B, p))
    designs = []
    for b in range(B):
        P = ref_projector(U, obs[b])
        z = np.where(obs[b], Z[b], 0.0)
        cols = np.isfinite(pen[b])
        # sklearn gets only the observed rows; penalty folded into the columns.
        A = (P @ phi_m)[obs[b]][:, cols] / pen[b, cols]
        y = (P @ z)[obs[b]]
        alpha = 1.0 / A.shape[0]  # sklearn: 1/(2 n_samples)||y - A t||^2 + alpha ||t||_1
        est = Lasso(alpha=alpha, fit_intercept=False, tol=1e-12, max_iter=200_000).fit(A, y)
        S_sk[b, cols] = est.coef_ / pen[b, cols]
        designs.append((A, y, alpha, cols))
    return S_sk, designs


def sklearn_objective(A, y, alpha, t):
    """scikit-learn's documented Lasso objective."""
    return 0.5 / A.shape[0] * np.sum((y - A @ t) ** 2) + alpha * np.sum(np.abs(t))


def to_t(s, pen, cols):
    return s[cols] * pen[cols]


CASES = {
    "cold": dict(),
    "groups": dict(groups=True),
    "mask": dict(masked=True),
    "r0": dict(r=0),
    "mask_groups": dict(masked=True, groups=True),
}


# ----------------------------------------------- 1. objective vs scikit-learn


def check_against_sklearn(Z, U, pen, phi, mask, res):
    B = Z.shape[0]
    S_sk, designs = sklearn_reference(Z, U, pen, phi, mask)
    f_ours = lasso_objective(Z, U, res.coef, pen, phi=phi, mask=mask)
    f_sk = lasso_objective(Z, U, S_sk, pen, phi=phi, mask=mask)
    # Reference: scikit-learn Lasso (coordinate descent, tol=1e-12). Both ways:
    # neither solution is better than the other by more than 1e-6 relative.
    np.testing.assert_array_less(f_ours, f_sk * (1 + 1e-6))
    np.testing.assert_array_less(f_sk, f_ours * (1 + 1e-6))
    penb = np.broadcast_to(pen, res.coef.shape)
    for b in range(B):
        A, y, alpha, cols = designs[b]
        t_ours, t_sk = to_t(res.coef[b], penb[b], cols), to_t(S_sk[b], penb[b], cols)
        # Reference: scikit-learn's objective formula; ours is n_samples times it
        # on the same coefficients (checks the objective definition itself).
        assert A.shape[0] * sklearn_objective(A, y, alpha, t_ours) == pytest.approx(f_ours[b], rel=1e-10)
        assert A.shape[0] * sklearn_objective(A, y, alpha, t_sk) == pytest.approx(f_sk[b], rel=1e-10)
        # Reference: sklearn's objective, evaluated at both solutions.
        f1, f2 = sklearn_objective(A, y, alpha, t_ours), sklearn_objective(A, y, alpha, t_sk)
        assert abs(f1 - f2) <= 1e-6 * f2
    return S_sk


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("case", sorted(CASES))
def test_objective_matches_sklearn(case, seed):
    Z, U, pen, phi, mask, _ = make_problem(seed, **CASES[case])
    res = solve_projected_lasso(Z, U, pen, phi=phi, mask=mask, tol=TIGHT, max_iter=20_000)
    assert isinstance(res, LassoResult)
    assert res.converged.all()
    check_against_sklearn(Z, U, pen, phi, mask, res)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("case", ["cold", "groups", "mask"])
def test_warm_start_matches_sklearn_and_saves_iterations(case, seed):
    Z, U, pen, phi, mask, _ = make_problem(seed, **CASES[case])
    rng = np.random.default_rng(100 + seed)
    prev = solve_projected_lasso(Z, U, pen, phi=phi, mask=mask, tol=TIGHT, max_iter=20_000).coef
    # Next sample of the same streams: same shifts, slightly different noise;
    # warm start = previous solution, perturbed on its support.
    Z2 = Z + 0.1 * rng.standard_normal(Z.shape)
    init = prev * (1.0 + 0.05 * rng.standard_normal(prev.shape))
    warm = solve_projected_lasso(Z2, U, pen, phi=phi, mask=mask, init=init, tol=TIGHT, max_iter=20_000)
    cold = solve_projected_lasso(Z2, U, pen, phi=phi, mask=mask, tol=TIGHT, max_iter=20_000)
    assert warm.converged.all() and cold.converged.all()
    check_against_sklearn(Z2, U, pen, phi, mask, warm)
    assert warm.n_iter.sum() < cold.n_iter.sum()


# ------------------------------------------------ 2. optimality and the gap


def gradient_ref(Z, U, S, phi, mask):
    """Phi^T P_b (z_b - Phi s_b) per row with the explicit reference projector."""
    B, n = Z.shape
    phi_m = np.eye(n) if phi is None else phi
    obs = observed(mask, B, n)
    out = np.zeros_like(S)
    for b in range(B):
        P = ref_projector(U, obs[b])
        out[b] = phi_m.T @ P @ (np.where(obs[b], Z[b], 0.0) - phi_m @ S[b])
    return out


@pytest.mark.parametrize("case", sorted(CASES))
def test_kkt_conditions(case):
    Z, U, pen, phi, mask, _ = make_problem(7, **CASES[case])
    res = solve_projected_lasso(Z, U, pen, phi=phi, mask=mask, tol=1e-12, max_iter=20_000)
    g = gradient_ref(Z, U, res.coef, phi, mask)
    penb = np.broadcast_to(pen, g.shape)
    nz = res.coef != 0
    # Reference: LASSO subgradient optimality (e.g. Hastie, Tibshirani &
    # Wainwright 2015, Statistical Learning with Sparsity, eq. 2.6):
    # g_j = pen_j sign(s_j) where s_j != 0, |g_j| <= pen_j where s_j = 0.
    assert nz.any() and (~nz).any()
    np.testing.assert_allclose(g[nz], penb[nz] * np.sign(res.coef[nz]), rtol=0, atol=1e-6)
    assert np.all(np.abs(g[~nz]) <= penb[~nz] + 1e-6)


@pytest.mark.parametrize("case", ["cold", "groups", "mask"])
def test_gap_is_a_valid_certificate(case):
    Z, U, pen, phi, mask, _ = make_problem(11, **CASES[case])
    B, n = Z.shape
    obs = observed(mask, B, n)
    y2 = np.array([np.sum((ref_projector(U, obs[b]) @ np.where(obs[b], Z[b], 0.0)) ** 2) for b in range(B)])
    S_sk, _ = sklearn_reference(Z, U, pen, phi, mask)
    f_star = lasso_objective(Z, U, S_sk, pen, phi=phi, mask=mask)
    for tol, max_iter in [(1e-6, 500), (1e-12, 3)]:
        res = solve_projected_lasso(Z, U, pen, phi=phi, mask=mask, tol=tol, max_iter=max_iter)
        f = lasso_objective(Z, U, res.coef, pen, phi=phi, mask=mask)
        # Reference: weak duality against scikit-learn's optimum: the reported
        # gap bounds the suboptimality of the returned coefficients.
        assert np.all(f - f_star <= res.gap + 1e-9 * f_star)
        assert np.all(res.gap >= 0)
        # Reference: scikit-learn's stopping rule, gap <= tol * ||P z||^2 with
        # ||P z|| from the explicit projector.
        np.testing.assert_array_equal(res.converged, res.gap <= tol * y2)
        assert np.all(res.n_iter <= max_iter)
    # With 3 iterations at tol 1e-12 the solver must admit it has not converged.
    assert not res.converged.any() and np.all(res.n_iter == 3)


# ------------------------------------------------- 3. zero-iteration paths


@pytest.mark.parametrize("case", sorted(CASES))
def test_zero_solution_costs_zero_iterations(case):
    Z, U, pen, phi, mask, _ = make_problem(3, **CASES[case])
    B, n = Z.shape
    rng = np.random.default_rng(5)
    # Pure baseline plus small noise: no shift at all.
    Zq = rng.standard_normal((B, U.shape[1])) @ U.T * 3.0 + 0.3 * rng.standard_normal((B, n))
    if mask is not None:
        Zq[~mask] = np.nan
    # Reference: the LASSO solution is 0 iff |Phi^T P z|_j <= pen_j for all j
    # (subgradient condition at 0), checked with the explicit projector.
    g0 = gradient_ref(Zq, U, np.zeros((B, len(pen))), phi, mask)
    assert np.all(np.abs(g0) <= pen)
    stale = rng.standard_normal((B, len(pen))) * 5.0  # stale warm start far from 0
    for init in (None, stale):
        res = solve_projected_lasso(Zq, U, pen, phi=phi, mask=mask, init=init)
        np.testing.assert_array_equal(res.n_iter, 0)
        np.testing.assert_array_equal(res.coef, 0.0)
        assert res.converged.all()


def test_optimal_warm_start_costs_zero_iterations():
    Z, U, pen, phi, mask, _ = make_problem(4, masked=True, groups=True)
    opt = solve_projected_lasso(Z, U, pen, phi=phi, mask=mask, tol=1e-13, max_iter=20_000)
    again = solve_projected_lasso(Z, U, pen, phi=phi, mask=mask, init=opt.coef, tol=1e-7)
    np.testing.assert_array_equal(again.n_iter, 0)
    np.testing.assert_array_equal(again.coef, opt.coef)
    assert again.converged.all()


# ----------------------------------- masks, infinite penalties, fast paths


def test_unobserved_entries_have_no_influence():
    Z, U, pen, phi, mask, _ = make_problem(8, masked=True)
    Z_other = np.where(mask, Z, 1e6)  # arbitrary values instead of NaN
    init = np.full(Z.shape, 2.0)  # nonzero warm start everywhere
    a = solve_projected_lasso(Z, U, pen, mask=mask, init=init, tol=TIGHT, max_iter=20_000)
    b = solve_projected_lasso(Z_other, U, pen, mask=mask, init=init, tol=TIGHT, max_iter=20_000)
    # Reference: the problem definition, P_b = M_b (...) M_b ignores z_bj where mask_bj is False.
    np.testing.assert_array_equal(a.coef, b.coef)
    # Reference: spec, an unobserved metric has no observed support -> exactly 0.
    assert np.all(a.coef[~mask] == 0.0)


def test_all_true_mask_equals_no_mask():
    Z, U, pen, phi, _, _ = make_problem(9, groups=True)
    a = solve_projected_lasso(Z, U, pen, phi=phi, tol=TIGHT, max_iter=20_000)
    b = solve_projected_lasso(Z, U, pen, phi=phi, mask=np.ones(Z.shape, bool), tol=TIGHT, max_iter=20_000)
    # Reference: M_b = I makes P_b = I - U U^T (U orthonormal).
    np.testing.assert_allclose(a.coef, b.coef, atol=1e-12)


def test_infinite_penalty_fixes_coefficient_at_zero():
    Z, U, pen, phi, mask, S = make_problem(10, B=4)
    penb = np.tile(pen, (4, 1))
    planted = S != 0
    penb[planted] = np.inf  # forbid exactly the planted shifts
    res = solve_projected_lasso(Z, U, penb, init=S, tol=TIGHT, max_iter=20_000)
    assert np.all(res.coef[planted] == 0.0) and res.converged.all()
    # Reference: scikit-learn Lasso on the remaining columns only.
    check_against_sklearn(Z, U, penb, None, None, res)


# ----------------------------------------------- residual, baseline, debias


@pytest.mark.parametrize("case", ["cold", "mask", "mask_groups", "r0"])
def test_projected_residual_and_baseline(case):
    Z, U, pen, phi, mask, S = make_problem(12, **CASES[case])
    B, n = Z.shape
    phi_m = np.eye(n) if phi is None else phi
    obs = observed(mask, B, n)
    R, W = projected_residual(Z, U, S, phi=phi, mask=mask)
    assert R.shape == (B, n) and W.shape == (B, U.shape[1])
    for b in range(B):
        x = np.where(obs[b], Z[b], 0.0) - phi_m @ S[b]
        # Reference: explicit projector built from scipy.linalg.orth.
        np.testing.assert_allclose(R[b], ref_projector(U, obs[b]) @ x, atol=1e-10)
        # Reference: numpy.linalg.lstsq of the observed rows on U.
        w = np.linalg.lstsq(U[obs[b]], x[obs[b]], rcond=None)[0]
        np.testing.assert_allclose(W[b], w, atol=1e-10)
    assert np.all(R[~obs] == 0.0)


@pytest.mark.parametrize("case", ["cold", "mask_groups"])
def test_debias_is_least_squares_on_support(case):
    Z, U, pen, phi, mask, _ = make_problem(13, **CASES[case])
    B, n = Z.shape
    phi_m = np.eye(n) if phi is None else phi
    obs = observed(mask, B, n)
    res = solve_projected_lasso(Z, U, pen, phi=phi, mask=mask, tol=TIGHT, max_iter=20_000)
    S = res.coef.copy()
    S[0] = 0.0  # one row with empty support
    D = debias(Z, U, S, phi=phi, mask=mask)
    assert np.all(D[0] == 0.0) and np.all(D[S == 0] == 0.0)
    for b in range(1, B):
        sup = np.flatnonzero(S[b])
        P = ref_projector(U, obs[b])
        # Reference: numpy.linalg.lstsq on the explicit design P_b Phi_S.
        ref = np.linalg.lstsq(P @ phi_m[:, sup], P @ np.where(obs[b], Z[b], 0.0), rcond=None)[0]
        np.testing.assert_allclose(D[b, sup], ref, atol=1e-8)
        # Reference: LASSO shrinks towards 0, the refit does not (|debiased| >= |lasso| here).
        assert np.all(np.abs(D[b, sup]) > np.abs(S[b, sup]) - 1e-9)


def test_debias_recovers_exact_magnitudes_without_noise():
    rng = np.random.default_rng(14)
    n, r, B = 60, 4, 5
    U = np.linalg.qr(rng.standard_normal((n, r)))[0]
    S = np.zeros((B, n))
    for b in range(B):
        S[b, rng.choice(n, 3, replace=False)] = rng.uniform(5, 10, 3) * rng.choice([-1, 1], 3)
    Z = rng.standard_normal((B, r)) @ U.T + S
    res = solve_projected_lasso(Z, U, np.full(n, 1.0), tol=TIGHT, max_iter=20_000)
    assert np.all((res.coef != 0) == (S != 0))
    # Reference: the planted (noise-free) magnitudes.
    np.testing.assert_allclose(debias(Z, U, res.coef), S, atol=1e-9)
    assert np.max(np.abs(res.coef - S)) > 0.5  # the LASSO itself is shrunk


# ------------------------------------------------- 4. compressed sensing


def cs_success_rate(n, m, k, trials, seed):
    """Fraction of noiseless k-sparse trials recovered (support and values) by
    small-lambda LASSO + debias; trials are the batch rows sharing one Phi."""
    rng = np.random.default_rng(seed)
    phi = rng.standard_normal((m, n)) / math.sqrt(m)  # non-square Gaussian dictionary
    S0 = np.zeros((trials, n))
    for t in range(trials):
        S0[t, rng.choice(n, k, replace=False)] = rng.choice([-1.0, 1.0], k) * rng.uniform(1.0, 2.0, k)
    Z = S0 @ phi.T  # rows of length m
    U = np.zeros((m, 0))
    pen = 1e-3 * np.abs(Z @ phi).max(axis=1, keepdims=True) * np.ones((1, n))  # small lambda, (B, p)
    res = solve_projected_lasso(Z, U, pen, phi=phi, tol=1e-8, max_iter=2000)
    assert res.coef.shape == (trials, n)
    D = debias(Z, U, res.coef, phi=phi)
    ok = (np.abs(D - S0).max(axis=1) <= 1e-4) & np.all((np.abs(D) > 1e-3) == (S0 != 0), axis=1)
    return ok.mean()


def test_cs_rule_of_thumb_m_k_log_n_over_k():
    n, k, trials = 200, 5, 30
    klog = k * math.log(n / k)  # ~18.4
    # Reference: common-practice rule of thumb, l1 recovery needs m >= ~ k log(n/k).
    assert cs_success_rate(n, math.ceil(2 * klog), k, trials, seed=1) >= 0.8  # m = 37
    assert cs_success_rate(n, math.floor(0.5 * klog), k, trials, seed=2) <= 0.2  # m = 9


def test_cs_donoho_tanner_weak_transition_at_delta_half():
    n, m, trials = 200, 100, 40  # delta = m/n = 0.5
    # Reference: Donoho & Tanner 2009, weak phase transition of l1 at delta 0.5
    # is near rho = k/m = 0.38 (value recalled from memory, not looked up).
    assert cs_success_rate(n, m, 25, trials, seed=3) >= 0.8  # rho = 0.25
    assert 0.2 <= cs_success_rate(n, m, 38, trials, seed=4) <= 0.8  # rho = 0.38: near 50%
    assert cs_success_rate(n, m, 50, trials, seed=5) <= 0.2  # rho = 0.5


# ------------------------------------------------------ 5. validation


def _ok():
    Z, U, pen, phi, mask, _ = make_problem(0, n=6, r=1, B=2, n_shift=1)
    return dict(Z=Z, U=U, penalty=pen)


def _bad_U():
    U = np.ones((6, 1))
    return dict(U=U)


@pytest.mark.parametrize(
    "override, match",
    [
        (dict(Z=np.ones(6)), "Z must be 2-D"),
        (dict(Z=np.full((2, 6), np.nan)), "Z contains NaN"),
        (dict(mask=np.ones((2, 6), bool), Z=np.full((2, 6), np.nan)), "observed entries"),
        (dict(U=np.zeros((5, 1))), "U must have shape"),
        (_bad_U(), "orthonormal"),
        (dict(phi=np.ones((5, 3))), "phi must have shape"),
        (dict(phi=np.full((6, 3), np.nan)), "phi contains NaN"),
        (dict(mask=np.ones((2, 5), bool)), "mask must have the shape"),
        (dict(mask=np.ones((2, 6))), "boolean"),
        (dict(penalty=np.ones(5)), "penalty must have shape"),
        (dict(penalty=-np.ones(6)), "non-negative"),
        (dict(penalty=np.full(6, np.nan)), "penalty contains NaN"),
        (dict(init=np.ones(5)), "init must have shape"),
        (dict(init=np.full((2, 6), np.inf)), "init contains NaN or infinite"),
        (dict(tol=0.0), "tol must be a positive"),
        (dict(tol=-1e-3), "tol must be a positive"),
        (dict(tol=float("nan")), "tol must be a positive"),
        (dict(max_iter=0), "max_iter must be an integer >= 1"),
        (dict(max_iter=2.5), "max_iter must be an integer >= 1"),
        (dict(lipschitz=0.0), "lipschitz must be a positive"),
    ],
)
def test_solver_validation(override, match):
    kw = _ok()
    kw.update(override)
    with pytest.raises(ValueError, match=match):
        solve_projected_lasso(kw.pop("Z"), kw.pop("U"), kw.pop("penalty"), **kw)


def test_helpers_validation():
    kw = _ok()
    Z, U = kw["Z"], kw["U"]
    for fn in (projected_residual, debias):
        with pytest.raises(ValueError, match="S must have shape"):
            fn(Z, U, np.zeros((2, 5)))
        with pytest.raises(ValueError, match="S contains NaN"):
            fn(Z, U, np.full((2, 6), np.nan))
    with pytest.raises(ValueError, match="penalty must be non-negative"):
        lasso_objective(Z, U, np.zeros((2, 6)), -np.ones(6))


# -------------------------------------------------- 6. property test


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 2**32 - 1),
    n=st.integers(2, 9),
    r=st.integers(0, 3),
    B=st.integers(1, 4),
    use_phi=st.booleans(),
    use_mask=st.booleans(),
    tol=st.sampled_from([1e-2, 1e-6, 1e-10]),
    max_iter=st.integers(1, 40),
)
def test_property_monotone_improvement(seed, n, r, B, use_phi, use_mask, tol, max_iter):
    rng = np.random.default_rng(seed)
    r = min(r, n - 1)
    U = np.linalg.qr(rng.standard_normal((n, r)))[0] if r else np.zeros((n, 0))
    phi = rng.standard_normal((n, int(rng.integers(1, 2 * n + 1)))) if use_phi else None
    p = n if phi is None else phi.shape[1]
    Z = rng.standard_normal((B, n)) * rng.uniform(0.1, 10)
    mask = rng.random((B, n)) > 0.3 if use_mask else None
    if mask is not None:
        Z[~mask] = np.nan
    pen = rng.uniform(0.0, 3.0, (B, p))
    pen[rng.random((B, p)) < 0.1] = np.inf
    init = rng.standard_normal((B, p)) * rng.choice([0.0, 0.1, 3.0])
    res = solve_projected_lasso(Z, U, pen, phi=phi, mask=mask, init=init, tol=tol, max_iter=max_iter)
    assert np.all(np.isfinite(res.coef)) and res.coef.shape == (B, p)
    f = lasso_objective(Z, U, res.coef, pen, phi=phi, mask=mask)
    f0 = lasso_objective(Z, U, np.zeros((B, p)), pen, phi=phi, mask=mask)
    fi = lasso_objective(Z, U, init, pen, phi=phi, mask=mask)
    slack = 1e-9 * (1.0 + np.abs(f0))
    # Reference: definition of a descent guarantee (never worse than zero or the warm start).
    assert np.all(f <= f0 + slack) and np.all(f <= fi + slack)
    assert np.all(res.gap >= -slack)  # reference: weak duality
    assert np.all((res.n_iter >= 0) & (res.n_iter <= max_iter))
    assert np.all(res.coef[np.isinf(pen)] == 0.0)


def test_refit_solution_equals_debias_and_projected_residual():
    """The detector's fast refit (reusing the solver's residual and coordinates) against the
    plain path: debias() (itself checked against numpy.linalg.lstsq above) and the
    coordinates that projected_residual() gives at the refitted coefficients."""
    rng = np.random.default_rng(17)
    n, r, B = 40, 3, 12
    U = np.linalg.qr(rng.standard_normal((n, r)))[0]
    G = np.zeros((n, 2))
    G[:5, 0] = 1 / np.sqrt(5)
    G[20:26, 1] = 1 / np.sqrt(6)
    for phi in (None, np.hstack([np.eye(n), G])):
        for mask in (None, rng.random((B, n)) > 0.1):
            Z = rng.standard_normal((B, n)) @ (np.eye(n) - U @ U.T) + rng.standard_normal((B, r)) @ U.T * 5
            Z[:, 7] += 6.0
            Z[:, 20:26] += 3.0
            p = n if phi is None else n + 2
            fit = solve_projected_lasso(Z, U, np.full(p, 2.0), phi=phi, mask=mask, tol=1e-10, max_iter=5000)
            rows, coef_rows, coords_rows = refit_solution(Z, U, fit, phi=phi, mask=mask)
            coef, coords = fit.coef.copy(), fit.coords.copy()
            coef[rows], coords[rows] = coef_rows, coords_rows
            assert np.allclose(coef, debias(Z, U, fit.coef, phi=phi, mask=mask), atol=1e-8)
            _, ref_coords = projected_residual(Z, U, coef, phi=phi, mask=mask)
            assert np.allclose(coords, ref_coords, atol=1e-8)
