"""Non-inferiority and equivalence rows: the margin on the analysis scale, the test against it,
its power, required size, detectable margin and the verdict of a reported interval.

A row's ``hypothesis`` is ``superiority`` (the default, audited by the designs as before),
``non_inferiority`` or ``equivalence``. For the other two everything is read on the design's
analysis scale (log for ratios), where the estimate is about normal with the design's standard
error and no effect is 0:

* ``margin`` is the margin's magnitude there (``log`` of a ratio margin, a ratio below 1 read as
  its reciprocal);
* ``truth`` is the planned true difference (blank: none), signed as group 2 minus group 1;
* ``better`` is the way that counts as better (the ``direction`` column, else the sign of the
  planned effect), needed for non-inferiority only.

Non-inferiority is the one-sided test of "worse than the margin" at ``alpha``; equivalence is
two one-sided tests, each at ``alpha`` (TOST). Power uses the design's own SE at the planned
true difference (for a risk difference: unpooled at the assumed true proportions) and its
test's df (mean designs: the exact t, :mod:`audit.designs._margin`). Formulas, conventions and
references: ``docs/methods/hypotheses.md``.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from scipy import special

from audit.designs import Design, Scenario, TestSpec
from audit.designs._base import TDesign, _hypotheses, _margin_rows
from audit.designs._margin import (
    detectable_equivalence_margin,
    detectable_ni_margin,
    ni_power,
    tost_power,
)
from audit.designs._solve import smallest_size, solve_increasing
from audit.plan_methods import DesignMethods, PlanInputs, PlanMethod, methods_for

__all__ = [
    "HYPOTHESES",
    "MARGIN_HYPOTHESES",
    "MarginTest",
    "ci_verdicts",
    "detectable_margin",
    "margin_bounds",
    "margin_p",
    "margin_rows",
    "margin_test",
    "power",
    "power_curve",
    "restricted_proportions",
    "size_methods",
]

#: Values of the ``hypothesis`` column, the default first.
HYPOTHESES = ("superiority", "non_inferiority", "equivalence")
#: The hypotheses tested against a margin.
MARGIN_HYPOTHESES = ("non_inferiority", "equivalence")
#: Verdicts of a reported interval against the margin (``ci_verdict``).
NI_VERDICTS = ("non_inferior", "inferior", "inconclusive")
EQUIVALENCE_VERDICTS = ("equivalent", "not_equivalent", "inconclusive")

_REF_JULIOUS = "Julious, S. A. (2004). Statistics in Medicine 23:1921-1986"
_REF_BLACKWELDER = "Blackwelder, W. C. (1982). Controlled Clinical Trials 3:345-353"
_REF_FARRINGTON = "Farrington, C. P. & Manning, G. (1990). Statistics in Medicine 9:1447-1454"
_REF_SCHOENFELD = "Schoenfeld, D. (1983). Biometrics 39:499-503, on the log-HR margin"


def hypothesis_of(rows: pd.DataFrame) -> np.ndarray:
    """The ``hypothesis`` column as text (superiority where the column is absent or blank)."""
    return _hypotheses(rows)


def margin_rows(rows: pd.DataFrame) -> np.ndarray:
    """True where a row tests non-inferiority or equivalence."""
    return _margin_rows(rows)


def _col(rows: pd.DataFrame, name: str) -> np.ndarray:
    if name in rows.columns:
        return rows[name].to_numpy(dtype=float, na_value=np.nan)
    return np.full(len(rows), np.nan)


@dataclass(frozen=True)
class MarginTest:
    """The margin tests of a design's rows, as float arrays on the analysis scale.

    Attributes
    ----------
    equivalence : True for TOST rows, False for non-inferiority rows.
    margin : the margin's magnitude (> 0; nan where not usable).
    margin_effect : the margin in effect units as used (a ratio margin above 1).
    truth : planned true difference (0 where the row gives none).
    truth_effect : the same in effect units (no effect where none is given).
    better : +1 or -1, the way that counts as better (+1 on equivalence rows).
    alpha, power : level of each one-sided test; target power.
    """

    equivalence: np.ndarray
    margin: np.ndarray
    margin_effect: np.ndarray
    truth: np.ndarray
    truth_effect: np.ndarray
    better: np.ndarray
    alpha: np.ndarray
    power: np.ndarray

    def one_sided(self) -> TestSpec:
        """The one-sided test (looking the better way) these rows' sizes and CIs are read at."""
        n = len(self.alpha)
        return TestSpec(self.alpha, np.ones(n), self.power, self.better, np.zeros(n, dtype=bool))


