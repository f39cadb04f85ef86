"""Results as papers report them: a test statistic, arm means and SDs, and the reported p checked.

A published study rarely gives its estimate with a standard error. It gives a test statistic (t
with its df, F with two df, chi-square, z, r), a p-value, sometimes the arm means and SDs. This
module turns those forms into the effect and its standard error on each design's *analysis scale*
(:meth:`audit.designs.Design.to_analysis`), and recomputes a reported p-value from the other
forms a row gives, allowing for the rounding of printed numbers. :mod:`audit.metrics` hands the
results to :func:`audit.retro.complete_results`, which fills in what is left (an interval, a p).

The most direct source of each part of a result comes first:

* the effect: ``observed_effect``; the midpoint of the interval; the arm means
  (``mean2 - mean1``, standardized by the pooled SD where effects are ``d``); the test statistic
  times the realized design's standard error (:meth:`Design.effect_from_statistic`);
* its standard error: ``observed_se``; the interval's width; for a standardized mean difference
  ``sqrt(SE^2 + d^2 / (2 N))`` from d and the sizes (Borenstein et al. 2009, eq. 4.20); the arm
  SDs (pooled); the statistic (the design's SE it was scaled by, or ``|effect| / |statistic|``);
  finally ``|effect| / |t_p|`` from the p-value (in :func:`audit.retro.complete_results`);
* the p-value: ``observed_p`` as reported; the statistic's own p; the t test of the arm means;
  for a standardized mean difference, the t test of d at the realized sizes; else from the
  effect and its SE.

Significance is read from the study's own test: the reported interval or SE where given, else
the most direct p (the statistic's, the means' t test, the reported p, d's t test).

Signs follow the contract: differences are group 2 minus group 1, a t or z carries the sign of
the effect, and an F or chi-square on 1 df (which carries none) is signed only where the row has
a direction, taken to be the way the effect went (a note says so).

References
----------
.. [1] Borenstein, M., Hedges, L. V., Higgins, J. P. T. & Rothstein, H. R. (2009). Introduction
   to Meta-Analysis. Wiley, ch. 4 (means), 6 (correlations), 7 (converting among effect sizes).
.. [2] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from scipy import special

from audit._format import format_number

if TYPE_CHECKING:
    from audit.designs import Design, Scenario, TestSpec

__all__ = [
    "ARM_COLUMNS",
    "STATISTIC_COLUMNS",
    "Derived",
    "PCheck",
    "check_reported_p",
    "derive_results",
    "half_unit",
    "statistic_checks",
    "statistic_p",
]

#: The columns of a reported test statistic.
STATISTIC_COLUMNS = ("observed_statistic", "statistic_type", "statistic_df1", "statistic_df2")
#: Arm means and SDs.
ARM_COLUMNS = ("observed_mean1", "observed_mean2", "observed_sd1", "observed_sd2")
#: Columns that make a row one that reports a result (with those of audit.metrics).
RESULT_FORMS = ("observed_statistic", "observed_mean1", "observed_mean2")

#: How each kind of statistic is written in notes and messages.
KIND_LABELS = {"t": "t", "z": "z", "f": "F", "chi2": "chi-square", "r": "r"}


def _col(rows: pd.DataFrame, name: str) -> np.ndarray:
    if name not in rows.columns:
        return np.full(len(rows), np.nan)
    return rows[name].to_numpy(dtype=float, na_value=np.nan)


def _kinds(rows: pd.DataFrame) -> np.ndarray:
    """``statistic_type`` as an object array of "t", "z", "f", "chi2", "r" or None."""
    if "statistic_type" not in rows.columns:
        return np.full(len(rows), None, dtype=object)
    return rows["statistic_type"].to_numpy(dtype=object)


def _is(kinds: np.ndarray, *names: str) -> np.ndarray:
    return np.isin(kinds, list(names))


# -- validation --------------------------------------------------------------------------------


def statistic_checks(design: Design, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, object]]:
    """Row errors about a reported statistic: ``(bad_mask, column, reason)`` (see
    :meth:`audit.designs.Design.check_rows`)."""
    value = _col(rows, "observed_statistic")
    kinds = _kinds(rows)
    df1, df2 = _col(rows, "statistic_df1"), _col(rows, "statistic_df2")
    given = np.isfinite(value)
    known = pd.notna(kinds)
    read = sorted(design.statistic_types, key=list(KIND_LABELS).index)
    readable = ", ".join(KIND_LABELS[k] for k in read)
    out: list[tuple[np.ndarray, str, object]] = [
        (
            given & ~known,
            "statistic_type",
            "blank, but observed_statistic is given: say which statistic it is (t, z, F, chi2 "
            "or r)",
        ),
        (
            known & ~_is(kinds, *design.statistic_types),
            "statistic_type",
            f"is not a statistic this design is read from: give it as one of {readable}",
        ),
    ]
    with np.errstate(invalid="ignore"):
        out.append(
            (
                given & _is(kinds, "f", "chi2") & (value < 0),
                "observed_statistic",
                "an F or chi-square statistic cannot be negative",
            )
        )
        out.append(
            (
                given & _is(kinds, "r") & (np.abs(value) >= 1),
                "observed_statistic",
                "a correlation r must lie strictly between -1 and 1",
            )
        )
        needs_df = given & _is(kinds, "f")
        out.append(
            (
                needs_df & np.isnan(df1),
                "statistic_df1",
                "blank: an F statistic needs both its degrees of freedom (statistic_df1 and "
                "statistic_df2)",
            )
        )
        out.append(
            (
                needs_df & np.isnan(df2),
                "statistic_df2",
                "blank: an F statistic needs both its degrees of freedom (statistic_df1 and "
                "statistic_df2)",
            )
        )
        if design.has_direction:
            several = given & _is(kinds, "f", "chi2") & (df1 > 1)
            out.append(
                (
                    several,
                    "statistic_df1",
                    "above 1: such a statistic tests several contrasts at once, while this "
                    "design compares two groups (1 df); give the statistic of that comparison",
                )
            )
        r_df = given & _is(kinds, "r") & np.isnan(df1)
        out.append(
            (
                r_df & ~np.isfinite(_total_size(design, design.scenario(rows, "realized"))),
                "statistic_df1",
                "blank, and no realized size gives the df of r (N - 2): give statistic_df1 or "
                "the realized size",
            )
        )
    return out


def _total_size(design: Design, sc: Scenario) -> np.ndarray:
    """Realized units behind a result (n, or n1 + n2; nan where not given)."""
    if not design.size_keys:
        return np.full(len(next(iter(sc.values()))), np.nan)
    return design.total_size(sc)


# -- the reported statistic ----------------------------------------------------------------------


@dataclass
class Statistic:
    """A reported test statistic as the audit reads it (arrays, one entry per row).

    ``magnitude`` is the statistic as a t or z (``|t|``; ``sqrt(F)`` and ``sqrt(chi2)`` on 1 df;
    ``r`` as its t test), ``signed`` where its sign is known, ``value`` the signed t or z (nan
    where unsigned or none), ``df`` its df (inf: normal). ``p`` is the statistic's own p-value
    on the study's test.
    """

    kind: np.ndarray
    raw: np.ndarray
    df1: np.ndarray
    df2: np.ndarray
    given: np.ndarray
    value: np.ndarray
    magnitude: np.ndarray
    signed: np.ndarray
    df: np.ndarray
    p: np.ndarray
    df_assumed: np.ndarray  # a t read with the design's df (statistic_df1 blank)
    chi2_df_assumed: np.ndarray


def _upper_t(x: np.ndarray, df: np.ndarray) -> np.ndarray:
    """P(T > x), T a central t (normal where df is infinite)."""
    return special.stdtr(df, -x)


def _upper_omnibus(kind: np.ndarray, x: np.ndarray, df1: np.ndarray, df2: np.ndarray):
    """Upper-tail probability of an F (kind "f") or chi-square statistic."""
    with np.errstate(invalid="ignore"):
        f_tail = special.fdtrc(np.where(np.isfinite(df1), df1, 1.0), df2, np.maximum(x, 0.0))
        chi_tail = special.chdtrc(np.where(np.isfinite(df1), df1, 1.0), np.maximum(x, 0.0))
    return np.where(kind == "f", f_tail, chi_tail)


def statistic_p(
    kind: np.ndarray,
    value: np.ndarray,
    df1: np.ndarray,
    df2: np.ndarray,
    *,
    sides: np.ndarray,
    direction: np.ndarray,
    df_default: np.ndarray,
    size: np.ndarray,
) -> np.ndarray:
    """The p-value of reported statistics on the studies' own tests.

    Parameters
    ----------
    kind : array of "t", "z", "f", "chi2", "r" (or None: nan out)
    value : the statistics (t, z and r signed as the effect)
    df1, df2 : their df (nan where not given): t's df; F's two df; chi-square's df (blank: 1);
        r's df (blank: ``size - 2``)
    sides, direction : the test: 1 or 2, and the side a one-sided test looks at (+1 / -1)
    df_default : df for a t given without its df (the design's)
    size : realized N (for r without df)

    Returns
    -------
    ndarray
        Two-sided: ``2 P(T > |t|)`` (t on its df, z normal, r as ``t = r sqrt(df) / sqrt(1 - r^2)``
        on ``df = N - 2``); the upper tail of an F or chi-square. One-sided: ``P(T > t)`` in the
        direction tested, and half the upper tail of an F or chi-square on 1 df (the effect
        taken to go the tested way).

    Examples
    --------
    t(38) = 2.10, two-sided; F(1, 38) = 2.10^2 gives the same p; r = .30 with N = 50:

    >>> k = np.array(["t", "f", "r"], dtype=object)
    >>> statistic_p(k, np.array([2.1, 4.41, 0.3]), np.array([38, 1, np.nan]),
    ...             np.array([np.nan, 38, np.nan]), sides=2, direction=1.0, df_default=np.inf,
    ...             size=50).round(4).tolist()
    [0.0424, 0.0424, 0.0343]
    """
    kind = np.asarray(kind, dtype=object)
    value, df1, df2, sides, direction, df_default, size = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (value, df1, df2, sides, direction, df_default, size))
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        r_df = np.where(np.isfinite(df1), df1, size - 2.0)
        t = np.where(kind == "r", value * np.sqrt(r_df) / np.sqrt(1.0 - value * value), value)
        df = np.where(kind == "t", np.where(np.isfinite(df1), df1, df_default), np.inf)
        df = np.where(kind == "r", r_df, df)
        two = np.minimum(2.0 * _upper_t(np.abs(t), df), 1.0)
        one = _upper_t(direction * t, df)
        linear = np.where(sides == 2, two, one)
        tail = _upper_omnibus(kind, value, df1, df2)
        single = ~np.isfinite(df1) | (df1 == 1)
        omnibus = np.where((sides == 1) & single, tail / 2.0, tail)
    out = np.where(_is(kind, "f", "chi2"), omnibus, linear)
    return np.where(pd.notna(kind) & np.isfinite(value), out, np.nan)


def read_statistic(
    design: Design, rows: pd.DataFrame, real: Scenario, test: TestSpec, df_default: np.ndarray
) -> Statistic:
    """The row's reported statistic as a t or z of the study's comparison, with its p."""
    kind = _kinds(rows)
    raw = _col(rows, "observed_statistic")
    df1, df2 = _col(rows, "statistic_df1"), _col(rows, "statistic_df2")
    given = pd.notna(kind) & np.isfinite(raw)
    kind = np.where(given, kind, None)
    size = _total_size(design, real)
    sides = test.sides if design.has_direction else np.full(len(rows), 2.0)
    p = statistic_p(
        kind,
        raw,
        df1,
        df2,
        sides=sides,
        direction=test.direction,
        df_default=df_default,
        size=size,
    )
    omnibus = _is(kind, "f", "chi2")
    single = omnibus & (np.isnan(df1) | (df1 == 1))
    with np.errstate(invalid="ignore", divide="ignore"):
        r_df = np.where(np.isfinite(df1), df1, size - 2.0)
        as_t = np.where(kind == "r", raw * np.sqrt(r_df) / np.sqrt(1.0 - raw * raw), raw)
        magnitude = np.where(single, np.sqrt(np.maximum(raw, 0.0)), np.abs(as_t))
    magnitude = np.where(given & (~omnibus | single), magnitude, np.nan)
    df = np.where(
        kind == "t",
        np.where(np.isfinite(df1), df1, df_default),
        np.where(kind == "f", df2, np.where(kind == "r", r_df, np.inf)),
    )
    # A t, z or r carries its sign; an F or chi-square on 1 df takes the direction the row gives.
    signed = given & (_is(kind, "t", "z", "r") | (single & ~test.either))
    value = np.where(_is(kind, "t", "z", "r"), as_t, test.direction * magnitude)
    return Statistic(
        kind=kind,
        raw=raw,
        df1=df1,
        df2=df2,
        given=given,
        value=np.where(signed, value, np.nan),
        magnitude=magnitude,
        signed=signed,
        df=np.where(given, df, np.nan),
        p=p,
        df_assumed=given & (kind == "t") & np.isnan(df1),
        chi2_df_assumed=given & (kind == "chi2") & np.isnan(df1),
    )


# -- the result derived --------------------------------------------------------------------------


@dataclass
class Derived:
    """What :func:`derive_results` found, on the analysis scale (arrays, one entry per row).

    Attributes
    ----------
    effect, se : the effect and its SE where derived here (nan elsewhere: reported values, an
        interval, or nothing; :func:`audit.retro.complete_results` does the rest).
    p : the p-value to use (reported, else derived here; nan: let complete_results derive it).
    p_test : the p of the study's test from the most direct form (decides significance where
        no interval or SE was reported).
    df : degrees of freedom to read the result with.
    statistic : the test statistic (signed, as t or z), for observed power; nan where unknown.
    unsigned : rows whose statistic gives a size but no sign.
    statistic_info : the reported statistic as read.
    notes : ``(mask, text)`` pairs saying what was derived from what.
    """

    effect: np.ndarray
    se: np.ndarray
    p: np.ndarray
    p_test: np.ndarray
    df: np.ndarray
    statistic: np.ndarray
    unsigned: np.ndarray
    statistic_info: Statistic
    notes: list[tuple[np.ndarray, object]] = field(default_factory=list)


def _standardized(design: Design, rows: pd.DataFrame) -> np.ndarray:
    """Rows of a mean design whose effects are standardized mean differences."""
    from audit.designs.means import _MeanDesign, _standardized_rows

    if not isinstance(design, _MeanDesign):
        return np.zeros(len(rows), dtype=bool)
    return _standardized_rows(rows)


def _units(design: Design, sc: Scenario) -> np.ndarray:
    """Units behind a standardized mean difference's SD (clusters times their size)."""
    total = _total_size(design, sc)
    if "cluster_size" in sc:
        total = total * sc["cluster_size"]
    return total


