"""Retrospective inference: what a finished study's result does and does not say.

Pure, vectorised functions over numpy arrays (one entry per study); :mod:`audit.metrics` applies
them per design on the design's *analysis scale* (identity for differences, log for ratios,
Fisher's z for correlations), on which an estimate is approximately normal and the null value is 0.

* :func:`complete_results` fills in a study's result (estimate, standard error, confidence
  interval, p-value) from whichever of them the study reported;
* :func:`sign_and_magnitude_errors` gives the Type S error rate and the exaggeration ratio (Type M)
  of a significant estimate, exactly (normal integrals in closed form, no simulation);
* :func:`observed_power` and :func:`observed_power_from_p` give the "observed power" only to
  show that it is a transform of the p-value;
* :func:`ci_verdicts` says what the confidence interval rules out.

Conventions
-----------
``alpha`` is the significance level of one comparison (Bonferroni applied), ``sides`` 1 or 2, and
``direction`` (+1 or -1) the side a one-sided test looks at (the sign of the planned effect).
``df = inf`` means the normal reference distribution. The confidence interval *dual to the test*
has level ``1 - 2 alpha / sides``: it excludes 0 exactly when the test rejects (a two-sided test
at .05 and a one-sided test at .025 both go with a 95 % interval).

References
----------
.. [1] Gelman, A. & Carlin, J. (2014). Beyond power calculations: assessing Type S (sign) and
   Type M (magnitude) errors. Perspectives on Psychological Science 9:641-651.
.. [2] Hoenig, J. M. & Heisey, D. M. (2001). The abuse of power: the pervasive fallacy of power
   calculations for data analysis. The American Statistician 55:19-24.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import pandas as pd
from scipy import special

from audit.designs._power import t_power

__all__ = [
    "CI_VERDICTS",
    "CompletedResults",
    "SignMagnitude",
    "ci_verdicts",
    "complete_results",
    "critical_value",
    "dual_ci_level",
    "observed_power",
    "observed_power_from_p",
    "p_from_statistic",
    "sign_and_magnitude_errors",
    "significant",
    "statistic_from_p",
    "upper_quantile",
]

#: The values of ``ci_verdict``, in order of precedence (see :func:`ci_verdicts`).
CI_VERDICTS = ("detected", "excludes_sesoi", "excludes_planned_effect", "inconclusive")

_SQRT_2PI = np.sqrt(2.0 * np.pi)


def _arrays(*values: object) -> list[np.ndarray]:
    return list(np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in values)))


def _normal_pdf(x: np.ndarray) -> np.ndarray:
    return np.exp(-0.5 * x * x) / _SQRT_2PI


def upper_quantile(tail: np.ndarray, df: np.ndarray) -> np.ndarray:
    """The value a t (``df`` finite) or normal (``df = inf``) variable exceeds with probability
    ``tail``.

    >>> round(float(upper_quantile(0.025, np.inf)), 3)
    1.96
    """
    tail, df = _arrays(tail, df)
    # By symmetry, minus the lower quantile: 1 - tail would lose tiny tails (p = 1e-40) to
    # rounding. stdtrit handles df = inf as the normal distribution.
    return -special.stdtrit(df, tail)


def critical_value(tail: np.ndarray, df: np.ndarray) -> np.ndarray:
    """:func:`upper_quantile` for per-study *settings* (a level and a df), computed once per
    distinct pair: portfolios repeat a few of them, and the t quantile is costly."""
    tail, df = _arrays(tail, df)
    if tail.size < 64:
        return upper_quantile(tail, df)
    # Hash the pairs as complex numbers (df = inf as -1, which no real df takes).
    key = np.empty(tail.size, dtype=complex)
    key.real = tail.ravel()
    key.imag = np.where(np.isinf(df.ravel()), -1.0, df.ravel())
    codes, uniq = pd.factorize(key, use_na_sentinel=False)
    d = np.where(uniq.imag == -1.0, np.inf, uniq.imag)
    return upper_quantile(uniq.real, d)[codes].reshape(tail.shape)


def _upper_tail(x: np.ndarray, df: np.ndarray) -> np.ndarray:
    """P(T > x) for T a central t (normal when ``df`` is infinite)."""
    return special.stdtr(df, -x)


def dual_ci_level(alpha: np.ndarray, sides: np.ndarray) -> np.ndarray:
    """Level of the two-sided confidence interval dual to the test: ``1 - 2 alpha / sides``.

    >>> dual_ci_level(np.array([0.05, 0.025, 0.05]), np.array([2, 1, 1])).round(3).tolist()
    [0.95, 0.95, 0.9]
    """
    alpha, sides = _arrays(alpha, sides)
    return 1.0 - 2.0 * alpha / sides


# -- p-values and test statistics ---------------------------------------------------------------


def statistic_from_p(p: np.ndarray, df: np.ndarray, sides: np.ndarray) -> np.ndarray:
    """The test statistic a p-value implies, oriented in the test's direction.

    A two-sided p gives the statistic's magnitude ``q(1 - p / 2)``; a one-sided p gives
    ``q(1 - p)``, negative when ``p > 1/2`` (an estimate on the other side of the null). ``q`` is
    the t quantile on ``df`` degrees of freedom (normal when infinite).

    >>> round(float(statistic_from_p(0.05, np.inf, 2)), 3)
    1.96
    """
    p, df, sides = _arrays(p, df, sides)
    with np.errstate(invalid="ignore"):
        return upper_quantile(np.where(sides == 2, p / 2.0, p), df)


def p_from_statistic(statistic: np.ndarray, df: np.ndarray, sides: np.ndarray) -> np.ndarray:
    """The p-value of a test statistic oriented in the test's direction (inverse of
    :func:`statistic_from_p`): ``2 P(T > |t|)`` two-sided, ``P(T > t)`` one-sided.

    >>> round(float(p_from_statistic(1.959964, np.inf, 2)), 4)
    0.05
    """
    statistic, df, sides = _arrays(statistic, df, sides)
    two = np.minimum(2.0 * _upper_tail(np.abs(statistic), df), 1.0)
    return np.where(sides == 2, two, _upper_tail(statistic, df))


def observed_power(
    statistic: np.ndarray, df: np.ndarray, alpha: np.ndarray, sides: np.ndarray
) -> np.ndarray:
    """Power of the study's test at the observed effect ("observed" or "post-hoc" power).

    Parameters
    ----------
    statistic : array_like
        Observed estimate divided by its standard error, oriented in the test's direction.
    df : array_like
        Degrees of freedom of the test; ``inf`` for a z test.
    alpha, sides : array_like
        Significance level of the comparison and 1 or 2.

    Returns
    -------
    ndarray
        The power of the test (noncentral t, or normal) with noncentrality equal to the observed
        statistic.

    Notes
    -----
    The observed statistic is a one-to-one function of the p-value, so this "power" is too: it
    adds nothing to the p-value and cannot show that a non-significant study was informative [2]_.
    For a z test it is 0.50 (one-sided: exactly) when ``p = alpha``, below 0.50 whenever the
    result is not significant and above it whenever it is.

    Examples
    --------
    >>> round(float(observed_power(1.959964, np.inf, 0.05, 2)), 3)
    0.5
    """
    statistic, df, alpha, sides = _arrays(statistic, df, alpha, sides)
    out = np.full(statistic.shape, np.nan)
    ok = np.isfinite(statistic) & (df > 0) & np.isfinite(alpha) & np.isfinite(sides)
    if ok.any():
        out[ok] = t_power(statistic[ok], df[ok], alpha[ok], sides[ok])
    return out


def observed_power_from_p(
    p: np.ndarray, df: np.ndarray, alpha: np.ndarray, sides: np.ndarray
) -> np.ndarray:
    """Observed power as a function of the p-value alone (Hoenig & Heisey's curve [2]_).

    ``p`` is the test's own p-value (two-sided for a two-sided test).

    >>> observed_power_from_p(np.array([0.05, 0.2]), np.inf, 0.05, 2).round(3).tolist()
    [0.5, 0.249]
    """
    return observed_power(statistic_from_p(p, df, sides), df, alpha, sides)


# -- Type S and Type M --------------------------------------------------------------------------


class SignMagnitude(NamedTuple):
    """Result of :func:`sign_and_magnitude_errors` (arrays, one entry per study)."""

    power: np.ndarray
    type_s: np.ndarray
    exaggeration: np.ndarray


def sign_and_magnitude_errors(
    effect: np.ndarray, se: np.ndarray, alpha: np.ndarray, sides: np.ndarray
) -> SignMagnitude:
    """Type S error rate and expected exaggeration ratio of a significant estimate.

    Parameters
    ----------
    effect : array_like
        The assumed true effect on the analysis scale, signed: positive means the direction a
        one-sided test looks at (for a two-sided test only its magnitude matters).
    se : array_like
        Standard error of the estimate, > 0.
    alpha, sides : array_like
        Significance level of the comparison, and 1 or 2.

    Returns
    -------
    SignMagnitude
        ``power`` (normal approximation), ``type_s`` (probability that a significant estimate
        has the wrong sign) and ``exaggeration`` (expected ``|estimate| / |effect|`` given
        significance); nan where ``effect`` is 0 or ``se`` is not positive.

    Notes
    -----
    With ``z = estimate / se ~ N(lam, 1)``, ``lam = effect / se``, and critical value ``c``
    (``z_{1 - alpha / sides}``), a two-sided test is significant when ``|z| > c``. Write
    ``hi = Phi(lam - c)`` and ``lo = Phi(-lam - c)`` for ``lam > 0``; then [1]_

    * ``power = hi + lo``; ``type_s = lo / power``;
    * ``E[|z|; |z| > c] = lam (hi - lo) + phi(c - lam) + phi(c + lam)`` (moments of a truncated
      normal), and ``exaggeration = E[|z|; |z| > c] / (power lam)``.

    A one-sided test is significant when ``z > c``, so every significant estimate points the
    way the test looks: ``type_s`` is 0 (1 if the true effect points the other way), and
    ``exaggeration = (lam power + phi(c - lam)) / (power |lam|)`` with ``power = Phi(lam - c)``.

    Gelman & Carlin compute these quantities by simulation; the integrals have the closed forms
    above, so none is needed. The estimate is taken as normal with a known SE (their default).

    Examples
    --------
    A well-powered design barely exaggerates; a weak one does, and sometimes gets the sign wrong:

    >>> r = sign_and_magnitude_errors(np.array([2.8, 0.5]), 1.0, 0.05, 2)
    >>> r.power.round(2).tolist(), r.type_s.round(3).tolist(), r.exaggeration.round(2).tolist()
    ([0.8, 0.08], [0.0, 0.088], [1.13, 4.79])
    """
    effect, se, alpha, sides = _arrays(effect, se, alpha, sides)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        lam = np.where(se > 0, effect / se, np.nan)
        lam = np.where(lam == 0, np.nan, lam)
        c = -special.ndtri(alpha / sides)
        two = sides == 2
        mag = np.abs(lam)
        # Two-sided: by symmetry work with |lam|; "lo" is the wrong-sign rejection region.
        hi = special.ndtr(mag - c)
        lo = special.ndtr(-mag - c)
        power_two = hi + lo
        moment_two = mag * (hi - lo) + _normal_pdf(c - mag) + _normal_pdf(c + mag)
        # One-sided: lam keeps its sign (negative: the truth is on the side the test ignores).
        power_one = special.ndtr(lam - c)
        moment_one = lam * power_one + _normal_pdf(c - lam)
        power = np.where(two, power_two, power_one)
        type_s = np.where(two, lo / power_two, np.where(lam > 0, 0.0, 1.0))
        exaggeration = np.where(two, moment_two, moment_one) / (power * mag)
    # A zero effect has no sign to get wrong and no magnitude to exaggerate (its power is alpha);
    # a significant result so improbable that its probability underflows has no defined ratio.
    undefined = ~np.isfinite(lam) | ~np.isfinite(c) | ~(power > 0)
    power = np.where(np.isfinite(lam), power, np.where((effect == 0) & (se > 0), alpha, np.nan))
    type_s = np.where(undefined, np.nan, type_s)
    exaggeration = np.where(undefined, np.nan, exaggeration)
    return SignMagnitude(power, type_s, exaggeration)


# -- results --------------------------------------------------------------------------------------

#: Where each value of a completed result came from (codes of :class:`CompletedResults`).
REPORTED, FROM_CI, FROM_P, FROM_EFFECT_SE, MISSING = 0, 1, 2, 3, 4


@dataclass
class CompletedResults:
    """A study's result with the missing parts derived, all on the analysis scale.

    Attributes
    ----------
    effect, se, p : estimate, standard error and p-value of the study's test.
    ci_low, ci_high : the confidence interval dual to the test (level :func:`dual_ci_level`).
    ci_level : that level.
    effect_from, se_from, p_from, ci_from : int8 codes: ``REPORTED``, ``FROM_CI``, ``FROM_P``,
        ``FROM_EFFECT_SE`` or ``MISSING`` (``ci_from`` is ``REPORTED`` only when the reported
        interval has the test's level).
    ci_unused : a reported interval was not used (only one bound given).
    """

    effect: np.ndarray
    se: np.ndarray
    p: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    ci_level: np.ndarray
    effect_from: np.ndarray
    se_from: np.ndarray
    p_from: np.ndarray
    ci_from: np.ndarray
    ci_unused: np.ndarray


def complete_results(
    effect: np.ndarray,
    se: np.ndarray,
    ci_low: np.ndarray,
    ci_high: np.ndarray,
    p: np.ndarray,
    *,
    df: np.ndarray,
    alpha: np.ndarray,
    sides: np.ndarray,
    direction: np.ndarray,
    ci_level: np.ndarray | None = None,
) -> CompletedResults:
    """Derive the missing parts of reported results, on the analysis scale.

    Parameters
    ----------
    effect, se, ci_low, ci_high, p : array_like
        As reported (nan where not reported), the effect and interval already on the analysis
        scale; ``p`` is the p-value of the study's test (two-sided for a two-sided test).
    df : array_like
        Degrees of freedom of the study's test (``inf``: normal).
    alpha, sides, direction : array_like
        The study's test: level of the comparison, 1 or 2, and the side a one-sided test looks at.
    ci_level : array_like, optional
        Level of the reported interval; nan or omitted: the level dual to the test.

    Returns
    -------
    CompletedResults

    Notes
    -----
    In this order, each from what is known by then:

    1. estimate = midpoint of the reported interval (intervals are symmetric on the analysis
       scale);
    2. SE = interval width / (2 q), with ``q`` the quantile of the interval's level; else
       ``|estimate| / |t_p|`` with ``t_p`` the statistic implied by p (undefined when the
       estimate is 0 or p gives a zero statistic);
    3. p from ``estimate / SE``;
    4. the interval at the test's level: the reported one when it has that level, else
       ``estimate ± q SE``.

    Examples
    --------
    A 95 % interval (1, 5) for a two-sided z test at .05: estimate 3, SE 1.02, p = 0.0033.

    >>> r = complete_results(np.nan, np.nan, 1.0, 5.0, np.nan, df=np.inf, alpha=0.05, sides=2,
    ...                      direction=1.0)
    >>> float(r.effect[0]), round(float(r.se[0]), 3), round(float(r.p[0]), 4)
    (3.0, 1.02, 0.0033)
    """
    effect, se, ci_low, ci_high, p, df, alpha, sides, direction = (
        np.atleast_1d(a).copy()
        for a in _arrays(effect, se, ci_low, ci_high, p, df, alpha, sides, direction)
    )
    shape = effect.shape
    level_test = dual_ci_level(alpha, sides)
    level = level_test if ci_level is None else np.broadcast_to(ci_level, shape).astype(float)
    level = np.where(np.isnan(level), level_test, level)

    def codes(known: np.ndarray) -> np.ndarray:
        return np.where(known, REPORTED, MISSING).astype(np.int8)

    have_ci = np.isfinite(ci_low) & np.isfinite(ci_high)
    ci_unused = np.isfinite(ci_low) ^ np.isfinite(ci_high)
    effect_from, se_from, p_from = (
        codes(np.isfinite(effect)),
        codes(np.isfinite(se)),
        codes(np.isfinite(p)),
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        # 1. the estimate from the interval
        fill = ~np.isfinite(effect) & have_ci
        effect = np.where(fill, (ci_low + ci_high) / 2.0, effect)
        effect_from[fill] = FROM_CI
        # 2. the SE from the interval, else from the estimate and p
        q_level = critical_value((1.0 - level) / 2.0, df)
        from_ci = (ci_high - ci_low) / (2.0 * q_level)
        fill = ~np.isfinite(se) & have_ci & (from_ci > 0)
        se = np.where(fill, from_ci, se)
        se_from[fill] = FROM_CI
        from_p = np.abs(effect) / np.abs(statistic_from_p(p, df, sides))
        fill = ~np.isfinite(se) & np.isfinite(from_p) & (from_p > 0)
        se = np.where(fill, from_p, se)
        se_from[fill] = FROM_P
        se = np.where(se > 0, se, np.nan)
        # 3. p from the estimate and SE
        stat = direction * effect / se
        fill = ~np.isfinite(p) & np.isfinite(stat)
        p = np.where(fill, p_from_statistic(stat, df, sides), p)
        p_from[fill] = FROM_EFFECT_SE
        # 4. the interval dual to the test
        same_level = np.abs(level - level_test) < 1e-9
        q_test = critical_value(alpha / sides, df)
        use_reported = have_ci & same_level
        low = np.where(use_reported, ci_low, effect - q_test * se)
        high = np.where(use_reported, ci_high, effect + q_test * se)
    ci_from = np.where(
        use_reported, REPORTED, np.where(np.isfinite(low), FROM_EFFECT_SE, MISSING)
    ).astype(np.int8)
    low = np.where(np.isfinite(low), low, np.nan)
    high = np.where(np.isfinite(high), high, np.nan)
    return CompletedResults(
        effect=np.where(np.isfinite(effect), effect, np.nan),
        se=se,
        p=p,
        ci_low=low,
        ci_high=high,
        ci_level=level_test,
        effect_from=effect_from,
        se_from=se_from,
        p_from=p_from,
        ci_from=ci_from,
        ci_unused=ci_unused,
    )


# -- what the interval rules out ----------------------------------------------------------------


def significant(
    ci_low: np.ndarray,
    ci_high: np.ndarray,
    p: np.ndarray,
    *,
    alpha: np.ndarray,
    sides: np.ndarray,
    direction: np.ndarray,
) -> np.ndarray:
    """1.0 where the study's test rejects, 0.0 where it does not, nan where unknown.

    The interval dual to the test decides where it is known (a two-sided test rejects when it
    excludes 0; a one-sided test when it lies entirely on the side the test looks at); else
    ``p < alpha``.
    """
    ci_low, ci_high, p, alpha, sides, direction = _arrays(
        ci_low, ci_high, p, alpha, sides, direction
    )
    near = np.minimum(direction * ci_low, direction * ci_high)
    far = np.maximum(direction * ci_low, direction * ci_high)
    by_ci = (near > 0) | ((sides == 2) & (far < 0))
    have_ci = np.isfinite(near) & np.isfinite(far)
    with np.errstate(invalid="ignore"):
        by_p = p < alpha
    out = np.where(have_ci, by_ci, np.where(np.isfinite(p), by_p, np.nan))
    return out.astype(float)


def ci_verdicts(
    ci_low: np.ndarray,
    ci_high: np.ndarray,
    is_significant: np.ndarray,
    planned_effect: np.ndarray,
    sesoi: np.ndarray,
    *,
    direction: np.ndarray,
    either: np.ndarray | None = None,
) -> np.ndarray:
    """What a result's confidence interval rules out, as one word per study.

    Parameters
    ----------
    ci_low, ci_high : array_like
        The interval dual to the study's test, on the analysis scale (nan: unknown).
    is_significant : array_like
        1.0 / 0.0 / nan, from :func:`significant`.
    planned_effect, sesoi : array_like
        Reference effects on the analysis scale (nan: not given), pointing in the planned
        ``direction``; only their magnitudes are used.
    direction : array_like
        +1 or -1.
    either : array_like of bool, optional
        Studies with no direction (no ``direction`` given and no signed planned effect): the
        SESOI is then a band ``(-sesoi, sesoi)`` and the interval excludes it only when it lies
        wholly inside the band; the planned effect is not used; nothing depends on the sign of
        the estimate.

    Returns
    -------
    ndarray of object
        ``"detected"`` (the test rejects: the interval excludes 0 — for a one-sided test, on the
        side the test looks at); otherwise the smallest reference effect the interval excludes,
        ``"excludes_sesoi"`` or ``"excludes_planned_effect"`` (excluding the smaller one implies
        excluding the larger, because the interval then holds 0 or lies on the other side);
        otherwise ``"inconclusive"``. None where the interval is unknown (unless the p-value
        shows significance), or where the result is not significant and there is no reference
        effect to compare with.

    Examples
    --------
    >>> ci_verdicts(np.array([0.5, -1.0, -1.0, -1.0]), np.array([3.0, 1.5, 3.0, 3.0]),
    ...             np.array([1.0, 0.0, 0.0, 0.0]), np.array([2.0, 2.0, 2.0, np.nan]),
    ...             np.array([1.0, 1.0, 1.0, np.nan]), direction=1.0).tolist()
    ['detected', 'excludes_planned_effect', 'inconclusive', None]

    With no direction, (-0.3, 0.1) and its mirror image (-0.1, 0.3) get the same verdict
    against a SESOI of 0.2, and (-0.15, 0.1) lies inside the band:

    >>> ci_verdicts(np.array([-0.3, -0.1, -0.15]), np.array([0.1, 0.3, 0.1]), 0.0, np.nan,
    ...             0.2, direction=1.0, either=True).tolist()
    ['inconclusive', 'inconclusive', 'excludes_sesoi']
    """
    ci_low, ci_high, is_significant, planned_effect, sesoi, direction = _arrays(
        ci_low, ci_high, is_significant, planned_effect, sesoi, direction
    )
    either = np.zeros(ci_low.shape, dtype=bool) if either is None else _arrays(either)[0] > 0
    far = np.maximum(direction * ci_low, direction * ci_high)
    plan = np.abs(planned_effect)
    small = np.abs(sesoi)
    with np.errstate(invalid="ignore"):
        # Not significant: the interval holds 0 or lies on the side the test ignores, so it
        # excludes a reference effect exactly when that effect lies beyond its far end.
        excl_plan = np.isfinite(far) & (plan > far)
        excl_sesoi = np.isfinite(far) & (small > far)
        sesoi_first = ~(plan < small)  # the SESOI is the smaller (or only) reference effect
    out = np.full(ci_low.shape, None, dtype=object)
    has_ref = np.isfinite(plan) | np.isfinite(small)
    undecided = np.isfinite(far) & has_ref
    out[undecided] = "inconclusive"
    out[excl_plan & ~(excl_sesoi & sesoi_first)] = "excludes_planned_effect"
    out[excl_sesoi & (sesoi_first | ~excl_plan)] = "excludes_sesoi"
    # No direction: only the band (-sesoi, sesoi) is a reference, on both sides at once.
    with np.errstate(invalid="ignore"):
        inside = (np.abs(ci_low) < small) & (np.abs(ci_high) < small)
    band = either & np.isfinite(ci_low) & np.isfinite(ci_high)
    out[either] = None
    out[band & np.isfinite(small)] = "inconclusive"
    out[band & inside] = "excludes_sesoi"
    out[is_significant == 1.0] = "detected"
    return out