def margin_test(design: Design, rows: pd.DataFrame, test: TestSpec) -> MarginTest:
    """The :class:`MarginTest` of rows that validation let through (margin given, > 0)."""
    margin = _col(rows, "margin")
    if design.is_ratio:
        # A ratio margin is given above 1; one below 1 is its reciprocal (a note says so).
        with np.errstate(divide="ignore"):
            margin = np.where(margin < 1.0, 1.0 / margin, margin)
    with np.errstate(divide="ignore", invalid="ignore"):
        margin_a = np.abs(design.to_analysis(margin))
    margin_a = np.where(np.isfinite(margin_a) & (margin_a > 0), margin_a, np.nan)
    effect = design.planned_effect(rows)
    with np.errstate(divide="ignore", invalid="ignore"):
        truth = design.to_analysis(effect)
    known = np.isfinite(truth)
    truth = np.where(known, truth, 0.0)
    none = design.from_analysis(np.zeros(len(rows)))
    equivalence = hypothesis_of(rows) == "equivalence"
    return MarginTest(
        equivalence=equivalence,
        margin=margin_a,
        margin_effect=margin,
        truth=truth,
        truth_effect=np.where(known, effect, none),
        better=np.where(equivalence, 1.0, test.direction),
        alpha=test.alpha,
        power=test.power,
    )


def _se_df(design: Design, sc: Scenario, mt: MarginTest) -> tuple[np.ndarray, np.ndarray]:
    with np.errstate(divide="ignore", invalid="ignore"):
        se = design.se(sc, mt.truth_effect)
        df = np.asarray(design.analysis_df(sc), dtype=float)
    return se, np.where(np.isnan(df), np.nan, df)


def power(design: Design, sc: Scenario, mt: MarginTest) -> np.ndarray:
    """Power of each row's margin test in scenario ``sc`` at the planned true difference."""
    se, df = _se_df(design, sc, mt)
    out = np.full(len(se), np.nan)
    eq = mt.equivalence
    if (~eq).any():
        out[~eq] = ni_power(
            mt.better[~eq] * mt.truth[~eq], mt.margin[~eq], se[~eq], df[~eq], mt.alpha[~eq]
        )
    if eq.any():
        out[eq] = tost_power(mt.truth[eq], mt.margin[eq], se[eq], df[eq], mt.alpha[eq])
    return out


