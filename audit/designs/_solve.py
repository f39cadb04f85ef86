"""Vectorised root finding for increasing functions (power in the effect or in the size)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["smallest_size", "solve_increasing", "unique_rows"]


def solve_increasing(
    func: Callable[..., np.ndarray],
    target: np.ndarray,
    guess: np.ndarray,
    *,
    lower: float | np.ndarray,
    upper: float | np.ndarray = np.inf,
    args: tuple[np.ndarray, ...] = (),
    xrtol: float = 1e-11,
    ftol: float = 1e-14,
) -> np.ndarray:
    """Solve ``func(x, *args) = target`` elementwise for ``x`` in (``lower``, ``upper``).

    ``func`` must be increasing in ``x`` and elementwise (scipy's convention: it receives only
    the still-active elements of ``x`` and of every array in ``args``).

    Notes
    -----
    The search starts at ``guess`` (designs pass a normal approximation, usually within a few
    per cent), steps 1 % towards the root and widens the step fourfold until the root is
    bracketed, then closes the bracket with Chandrupatla's method (inverse quadratic
    interpolation safeguarded by bisection; Chandrupatla 1997, the algorithm behind
    ``scipy.optimize.elementwise.find_root``). Unlike calling scipy's ``bracket_root`` and
    ``find_root`` in turn, the function values at the bracket ends are reused, which saves about a
    third of the evaluations of ``func`` (the noncentral t or F distribution, the costly part).
    Only unconverged elements are evaluated; convergence is ``|func - target| <= ftol`` or a
    bracket narrower than ``xrtol`` relative to the root.

    Returns nan for elements whose root could not be bracketed (the target is not reached
    between ``lower`` and ``upper``).

    References
    ----------
    .. [1] Chandrupatla, T. R. (1997). A new hybrid quadratic/bisection algorithm for finding the
       zero of a nonlinear function without using derivatives. Advances in Engineering Software
       28:145-149.

    Examples
    --------
    >>> root = solve_increasing(lambda x: x**3, np.array([8.0, 27.0]), np.array([1.0, 1.0]),
    ...                         lower=0.0)
    >>> np.round(root, 12).tolist()
    [2.0, 3.0]
    """
    target = np.asarray(target, dtype=float)
    guess = np.asarray(guess, dtype=float)
    shape = np.broadcast_shapes(target.shape, guess.shape, *(np.shape(a) for a in args))
    out = np.full(shape, np.nan)
    if not np.prod(shape):
        return out
    target = np.broadcast_to(target, shape).reshape(-1)
    args = tuple(np.broadcast_to(np.asarray(a, dtype=float), shape).reshape(-1) for a in args)
    lo = np.broadcast_to(np.asarray(lower, dtype=float), shape).reshape(-1)
    hi = np.broadcast_to(np.asarray(upper, dtype=float), shape).reshape(-1)
    inner_lo = lo + 1e-9 * (np.abs(lo) + 1.0)
    with np.errstate(invalid="ignore"):
        inner_hi = np.where(np.isfinite(hi), hi - 1e-9 * (np.abs(hi) + 1.0), np.inf)
    x0 = np.clip(np.broadcast_to(guess, shape).reshape(-1), inner_lo, inner_hi)
    n = x0.size

    def excess(x: np.ndarray, idx: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            return func(x, *(a[idx] for a in args)) - target[idx]

    everyone = np.arange(n)
    f0 = excess(x0, everyone)
    ok = np.isfinite(f0)
    # Bracket: a (below the target) and b (at or above it), with their function values.
    a, fa = np.full(n, np.nan), np.full(n, np.nan)
    b, fb = np.full(n, np.nan), np.full(n, np.nan)
    below = ok & (f0 < 0)
    above = ok & (f0 >= 0)
    a[below], fa[below] = x0[below], f0[below]
    b[above], fb[above] = x0[above], f0[above]
    exact = ok & (f0 == 0)
    out_flat = out.reshape(-1)
    out_flat[exact] = x0[exact]
    step = np.full(n, 0.01)
    pending = (below | above) & ~exact
    for _ in range(60):
        idx = np.flatnonzero(pending)
        if not idx.size:
            break
        up = below[idx]
        grow = x0[idx] * (1.0 + step[idx]) + step[idx]
        shrink = inner_lo[idx] + (x0[idx] - inner_lo[idx]) * (1.0 - np.minimum(step[idx], 1.0))
        x1 = np.where(up, np.minimum(grow, inner_hi[idx]), np.maximum(shrink, inner_lo[idx]))
        f1 = excess(x1, idx)
        bad = ~np.isfinite(f1)
        crossed = ~bad & np.where(up, f1 >= 0, f1 < 0)
        # Up: x1 becomes b (if crossed) or the new a. Down: x1 becomes a (if crossed) or new b.
        sel = idx[crossed & up]
        b[sel], fb[sel] = x1[crossed & up], f1[crossed & up]
        sel = idx[crossed & ~up]
        a[sel], fa[sel] = x1[crossed & ~up], f1[crossed & ~up]
        sel = idx[~crossed & ~bad & up]
        a[sel], fa[sel] = x1[~crossed & ~bad & up], f1[~crossed & ~bad & up]
        sel = idx[~crossed & ~bad & ~up]
        b[sel], fb[sel] = x1[~crossed & ~bad & ~up], f1[~crossed & ~bad & ~up]
        at_edge = np.where(up, x1 >= inner_hi[idx], x1 <= inner_lo[idx])
        # Where func is undefined (a design too small to test, an effect past a boundary), come
        # back halfway towards the start instead of giving up.
        step[idx] = np.where(bad, step[idx] / 2.0, step[idx] * 4.0)
        pending[idx[crossed | (at_edge & ~bad)]] = False
    bracketed = np.isfinite(a) & np.isfinite(b) & ~exact
    root = _chandrupatla(excess, np.flatnonzero(bracketed), a, b, fa, fb, xrtol, ftol)
    out_flat[bracketed] = root
    return out


def _chandrupatla(
    excess: Callable[[np.ndarray, np.ndarray], np.ndarray],
    idx: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    fa: np.ndarray,
    fb: np.ndarray,
    xrtol: float,
    ftol: float,
    maxiter: int = 100,
) -> np.ndarray:
    """Chandrupatla's bracketed root search, vectorised; ``fa < 0 <= fb`` on entry."""
    x1, f1 = b[idx].copy(), fb[idx].copy()
    x2, f2 = a[idx].copy(), fa[idx].copy()
    x3, f3 = x2.copy(), f2.copy()
    # First step: the secant (regula falsi) point, since no third point exists yet.
    with np.errstate(all="ignore"):
        t = np.clip(f1 / (f1 - f2), 0.05, 0.95)
    t = np.where(np.isfinite(t), t, 0.5)
    result = np.where(np.abs(f1) <= np.abs(f2), x1, x2)
    active = np.ones(idx.size, dtype=bool)
    for _ in range(maxiter):
        act = np.flatnonzero(active)
        if not act.size:
            break
        xt = x1[act] + t[act] * (x2[act] - x1[act])
        ft = excess(xt, idx[act])
        ft = np.where(np.isfinite(ft), ft, np.sign(f1[act]))  # treat a failure as no crossing
        same = np.sign(ft) == np.sign(f1[act])
        # Keep the bracket: (x1, x2) always straddle the root; x3 is the point dropped.
        x3[act] = np.where(same, x1[act], x2[act])
        f3[act] = np.where(same, f1[act], f2[act])
        x2[act] = np.where(same, x2[act], x1[act])
        f2[act] = np.where(same, f2[act], f1[act])
        x1[act], f1[act] = xt, ft
        best_is_1 = np.abs(f1[act]) < np.abs(f2[act])
        xm = np.where(best_is_1, x1[act], x2[act])
        fm = np.where(best_is_1, f1[act], f2[act])
        result[act] = xm
        width = np.abs(x2[act] - x1[act])
        tol = xrtol * np.abs(xm) + 1e-300
        with np.errstate(all="ignore"):
            tlim = tol / width
        done = (np.abs(fm) <= ftol) | (tlim > 0.5) | (width == 0)
        with np.errstate(all="ignore"):
            xi = (x1[act] - x2[act]) / (x3[act] - x2[act])
            phi = (f1[act] - f2[act]) / (f3[act] - f2[act])
            iqi = phi * phi < xi
            iqi &= (1.0 - phi) ** 2 < 1.0 - xi
            tq = f1[act] / (f2[act] - f1[act]) * f3[act] / (f2[act] - f3[act]) + (
                x3[act] - x1[act]
            ) / (x2[act] - x1[act]) * f1[act] / (f3[act] - f1[act]) * f2[act] / (f3[act] - f2[act])
        tn = np.where(iqi & np.isfinite(tq), tq, 0.5)
        lim = np.minimum(np.where(np.isfinite(tlim), tlim, 0.5), 0.5)
        t[act] = np.clip(tn, lim, 1.0 - lim)
        active[act[done]] = False
    return result


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
    guess = np.broadcast_to(np.asarray(guess, dtype=float), target.shape)
    args = tuple(np.broadcast_to(np.asarray(a, dtype=float), target.shape) for a in args)

    def reached_at_lower(mask: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            return func(lower[mask], *(a[mask] for a in args)) >= target[mask]

    out = np.full(target.shape, np.nan)
    # Only sizes whose starting guess is near the smallest usable design can already reach the
    # target there; checking the others would cost one evaluation per row for nothing (their
    # solve below falls back on the check if it finds no root).
    near = ~(guess > 2.0 * lower)
    done = np.zeros(target.shape, dtype=bool)
    if near.any():
        done[near] = reached_at_lower(near)
    out[done] = lower[done]
    rest = ~done
    if rest.any():
        out[rest] = solve_increasing(
            func,
            target[rest],
            np.maximum(guess[rest], lower[rest]),
            lower=lower[rest],
            upper=upper,
            args=tuple(a[rest] for a in args),
        )
    retry = rest & ~near & np.isnan(out)
    if retry.any():
        hit = reached_at_lower(retry)
        idx = np.flatnonzero(retry)[hit]
        out[idx] = lower[idx]
    return out


def unique_rows(*arrays: np.ndarray) -> tuple[tuple[np.ndarray, ...], np.ndarray]:
    """Distinct combinations of equally long 1-d arrays, and the inverse index to expand them.

    Portfolios repeat the same test settings (alpha .05, power .80, the same df) many times; the
    inverse functions solve once per distinct combination instead of once per row. Hashing
    (a pandas group-by) rather than sorting: ten times faster than ``np.unique(axis=0)``.
    """
    import pandas as pd

    columns = [np.asarray(a, dtype=float).reshape(-1) for a in arrays]
    n = len(columns[0])
    if not n:
        return tuple(np.empty(0) for _ in arrays), np.empty(0, dtype=np.intp)
    frame = pd.DataFrame(dict(enumerate(columns)))
    codes = frame.groupby(list(frame.columns), sort=False, dropna=False).ngroup().to_numpy()
    codes = codes.astype(np.intp)
    # Each distinct combination is represented by its first row.
    first = np.empty(codes.max() + 1, dtype=np.intp)
    first[codes[::-1]] = np.arange(n - 1, -1, -1)
    return tuple(c[first] for c in columns), codes
