"""Power of t, z and F tests as vectorised functions of the noncentrality, and their inverses.

Every design reduces to one of three reference tests: a t (or, with infinite df, a z) test whose
statistic is shifted by a noncentrality ``ncp = effect / se``, or an F test with noncentrality
``lam``. The functions here know nothing about designs; they take numpy arrays that broadcast.

Conventions
-----------
* ``alpha`` is the significance level of *one* comparison (Bonferroni already applied).
* ``sides`` is 1 or 2. A one-sided test rejects in the direction of a positive ``ncp``; a
  two-sided test puts ``alpha / 2`` in each tail and its power counts both rejection tails.
* ``df = inf`` means the normal reference distribution.
"""

from __future__ import annotations

import itertools
import os
import warnings

import numpy as np
from scipy import special

from audit.designs._solve import solve_increasing, unique_rows

__all__ = [
    "f_lambda_for_power",
    "f_power",
    "t_critical",
    "t_critical_computable",
    "t_ncp_for_power",
    "t_power",
]


def _stats_ufunc(name: str, method: str, probe: tuple[float, ...], public, ufuncs=None):  # type: ignore[no-untyped-def]
    """The scipy.special ufunc behind ``scipy.stats.<name>.<method>``, or that method.

    ``scipy.stats`` costs about 0.45 s to import, a tenth of a 100k-row audit, and the audit needs
    only two of its functions: the survival functions of the noncentral t and F, which
    ``scipy.stats`` computes with the (Boost) ufuncs ``_nct_sf`` and ``_ncf_sf`` of
    ``scipy.special``, taking the same arguments. Those names are private, so they are used only
    while they behave as expected: the ufunc is called once at ``probe`` and must agree there
    with ``public(*probe)``, a public survival function accurate at that central point. A scipy
    without the ufunc, or whose ufunc takes other arguments now (it then raises, or gives
    another value), gets the public ``scipy.stats`` method instead (imported then).
    ``tests/test_power.py`` checks both paths and that they give the same values.

    The public ``scipy.special.nctdtr`` is not the fallback: as ``1 - cdf`` it loses all
    accuracy in the far upper tail (power near alpha at tiny alphas), where the audit needs it.

    ``ufuncs``: where to look for the private ufunc (default ``scipy.special._ufuncs``).
    """
    try:
        if ufuncs is None:
            from scipy.special import _ufuncs as ufuncs

        func = getattr(ufuncs, f"_{name}_{method}")
        with np.errstate(all="ignore"):
            value = float(func(*probe))
        if not abs(value - float(public(*probe))) <= 1e-9 * max(abs(value), 1e-300):
            raise ValueError(f"scipy.special._{name}_{method} changed")
        return func
    except (ImportError, AttributeError, TypeError, ValueError):
        # Missing, or a signature or meaning that changed (a wrong argument count raises
        # TypeError, wrong types ValueError; other arguments give another value).
        from scipy import stats

        return getattr(getattr(stats, name), method)


def _public_nct_sf(x: float, df: float, nc: float) -> float:
    return 1.0 - special.nctdtr(df, nc, x)


def _public_ncf_sf(f: float, dfn: float, dfd: float, nc: float) -> float:
    return 1.0 - special.ncfdtr(dfn, dfd, nc, f)


def _threads() -> int:
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        cores = os.cpu_count() or 1
    return max(1, min(cores, 4))


#: Threads for large special-function evaluations (scipy's ufuncs release the interpreter lock).
THREADS = _threads()
#: Arrays at least this long are split over :data:`THREADS` threads.
THREADED_MIN = 20_000


def threaded(func, *args: np.ndarray) -> np.ndarray:  # type: ignore[no-untyped-def]
    """``func(*args)`` for a ufunc of equally long 1-d arrays, split over threads when large.

    The noncentral t and F are the bulk of an audit's arithmetic (about a microsecond a value)
    and scipy computes them without holding the interpreter lock, so a second core halves
    them. Floating-point error states are per thread: each part ignores overflow, as
    ``scipy.stats`` does around these functions.
    """
    n = len(args[0])
    if n < THREADED_MIN or THREADS < 2:
        with np.errstate(over="ignore"):
            return func(*args)
    from concurrent.futures import ThreadPoolExecutor

    out = np.empty(n)
    bounds = np.linspace(0, n, THREADS + 1).astype(int)

    def part(lo: int, hi: int) -> None:
        with np.errstate(over="ignore"):
            out[lo:hi] = func(*(a[lo:hi] for a in args))

    with ThreadPoolExecutor(THREADS) as pool:
        for done in [pool.submit(part, lo, hi) for lo, hi in itertools.pairwise(bounds)]:
            done.result()
    return out