def power_curve(design: Design, sc: Scenario, mt: MarginTest, truth: np.ndarray) -> np.ndarray:
    """Power in ``sc`` at other true differences ``truth`` (analysis scale; one per row), the
    margins and levels of ``mt`` kept: the curve of a figure."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        effect = design.from_analysis(truth)
    return power(design, sc, replace(mt, truth=truth, truth_effect=effect))


def margin_bounds(design: Design, mt: MarginTest) -> tuple[np.ndarray, np.ndarray]:
    """The margin's edges in effect units: for non-inferiority the worse-side edge (and nan),
    for equivalence the lower and upper edges of the range."""
    with np.errstate(over="ignore", invalid="ignore"):
        worse = design.from_analysis(-mt.better * mt.margin)
        low = design.from_analysis(-mt.margin)
        high = design.from_analysis(mt.margin)
    return np.where(mt.equivalence, low, worse), np.where(mt.equivalence, high, np.nan)


def detectable_margin(design: Design, sc: Scenario, mt: MarginTest) -> np.ndarray:
    """``detectable_margin``: the smallest margin (effect units; ratios above 1) the design
    demonstrates with the target power at the planned true difference. For non-inferiority it
    may come out at or below no effect (the design would show even superiority)."""
    se, df = _se_df(design, sc, mt)
    out = np.full(len(se), np.nan)
    eq = mt.equivalence
    ok = np.isfinite(se) & (df > 0) & (mt.power > mt.alpha) & (mt.power < 1)
    ni = ok & ~eq
    if ni.any():
        out[ni] = detectable_ni_margin(
            mt.better[ni] * mt.truth[ni], se[ni], df[ni], mt.alpha[ni], mt.power[ni]
        )
    te = ok & eq
    if te.any():
        out[te] = detectable_equivalence_margin(
            mt.truth[te], se[te], df[te], mt.alpha[te], mt.power[te]
        )
    with np.errstate(over="ignore", invalid="ignore"):
        return design.from_analysis(out)


# -- required sizes ------------------------------------------------------------------------------


def _unit_scenario(design: Design, sc: Scenario) -> Scenario | None:
    """The scenario at one unit of the design's sizing unit (the first group's size of a t or
    proportions design, a one-group design's N, survival's events), the allocation kept; None
    for a design without sizes. The SE there times ``1 / sqrt(size)`` is the SE at ``size``."""
    n = len(next(iter(sc.values())))
    ones = np.ones(n)
    if isinstance(design, TDesign):
        return design.with_n1(sc, ones)
    if design.name == "survival":
        return {**sc, "events": ones}
    if "n1" in sc and "n2" in sc:
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = sc["n2"] / sc["n1"]
        ratio = np.where(np.isfinite(ratio) & (ratio > 0), ratio, 1.0)
        return {**sc, "n1": ones, "n2": ratio}
    return None


def _needed_se(mt: MarginTest) -> np.ndarray:
    """The SE at which the normal (known-SE) margin test reaches the target power: for
    non-inferiority ``(s·Δ + M) / (z_α + z_β)``; for TOST the root in the SE of
    ``Φ((M − Δ)/se − z_α) − Φ((−M − Δ)/se + z_α) = power``. nan where no SE does."""
    n = len(mt.alpha)
    out = np.full(n, np.nan)
    za = special.ndtri(1.0 - mt.alpha)
    zb = special.ndtri(mt.power)
    usable = (mt.power > mt.alpha) & (mt.power < 1) & np.isfinite(mt.margin)
    ni = usable & ~mt.equivalence
    with np.errstate(divide="ignore", invalid="ignore"):
        room = mt.better * mt.truth + mt.margin
        out[ni] = np.where(room[ni] > 0, room[ni] / (za[ni] + zb[ni]), np.nan)
    # TOST: power rises with precision x = 1/se and tends to 1 only inside the margin (at
    # |Δ| = M it tends to 1/2).
    te = usable & mt.equivalence & (np.abs(mt.truth) < mt.margin)
    if te.any():
        d, m, a, p = mt.truth[te], mt.margin[te], mt.alpha[te], mt.power[te]

        def power_at(x, d, m, a):  # type: ignore[no-untyped-def]
            return tost_power(d, m, 1.0 / x, np.inf, a)

        # |Δ| near 0: both tails share beta; |Δ| near M: one tail takes it all.
        z = special.ndtri(1.0 - a) + special.ndtri((1.0 + p) / 2.0)
        guess = z / (m - np.abs(d))
        x = solve_increasing(power_at, p, guess, lower=0.0, args=(d, m, a))
        out[te] = 1.0 / x
    return out


def _normal_size(design: Design, mt: MarginTest):  # type: ignore[no-untyped-def]
    """Size function (continuous sizing unit) of the normal approximation."""

    def size(inputs: PlanInputs) -> np.ndarray:
        unit = _unit_scenario(design, inputs.plan)
        if unit is None:
            return np.full(len(inputs.effect), np.nan)
        se1, _ = _se_df(design, unit, mt)
        with np.errstate(divide="ignore", invalid="ignore"):
            n = (se1 / _needed_se(mt)) ** 2
        return np.where(np.isfinite(n) & (n > 0), n, np.nan)

    return size


def _exact_t_size(design: TDesign, mt: MarginTest):  # type: ignore[no-untyped-def]
    """Size function of the exact t: the continuous first-group size (N for one group)."""

    def size(inputs: PlanInputs) -> np.ndarray:
        sc = inputs.plan
        n = len(inputs.effect)
        out = np.full(n, np.nan)
        guess = _normal_size(design, mt)(inputs)
        eq = mt.equivalence
        ni = ~eq
        if ni.any():
            # Non-inferiority is the one-sided t at the true difference shifted by the margin.
            shifted = design.from_analysis(mt.better * (mt.better * mt.truth + mt.margin))
            sub = {k: v[ni] for k, v in sc.items()}
            spec = TestSpec(mt.alpha[ni], np.ones(ni.sum()), mt.power[ni], mt.better[ni])
            out[ni] = design.first_group_size(sub, shifted[ni], spec)
        ok = eq & np.isfinite(guess)
        if ok.any():
            sub = {k: v[ok] for k, v in sc.items()}
            keys = list(sub)

            def power_at(n1, *rest):  # type: ignore[no-untyped-def]
                fields = dict(zip(keys, rest[:-3], strict=True))
                d, m, a = rest[-3:]
                s = design.with_n1(fields, n1)
                with np.errstate(divide="ignore", invalid="ignore"):
                    return tost_power(d, m, design.se(s), design.df(s), a)

            lower = design.min_n1(sub)
            out[ok] = smallest_size(
                power_at,
                mt.power[ok],
                np.maximum(guess[ok], lower * 1.01),
                lower=lower,
                args=(*sub.values(), mt.truth[ok], mt.margin[ok], mt.alpha[ok]),
            )
        return out

    return size


def restricted_proportions(
    p1: np.ndarray, p2: np.ndarray, ratio: np.ndarray, difference: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Maximum-likelihood proportions ``(π1, π2)`` under the constraint ``π2 − π1 = difference``
    for proportions ``p1``, ``p2`` observed (or expected) in groups of sizes ``n1`` and
    ``ratio·n1`` (Farrington & Manning 1990; Miettinen & Nurminen 1985).

    The restricted score ``n1 (p1/π1 − q1/(1 − π1)) + n2 (p2/π2 − q2/(1 − π2))`` falls
    strictly in ``π1`` on the interval where both proportions lie in (0, 1), so its root is
    found by vectorised bisection (60 halvings, below 1e-16) rather than through the closed
    form of the cubic, which loses digits near its double roots.

    Examples
    --------
    Issue 15: 0.8 against 0.8, null difference −0.1, equal groups:

    >>> p1, p2 = restricted_proportions(0.8, 0.8, 1.0, -0.1)
    >>> round(float(p1), 5), round(float(p2), 5)
    (0.84106, 0.74106)
    """
    p1, p2, ratio, d = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (p1, p2, ratio, difference))
    )
    lo = np.maximum(0.0, -d)
    hi = np.minimum(1.0, 1.0 - d)

    def score(x: np.ndarray) -> np.ndarray:
        y = x + d
        with np.errstate(divide="ignore", invalid="ignore"):
            return p1 / x - (1 - p1) / (1 - x) + ratio * (p2 / y - (1 - p2) / (1 - y))

    a, b = lo.copy(), hi.copy()
    for _ in range(60):
        mid = (a + b) / 2.0
        up = score(mid) > 0
        a = np.where(up, mid, a)
        b = np.where(up, b, mid)
    pi1 = (a + b) / 2.0
    ok = np.isfinite(pi1) & (hi > lo)
    return np.where(ok, pi1, np.nan), np.where(ok, pi1 + d, np.nan)