def _labels(values, fmt) -> np.ndarray:
    """``fmt(v)`` for each entry, formatted once per distinct value (notes and texts).

    ``values`` is an array, or a tuple of arrays whose entries ``fmt`` gets as one tuple.
    """
    columns = values if isinstance(values, tuple) else (values,)
    size = len(columns[0])
    if not size:
        return np.empty(0, dtype=object)
    key = np.zeros(size, dtype=np.int64)
    for column in columns:
        codes, uniques = pd.factorize(np.asarray(column, dtype=object), use_na_sentinel=False)
        key = key * (len(uniques) + 1) + codes
    _, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    cells = [np.asarray(c, dtype=object) for c in columns]
    texts = [
        fmt(tuple(c[j] for c in cells) if isinstance(values, tuple) else cells[0][j]) for j in first
    ]
    return np.array(texts, dtype=object)[inverse.reshape(-1)]


def _distribution(kind: object, df: float, df1: float, df2: float) -> str:
    if kind == "f":
        return f"F, {df1:g} and {df2:g} df"
    if kind == "chi2":
        return f"chi-square, {df1 if np.isfinite(df1) else 1:g} df"
    return "normal" if not np.isfinite(df) else f"t, {df:g} df"


def derive_results(
    design: Design,
    rows: pd.DataFrame,
    real: Scenario,
    test: TestSpec,
    df_real: np.ndarray,
    reported: dict[str, np.ndarray],
) -> Derived:
    """Effect, SE and p from a reported statistic and arm means, the most direct form first.

    ``reported`` holds the row's reported result: ``effect``, ``ci_low``, ``ci_high`` on the
    analysis scale, ``observed_se`` and ``observed_p`` as given.
    """
    n = len(rows)
    nan = np.full(n, np.nan)
    st = read_statistic(design, rows, real, test, df_real)
    e_rep, se_rep, p_rep = reported["effect"], reported["observed_se"], reported["observed_p"]
    have_ci = np.isfinite(reported["ci_low"]) & np.isfinite(reported["ci_high"])
    open_effect = np.isnan(e_rep) & ~have_ci
    open_se = np.isnan(se_rep) & ~have_ci
    notes: list[tuple[np.ndarray, object]] = []
    kind_text = _labels(st.kind, lambda k: KIND_LABELS.get(k, ""))

    # The statistic, on the design's analysis scale.
    from audit.designs.correlation import Correlation

    probe = np.where(st.signed, st.value, st.magnitude)
    with np.errstate(all="ignore"):
        e_stat, se_stat = design.effect_from_statistic(rows, real, probe, st.df)
        if isinstance(design, Correlation):
            r_given = st.kind == "r"
            e_stat = np.where(r_given, np.arctanh(st.raw), e_stat)
    # Without a sign only the size is known; the SE too where it does not depend on the sign.
    e_stat_size = np.abs(e_stat)
    se_stat = np.where(st.signed | design.symmetric, se_stat, np.nan)
    e_stat = np.where(st.signed, e_stat, np.nan)
    unsigned = st.given & ~st.signed & np.isfinite(st.magnitude)

    # Arm means.
    with np.errstate(all="ignore"):
        e_means, se_means, df_means = design.effect_from_means(rows, real)
        t_means = e_means / se_means
    p_means = np.where(
        np.isfinite(t_means),
        np.where(
            test.sides == 2,
            np.minimum(2.0 * _upper_t(np.abs(t_means), df_means), 1.0),
            _upper_t(test.direction * t_means, df_means),
        ),
        np.nan,
    )

    # 1. The effect.
    effect = nan.copy()
    from_means = open_effect & np.isfinite(e_means)
    from_stat = open_effect & ~from_means & np.isfinite(e_stat)
    effect[from_means] = e_means[from_means]
    effect[from_stat] = e_stat[from_stat]
    midpoint = (reported["ci_low"] + reported["ci_high"]) / 2.0
    known = np.where(np.isfinite(e_rep), e_rep, np.where(have_ci, midpoint, effect))
    size = np.where(np.isfinite(known), np.abs(known), np.where(unsigned, e_stat_size, np.nan))

    # 2. Its standard error.
    se = nan.copy()
    std = _standardized(design, rows)
    with np.errstate(all="ignore"):
        # In SD units on standardized rows (their SD is 1); only mean designs have such rows.
        null_se = design.se(real) if std.any() else nan
        units = _units(design, real)
        borenstein = np.sqrt(null_se**2 + size**2 / (2.0 * units))
    by_d = open_se & std & np.isfinite(borenstein)
    se[by_d] = borenstein[by_d]
    by_sds = open_se & ~by_d & np.isfinite(se_means)
    se[by_sds] = se_means[by_sds]
    stat_open = open_se & ~by_d & ~by_sds & st.given
    by_design = stat_open & (from_stat | unsigned | design.se_from_sizes) & np.isfinite(se_stat)
    se[by_design] = se_stat[by_design]
    with np.errstate(all="ignore"):
        ratio = size / st.magnitude
    by_ratio = stat_open & ~by_design & np.isfinite(ratio) & (ratio > 0)
    se[by_ratio] = ratio[by_ratio]

    # 3. The p-value and the df to read the result with.
    # A reported t (or F on 1 df) is read on its own df; Fisher's z of a correlation is normal
    # whatever the df of the t test of r.
    own_df = st.given & np.isfinite(st.df) & (not design.se_from_sizes)
    df = np.where(own_df, st.df, np.where(from_means, df_means, df_real))
    with np.errstate(all="ignore"):
        t_d = known / null_se
    df_d = design.analysis_df(real)
    p_d = np.where(
        std & np.isfinite(t_d),
        np.where(
            test.sides == 2,
            np.minimum(2.0 * _upper_t(np.abs(t_d), df_d), 1.0),
            _upper_t(test.direction * t_d, df_d),
        ),
        np.nan,
    )
    p = p_rep.copy()
    p_from_stat = np.isnan(p) & np.isfinite(st.p)
    p[p_from_stat] = st.p[p_from_stat]
    p_from_means = np.isnan(p) & np.isfinite(p_means)
    p[p_from_means] = p_means[p_from_means]
    p_from_d = np.isnan(p) & np.isfinite(p_d) & np.isnan(se_rep) & ~have_ci
    p[p_from_d] = p_d[p_from_d]
    p_test = np.where(
        np.isfinite(st.p),
        st.p,
        np.where(np.isfinite(p_means), p_means, np.where(np.isfinite(p_rep), p_rep, p_d)),
    )
    statistic = np.where(
        st.signed, st.value, np.where(np.isfinite(t_means), t_means, np.where(std, t_d, np.nan))
    )
    if isinstance(design, Correlation):
        with np.errstate(all="ignore"):
            fisher = e_stat / se_stat
        statistic = np.where(st.signed, fisher, statistic)

    # What was derived from what.
    if from_means.any():
        scale = np.where(
            std, ", over the pooled SD (d)" if "n2" in real else ", over realized_sd (d_z)", ""
        ).astype(object)
        notes.append(
            (
                from_means,
                "result_effect derived from the arm means (observed_mean2 - observed_mean1"
                + scale
                + ")",
            )
        )
    if from_stat.any():
        notes.append(
            (
                from_stat,
                "result_effect derived from the reported "
                + kind_text
                + f" statistic: {design.statistic_rule}",
            )
        )
    sign_taken = st.given & st.signed & _is(st.kind, "f", "chi2")
    if sign_taken.any():
        way = np.where(test.direction < 0, "decrease", "increase").astype(object)
        notes.append(
            (
                sign_taken,
                "the "
                + kind_text
                + " statistic carries no sign: the effect is taken to go the way the row says ("
                + way
                + "); give a t, a z or the estimate if it went the other way",
            )
        )
    if unsigned.any():
        notes.append(
            (
                unsigned,
                "the "
                + kind_text
                + " statistic carries no sign and the row gives no direction: the result's "
                "size, SE and p are used, not its sign (result_effect and the interval are not "
                "computed)",
            )
        )
    notes.append(
        (
            by_d,
            "result_se of the standardized mean difference from d and the realized sizes: "
            "sqrt(SE^2 + d^2 / (2N)) with SE the t test's in SD units (Borenstein et al. 2009, "
            "eq. 4.20)",
        )
    )
    cluster = " with the design effect" if "icc" in real else ""
    notes.append(
        (
            by_sds,
            "result_se derived from the arm SDs (pooled) and the realized group sizes" + cluster,
        )
    )
    if design.se_from_sizes:
        notes.append((by_design, "result_se = 1 / sqrt(n - 3) at the realized n (Fisher's z)"))
    notes.append(
        (
            by_ratio,
            "result_se derived from the estimate and the reported "
            + kind_text
            + " statistic: |estimate| / |statistic| on the analysis scale",
        )
    )
    if p_from_stat.any():
        text = _labels(
            (st.kind, st.df, st.df1, st.df2, test.sides),
            lambda k: (
                _distribution(*k[:4])
                + (", one-sided" if k[4] == 1 and design.has_direction else "")
            ),
        )
        notes.append(
            (
                p_from_stat,
                "result_p derived from the reported " + kind_text + " statistic (" + text + ")",
            )
        )
    for mask, what, dfs in (
        (p_from_means, "the arm means and SDs", df_means),
        (p_from_d, "d and the realized sizes", df_d),
    ):
        if mask.any():
            text = _labels(
                (dfs, test.sides),
                lambda k: (
                    _distribution("t", k[0], np.nan, np.nan) + (", one-sided" if k[1] == 1 else "")
                ),
            )
            notes.append((mask, f"result_p from the t test of {what} (" + text + ")"))
    notes.extend(_statistic_notes(design, rows, real, st, known, open_effect))
    notes.extend(_means_notes(design, rows, real, e_means, e_rep, have_ci))
    return Derived(
        effect=effect,
        se=se,
        p=p,
        p_test=p_test,
        df=df,
        statistic=statistic,
        unsigned=unsigned,
        statistic_info=st,
        notes=notes,
    )