# Probe points: central values (survival about 0.2 to 0.5), where the public cdfs are accurate,
# and arguments no two of which may be swapped without changing the value.
#: P(T > x) for T noncentral t(df, nc): ``_nct_sf(x, df, nc)``.
_nct_sf = _stats_ufunc("nct", "sf", (2.0, 7.0, 1.5), _public_nct_sf)
#: P(F > x) for F noncentral F(dfn, dfd, nc): ``_ncf_sf(x, dfn, dfd, nc)``.
_ncf_sf = _stats_ufunc("ncf", "sf", (2.5, 3.0, 17.0, 4.0), _public_ncf_sf)


def t_critical(alpha: np.ndarray, sides: np.ndarray, df: np.ndarray) -> np.ndarray:
    """Upper critical value of a t (df finite) or z (df infinite) test.

    Examples
    --------
    >>> round(float(t_critical(0.05, 2, np.inf)), 4)
    1.96
    """
    tail = np.asarray(alpha, dtype=float) / np.asarray(sides, dtype=float)
    df = np.asarray(df, dtype=float)
    tail, df = np.broadcast_arrays(tail, df)
    if tail.size > 1000:
        # The t quantile costs a few microseconds; portfolios repeat (alpha, df) pairs a lot.
        (tail_u, df_u), inverse = unique_rows(tail.ravel(), df.ravel())
        return _upper_point(tail_u, df_u)[inverse].reshape(tail.shape)
    return _upper_point(tail, df)


def _upper_point(tail: np.ndarray, df: np.ndarray) -> np.ndarray:
    out = np.empty(tail.shape)
    normal = np.isinf(df)
    # The upper point is minus the lower point of the small tail (both distributions are
    # symmetric): ndtri(1 - tail) would lose the tail's digits to the rounding of 1 - tail
    # (z off in the 6th digit at alpha 1e-12, infinite below 1.1e-16).
    out[normal] = -special.ndtri(tail[normal])
    usual = ~normal & (df >= 1.0)
    out[usual] = -special.stdtrit(df[usual], tail[usual])
    small = ~normal & ~usual
    if small.any():
        # Below one degree of freedom the point grows like tail ** (-1 / df) (1e260 at df =
        # 0.005, alpha 0.05), past where stdtrit stops (it returns about 5e152 instead). From
        # P(|T| > c) = I_x(df / 2, 1 / 2) at x = df / (df + c^2): c = sqrt(df (1 - x) / x),
        # infinite when x underflows (rows validation refuses, see audit.validate).
        d, t = df[small], tail[small]
        q = np.minimum(t, 1.0 - t)
        x = special.betaincinv(d / 2.0, 0.5, 2.0 * q)
        with np.errstate(divide="ignore", invalid="ignore"):
            magnitude = np.sqrt(d * (1.0 - x) / x)
        out[small] = np.where(t <= 0.5, magnitude, -magnitude)
    return out


def t_critical_computable(tail: np.ndarray, df: np.ndarray) -> np.ndarray:
    """Where the upper ``tail`` point of t(``df``) is computed correctly: finite, and its tail
    computed back agrees to 1e-9. False only for df below 1 with a small tail, where the point
    (about tail ** (-1 / df)) passes 1e152 and scipy's inverses stop short of it."""
    tail = np.asarray(tail, dtype=float)
    df = np.asarray(df, dtype=float)
    tail, df = np.broadcast_arrays(tail, df)
    with np.errstate(all="ignore"):
        c = t_critical(tail, np.ones(tail.shape), df)
        q = np.minimum(tail, 1.0 - tail)
        back = np.where(np.isinf(df), special.ndtr(-np.abs(c)), special.stdtr(df, -np.abs(c)))
        return np.isfinite(c) & (np.abs(back - q) <= 1e-9 * q)


#: Above this |ncp| scipy's noncentral t is replaced (see :func:`_upper_tail`).
_LARGE_NCP = 1e3
# Probabilists' Gauss-Hermite rule: E[f(Z)] = sum(w * f(x)) for Z standard normal.
_GH_X, _GH_W = np.polynomial.hermite_e.hermegauss(96)
_GH_W = _GH_W / np.sqrt(2.0 * np.pi)