def _farrington_manning_size(design: Design, mt: MarginTest):  # type: ignore[no-untyped-def]
    """Non-inferiority of two proportions with the null variance at the restricted maximum-
    likelihood proportions on the margin (Farrington & Manning 1990), the alternative
    variance at the assumed proportions: ``n1 = (z_α √V0 + z_β √V1)² / (s·Δ + M)²`` with
    ``V = π1(1 − π1) + π2(1 − π2)/r``."""

    def size(inputs: PlanInputs) -> np.ndarray:
        sc = inputs.plan
        n = len(inputs.effect)
        r = _unit_scenario(design, sc)["n2"]
        p1 = sc["p1"]
        with np.errstate(invalid="ignore"):
            p2 = design.intervention_rate(p1, mt.truth_effect)  # type: ignore[attr-defined]
        r1, r2 = restricted_proportions(p1, p2, r, -mt.better * mt.margin)
        with np.errstate(invalid="ignore", divide="ignore"):
            v0 = r1 * (1 - r1) + r2 * (1 - r2) / r
            v1 = p1 * (1 - p1) + p2 * (1 - p2) / r
            za = special.ndtri(1.0 - mt.alpha)
            zb = special.ndtri(mt.power)
            room = mt.better * mt.truth + mt.margin
            out = (za * np.sqrt(v0) + zb * np.sqrt(v1)) ** 2 / room**2
        usable = ~mt.equivalence & (room > 0) & (mt.power > mt.alpha) & np.isfinite(out) & (out > 0)
        return np.where(usable, out, np.full(n, np.nan))

    return size