def _statistic_notes(
    design: Design,
    rows: pd.DataFrame,
    real: Scenario,
    st: Statistic,
    known: np.ndarray,
    open_effect: np.ndarray,
) -> list[tuple[np.ndarray, object]]:
    """Notes on how a statistic was read, and on statistic columns not used."""
    out: list[tuple[np.ndarray, object]] = []
    kind_text = _labels(st.kind, lambda k: KIND_LABELS.get(k, ""))
    stray = ~st.given & (
        pd.notna(_kinds(rows)) | np.isfinite(st.df1) | np.isfinite(_col(rows, "statistic_df2"))
    )
    out.append(
        (
            stray,
            "statistic_type / statistic_df1 / statistic_df2 given without observed_statistic: "
            "not used",
        )
    )
    out.append(
        (
            st.given & ~_is(st.kind, "f") & np.isfinite(st.df2),
            "statistic_df2 not used: only an F statistic has a second df",
        )
    )
    out.append(
        (st.given & _is(st.kind, "z") & np.isfinite(st.df1), "statistic_df1 not used for a z")
    )
    out.append((st.chi2_df_assumed, "chi-square statistic without statistic_df1: 1 df assumed"))
    if st.df_assumed.any():
        text = _labels(
            st.df,
            lambda d: f"the design's {d:g} df" if np.isfinite(d) else "the normal distribution",
        )
        out.append(
            (st.df_assumed, "t statistic without statistic_df1: read with " + text.astype(object))
        )
    if not design.has_direction:
        out.append(
            (
                st.given,
                "only the p-value of the reported "
                + kind_text
                + " statistic is used: an omnibus test has no single signed effect",
            )
        )
        return out
    # A statistic that gave no effect where nothing more direct did: say what was missing.
    lost = st.given & st.signed & open_effect & ~np.isfinite(known)
    if lost.any():
        if "p1" in real:
            why = np.full(len(rows), "realized_p1 (the observed control rate)", dtype=object)
        else:
            src = design.sources("realized")
            why = _joined([(np.isnan(real[k]), src[k]) for k in real if k in src], len(rows))
            why[why == ""] = "what scales it"
        out.append(
            (
                lost,
                "observed_statistic gives p but no effect: the realized design lacks "
                + why
                + " to put it on the design's scale",
            )
        )
    return out


