"""The tracked baseline subspace against batch references (numpy/scipy)."""

import numpy as np
import pytest
from scipy.linalg import subspace_angles

from shiftsieve.models.subspace import SubspaceTracker, choose_rank, impute_low_rank


def _stationary(rng, n=60, r=4, noise=0.3):
    basis, _ = np.linalg.qr(rng.standard_normal((n, r)))
    spread = np.array([5.0, 4.0, 3.0, 2.0])[:r]

    def draw(k):
        return (rng.standard_normal((k, r)) * spread) @ basis.T + noise * rng.standard_normal((k, n))
    return basis, draw


@pytest.mark.parametrize("missing", [0.0, 0.1])
def test_tracked_subspace_matches_batch_svd(missing):
    rng = np.random.default_rng(11)
    basis, draw = _stationary(rng)
    tracker = SubspaceTracker(rank=4, halflife=2000.0)
    seen = [draw(200)]
    tracker.fit(seen[0])
    for _ in range(30):
        block = draw(128)
        seen.append(block)
        if missing:   # holes are filled with the tracker's own prediction, as the detector does
            holes = rng.random(block.shape) < missing
            coords = np.linalg.lstsq(tracker.U, np.where(holes, 0, block).T, rcond=None)[0].T
            block = np.where(holes, coords @ tracker.U.T, block)
        tracker.update(block)
    # Reference: top-4 right singular vectors of all data seen (numpy.linalg.svd).
    _, _, vt = np.linalg.svd(np.vstack(seen), full_matrices=False)
    batch = vt[:4].T
    # Largest principal angle (scipy.linalg.subspace_angles, Bjorck-Golub). Perturbation theory
    # (Davis-Kahan) puts the estimation error near noise/gap * sqrt(n / effective samples)
    # = 0.3/2 * sqrt(60/2000) ~ 0.03 rad; bound at 0.1 rad (5.7 degrees).
    assert subspace_angles(tracker.U, batch).max() < 0.1
    assert subspace_angles(tracker.U, basis).max() < 0.1
    assert np.allclose(tracker.U.T @ tracker.U, np.eye(4), atol=1e-10)


def test_tracker_follows_a_rotation():
    """With forgetting, the basis follows a subspace that rotates to a new one."""
    rng = np.random.default_rng(3)
    _, draw_a = _stationary(rng)
    basis_b, draw_b = _stationary(rng)
    tracker = SubspaceTracker(rank=4, halflife=300.0).fit(draw_a(300))
    for _ in range(40):
        tracker.update(draw_b(64))
    assert subspace_angles(tracker.U, basis_b).max() < 0.1


def test_singular_values_match_weighted_moment():
    """Stored spectrum = that of the forgetting-weighted second moment (numpy.linalg.eigvalsh)."""
    rng = np.random.default_rng(5)
    _, draw = _stationary(rng, n=30)
    tracker = SubspaceTracker(rank=4, halflife=500.0)
    X = draw(400)
    tracker.fit(X[:200])
    tracker.update(X[200:])
    decay = tracker.decay
    w = decay ** np.arange(399, -1, -1)
    moment = (X * w[:, None]).T @ X
    top = np.sort(np.linalg.eigvalsh(moment))[::-1][:4]
    # fit() summarises the first 200 with uniform weight at their mean decay; allow 15 %.
    assert np.allclose(tracker.singular_values ** 2, top, rtol=0.15)


def test_rank_by_energy_with_cap():
    sv = np.sqrt(np.array([50.0, 30.0, 10.0, 5.0, 3.0, 2.0]))   # energies sum to 100
    assert choose_rank(sv, 0.8, 8) == 2      # 50 + 30 = 80 %
    assert choose_rank(sv, 0.9, 8) == 3
    assert choose_rank(sv, 0.99, 4) == 4     # capped


def test_extend_and_keep_preserve_orthonormality():
    rng = np.random.default_rng(9)
    _, draw = _stationary(rng, n=20)
    tracker = SubspaceTracker(rank=3).fit(draw(100))
    tracker.extend(2)
    assert tracker.U.shape == (22, 3)
    assert np.allclose(tracker.U.T @ tracker.U, np.eye(3))
    tracker.keep(np.arange(1, 21))
    assert tracker.U.shape == (20, 3)
    assert np.allclose(tracker.U.T @ tracker.U, np.eye(3))


def test_impute_low_rank_recovers_missing_entries():
    """Hard-impute on an exactly rank-2 matrix restores the holes (matrix completion, common practice)."""
    rng = np.random.default_rng(2)
    M = rng.standard_normal((80, 2)) @ rng.standard_normal((2, 25))
    holes = rng.random(M.shape) < 0.1
    filled = impute_low_rank(np.where(holes, np.nan, M), 2, n_iter=200)
    assert np.abs(filled - M)[holes].max() < 1e-3 * np.abs(M).max()


def test_parameters_validated():
    with pytest.raises(ValueError, match="rank"):
        SubspaceTracker(rank=0)
    with pytest.raises(ValueError, match="energy"):
        SubspaceTracker(energy=1.5)
    with pytest.raises(ValueError, match="halflife"):
        SubspaceTracker(halflife=0)
