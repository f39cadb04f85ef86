"""Power of non-inferiority and equivalence tests against a margin, vectorised over rows.

Everything is on a design's analysis scale (the scale on which the estimate is about normal with
standard error ``se`` and no effect is 0: log for ratios). ``shift`` is the planned true
difference in the direction that counts as better, ``s·Δ``; ``margin`` is the margin's magnitude
on that scale (``log`` of a ratio margin). The formulas and references are in
``docs/methods/hypotheses.md``.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from audit.designs._power import t_critical, t_ncp_for_power, t_power
from audit.designs._solve import solve_increasing

__all__ = [
    "detectable_equivalence_margin",
    "detectable_ni_margin",
    "ni_power",
    "tost_power",
]

#: Gauss-Legendre rule on (0, 1) for the integral over the distribution of the sample SD.
_GL_X, _GL_W = np.polynomial.legendre.leggauss(64)
_GL_X = (_GL_X + 1.0) / 2.0
_GL_W = _GL_W / 2.0
#: Probability of U left out in each tail of the integral.
_TAIL = 1e-15
#: Above this many degrees of freedom the t is read as the normal (difference below 1e-6).
_NORMAL_DF = 1e7


def _arrays(*values: object) -> list[np.ndarray]:
    return list(np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in values)))


def ni_power(shift: np.ndarray, margin: np.ndarray, se: np.ndarray, df, alpha) -> np.ndarray:
    """Power of the one-sided test of H0 "worse than the margin" at level ``alpha``.

    The test rejects when ``(s·estimate + margin) / SE > c``, ``c`` the one-sided critical value
    of a t on ``df`` degrees of freedom (``inf``: normal); ``s·estimate`` has mean ``shift``. The
    statistic is a noncentral t with noncentrality ``(shift + margin) / se``, so the power is
    that of a one-sided superiority test at the effect ``shift + margin``.

    Examples
    --------
    No true difference, a margin of 2.8 SEs, one-sided alpha .025 (normal): power about .80,
    the familiar 1.96 + 0.84.

    >>> round(float(ni_power(0.0, 2.8016, 1.0, np.inf, 0.025)), 3)
    0.8
    """
    shift, margin, se, df, alpha = _arrays(shift, margin, se, df, alpha)
    with np.errstate(divide="ignore", invalid="ignore"):
        ncp = (shift + margin) / se
    out = np.full(ncp.shape, np.nan)
    ok = np.isfinite(ncp) & (df > 0) & (margin > 0)
    out[ok] = t_power(ncp[ok], df[ok], alpha[ok], np.ones(ok.sum()))
    return out


def tost_power(delta: np.ndarray, margin: np.ndarray, se: np.ndarray, df, alpha) -> np.ndarray:
    """Power of the two one-sided tests (TOST, Schuirmann 1987), each at level ``alpha``.

    Equivalence is shown when ``estimate - c·SÊ > -margin`` and ``estimate + c·SÊ < margin``.
    With the SE known (``df`` infinite) the power is
    ``max(0, Φ((M − Δ)/se − c) − Φ((−M − Δ)/se + c))``. With the SE estimated on ``df``
    degrees of freedom, ``SÊ = se·U`` with ``U² ~ χ²(df)/df`` independent of the estimate, and
    the power is the exact probability of both tails of the bivariate noncentral t
    (Owen 1965): ``∫ [Φ((M − Δ)/se − c u) − Φ((−M − Δ)/se + c u)] dF(u)`` over
    ``0 < u < M / (c·se)``, where the bracket is positive. The integral is taken by a
    64-point Gauss-Legendre rule over the part of that range where ``U`` has all but 1e-15 of
    its probability on either side (the chi density is smooth there, and no wider than a few
    of its SDs when ``df`` is large): rows × nodes arrays, no loop over rows.

    Examples
    --------
    Normal, no true difference, margin 3 SEs, alpha .05 each: ``2 Φ(3 − 1.645) − 1``.

    >>> round(float(tost_power(0.0, 3.0, 1.0, np.inf, 0.05)), 4)
    0.8246
    """
    delta, margin, se, df, alpha = _arrays(delta, margin, se, df, alpha)
    out = np.full(delta.shape, np.nan)
    ok = np.isfinite(delta) & np.isfinite(se) & (se > 0) & (margin > 0) & (df > 0)
    ok &= np.isfinite(margin)
    if not ok.any():
        return out
    d, m, s, f, a = delta[ok], margin[ok], se[ok], df[ok], alpha[ok]
    c = t_critical(a, np.ones(len(a)), f)
    upper = (m - d) / s
    lower = (-m - d) / s
    power = np.empty(len(d))
    normal = ~(f < _NORMAL_DF)
    if normal.any():
        cn = c[normal]
        power[normal] = np.maximum(
            special.ndtr(upper[normal] - cn) - special.ndtr(lower[normal] + cn), 0.0
        )
    exact = ~normal
    if exact.any():
        fe, ce = f[exact], c[exact]
        u_max = m[exact] / (ce * s[exact])
        # U's range holding all but 1e-15 of its probability on either side, cut at u_max.
        u_lo = np.sqrt(special.chdtri(fe, 1.0 - _TAIL) / fe)
        u_hi = np.minimum(np.sqrt(special.chdtri(fe, _TAIL) / fe), u_max)
        width = np.maximum(u_hi - u_lo, 0.0)
        u = u_lo[:, None] + width[:, None] * _GL_X[None, :]
        half = fe[:, None] / 2.0
        # Density of U = sqrt(chi2(df) / df): 2 df u times the chi-square density at df u^2.
        x = fe[:, None] * u * u
        log_density = (
            np.log(2.0 * fe[:, None] * u)
            + (half - 1.0) * np.log(x)
            - x / 2.0
            - half * np.log(2.0)
            - special.gammaln(half)
        )
        inner = special.ndtr(upper[exact][:, None] - ce[:, None] * u) - special.ndtr(
            lower[exact][:, None] + ce[:, None] * u
        )
        power[exact] = width * ((np.maximum(inner, 0.0) * np.exp(log_density)) @ _GL_W)
    out[ok] = np.clip(power, 0.0, 1.0)
    return out


def detectable_ni_margin(shift: np.ndarray, se: np.ndarray, df, alpha, power) -> np.ndarray:
    """Smallest margin (analysis scale) that a one-sided test at ``alpha`` shows with ``power``
    when the true difference is ``shift``: ``ncp(power) · se − shift``, with ``ncp(power)`` the
    noncentrality a one-sided t on ``df`` needs. Not clipped: a value at or below 0 means the
    design would show even superiority with that power.

    Examples
    --------
    >>> round(float(detectable_ni_margin(0.0, 1.0, np.inf, 0.025, 0.8)), 3)
    2.802
    """
    shift, se, df, alpha, power = _arrays(shift, se, df, alpha, power)
    ncp = t_ncp_for_power(power, df, alpha, np.ones(shift.shape))
    return ncp * se - shift


def detectable_equivalence_margin(delta, se, df, alpha, power) -> np.ndarray:
    """Smallest margin (analysis scale) that TOST at ``alpha`` shows with ``power`` when the true
    difference is ``delta``: the root of :func:`tost_power` in the margin (increasing in it)."""
    delta, se, df, alpha, power = _arrays(delta, se, df, alpha, power)
    out = np.full(delta.shape, np.nan)
    ok = np.isfinite(delta) & np.isfinite(se) & (se > 0) & (df > 0) & (power > 0) & (power < 1)
    if not ok.any():
        return out
    d, s, f, a, p = (x[ok] for x in (delta, se, df, alpha, power))
    c = t_critical(a, np.ones(len(a)), np.where(f < _NORMAL_DF, f, np.inf))
    guess = np.abs(d) + (c + special.ndtri((1.0 + p) / 2.0)) * s * 1.1

    def power_at(m, d, s, f, a):  # type: ignore[no-untyped-def]
        return tost_power(d, m, s, f, a)

    out[ok] = solve_increasing(power_at, p, guess, lower=0.0, args=(d, s, f, a))
    return out