def _joined(parts: list[tuple[np.ndarray, str]], size: int) -> np.ndarray:
    """Per row, the comma-joined labels whose mask is set ('' where none)."""
    merged: dict[str, np.ndarray] = {}
    for mask, label in parts:
        merged[label] = merged[label] | mask if label in merged else mask
    out = np.full(size, "", dtype=object)
    for label, mask in merged.items():
        out[mask] = np.where(out[mask] == "", label, out[mask] + ", " + label)
    return out


def _means_notes(
    design: Design,
    rows: pd.DataFrame,
    real: Scenario,
    e_means: np.ndarray,
    e_rep: np.ndarray,
    have_ci: np.ndarray,
) -> list[tuple[np.ndarray, object]]:
    out: list[tuple[np.ndarray, object]] = []
    m1, m2 = _col(rows, "observed_mean1"), _col(rows, "observed_mean2")
    half = np.isfinite(m1) ^ np.isfinite(m2)
    out.append((half, "only one arm mean given: the arm means are not used"))
    reads_sds = "observed_sd1" in design.inputs()
    if reads_sds:
        s1, s2 = _col(rows, "observed_sd1"), _col(rows, "observed_sd2")
        out.append(
            (
                np.isfinite(m1) & np.isfinite(m2) & (np.isfinite(s1) ^ np.isfinite(s2)),
                "only one arm SD given: the arm SDs are not used (the pooled SD needs both)",
            )
        )
    covariates = real.get("covariates")
    if covariates is not None:
        out.append(
            (
                np.isfinite(e_means) & np.isnan(e_rep) & ~have_ci & (covariates > 0),
                "the result from the arm means is the unadjusted comparison: the covariates "
                "the row names are not applied to it",
            )
        )
    return out