def _chi_spread(df: np.ndarray) -> np.ndarray:
    """Standard deviation of S = sqrt(V / df), V chi-square on ``df`` degrees of freedom."""
    df = np.asarray(df, dtype=float)
    with np.errstate(over="ignore", invalid="ignore"):
        mean = np.sqrt(2.0 / df) * np.exp(special.gammaln((df + 1) / 2) - special.gammaln(df / 2))
        var = np.where(df > 1e4, 1.0 / (2.0 * df), np.maximum(1.0 - mean * mean, 0.0))
    return np.sqrt(var)


def _upper_tail_large_ncp(c: np.ndarray, df: np.ndarray, ncp: np.ndarray) -> np.ndarray:
    """P(T > c) for a noncentral t with |ncp| large, where scipy's series is slow and wrong.

    With T = (Z + ncp) / S, S = sqrt(V / df): T > c  <=>  Z + ncp > c S, so
    P = E_Z[P(S < (Z + ncp) / c)] for c > 0 (and 1 minus that for c < 0), where
    P(S < s) = P(V < df s^2) is a regularized incomplete gamma. The integrand is smooth in Z
    when c * sd(S) > 1, and is integrated by Gauss-Hermite quadrature (96 nodes; agrees with a
    fine trapezoid rule to 1e-15 at df = 1). Otherwise S is so concentrated relative to 1 / c
    that the normal approximation of Abramowitz & Stegun 26.7.10 is exact to double precision
    in the region where the probability is not 0 or 1.
    """
    out = np.empty(c.shape)
    quad = c * _chi_spread(df) > 1.0
    if quad.any():
        cq, dq, nq = c[quad], df[quad], ncp[quad]
        s = (_GH_X[:, None] + nq) / cq
        below = np.where(s > 0, special.gammainc(dq / 2.0, dq * np.maximum(s, 0.0) ** 2 / 2.0), 0.0)
        inside = np.where(cq > 0, below, 1.0 - below)
        out[quad] = _GH_W @ inside
    rest = ~quad
    if rest.any():
        cr, dr, nr = c[rest], df[rest], ncp[rest]
        z = (nr - cr * (1.0 - 1.0 / (4.0 * dr))) / np.sqrt(1.0 + cr * cr / (2.0 * dr))
        out[rest] = special.ndtr(z)
    return out


def _upper_tail(c: np.ndarray, df: np.ndarray, ncp: np.ndarray) -> np.ndarray:
    """P(T > c) for T noncentral t(df, ncp); normal when df is infinite."""
    c, df, ncp = np.broadcast_arrays(
        np.asarray(c, float), np.asarray(df, float), np.asarray(ncp, float)
    )
    out = np.empty(c.shape)
    normal = np.isinf(df)
    out[normal] = special.ndtr(ncp[normal] - c[normal])
    # The survival function of the noncentral t is numerically sound for |ncp| up to about 1e3
    # (checked down to df = 1), whereas scipy's nct.cdf returns nan for a lower tail far from a
    # large ncp. Lower tails are therefore written as upper tails by symmetry. Beyond that scipy
    # is slow (seconds per value) and wrong (0.38 instead of 0.88 at df = 1, c = 6.4e7,
    # ncp = 1e8), so a quadrature takes over.
    large = ~normal & (np.abs(ncp) > _LARGE_NCP)
    if large.any():
        out[large] = _upper_tail_large_ncp(c[large], df[large], ncp[large])
    finite = ~normal & ~large
    if finite.any():
        with warnings.catch_warnings():
            # Boost reports slow series convergence at extreme noncentralities; the value it
            # returns there is still the closest representable probability (0 or 1).
            warnings.simplefilter("ignore", RuntimeWarning)
            out[finite] = threaded(_nct_sf, c[finite], df[finite], ncp[finite])
    return np.clip(out, 0.0, 1.0)


def _t_power_at_critical(
    ncp: np.ndarray, df: np.ndarray, c: np.ndarray, sides: np.ndarray
) -> np.ndarray:
    """Power given the critical value ``c`` (the solver's inner function: ``c`` is fixed)."""
    upper = _upper_tail(c, df, ncp)
    lower = np.zeros_like(upper)
    two = np.broadcast_to(sides == 2, upper.shape)
    if two.any():
        ncp_b = np.broadcast_to(ncp, upper.shape)
        lower[two] = _upper_tail(
            np.broadcast_to(c, upper.shape)[two],
            np.broadcast_to(df, upper.shape)[two],
            -ncp_b[two],
        )
    return np.clip(upper + lower, 0.0, 1.0)


