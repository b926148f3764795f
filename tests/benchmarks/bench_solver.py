"""Solver benchmark: warm-started batched FISTA vs scikit-learn ``Lasso`` per vector.

Run:  python tests/benchmarks/bench_solver.py [--quick] [--seed N]

Workload (as in operation): n = 200 metrics, rank-8 orthonormal baseline U,
B = 256 streams; every batch holds one vector per stream, z = U w + noise,
with a few planted shifts (1-3 metrics, 6-12 sigma) on about 10% of the
streams that persist across consecutive batches (a shift starts with
probability 0.005 and ends with probability 0.05 per batch: it lasts about
20 batches). Residual
scales d are estimated robustly (MAD of the projected residual) on a clean
calibration batch; penalty = 3.29 * d.

Printed figures (all measured in this one run):
  (a) our solver warm-started from the same stream's previous solution, tol=1e-6;
  (b) scikit-learn ``Lasso`` solving the same problems cold, one vector at a
      time, tol=1e-6 (same duality-gap rule: gap <= tol * ||y||^2), on a
      subset of the vectors (it is slow);
  (c) our solver cold (init=None) on the same batches;
plus the ratios, iteration statistics and the objective agreement with sklearn.
Nothing about speed is asserted.
"""

from __future__ import annotations

import argparse
import sys
import time

import numpy as np

from shiftsieve.models.lasso import lasso_objective, solve_projected_lasso


def _make_stream(rng, n, r, B, n_batches, p_shifted, p_on, p_off):
    """Yield (U, d_true, batches): batches is a list of (B, n) arrays."""
    U = np.linalg.qr(rng.standard_normal((n, r)))[0]
    sigma = rng.uniform(0.5, 1.5, n)

    def new_shift():
        s = np.zeros(n)
        j = rng.choice(n, rng.integers(1, 4), replace=False)
        s[j] = rng.choice([-1.0, 1.0], j.size) * rng.uniform(6.0, 12.0, j.size) * sigma[j]
        return s

    shifts = np.zeros((B, n))
    for b in np.flatnonzero(rng.random(B) < p_shifted):
        shifts[b] = new_shift()
    batches = []
    for _ in range(n_batches):
        u = rng.random(B)
        active = np.any(shifts != 0, axis=1)
        for b in np.flatnonzero(~active & (u < p_on)):
            shifts[b] = new_shift()
        shifts[active & (u < p_off)] = 0.0
        W = rng.standard_normal((B, r)) * 5.0
        Z = W @ U.T + rng.standard_normal((B, n)) * sigma + shifts
        batches.append(Z)
    return U, sigma, batches


def _iter_stats(n_iter: np.ndarray) -> str:
    return (
        f"zero-iteration {np.mean(n_iter == 0):6.1%}  mean {n_iter.mean():6.2f}  "
        f"median {np.median(n_iter):4.0f}  p95 {np.percentile(n_iter, 95):5.0f}  max {n_iter.max():4d}"
    )


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="tiny run (smoke test)")
    ap.add_argument("--seed", type=int, default=20240601)
    args = ap.parse_args(argv)

    from sklearn.linear_model import Lasso  # test-only dependency

    n, r, tol = 200, 8, 1e-6
    if args.quick:
        B, n_batches, n_sk = 16, 4, 6
    else:
        B, n_batches, n_sk = 256, 41, 256
    rng = np.random.default_rng(args.seed)
    U, sigma, batches = _make_stream(rng, n, r, B, n_batches, p_shifted=0.1, p_on=0.005, p_off=0.05)

    # Robust residual scale from a clean calibration batch (MAD of P z).
    calib = rng.standard_normal((max(B, 64), n)) * sigma + rng.standard_normal((max(B, 64), r)) @ U.T
    Pc = calib - (calib @ U) @ U.T
    d = 1.4826 * np.median(np.abs(Pc), axis=0)
    pen = 3.29 * d

    # (a) warm: batch 0 is solved cold to seed the warm starts and not timed.
    prev = solve_projected_lasso(batches[0], U, pen, tol=tol).coef
    t_warm, it_warm, sols = 0.0, [], []
    for Z in batches[1:]:
        t0 = time.perf_counter()
        res = solve_projected_lasso(Z, U, pen, init=prev, tol=tol)
        t_warm += time.perf_counter() - t0
        prev = res.coef
        it_warm.append(res.n_iter)
        sols.append(res.coef)
    it_warm = np.concatenate(it_warm)
    n_vec = it_warm.size

    # (c) cold, same batches.
    t_cold, it_cold = 0.0, []
    for Z in batches[1:]:
        t0 = time.perf_counter()
        res = solve_projected_lasso(Z, U, pen, tol=tol)
        t_cold += time.perf_counter() - t0
        it_cold.append(res.n_iter)
    it_cold = np.concatenate(it_cold)

    # (b) sklearn cold, one vector at a time: A = P diag(1/pen), y = P z,
    # alpha = 1/n_samples makes its objective ours / n_samples.
    A = (np.eye(n) - U @ U.T) / pen
    lasso = Lasso(alpha=1.0 / n, fit_intercept=False, tol=tol, max_iter=100_000)
    Zall = np.concatenate(batches[1:])
    Sall = np.concatenate(sols)
    pick = np.random.default_rng(args.seed + 1).choice(n_vec, size=min(n_sk, n_vec), replace=False)
    t_sk, it_sk, s_sk = 0.0, [], []
    for i in pick:
        y = A @ (Zall[i] * pen)  # = P z
        t0 = time.perf_counter()
        lasso.fit(A, y)
        t_sk += time.perf_counter() - t0
        it_sk.append(lasso.n_iter_)
        s_sk.append(lasso.coef_ / pen)
    it_sk = np.asarray(it_sk)
    f_ours = lasso_objective(Zall[pick], U, Sall[pick], pen)
    f_sk = lasso_objective(Zall[pick], U, np.asarray(s_sk), pen)
    rel = (f_ours - f_sk) / f_sk

    us = 1e6
    w, c, s = t_warm / n_vec * us, t_cold / n_vec * us, t_sk / pick.size * us
    print(f"shiftsieve solver benchmark: n={n} r={r} B={B} batches={n_batches - 1} "
          f"vectors={n_vec} tol={tol:g} penalty=3.29*d seed={args.seed}{' (quick)' if args.quick else ''}")
    print(f"  samples with a nonzero solution: {np.mean(np.any(Sall != 0, axis=1)):.1%}")
    print(f"(a) ours warm   per-vector {w:10.2f} us   iterations: {_iter_stats(it_warm)}")
    print(f"(b) sklearn cold per-vector {s:10.2f} us   CD epochs:  {_iter_stats(it_sk)}  ({pick.size} vectors)")
    print(f"(c) ours cold   per-vector {c:10.2f} us   iterations: {_iter_stats(it_cold)}")
    print(f"ratio sklearn-cold / ours-warm: {s / w:8.1f}x   (goal >= 20x)")
    print(f"ratio sklearn-cold / ours-cold: {s / c:8.1f}x")
    print(f"ratio ours-cold / ours-warm:    {c / w:8.1f}x")
    print(f"objective (ours - sklearn)/sklearn on the sklearn subset: "
          f"max {rel.max():+.2e}  min {rel.min():+.2e}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