def size_methods(design: Design, mt: MarginTest) -> DesignMethods | None:
    """The sample-size methods of these margin tests, rounded as the design rounds its sizes
    (for :func:`audit.plan_methods.reproduce`); None for a design without sizes."""
    if not design.size_keys or "n_required_plan" in design.not_applicable:
        return None
    groups = methods_for(design).groups
    normal = _normal_size(design, mt)
    if isinstance(design, TDesign):
        return DesignMethods(
            groups,
            (
                PlanMethod("exact t", _exact_t_size(design, mt), _REF_JULIOUS, default=True),
                PlanMethod("normal approximation", normal, _REF_JULIOUS),
            ),
        )
    if design.name == "survival":
        return DesignMethods(
            groups, (PlanMethod("Schoenfeld", normal, _REF_SCHOENFELD, default=True),)
        )
    return DesignMethods(
        groups,
        (
            PlanMethod(
                "normal approximation, unpooled variance", normal, _REF_BLACKWELDER, default=True
            ),
            # Non-inferiority only (nan on equivalence rows): the null variance at the margin.
            PlanMethod(
                "Farrington-Manning (restricted MLE variance)",
                _farrington_manning_size(design, mt),
                _REF_FARRINGTON,
            ),
        ),
    )


# -- the reported result against the margin -------------------------------------------------------


def ci_verdicts(low: np.ndarray, high: np.ndarray, mt: MarginTest) -> np.ndarray:
    """``ci_verdict`` of margin rows from the interval (analysis scale) at level 1 − 2α.

    Non-inferiority: ``non_inferior`` where the worse-side limit lies on the better side of the
    margin (``s·limit > −M``), ``inferior`` where the whole interval lies beyond it, else
    ``inconclusive``. Equivalence: ``equivalent`` where the interval lies inside (−M, M),
    ``not_equivalent`` where it lies wholly outside, else ``inconclusive``. None where the
    interval is unknown.

    Examples
    --------
    >>> mt = MarginTest(np.array([False, True]), np.array([0.1, 0.1]), np.array([0.1, 0.1]),
    ...                 np.zeros(2), np.zeros(2), np.ones(2), np.full(2, 0.025), np.full(2, 0.8))
    >>> ci_verdicts(np.array([-0.079, -0.05]), np.array([0.02, 0.12]), mt).tolist()
    ['non_inferior', 'inconclusive']
    """
    low = np.asarray(low, dtype=float)
    high = np.asarray(high, dtype=float)
    m = mt.margin
    s = mt.better
    worse = np.where(s > 0, low, -high)  # the worse-side limit, oriented: better is positive
    best = np.where(s > 0, high, -low)
    out = np.full(len(low), None, dtype=object)
    known = np.isfinite(low) & np.isfinite(high) & np.isfinite(m)
    eq = mt.equivalence
    with np.errstate(invalid="ignore"):
        ni_yes = worse > -m
        ni_no = best < -m
        eq_yes = (low > -m) & (high < m)
        eq_no = (low >= m) | (high <= -m)
    out[known] = "inconclusive"
    out[known & ~eq & ni_yes] = "non_inferior"
    out[known & ~eq & ni_no] = "inferior"
    out[known & eq & eq_yes] = "equivalent"
    out[known & eq & eq_no] = "not_equivalent"
    return out


def margin_p(estimate: np.ndarray, se: np.ndarray, df: np.ndarray, mt: MarginTest) -> np.ndarray:
    """p-value of the margin test from an estimate and its SE (analysis scale): non-inferiority
    ``P(T > (s·est + M) / se)``; TOST the larger of its two one-sided p-values."""
    df = np.where(np.isfinite(df) & (df > 0), df, np.inf)

    def upper(t: np.ndarray) -> np.ndarray:
        return np.where(
            np.isinf(df), special.ndtr(-t), special.stdtr(np.where(np.isinf(df), 1.0, df), -t)
        )

    with np.errstate(divide="ignore", invalid="ignore"):
        ni = upper((mt.better * estimate + mt.margin) / se)
        low = upper((estimate + mt.margin) / se)
        high = upper((mt.margin - estimate) / se)
    return np.where(mt.equivalence, np.maximum(low, high), ni)