def t_power(ncp: np.ndarray, df: np.ndarray, alpha: np.ndarray, sides: np.ndarray) -> np.ndarray:
    """Power of a t test (z test when ``df`` is infinite) at noncentrality ``ncp``.

    Parameters
    ----------
    ncp : array_like
        Noncentrality, ``effect / se``, signed: positive means the direction a one-sided test
        looks in.
    df : array_like
        Degrees of freedom (> 0); ``inf`` for the normal distribution.
    alpha : array_like
        Significance level of the comparison, in (0, 1).
    sides : array_like
        1 or 2.

    Returns
    -------
    ndarray
        ``P(T > c) + [sides == 2] P(T < -c)`` with ``T ~ t(df, ncp)`` and ``c`` the critical value.

    Notes
    -----
    At ``ncp = 0`` the power is ``alpha`` exactly (size of the test). Both tails are counted for
    two-sided tests, so power is symmetric in the sign of ``ncp``.

    Examples
    --------
    >>> round(float(t_power(2.8016, np.inf, 0.05, 2)), 3)
    0.8
    """
    ncp, df, alpha, sides = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (ncp, df, alpha, sides))
    )
    # P(T_ncp < -c) = P(T_{-ncp} > c): the lower rejection tail of a two-sided test.
    return _t_power_at_critical(ncp, df, t_critical(alpha, sides, df), sides)


def _exact_ncp(power: np.ndarray, df: np.ndarray, alpha: np.ndarray, sides: np.ndarray):
    """Root of ``t_power(ncp) = power`` by search, once per distinct (power, df, alpha, sides)."""
    (p, d, a, s), inverse = unique_rows(power, df, alpha, sides)
    c = t_critical(a, s, d)
    with np.errstate(divide="ignore"):
        spread = np.sqrt(1.0 + c * c / (2.0 * d))
    guess = np.maximum(c + special.ndtri(p) * spread, 1e-3)
    root = solve_increasing(_t_power_at_critical, p, guess, lower=0.0, args=(d, c, s))
    return root[inverse]


class _Segment:
    """One df range of the noncentrality interpolant: Chebyshev nodes in a variable of df."""

    def __init__(self, low: float, high: float, nodes: int, *, log: bool) -> None:
        self.low, self.high, self.log = low, high, log
        k = np.arange(nodes)
        self.t_nodes = np.cos(np.pi * (k + 0.5) / nodes)
        self.df_nodes = self.df_at(self.t_nodes)
        self.degree = nodes - 1
        self.inverse = np.linalg.inv(np.polynomial.chebyshev.chebvander(self.t_nodes, nodes - 1))

    def t_of(self, df: np.ndarray) -> np.ndarray:
        """Map df in [low, high] (high may be inf) to [-1, 1] through u = 1 / df."""
        u = 1.0 / df
        u_low, u_high = 1.0 / self.high, 1.0 / self.low
        return 2.0 * (u - u_low) / (u_high - u_low) - 1.0

    def df_at(self, t: np.ndarray) -> np.ndarray:
        u_low, u_high = 1.0 / self.high, 1.0 / self.low
        u = u_low + (t + 1.0) / 2.0 * (u_high - u_low)
        with np.errstate(divide="ignore"):
            return 1.0 / u


#: df from which a setting's noncentrality is read off its interpolant (below: direct search).
TABLE_MIN_DF = 2.0
# Large df: the noncentrality itself is smooth in 1 / df up to the normal limit. Small df: its
# logarithm is (the critical value grows fast as df falls to 2 at small alpha).
_SEGMENTS = (_Segment(30.0, np.inf, 24, log=False), _Segment(2.0, 30.0, 32, log=True))
#: (power, alpha, sides) -> Chebyshev coefficients per segment; settings repeat across calls.
_TABLES: dict[tuple[float, float, float], tuple[np.ndarray, ...]] = {}
_TABLES_MAX = 4096


