"""The exact distribution of a sample Pearson correlation, and the exact test of r = 0.

For ``n`` pairs from a bivariate normal population with correlation ``rho``, the sample
correlation ``r`` has the density [1]_

    f(r) = (n − 2) Γ(n − 1) (1 − ρ²)^((n − 1)/2) (1 − r²)^((n − 4)/2)
           / (√(2π) Γ(n − 1/2) (1 − ρ r)^(n − 3/2)) · ₂F₁(1/2, 1/2; n − 1/2; (1 + ρ r)/2).

The test of ``rho = 0`` rejects when ``r √(n − 2) / √(1 − r²)`` exceeds the t quantile on
``n − 2`` df, i.e. when ``r`` exceeds ``c = t / √(n − 2 + t²)``; its power under ``rho`` is the
tail mass of ``f`` beyond ``c`` (both tails for a two-sided test). The tail mass is integrated
numerically on Fisher's scale ``z = atanh r``, where the density is close to normal with SD
``1/√(n − 3)``: Gauss-Legendre quadrature (two panels of 32 nodes) over the part of
``atanh(rho) ± 14/√(n − 3)`` beyond ``atanh c``. Against mpmath's adaptive quadrature of the
density at 25 digits the error is below 1e-11 for n ≥ 8 and below 1e-8 down to n = 4
(tests/test_plan_methods.py). Everything is vectorised over arrays; nothing loops over rows.

References
----------
.. [1] Hotelling, H. (1953). New light on the correlation coefficient and its transforms.
   J. R. Statist. Soc. B 15:193-232 (the density in the hypergeometric form used here).
.. [2] Fisher, R. A. (1915). Frequency distribution of the values of the correlation
   coefficient in samples from an indefinitely large population. Biometrika 10:507-521.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from audit.designs._power import t_critical
from audit.designs._solve import smallest_size, unique_rows

__all__ = ["exact_r_size", "r_critical", "r_power", "r_tail"]

_LOG_SQRT_2PI = 0.5 * np.log(2.0 * np.pi)
_NODES, _WEIGHTS = np.polynomial.legendre.leggauss(32)
_PANELS = 2
#: Half-width of the integration window in SDs of Fisher's z (the mass beyond is below 1e-12).
_WINDOW = 14.0
#: Rows per block of the quadrature (each row takes 64 nodes: blocks keep the arrays small).
_BLOCK = 4096


def _log_cosh(z: np.ndarray) -> np.ndarray:
    a = np.abs(z)
    return a + np.log1p(np.exp(-2.0 * a)) - np.log(2.0)


def _tail_block(c: np.ndarray, rho: np.ndarray, n: np.ndarray) -> np.ndarray:
    z_c = np.arctanh(c)
    centre = np.arctanh(rho) + rho / (2.0 * (n - 1.0))
    spread = _WINDOW / np.sqrt(n - 3.0)
    lo = np.maximum(z_c, centre - spread)
    hi = centre + spread
    width = np.maximum(hi - lo, 0.0) / _PANELS
    starts = lo[:, None] + width[:, None] * np.arange(_PANELS)
    z = (starts[:, :, None] + width[:, None, None] * (_NODES + 1.0) / 2.0).reshape(len(c), -1)
    w = np.tile(_WEIGHTS, _PANELS)
    nn, rr = n[:, None], rho[:, None]
    log_cosh = _log_cosh(z)
    # log(1 - rho tanh z) = log(cosh z - rho sinh z) - log cosh z, without cancellation.
    log_q = np.logaddexp(np.log1p(-rr) + z, np.log1p(rr) - z) - np.log(2.0) - log_cosh
    log_f = (
        np.log(nn - 2.0)
        + special.gammaln(nn - 1.0)
        - special.gammaln(nn - 0.5)
        - _LOG_SQRT_2PI
        + (nn - 1.0) / 2.0 * np.log1p(-rr * rr)
        # (1 - r²)^((n - 4)/2) dr = sech(z)^(n - 4) · sech(z)² dz
        - (nn - 2.0) * log_cosh
        - (nn - 1.5) * log_q
    )
    hyper = special.hyp2f1(0.5, 0.5, nn - 0.5, (1.0 + rr * np.tanh(z)) / 2.0)
    return (np.exp(log_f) * hyper) @ w * width / 2.0


def r_tail(c: np.ndarray, rho: np.ndarray, n: np.ndarray) -> np.ndarray:
    """``P(r >= c)`` for the sample correlation of ``n`` pairs with population correlation
    ``rho``.

    Parameters
    ----------
    c : array_like
        Threshold in (-1, 1).
    rho : array_like
        Population correlation in (-1, 1).
    n : array_like
        Number of pairs, > 3 (need not be a whole number).

    Returns
    -------
    ndarray
        The tail probability; nan outside the ranges above.

    Examples
    --------
    With ``rho = 0`` the tail is that of the t distribution on n − 2 df:

    >>> t = 2.0; n = 20.0
    >>> c = t / np.sqrt(n - 2 + t * t)
    >>> round(float(r_tail(c, 0.0, n)), 8) == round(float(special.stdtr(n - 2, -t)), 8)
    True
    """
    c, rho, n = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (c, rho, n)))
    shape = c.shape
    c, rho, n = c.reshape(-1), rho.reshape(-1), n.reshape(-1)
    out = np.full(c.shape, np.nan)
    ok = (np.abs(c) < 1) & (np.abs(rho) < 1) & (n > 3)
    idx = np.flatnonzero(ok)
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        for start in range(0, len(idx), _BLOCK):
            part = idx[start : start + _BLOCK]
            out[part] = _tail_block(c[part], rho[part], n[part])
    return np.clip(out, 0.0, 1.0).reshape(shape)


def r_critical(n: np.ndarray, alpha: np.ndarray, sides: np.ndarray) -> np.ndarray:
    """Critical value of ``r`` for the exact test of ``rho = 0``: ``t / √(n − 2 + t²)`` with
    ``t`` the upper ``alpha / sides`` point of t on ``n − 2`` df.

    Examples
    --------
    >>> round(float(r_critical(20, 0.05, 2)), 4)
    0.4438
    """
    t = t_critical(alpha, sides, np.asarray(n, dtype=float) - 2.0)
    return t / np.sqrt(np.asarray(n, dtype=float) - 2.0 + t * t)


def r_power(rho: np.ndarray, n: np.ndarray, alpha: np.ndarray, sides: np.ndarray) -> np.ndarray:
    """Power of the exact test of ``rho = 0`` with ``n`` pairs at population correlation ``rho``.

    ``rho`` is signed in the direction a one-sided test looks (positive: that way); a
    two-sided test counts both rejection tails. At ``rho = 0`` the power is ``alpha``.

    Examples
    --------
    >>> round(float(r_power(0.0, 30, 0.05, 2)), 10)
    0.05
    """
    rho, n, alpha, sides = np.broadcast_arrays(
        *(np.asarray(v, dtype=float) for v in (rho, n, alpha, sides))
    )
    c = r_critical(n, alpha, sides)
    upper = r_tail(c, rho, n)
    lower = np.zeros_like(upper)
    # The far tail of a two-sided test, where its mass can matter (Fisher's z says where).
    with np.errstate(invalid="ignore", divide="ignore"):
        rough = special.ndtr((-np.arctanh(c) - np.arctanh(rho)) * np.sqrt(n - 3.0))
    far = (sides == 2) & ~(rough < 1e-15)
    if far.any():
        lower[far] = r_tail(c[far], -rho[far], n[far])
    return np.clip(upper + lower, 0.0, 1.0)


def _power_of_n(n: np.ndarray, rho: np.ndarray, alpha: np.ndarray, sides: np.ndarray):
    return r_power(rho, n, alpha, sides)


def _step_search(
    rho: np.ndarray,
    alpha: np.ndarray,
    sides: np.ndarray,
    power: np.ndarray,
    start: np.ndarray,
    steps: int = 3,
) -> np.ndarray:
    """Smallest whole n >= 4 reaching ``power``, searched one unit at a time from ``start``
    (down while the target is reached, up while it is not), at most ``steps`` units; nan
    where the answer lies further away. A row usually needs two evaluations."""
    reached = _power_of_n(start, rho, alpha, sides) >= power
    way = np.where(reached, -1.0, 1.0)
    # Down: the last size that reaches the target; up: the first one.
    answer = np.where(reached, start, np.nan)
    n = start.copy()
    open_ = ~(reached & (start <= 4.0))
    for _ in range(steps):
        idx = np.flatnonzero(open_)
        if not idx.size:
            break
        n[idx] += way[idx]
        hit = _power_of_n(n[idx], rho[idx], alpha[idx], sides[idx]) >= power[idx]
        down = way[idx] < 0
        # Going down, a size that still reaches the target is the new answer; one that misses
        # ends the search. Going up, the first size that reaches it is the answer.
        answer[idx[down & hit]] = n[idx[down & hit]]
        settled = np.where(down, ~hit | (n[idx] <= 4.0), hit)
        answer[idx[~down & hit]] = n[idx[~down & hit]]
        open_[idx[settled]] = False
    answer[open_] = np.nan
    return answer


def exact_r_size(
    rho: np.ndarray,
    alpha: np.ndarray,
    sides: np.ndarray,
    power: np.ndarray,
    guess: np.ndarray,
) -> np.ndarray:
    """Smallest whole number of pairs (at least 4) whose exact test reaches ``power``.

    ``rho`` is signed in the direction used (must be > 0); ``guess`` is a starting size (the
    Fisher-z size, within a few pairs of the answer). The exact power is evaluated at whole
    numbers stepping from the guess (:func:`_step_search`); rows whose answer lies further
    away are solved on the continuous size and rounded up (power rises with n). nan where
    ``rho <= 0`` or the target is not above alpha.

    Examples
    --------
    r = .30, alpha .05 two-sided, power .80 (85 pairs by Fisher's z):

    >>> int(exact_r_size(0.3, 0.05, 2, 0.8, 85)[0])
    84
    """
    rho, alpha, sides, power, guess = (
        np.atleast_1d(np.asarray(v, dtype=float))
        for v in np.broadcast_arrays(rho, alpha, sides, power, guess)
    )
    out = np.full(rho.shape, np.nan)
    ok = (rho > 0) & (rho < 1) & (power > alpha) & (power < 1) & np.isfinite(guess)
    if not ok.any():
        return out
    # Portfolios repeat settings (a planned r of .3 at .05 and .80): solve each once.
    (r_u, a_u, s_u, p_u, g_u), inverse = unique_rows(
        rho[ok], alpha[ok], sides[ok], power[ok], guess[ok]
    )
    size = _step_search(r_u, a_u, s_u, p_u, np.maximum(np.ceil(g_u) - 1.0, 4.0))
    rest = np.isnan(size)
    if rest.any():
        root = smallest_size(
            _power_of_n,
            p_u[rest],
            np.maximum(g_u[rest], 4.0),
            lower=np.full(int(rest.sum()), 4.0),
            upper=1e9,
            args=(r_u[rest], a_u[rest], s_u[rest]),
        )
        size[rest] = np.ceil(root * (1.0 - 1e-12))
    out[ok] = size[inverse]
    return out
