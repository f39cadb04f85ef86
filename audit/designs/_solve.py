"""Vectorised root finding for increasing functions (power in the effect or in the size)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy.optimize import elementwise

__all__ = ["smallest_size", "solve_increasing", "unique_rows"]


def solve_increasing(
    func: Callable[..., np.ndarray],
    target: np.ndarray,
    guess: np.ndarray,
    *,
    lower: float | np.ndarray,
    upper: float | np.ndarray = np.inf,
    args: tuple[np.ndarray, ...] = (),
) -> np.ndarray:
    """Solve ``func(x, *args) = target`` elementwise for ``x`` in (``lower``, ``upper``).

    ``func`` must be increasing in ``x`` and elementwise (scipy's convention). A bracket is grown
    geometrically from ``guess`` (``scipy.optimize.elementwise.bracket_root``) and the root
    polished with Chandrupatla's method (``elementwise.find_root``); only unconverged elements stay
    active, so the cost is a handful of vectorised calls of ``func`` whatever the number of rows.

    Returns nan for elements whose root could not be bracketed (the target is not reached
    between ``lower`` and ``upper``).
    """
    target = np.asarray(target, dtype=float)
    guess = np.asarray(guess, dtype=float)
    shape = np.broadcast_shapes(target.shape, guess.shape, *(np.shape(a) for a in args))
    if not np.prod(shape):
        return np.empty(shape)
    target = np.broadcast_to(target, shape)
    args = tuple(np.broadcast_to(np.asarray(a, dtype=float), shape) for a in args)
    lower_arr = np.broadcast_to(np.asarray(lower, dtype=float), shape)
    upper_arr = np.broadcast_to(np.asarray(upper, dtype=float), shape)
    guess = np.clip(np.broadcast_to(guess, shape), lower_arr, upper_arr)

    def excess(x: np.ndarray, t: np.ndarray, *a: np.ndarray) -> np.ndarray:
        return func(x, *a) - t

    # Keep the starting bracket strictly inside (lower, upper): bracket_root requires it.
    inner_lo = lower_arr + 1e-9 * (np.abs(lower_arr) + 1.0)
    with np.errstate(invalid="ignore"):
        inner_hi = np.where(
            np.isfinite(upper_arr), upper_arr - 1e-9 * (np.abs(upper_arr) + 1.0), np.inf
        )
    xl0 = np.clip(guess - 0.01 * np.abs(guess) - 1e-6, inner_lo, inner_hi)
    xr0 = np.clip(guess + 0.01 * np.abs(guess) + 1e-6, inner_lo, inner_hi)
    xr0 = np.where(xr0 > xl0, xr0, np.minimum(xl0 + 1e-6, inner_hi))
    with np.errstate(all="ignore"):
        bracket = elementwise.bracket_root(
            excess,
            xl0,
            xr0,
            xmin=lower_arr,
            xmax=upper_arr,
            args=(target, *args),
            maxiter=200,
        )
        found = bracket.success
        out = np.full(shape, np.nan)
        if not found.any():
            return out
        xl, xr = bracket.bracket
        sub_args = tuple(a[found] for a in (target, *args))
        root = elementwise.find_root(
            excess,
            (xl[found], xr[found]),
            args=sub_args,
            tolerances={"xrtol": 1e-11, "xatol": 1e-12},
            maxiter=200,
        )
    out[found] = np.where(root.success, root.x, np.nan)
    return out


def smallest_size(
    func: Callable[..., np.ndarray],
    target: np.ndarray,
    guess: np.ndarray,
    *,
    lower: np.ndarray,
    upper: float = 1e12,
    args: tuple[np.ndarray, ...] = (),
) -> np.ndarray:
    """Smallest continuous size ``x >= lower`` with ``func(x, *args) >= target``.

    Like :func:`solve_increasing`, but where ``func`` already reaches the target at ``lower``
    (a large effect needs no more than the smallest usable design) the answer is ``lower``
    rather than "no root". nan where the target is not reached below ``upper``.
    """
    target = np.asarray(target, dtype=float)
    lower = np.broadcast_to(np.asarray(lower, dtype=float), target.shape)
    args = tuple(np.broadcast_to(np.asarray(a, dtype=float), target.shape) for a in args)
    with np.errstate(all="ignore"):
        done = func(lower, *args) >= target
    out = np.where(done, lower, np.nan)
    rest = ~done
    if rest.any():
        out[rest] = solve_increasing(
            func,
            target[rest],
            np.maximum(np.broadcast_to(guess, target.shape)[rest], lower[rest]),
            lower=lower[rest],
            upper=upper,
            args=tuple(a[rest] for a in args),
        )
    return out


def unique_rows(*arrays: np.ndarray) -> tuple[tuple[np.ndarray, ...], np.ndarray]:
    """Distinct combinations of equally long 1-d arrays, and the inverse index to expand them.

    Portfolios repeat the same test settings (alpha .05, power .80, the same df) many times; the
    inverse functions solve once per distinct combination instead of once per row.
    """
    stacked = np.column_stack([np.asarray(a, dtype=float) for a in arrays])
    if stacked.shape[0] == 0:
        return tuple(np.empty(0) for _ in arrays), np.empty(0, dtype=np.intp)
    uniq, inverse = np.unique(stacked, axis=0, return_inverse=True)
    return tuple(uniq[:, j] for j in range(uniq.shape[1])), inverse.reshape(-1)