class NcpLookup:
    """Noncentrality needed for ``power`` at any df, for a fixed set of rows and settings.

    Notes
    -----
    The root of ``t_power(ncp) = power`` is a smooth function of df. For each distinct
    (power, alpha, sides) it is solved exactly (a bracketed search on the noncentral t) at
    Chebyshev nodes of ``1 / df`` on two ranges, df >= 30 (24 nodes, the normal limit included)
    and 2 <= df < 30 (32 nodes, on the logarithm), and interpolated. Over alpha 1e-8 to 0.5 and
    power up to 0.999999 the interpolant agrees with the direct search to about 1e-11 relative,
    the precision of the search itself (tests/test_power.py). Tables are kept for the rest of the
    process: a portfolio repeats a few settings over many rows, and a required-size iteration
    asks for the root at many df values.
    """

    def __init__(self, power: np.ndarray, alpha: np.ndarray, sides: np.ndarray) -> None:
        (p, a, s), self._inverse = unique_rows(power, alpha, sides)
        self._build(p, a, s)

    @staticmethod
    def missing(power: np.ndarray, alpha: np.ndarray, sides: np.ndarray) -> int:
        """How many distinct settings of these rows have no table yet."""
        (p, a, s), _ = unique_rows(power, alpha, sides)
        return sum(k not in _TABLES for k in zip(p.tolist(), a.tolist(), s.tolist(), strict=True))

    def _build(self, p: np.ndarray, a: np.ndarray, s: np.ndarray) -> None:
        keys = list(zip(p.tolist(), a.tolist(), s.tolist(), strict=True))
        # This lookup's tables are taken out of the process-wide store before anything is
        # evicted from it: a full store is cleared, and the keys just read must survive that.
        tables = {k: _TABLES[k] for k in keys if k in _TABLES}
        missing = [i for i, k in enumerate(keys) if k not in tables]
        if missing:
            m = np.asarray(missing)
            per_segment = []
            for seg in _SEGMENTS:
                k = len(seg.df_nodes)
                values = _exact_ncp(
                    np.repeat(p[m], k),
                    np.tile(seg.df_nodes, len(m)),
                    np.repeat(a[m], k),
                    np.repeat(s[m], k),
                ).reshape(len(m), k)
                if seg.log:
                    values = np.log(values)
                per_segment.append(values @ seg.inverse.T)
            for j, i in enumerate(m.tolist()):
                tables[keys[i]] = tuple(c[j] for c in per_segment)
            if len(_TABLES) + len(missing) > _TABLES_MAX:
                _TABLES.clear()
            _TABLES.update((keys[i], tables[keys[i]]) for i in m.tolist()[:_TABLES_MAX])
        self._coefficients = [
            np.vstack([tables[key][n] for key in keys]) for n in range(len(_SEGMENTS))
        ]

    def at(self, df: np.ndarray) -> np.ndarray:
        """The noncentrality each row needs at ``df`` (nan below TABLE_MIN_DF)."""
        df = np.asarray(df, dtype=float)
        out = np.full(df.shape, np.nan)
        for seg, coefficients in zip(_SEGMENTS, self._coefficients, strict=True):
            inside = (df >= seg.low) & (df < seg.high) if np.isfinite(seg.high) else df >= seg.low
            if not inside.any():
                continue
            basis = np.polynomial.chebyshev.chebvander(seg.t_of(df[inside]), seg.degree)
            value = np.einsum("ij,ij->i", basis, coefficients[self._inverse[inside]])
            out[inside] = np.exp(value) if seg.log else value
        return out

    @property
    def settings(self) -> int:
        return len(self._coefficients[0])


