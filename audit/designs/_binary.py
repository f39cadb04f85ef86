"""Effect measures of a binary outcome, and the result a trial's 2×2 table gives in each.

Small pure functions over numpy arrays (they broadcast), used by the proportion designs and,
later, by anything that must move a value between measures (a non-inferiority margin given as a
risk ratio, say). ``p1`` is the control (reference) proportion, ``p2`` the intervention one, and
every measure compares group 2 with group 1:

=================  ==================  ==========================  ==================
measure            value               analysis scale (``log``)     no effect
=================  ==================  ==========================  ==================
risk_difference    p2 − p1             p2 − p1                      0
risk_ratio         p2 / p1             ln(p2 / p1)                  1 (log 0)
odds_ratio         p2 q1 / (p1 q2)     ln of it                     1 (log 0)
=================  ==================  ==========================  ==================

(``q = 1 − p``). Outside its domain a function returns nan (an odds ratio ≤ 0, a risk ratio that
takes ``p2`` beyond 1, a proportion outside [0, 1]).

References
----------
.. [1] Fleiss, J. L., Levin, B. & Paik, M. C. (2003). Statistical Methods for Rates and
   Proportions, 3rd ed., chapters 6-7 (the odds ratio and its standard error; Woolf's
   formula; adding one half to each cell).
.. [2] Agresti, A. (2013). Categorical Data Analysis, 3rd ed., section 3.1 (Wald intervals for
   the difference, the log relative risk and the log odds ratio).
.. [3] Haldane, J. B. S. (1956). The estimation and significance of the logarithm of a ratio of
   frequencies. Annals of Human Genetics 20:309-311.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

__all__ = [
    "MEASURES",
    "RATIO_MEASURES",
    "CountResult",
    "convert_measure",
    "counts_result",
    "from_log",
    "measure_of",
    "p2_from",
    "to_log",
]

#: The values of ``effect_measure``, the default first.
MEASURES = ("risk_difference", "risk_ratio", "odds_ratio")
#: Measures analysed on the log scale (no effect = 1).
RATIO_MEASURES = frozenset({"risk_ratio", "odds_ratio"})

#: Added to every cell of a 2×2 table with an empty cell before a ratio or its SE is formed
#: (Haldane 1956; Fleiss, Levin & Paik 2003, section 6.3).
ZERO_CELL_CORRECTION = 0.5


def _arrays(*values: object) -> list[np.ndarray]:
    return list(np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in values)))


def _proportion(p: np.ndarray) -> np.ndarray:
    return np.where((p >= 0) & (p <= 1), p, np.nan)


def p2_from(measure: str, p1: np.ndarray, value: np.ndarray) -> np.ndarray:
    """The intervention proportion a control proportion ``p1`` and an effect give.

    Examples
    --------
    >>> float(p2_from("risk_difference", 0.2, 0.1)), float(p2_from("risk_ratio", 0.2, 1.5))
    (0.30000000000000004, 0.30000000000000004)
    >>> round(float(p2_from("odds_ratio", 0.2, 2.0)), 6)   # odds 0.25 * 2 = 0.5
    0.333333
    """
    p1, value = _arrays(p1, value)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if measure == "risk_difference":
            p2 = p1 + value
        elif measure == "risk_ratio":
            p2 = np.where(value >= 0, p1 * value, np.nan)
        elif measure == "odds_ratio":
            odds = np.where(value > 0, p1 / (1.0 - p1) * value, np.nan)
            p2 = np.where(np.isinf(odds), 1.0, odds / (1.0 + odds))
        else:
            raise ValueError(f"unknown effect measure {measure!r}")
    return _proportion(np.where(np.isnan(_proportion(p1)), np.nan, p2))


def measure_of(measure: str, p1: np.ndarray, p2: np.ndarray) -> np.ndarray:
    """The effect of ``p2`` against ``p1`` in ``measure`` (nan outside the domain).

    Examples
    --------
    >>> round(float(measure_of("odds_ratio", 0.2, 1 / 3)), 10)
    2.0
    """
    p1, p2 = (_proportion(p) for p in _arrays(p1, p2))
    with np.errstate(divide="ignore", invalid="ignore"):
        if measure == "risk_difference":
            return p2 - p1
        if measure == "risk_ratio":
            return p2 / p1
        if measure == "odds_ratio":
            return p2 * (1.0 - p1) / (p1 * (1.0 - p2))
    raise ValueError(f"unknown effect measure {measure!r}")


def convert_measure(value: np.ndarray, source: str, target: str, p1: np.ndarray) -> np.ndarray:
    """An effect in ``source`` measure as the same pair of proportions in ``target`` measure,
    at control proportion ``p1`` (``p2`` fixed).

    Examples
    --------
    A risk ratio of 0.5 from a control rate of 0.4 is a risk difference of −0.2:

    >>> round(float(convert_measure(0.5, "risk_ratio", "risk_difference", 0.4)), 12)
    -0.2
    """
    return measure_of(target, p1, p2_from(source, p1, value))


def to_log(measure: str, value: np.ndarray) -> np.ndarray:
    """The analysis scale: the log of a ratio, a risk difference as it is."""
    value = np.asarray(value, dtype=float)
    if measure not in RATIO_MEASURES:
        return value
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(value > 0, np.log(np.where(value > 0, value, 1.0)), np.nan)


def from_log(measure: str, value: np.ndarray) -> np.ndarray:
    """Inverse of :func:`to_log`."""
    value = np.asarray(value, dtype=float)
    if measure not in RATIO_MEASURES:
        return value
    with np.errstate(over="ignore"):
        return np.exp(value)


def wald_se(measure: str, n1, n2, p1, p2) -> np.ndarray:
    """Large-sample SE of the estimated measure on its analysis scale at true ``p1``, ``p2``.

    ``√(p1 q1 / n1 + p2 q2 / n2)`` for the risk difference, ``√(q1 / (n1 p1) + q2 / (n2 p2))``
    for the log risk ratio, ``√(1 / (n1 p1 q1) + 1 / (n2 p2 q2))`` for the log odds ratio
    (Woolf) [2]_.
    """
    n1, n2, p1, p2 = _arrays(n1, n2, p1, p2)
    q1, q2 = 1.0 - p1, 1.0 - p2
    with np.errstate(divide="ignore", invalid="ignore"):
        if measure == "risk_difference":
            var = p1 * q1 / n1 + p2 * q2 / n2
        elif measure == "risk_ratio":
            var = q1 / (n1 * p1) + q2 / (n2 * p2)
        elif measure == "odds_ratio":
            var = 1.0 / (n1 * p1 * q1) + 1.0 / (n2 * p2 * q2)
        else:
            raise ValueError(f"unknown effect measure {measure!r}")
        se = np.sqrt(var)
    return np.where(np.isfinite(se) & (se > 0), se, np.nan)


class CountResult(NamedTuple):
    """A result computed from events per arm."""

    effect: np.ndarray  # in the measure (a ratio on its natural scale)
    se: np.ndarray  # on the analysis scale (log for ratios)
    corrected: np.ndarray  # bool: a zero cell made the correction apply


def counts_result(measure: str, events1, n1, events2, n2) -> CountResult:
    """Estimate and SE of ``measure`` from ``events1`` of ``n1`` (control) and ``events2`` of
    ``n2`` (intervention).

    Notes
    -----
    The estimate is the measure of the observed proportions; the SE is the Wald SE of
    :func:`wald_se` at them. Where a cell of the 2×2 table is empty (no events, or only events, in
    an arm) a ratio or its SE is not finite: then 0.5 is added to all four cells (Haldane 1956
    [3]_; Fleiss, Levin & Paik 2003 [1]_) before the estimate and the SE are formed, for every
    measure (for the risk difference only the SE needs it, but one rule keeps the three measures
    of one table alike). Events above the arm size, or negative, give nan.

    Examples
    --------
    30 of 100 events in the control arm, 15 of 100 in the intervention arm: the odds ratio is
    (15·70) / (85·30) = 0.4118, and Woolf's SE of its log is √(1/15 + 1/85 + 1/30 + 1/70):

    >>> r = counts_result("odds_ratio", 30, 100, 15, 100)
    >>> round(float(r.effect), 4), round(float(r.se), 4)
    (0.4118, 0.355)
    """
    e1, n1, e2, n2 = _arrays(events1, n1, events2, n2)
    ok = (e1 >= 0) & (e2 >= 0) & (e1 <= n1) & (e2 <= n2) & (n1 > 0) & (n2 > 0)
    empty = ok & ((e1 == 0) | (e2 == 0) | (e1 == n1) | (e2 == n2))
    add = np.where(empty, ZERO_CELL_CORRECTION, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        a1, m1 = e1 + add, n1 + 2.0 * add
        a2, m2 = e2 + add, n2 + 2.0 * add
        p1, p2 = a1 / m1, a2 / m2
        effect = measure_of(measure, p1, p2)
        se = wald_se(measure, m1, m2, p1, p2)
    return CountResult(np.where(ok, effect, np.nan), np.where(ok, se, np.nan), empty)