# -- the reported p, recomputed -----------------------------------------------------------------


def half_unit(x: np.ndarray) -> np.ndarray:
    """Half a unit of the last decimal a number was written with (its rounding).

    The decimals are those of the shortest decimal text of the number (2.31 has two, 0.0012
    four); a trailing zero written in the cell (2.30) cannot be seen in the number, which makes
    the allowance wider, never narrower.

    >>> half_unit(np.array([2.31, 0.03, 0.0012, 12.0])).tolist()
    [0.005, 0.005, 5e-05, 0.5]
    """
    x = np.abs(np.asarray(x, dtype=float))
    out = np.full(x.shape, np.nan)
    todo = np.isfinite(x)
    for k in range(16):
        scaled = x * 10.0**k
        with np.errstate(invalid="ignore"):
            exact = todo & (np.abs(scaled - np.round(scaled)) <= 1e-9 * np.maximum(1.0, scaled))
        out[exact] = 0.5 * 10.0**-k
        todo &= ~exact
    out[todo] = 0.5 * 10.0**-16
    return out


@dataclass
class PCheck:
    """The reported p-value against the one the other reported forms give (see
    :func:`check_reported_p`)."""

    recomputed: np.ndarray
    low: np.ndarray
    high: np.ndarray
    discrepancy: np.ndarray
    as_given: np.ndarray
    source: np.ndarray
    notes: list[tuple[np.ndarray, object]] = field(default_factory=list)


