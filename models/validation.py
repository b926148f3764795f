"""Parameter and array checks shared by the solvers, with scikit-learn-style messages.

Every check raises ``ValueError`` naming the offending argument, so a caller's mistake is
reported at the public function it called rather than deep inside the numerics.
"""

from __future__ import annotations

from numbers import Integral, Real

import numpy as np

__all__ = ["as_float_array", "batch_rows", "check_positive", "check_rows", "check_solver_settings"]


def as_float_array(x, name: str, ndim: tuple[int, ...]) -> np.ndarray:
    """``x`` as a float64 array with one of the dimensions ``ndim``.

    >>> as_float_array([1, 2], "x", (1,))
    array([1., 2.])
    """
    try:
        a = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be a numeric array ({exc})") from None
    if a.ndim not in ndim:
        want = " or ".join(f"{d}-D" for d in ndim)
        raise ValueError(f"{name} must be {want}, got an array of shape {a.shape}")
    return a


def check_rows(x, name: str, B: int, p: int, *, allow_inf: bool = False, check: bool = True) -> np.ndarray:
    """Validate a (p,) or (B, p) array (values only if ``check``) and return it as an array."""
    a = as_float_array(x, name, (1, 2))
    if a.shape not in ((p,), (B, p)):
        raise ValueError(f"{name} must have shape ({p},) or ({B}, {p}), got {a.shape}")
    if check and (np.isnan(a) if allow_inf else ~np.isfinite(a)).any():
        raise ValueError(f"{name} contains {'NaN' if allow_inf else 'NaN or infinite'} values")
    return a


def batch_rows(x, name: str, B: int, p: int, *, allow_inf: bool = False, check: bool = True) -> np.ndarray:
    """:func:`check_rows`, returned as (B, p) (a fresh copy)."""
    out = np.empty((B, p))
    out[...] = check_rows(x, name, B, p, allow_inf=allow_inf, check=check)
    return out


def check_solver_settings(tol: float, max_iter: int, lipschitz: float | None) -> None:
    """Validate an iterative solver's scalar settings (``lipschitz`` None = the solver's default)."""
    if isinstance(tol, bool) or not isinstance(tol, Real) or not (np.isfinite(tol) and tol > 0):
        raise ValueError(f"tol must be a positive finite number, got {tol!r}")
    if isinstance(max_iter, bool) or not isinstance(max_iter, Integral) or max_iter < 1:
        raise ValueError(f"max_iter must be an integer >= 1, got {max_iter!r}")
    if lipschitz is not None and (isinstance(lipschitz, bool) or not isinstance(lipschitz, Real)
                                  or not (np.isfinite(lipschitz) and lipschitz > 0)):
        raise ValueError(f"lipschitz must be a positive finite number, got {lipschitz!r}")


def check_positive(value, name: str, *, allow_zero: bool = False) -> None:
    """Raise ValueError unless ``value`` is a finite real number > 0 (>= 0 with ``allow_zero``)."""
    ok = (not isinstance(value, bool) and isinstance(value, Real) and np.isfinite(value)
          and (value >= 0 if allow_zero else value > 0))
    if not ok:
        kind = "non-negative" if allow_zero else "positive"
        raise ValueError(f"{name} must be a {kind} finite number, got {value!r}")