def t_ncp_for_power(
    power: np.ndarray, df: np.ndarray, alpha: np.ndarray, sides: np.ndarray
) -> np.ndarray:
    """Smallest nonnegative noncentrality at which a t (or z) test reaches ``power``.

    Returns nan where ``power <= alpha`` (the test reaches that power at a zero effect, so no
    positive detectable effect exists) or ``power >= 1``.

    Notes
    -----
    The root of ``t_power(ncp) = power`` is searched directly for df below 2, and for settings
    too few rows share; the normal approximation to the noncentral t (Abramowitz & Stegun
    26.7.10), ``ncp ~ c + z_power * sqrt(1 + c**2 / (2 df))`` with ``c`` the critical value,
    starts a bracketed search polished with Chandrupatla's method, once per distinct setting.
    Otherwise the root is read off the setting's interpolant (:class:`NcpLookup`), which agrees
    with the search to about 1e-11 relative.

    Examples
    --------
    Bloom's (1995) MDE multiplier for a two-sided test at alpha = .05 and power .80:

    >>> round(float(t_ncp_for_power(0.8, np.inf, 0.05, 2)), 2)
    2.8
    """
    power, df, alpha, sides = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (power, df, alpha, sides))
    )
    ok = (power > alpha) & (power < 1.0) & (df > 0)
    out = np.full(power.shape, np.nan)
    if not ok.any():
        return out
    tabled = ok & (df >= TABLE_MIN_DF)
    if tabled.any():
        p, a, s = power[tabled], alpha[tabled], sides[tabled]
        # Worth it only when settings repeat: each new table costs 56 exact solves.
        if NcpLookup.missing(p, a, s) * 56 < tabled.sum():
            out[tabled] = NcpLookup(p, a, s).at(df[tabled])
        else:
            tabled = np.zeros_like(tabled)
    direct = ok & ~tabled
    if direct.any():
        out[direct] = _exact_ncp(power[direct], df[direct], alpha[direct], sides[direct])
    return out


def f_upper_point(dfn: np.ndarray, dfd: np.ndarray, alpha: np.ndarray) -> np.ndarray:
    """Upper ``alpha`` point of the central F on (``dfn``, ``dfd``) degrees of freedom.

    P(F > f) is the regularized incomplete beta I_x(dfd/2, dfn/2) at x = dfd / (dfd + dfn f),
    so the point comes from the inverse of that beta at ``alpha`` itself, not from
    ``fdtri(dfn, dfd, 1 - alpha)``, which loses the digits of a small alpha to ``1 - alpha``.

    Examples
    --------
    >>> round(float(f_upper_point(2.0, 30.0, 0.05)), 4)
    3.3158
    """
    x = special.betaincinv(np.asarray(dfd, float) / 2.0, np.asarray(dfn, float) / 2.0, alpha)
    with np.errstate(divide="ignore"):
        return dfd * (1.0 - x) / (dfn * x)


def f_power(lam: np.ndarray, dfn: np.ndarray, dfd: np.ndarray, alpha: np.ndarray) -> np.ndarray:
    """Power of an F test with noncentrality ``lam`` on (``dfn``, ``dfd``) degrees of freedom.

    Notes
    -----
    scipy 1.17's ``ncf.sf`` returns ``-(1 - alpha)`` instead of ``alpha`` at ``lam = 0`` exactly,
    so the central F is used there. At ``lam = 0`` the power equals ``alpha``.

    Examples
    --------
    >>> round(float(f_power(0.0, 2, 30, 0.05)), 6)
    0.05
    """
    lam, dfn, dfd, alpha = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (lam, dfn, dfd, alpha))
    )
    with warnings.catch_warnings():
        # Boost reports slow convergence of the noncentral F series at extreme noncentralities
        # (lambda of 1e12 in the extremes tests); the value it returns is its closest estimate,
        # which there is 1 to double precision except with a denominator df of 1 or 2.
        warnings.simplefilter("ignore", RuntimeWarning)
        crit = f_upper_point(dfn, dfd, alpha)
        out = alpha.copy()
        positive = lam > 0
        out[positive] = threaded(
            _ncf_sf, crit[positive], dfn[positive], dfd[positive], lam[positive]
        )
    return np.clip(out, 0.0, 1.0)


def f_lambda_for_power(
    power: np.ndarray, dfn: np.ndarray, dfd: np.ndarray, alpha: np.ndarray
) -> np.ndarray:
    """Smallest noncentrality ``lam`` at which an F test reaches ``power`` (nan if none)."""
    power, dfn, dfd, alpha = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (power, dfn, dfd, alpha))
    )
    ok = (power > alpha) & (power < 1.0) & (dfn > 0) & (dfd > 0)
    out = np.full(power.shape, np.nan)
    if not ok.any():
        return out
    (p, d1, d2, a), inverse = unique_rows(power[ok], dfn[ok], dfd[ok], alpha[ok])
    # For large dfd, dfn * F is close to a noncentral chi-square; its square-root scale is nearly
    # normal, which gives a serviceable starting point.
    z = -special.ndtri(a) + special.ndtri(p)
    guess = np.maximum(z * z + d1, 1e-2)
    root = solve_increasing(f_power, p, guess, lower=0.0, args=(d1, d2, a))
    out[ok] = root[inverse]
    return out