#: Sources of a recomputed p, in the order they are used.
P_SOURCES = {
    "statistic": "reported {kind} statistic",
    "se": "estimate and its standard error",
    "ci": "estimate and its confidence interval",
    "means": "arm means and SDs",
    "d": "standardized difference d and the realized sizes",
}


def _p_range_linear(
    low: np.ndarray, high: np.ndarray, df_low: np.ndarray, df_high: np.ndarray, sides: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The range of p over a range ``[low, high]`` of a t or z statistic oriented in the tested
    direction, and a range of df (more df, smaller p for the same statistic)."""
    with np.errstate(invalid="ignore"):
        big = np.maximum(np.abs(low), np.abs(high))
        small = np.where((low <= 0) & (high >= 0), 0.0, np.minimum(np.abs(low), np.abs(high)))
        two_low = np.minimum(2.0 * _upper_t(big, df_high), 1.0)
        two_high = np.minimum(2.0 * _upper_t(small, df_low), 1.0)
        one_low = _upper_t(high, df_high)
        one_high = _upper_t(low, df_low)
    two = sides == 2
    return np.where(two, two_low, one_low), np.where(two, two_high, one_high)


def _ratio_range(
    e_low: np.ndarray, e_high: np.ndarray, s_low: np.ndarray, s_high: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The range of ``e / s`` over ``e`` in ``[e_low, e_high]`` and ``s > 0`` in
    ``[s_low, s_high]``."""
    with np.errstate(invalid="ignore", divide="ignore"):
        s_low = np.where(s_low > 0, s_low, np.nan)
        corners = np.stack([e_low / s_low, e_low / s_high, e_high / s_low, e_high / s_high])
    return np.min(corners, axis=0), np.max(corners, axis=0)


def check_reported_p(
    design: Design,
    rows: pd.DataFrame,
    real: Scenario,
    test: TestSpec,
    df_real: np.ndarray,
    st: Statistic,
) -> PCheck:
    """Recompute a reported p-value from the other forms the row reports, and say how far apart.

    The source is the most direct other form: the test statistic; else the estimate with its
    standard error; else the estimate (or the interval's midpoint) with the interval; else the
    arm means and SDs; else, for a standardized mean difference, d with the realized sizes.
    Every printed number is taken to be rounded to its last decimal (:func:`half_unit`), and a
    t given without its df may have any df from Welch's smallest (``min(n1, n2) - 1``) to the
    pooled test's: the recomputed p is then a range ``[low, high]``. A reported ``p = 0.03``
    stands for ``[0.025, 0.035]``; ``p < b`` for ``(0, b]``; ``p > b`` for ``[b, 1]``; "n.s."
    for ``[alpha, 1]``.

    ``discrepancy`` is 1 where the two ranges meet and otherwise the factor between their
    nearest ends (above 1 either way); nan where no p was reported or nothing recomputes it.
    """
    n = len(rows)
    nan = np.full(n, np.nan)
    to_a = design.to_analysis
    sides = test.sides if design.has_direction else np.full(n, 2.0)
    direction = test.direction
    p_rep = _col(rows, "observed_p")
    bound, relation = _col(rows, "observed_p_bound"), _col(rows, "observed_p_relation")
    has_p = np.isfinite(p_rep) | np.isfinite(relation)
    alpha = test.alpha

    face, low, high = nan.copy(), nan.copy(), nan.copy()
    source = np.full(n, None, dtype=object)
    todo = has_p.copy()

    # The statistic.
    use = todo & st.given
    if use.any():
        h = half_unit(st.raw)
        kind = st.kind
        omnibus = _is(kind, "f", "chi2")
        face[use] = st.p[use]
        with np.errstate(invalid="ignore"):
            # F or chi-square: p falls as the statistic grows.
            upper = _upper_omnibus(kind, st.raw - h, st.df1, st.df2)
            lower = _upper_omnibus(kind, st.raw + h, st.df1, st.df2)
            single = np.isnan(st.df1) | (st.df1 == 1)
            halve = (sides == 1) & single
            upper = np.where(halve, upper / 2.0, upper)
            lower = np.where(halve, lower / 2.0, lower)
            # t, z, r: the statistic's range as a t, in the tested direction.
            raw_low, raw_high = st.raw - h, st.raw + h
            if (kind == "r").any():
                r_df = np.where(np.isfinite(st.df1), st.df1, _total_size(design, real) - 2.0)

                def as_t(r: np.ndarray) -> np.ndarray:
                    r = np.clip(r, -1.0 + 1e-15, 1.0 - 1e-15)
                    return r * np.sqrt(r_df) / np.sqrt(1.0 - r * r)

                raw_low = np.where(kind == "r", as_t(raw_low), raw_low)
                raw_high = np.where(kind == "r", as_t(raw_high), raw_high)
            oriented_low = np.where(direction > 0, raw_low, -raw_high)
            oriented_high = np.where(direction > 0, raw_high, -raw_low)
            df_high = st.df
            df_low = st.df.copy()
            if "n2" in real and st.df_assumed.any():
                welch = np.maximum(np.minimum(real["n1"], real["n2"]) - 1.0, 1.0)
                df_low = np.where(st.df_assumed, np.minimum(welch, st.df), st.df)
        lin_low, lin_high = _p_range_linear(oriented_low, oriented_high, df_low, df_high, sides)
        low[use] = np.where(omnibus, lower, lin_low)[use]
        high[use] = np.where(omnibus, upper, lin_high)[use]
        source[use] = _labels(
            kind[use], lambda k: P_SOURCES["statistic"].format(kind=KIND_LABELS.get(k, k))
        )
        todo &= ~use

    if design.has_direction:
        e_raw = _col(rows, "observed_effect")
        se_raw = _col(rows, "observed_se")
        lo_raw, hi_raw = _col(rows, "observed_ci_low"), _col(rows, "observed_ci_high")
        df_read = df_real
        with np.errstate(all="ignore"):
            e_h = half_unit(e_raw)
            e_lo, e_hi = to_a(e_raw - e_h), to_a(e_raw + e_h)
            e_a = to_a(e_raw)

        def put(mask: np.ndarray, s_face, s_low, s_high, df, label: str, df_range) -> None:
            """The p at face value (on ``df``), and its range over a range of the statistic
            and one of the df (``df_range``: lowest, highest)."""
            df_low, df_high = df_range
            oriented = direction * s_face
            o_low = np.where(direction > 0, s_low, -s_high)
            o_high = np.where(direction > 0, s_high, -s_low)
            pf, _ = _p_range_linear(oriented, oriented, df, df, sides)
            pl, ph = _p_range_linear(o_low, o_high, df_low, df_high, sides)
            face[mask], low[mask], high[mask] = pf[mask], pl[mask], ph[mask]
            source[mask] = P_SOURCES[label]

        # An estimate with its SE or interval may have been tested with the design's t or as a
        # z (large-sample, Wald): any df from the design's to infinity. A t test of means or of
        # d may have been Welch's: any df from its smallest to the pooled test's.
        normal = np.full(n, np.inf)
        welch = df_real
        if "n2" in real:
            welch = np.minimum(np.maximum(np.minimum(real["n1"], real["n2"]) - 1.0, 1.0), df_real)

        # The estimate with its SE.
        use = todo & np.isfinite(e_a) & np.isfinite(se_raw) & (se_raw > 0)
        if use.any():
            s_h = half_unit(se_raw)
            with np.errstate(all="ignore"):
                s_low, s_high = _ratio_range(e_lo, e_hi, se_raw - s_h, se_raw + s_h)
                put(use, e_a / se_raw, s_low, s_high, df_read, "se", (df_read, normal))
            todo &= ~use

        # The interval (with the estimate where given).
        use = todo & np.isfinite(lo_raw) & np.isfinite(hi_raw)
        if use.any():
            from audit.retro import critical_value

            level = _col(rows, "observed_ci_level")
            level = np.where(np.isnan(level), 0.95, level)
            with np.errstate(all="ignore"):
                q = critical_value((1.0 - level) / 2.0, df_read)
                lh, hh = half_unit(lo_raw), half_unit(hi_raw)
                a_lo, a_hi = to_a(lo_raw), to_a(hi_raw)
                lo_min, lo_max = to_a(lo_raw - lh), to_a(lo_raw + lh)
                hi_min, hi_max = to_a(hi_raw - hh), to_a(hi_raw + hh)
                se_face = (a_hi - a_lo) / (2.0 * q)
                se_min = (hi_min - lo_max) / (2.0 * q)
                se_max = (hi_max - lo_min) / (2.0 * q)
                mid_lo, mid_hi = (lo_min + hi_min) / 2.0, (lo_max + hi_max) / 2.0
                est = np.isfinite(e_a)
                eff = np.where(est, e_a, (a_lo + a_hi) / 2.0)
                eff_lo = np.where(est, e_lo, mid_lo)
                eff_hi = np.where(est, e_hi, mid_hi)
                s_low, s_high = _ratio_range(eff_lo, eff_hi, se_min, se_max)
                use &= np.isfinite(se_face) & (se_face > 0)
                put(use, eff / se_face, s_low, s_high, df_read, "ci", (df_read, normal))
            todo &= ~use

        # Arm means and SDs.
        with np.errstate(all="ignore"):
            e_m, se_m, df_m = design.effect_from_means(rows, real)
        use = todo & np.isfinite(e_m) & np.isfinite(se_m) & (se_m > 0)
        if use.any():
            m1, m2 = _col(rows, "observed_mean1"), _col(rows, "observed_mean2")
            s1, s2 = _col(rows, "observed_sd1"), _col(rows, "observed_sd2")
            sd_rows = np.isfinite(s1) & np.isfinite(s2) & ("observed_sd1" in design.inputs())
            with np.errstate(all="ignore"):
                dh = half_unit(m1) + half_unit(m2)
                diff = m2 - m1
                # The SE scales with the pooled SD; bound it by the SDs' rounding.
                sh = np.where(sd_rows, np.maximum(half_unit(s1), half_unit(s2)), 0.0)
                pooled = np.sqrt((s1**2 + s2**2) / 2.0)
                grow = np.where(sd_rows, (pooled + sh) / pooled, 1.0)
                shrink = np.where(sd_rows, np.maximum(pooled - sh, 0.0) / pooled, 1.0)
                t_face = e_m / se_m
                scale = np.where(diff != 0, e_m / diff, np.nan)
                t_low, t_high = _ratio_range(
                    (diff - dh) * scale, (diff + dh) * scale, se_m * shrink, se_m * grow
                )
                # A paired design's SE comes from realized_sd, whose rounding is ignored here
                # (its change of the range is of the order of the means' rounding).
                put(use, t_face, t_low, t_high, df_m, "means", (np.minimum(welch, df_m), df_m))
            todo &= ~use

        # A standardized difference with the sizes.
        std = _standardized(design, rows)
        with np.errstate(all="ignore"):
            null_se = design.se(real) if std.any() else nan
        use = todo & std & np.isfinite(e_a) & np.isfinite(null_se) & (null_se > 0)
        if use.any():
            df_d = design.analysis_df(real)
            with np.errstate(all="ignore"):
                put(
                    use,
                    e_a / null_se,
                    e_lo / null_se,
                    e_hi / null_se,
                    df_d,
                    "d",
                    (np.minimum(welch, df_d), df_d),
                )
            todo &= ~use

    # The reported p as a range.
    ph = half_unit(p_rep)
    rep_low = np.where(
        np.isfinite(p_rep),
        np.maximum(p_rep - ph, 0.0),
        np.where(relation < 0, 0.0, np.where(np.isfinite(bound), bound, alpha)),
    )
    rep_high = np.where(
        np.isfinite(p_rep),
        np.minimum(p_rep + ph, 1.0),
        np.where(relation < 0, bound, 1.0),
    )
    checked = has_p & np.isfinite(low) & np.isfinite(high)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        above = rep_low / high  # the reported p larger than the other forms allow
        below = low / rep_high
    discrepancy = np.where(rep_low > high, above, np.where(rep_high < low, below, 1.0))
    discrepancy = np.where(checked, discrepancy, np.nan)
    discrepancy = np.where(np.isinf(discrepancy) | (discrepancy > 1e300), 1e300, discrepancy)
    as_given = np.full(n, None, dtype=object)
    plain = np.isfinite(p_rep)
    if plain.any():
        # Printed p-values have few digits; four significant ones show them as written.
        as_given[plain] = np.char.add("p = ", np.char.mod("%.4g", p_rep[plain])).astype(object)
    bounded = has_p & ~plain
    if bounded.any():
        as_given[bounded] = _labels((relation[bounded], bound[bounded]), _p_as_given)
    notes: list[tuple[np.ndarray, object]] = []
    # A reported p that is the other half of the test: one-sided versus two-sided.
    with np.errstate(invalid="ignore"):
        other = np.where(sides == 2, 0.5, 2.0)
        other_low, other_high = low * other, np.minimum(high * other, 1.0)
        halves = checked & (discrepancy > 1) & (rep_low <= other_high) & (rep_high >= other_low)
    notes.append(
        (
            halves & (sides == 2),
            "the reported p matches the one-sided p (half the two-sided p the other reported "
            "numbers give): the study may have reported a one-sided test",
        )
    )
    notes.append(
        (
            halves & (sides == 1),
            "the reported p matches the two-sided p (twice the one-sided p the other reported "
            "numbers give): check sides",
        )
    )
    with np.errstate(invalid="ignore"):
        flips = checked & (discrepancy > 1) & ((rep_high < alpha) != (face < alpha))
    notes.append(
        (
            flips & st.given,
            "the reported p and the p of the reported statistic disagree about significance at "
            "the study's alpha; the statistic decides result_significant",
        )
    )
    return PCheck(
        recomputed=np.where(has_p, face, np.nan),
        low=np.where(checked, low, np.nan),
        high=np.where(checked, high, np.nan),
        discrepancy=discrepancy,
        as_given=as_given,
        source=np.where(checked, source, None),
        notes=notes,
    )


def _p_as_given(key: tuple[float, float]) -> str:
    relation, bound = key
    if np.isnan(bound):
        return "n.s."
    return ("p < " if relation < 0 else "p > ") + format_number(bound)
