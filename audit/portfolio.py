"""Portfolio-level statistics over all audited studies."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from audit.designs import DESIGNS, design_groups
from audit.designs._base import _margin_rows
from audit.designs._power import t_power
from audit.excess import deficit_p_value, excess_significance_test

__all__ = [
    "BLANK_GROUP",
    "EXCESS_DEFAULTS",
    "MAX_GROUPS",
    "ExcessSettings",
    "excess_significance",
    "group_labels",
    "group_summaries",
    "portfolio_summary",
]


@dataclass(frozen=True)
class ExcessSettings:
    """How the test of excess significance is run (keyword arguments of ``audit_table``).

    Attributes
    ----------
    basis : ``"planned"`` — each study's design-based power at its planned effect (realized
        design); ``"pooled"`` — each study's design-based power at the pooled estimate of its
        ``outcome_family`` (``power_at_pooled_effect``).
    method : ``"exact"`` (Poisson-binomial; binomial when all powers are equal) or ``"chi2"``
        (the chi-square statistic of Ioannidis & Trikalinos 2007).
    pooling : how each family is pooled (for ``power_at_pooled_effect``, the ``families``
        block and the pooled basis): ``"fixed"`` (inverse-variance) or ``"random"``
        (random-effects, Paule-Mandel between-study variance); see
        :func:`inverse_variance_pool`.
    min_studies : the test is skipped, with a note, when fewer studies have both a result and a
        power at the basis. Default 5: the fewest at which a portfolio of studies with 50 % power
        that are all significant gives an exact p-value below .05 (0.5^5 = 0.031).
    """

    basis: str = "planned"
    method: str = "exact"
    pooling: str = "fixed"
    min_studies: int = 5

    CHOICES = {  # noqa: RUF012 - a class constant, not a field
        "basis": ("planned", "pooled"),
        "method": ("exact", "chi2"),
        "pooling": ("fixed", "random"),
    }

    def problems(self) -> list[str]:
        """Why these settings cannot be used (empty when they can)."""
        out = []
        for name, allowed in self.CHOICES.items():
            value = getattr(self, name)
            if value not in allowed:
                options = " or ".join(repr(a) for a in allowed)
                out.append(f"excess_{name} must be {options}, but got {value!r}")
        if not isinstance(self.min_studies, (int, np.integer)) or self.min_studies < 1:
            out.append(
                f"excess_min_studies must be a whole number of at least 1, "
                f"but got {self.min_studies!r}"
            )
        return out

    def as_dict(self) -> dict[str, Any]:
        return {
            "basis": self.basis,
            "method": self.method,
            "pooling": self.pooling,
            "min_studies": int(self.min_studies),
        }


EXCESS_DEFAULTS = ExcessSettings()


def _median(x: pd.Series) -> float | None:
    x = x.dropna()
    return float(np.median(x)) if len(x) else None


#: Bands of design-based power the portfolio summary counts studies in (the last includes 1).
POWER_BANDS = ((0.0, 0.2), (0.2, 0.5), (0.5, 0.8), (0.8, 0.9), (0.9, 1.0))

#: Severities from the most to the least severe (as audit.rules orders them).
_WORST_FIRST = ("serious", "warning", "note")


def _quartiles(x: np.ndarray) -> list[float] | None:
    """First quartile, median and third quartile (numpy's linear interpolation), or None."""
    if not len(x):
        return None
    return [float(v) for v in np.quantile(x, [0.25, 0.5, 0.75])]


def power_distribution(power: np.ndarray, target: np.ndarray) -> dict[str, Any]:
    """How the studies' design-based power at the planned effect is spread.

    ``studies``: those with a power; ``quartiles``: [q1, median, q3]; ``at_target``: how many
    reach their own target power; ``bands``: studies per :data:`POWER_BANDS` band, each
    ``[low, high)`` (the last ``[0.9, 1]``).
    """
    known = np.isfinite(power)
    p, t = power[known], target[known]
    bands = []
    for low, high in POWER_BANDS:
        inside = (p >= low) & ((p < high) if high < 1.0 else (p <= high))
        bands.append({"low": low, "high": high, "studies": int(inside.sum())})
    return {
        "studies": int(known.sum()),
        "quartiles": _quartiles(p),
        "at_target": int((p >= t - 1e-12).sum()),
        "bands": bands,
    }


def mde_std_distribution(designs: np.ndarray, mde_std: np.ndarray) -> dict[str, Any]:
    """Per design, the spread of the standardized MDE's magnitude (a sign only says which way a
    study looked): ``unit``, ``studies``, ``median`` and ``quartiles`` ([q1, median, q3])."""
    out: dict[str, Any] = {}
    magnitude = np.abs(mde_std)
    for name in sorted({d for d in designs if isinstance(d, str)}):
        values = magnitude[(designs == name) & np.isfinite(magnitude)]
        if len(values):
            design = DESIGNS.get(name)
            q = _quartiles(values)
            out[name] = {
                "unit": design.standardized_as if design is not None else None,
                "studies": len(values),
                "median": q[1],
                "quartiles": q,
            }
    return out


def worst_findings(findings: pd.DataFrame, valid: np.ndarray) -> dict[str, int]:
    """Audited studies by their most severe finding (``none``: no finding)."""
    n = len(valid)
    rank = {s: i for i, s in enumerate(_WORST_FIRST)}
    worst = np.full(n, len(_WORST_FIRST))
    if len(findings):
        ranks = findings["severity"].map(rank).to_numpy(dtype=int)
        np.minimum.at(worst, findings["pos"].to_numpy(dtype=int), ranks)
    out = {s: int(((worst == i) & valid).sum()) for i, s in enumerate(_WORST_FIRST)}
    out["none"] = int(((worst == len(_WORST_FIRST)) & valid).sum())
    return out


def portfolio_summary(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    valid: np.ndarray,
    findings: pd.DataFrame,
    blank_rows: int = 0,
    excess: ExcessSettings = EXCESS_DEFAULTS,
    judged: dict[str, int] | None = None,
) -> dict[str, object]:
    """The contract's portfolio block (DESIGN.md section 5).

    ``share_at_target_power`` is the share of studies with a computable power at the planned
    effect whose power reaches that study's own target; ``median_mde_std`` is the median of the
    magnitudes of ``mde_std`` per design (standardized MDEs are comparable only within a
    design, and their sign only says which way a study looked). The report and the figures
    read these numbers; they compute none of their own.
    """
    from audit.metrics import reference_columns

    references = reference_columns(metrics.columns)
    # The audited rows of the columns read here only (a copy of every metric column would
    # double the metrics' memory for a moment).
    read = ["power_at_planned_effect", "mde_std", "ci_verdict", "exaggeration"]
    read += [c for _, c in references]
    audited = metrics.loc[valid, [c for c in read if c in metrics.columns]]
    power = audited["power_at_planned_effect"]
    spread = power_distribution(
        power.to_numpy(dtype=float), table.loc[valid, "target_power"].to_numpy(dtype=float)
    )
    share = spread["at_target"] / spread["studies"] if spread["studies"] else None
    mde_spread = mde_std_distribution(
        table.loc[valid, "design"].to_numpy(dtype=object),
        audited["mde_std"].to_numpy(dtype=float),
    )
    by_design = {name: d["median"] for name, d in mde_spread.items()}
    flag_counts = (
        {str(k): int(v) for k, v in findings["rule"].value_counts().sort_index().items()}
        if len(findings)
        else {}
    )
    verdicts = audited["ci_verdict"] if "ci_verdict" in audited else pd.Series(dtype=object)
    verdict_counts = {str(k): int(v) for k, v in verdicts.dropna().value_counts().items()}
    exaggeration = audited["exaggeration"] if "exaggeration" in audited else pd.Series(dtype=float)
    pool = pool_families(table, metrics, valid, excess.pooling)
    excess_test, excess_note = excess_significance(table, metrics, valid, excess, pool)
    any_power, basis, key = power_by_basis(metrics, valid)
    by_basis = power_distribution(
        any_power[valid], table.loc[valid, "target_power"].to_numpy(dtype=float)
    )
    by_basis["basis_counts"] = {
        name: int((basis == name).sum()) for name in ("planned", "pooled", "reference")
    }
    by_basis["reference_effect"] = key or None
    return {
        "studies": len(table),
        "audited": int(valid.sum()),
        "invalid": int((~valid).sum()),
        "blank_rows_skipped": int(blank_rows),
        "studies_with_power": spread["studies"],
        "median_power_at_planned_effect": _median(power),
        "share_at_target_power": share,
        "median_mde_std": by_design,
        "power_distribution": spread,
        "mde_std_distribution": mde_spread,
        "flag_counts": flag_counts,
        "studies_by_worst_finding": worst_findings(findings, valid),
        "ci_verdict_counts": verdict_counts,
        "median_exaggeration": _median(exaggeration),
        "excess_significance": excess_test,
        "excess_significance_note": excess_note,
        "power_distribution_by_basis": by_basis,
        "median_reference_power": {k: _median(audited[c]) for k, c in references},
        "families": family_summary(table, metrics, valid, excess, pool),
        "rows_judged_by_rule": dict(judged or {}),
    }


def _per_design(table: pd.DataFrame, rows: np.ndarray, func) -> np.ndarray:
    """``func(design, sub_table)`` evaluated per design over the selected rows (nan elsewhere)."""
    out = np.full(len(table), np.nan)
    for design, pos in design_groups(table, np.flatnonzero(rows)):
        out[pos] = func(design, table.iloc[pos])
    return out


def _scales(table: pd.DataFrame, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each selected row's analysis scale (:meth:`Design.analysis_scale`; None elsewhere), and
    whether it follows its family's scale (the estimate design's results)."""
    out = np.full(len(table), None, dtype=object)
    follows = np.zeros(len(table), dtype=bool)
    designs = table["design"].to_numpy(dtype=object)
    for name, design in DESIGNS.items():
        mask = rows & (designs == name)
        if mask.any():
            out[mask] = design.analysis_scale(table.loc[mask])
            follows[mask] = design.scale_follows_family
    return out, follows


def inverse_variance_pool(
    codes: np.ndarray, effect: np.ndarray, variance: np.ndarray, groups: int, pooling: str
) -> dict[str, np.ndarray]:
    """Inverse-variance pooled estimates of several groups of results at once.

    Parameters
    ----------
    codes : group of each result, ``0 .. groups - 1``
    effect, variance : the results and their variances (> 0), on one scale per group
    pooling : ``"fixed"`` or ``"random"``

    Returns
    -------
    dict of arrays, one entry per group
        ``estimate``, ``se``, ``k`` (results), ``q`` (Cochran's Q about the fixed-effect mean),
        ``tau2`` (between-study variance; 0 for fixed).

    Notes
    -----
    Fixed effect: ``w = 1 / v``, ``mu = sum(w y) / sum(w)``, ``se = 1 / sqrt(sum(w))``.
    Random effects: the same with ``w = 1 / (v + tau2)``, ``tau2`` the Paule-Mandel estimate, the
    root of ``sum w(tau2) (y - mu(tau2))^2 = k - 1`` (0 where the left side is below ``k - 1`` at
    ``tau2 = 0``). The left side falls as ``tau2`` grows and is at most ``k - 1`` at
    ``tau2 = sum (y - ybar)^2 / (k - 1)`` (a weighted sum of squares about its weighted mean is
    at most that about any other value), so the root is bracketed and found by bisection, all
    groups at once. Borenstein et al. (2009, ch. 11-12); Paule & Mandel (1982), J. Res. Natl.
    Bur. Stand. 87:377-385.

    Examples
    --------
    Two groups; the first pools 1 (variance 1) and 3 (variance 1) to 2 with SE 1/sqrt(2):

    >>> r = inverse_variance_pool(np.array([0, 0, 1]), np.array([1.0, 3.0, 5.0]),
    ...                           np.array([1.0, 1.0, 4.0]), 2, "fixed")
    >>> r["estimate"].tolist(), r["se"].round(4).tolist()
    ([2.0, 5.0], [0.7071, 2.0])
    """
    y = np.asarray(effect, dtype=float)
    v = np.asarray(variance, dtype=float)

    def weighted(tau2: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        w = 1.0 / (v + tau2[codes])
        total = np.bincount(codes, w, minlength=groups)
        mu = np.bincount(codes, w * y, minlength=groups) / total
        q = np.bincount(codes, w * (y - mu[codes]) ** 2, minlength=groups)
        return mu, total, q

    k = np.bincount(codes, minlength=groups).astype(float)
    zero = np.zeros(groups)
    with np.errstate(invalid="ignore", divide="ignore"):
        mu, total, q = weighted(zero)
        tau2 = zero.copy()
        if pooling == "random":
            mean = np.bincount(codes, y, minlength=groups) / k
            spread = np.bincount(codes, (y - mean[codes]) ** 2, minlength=groups)
            hi = np.where(k > 1, spread / (k - 1.0), 0.0)
            lo = zero.copy()
            heterogeneous = (q > k - 1.0) & (hi > 0)
            if heterogeneous.any():
                for _ in range(200):
                    mid = (lo + hi) / 2.0
                    _, _, q_mid = weighted(mid)
                    above = q_mid > k - 1.0
                    lo = np.where(above, mid, lo)
                    hi = np.where(above, hi, mid)
                tau2 = np.where(heterogeneous, (lo + hi) / 2.0, 0.0)
            mu, total, _ = weighted(tau2)
    return {"estimate": mu, "se": 1.0 / np.sqrt(total), "k": k, "q": q, "tau2": tau2}


@dataclass
class FamilyPool:
    """The pooled estimate of each ``outcome_family`` (see :func:`pool_families`).

    ``families``: family name -> its block (``studies``, ``results_pooled``, ``scale``,
    ``pooled_estimate``, ``pooled_se``, ``tau2``, and ``not_pooled`` saying why where it was not);
    ``members``: family name -> row positions of its audited studies; ``scale``: each row's
    analysis scale; ``too_small``: results left out because their family has fewer than two.
    """

    families: dict[str, dict[str, Any]]
    members: dict[str, np.ndarray]
    scale: np.ndarray
    follows: np.ndarray
    too_small: int
    pooling: str


def _analysis_results(table: pd.DataFrame, metrics: pd.DataFrame, rows: np.ndarray):
    """Each selected row's result on its design's analysis scale, and its SE."""

    def analysis(design, sub):
        with np.errstate(all="ignore"):
            return design.to_analysis(metrics.loc[sub.index, "result_effect"].to_numpy(float))

    return _per_design(table, rows, analysis), metrics["result_se"].to_numpy(dtype=float)


def pool_families(
    table: pd.DataFrame, metrics: pd.DataFrame, valid: np.ndarray, pooling: str
) -> FamilyPool:
    """Pool the results of each ``outcome_family`` on its analysis scale (one vectorised pass).

    A family is pooled from its audited studies with a signed result and an SE, when it has at
    least two and they are all on one analysis scale (d, d_z, Fisher z, log hazard ratio, ...:
    :meth:`Design.analysis_scale`); a family mixing scales is not pooled (its block says which
    scales it holds), since a d and a log hazard ratio cannot be averaged.
    """
    family = table["outcome_family"].to_numpy(dtype=object)
    in_family = valid & pd.notna(family)
    scale, follows = _scales(table, in_family)
    effect, se = _analysis_results(table, metrics, in_family)
    with np.errstate(invalid="ignore"):
        usable = in_family & np.isfinite(effect) & np.isfinite(se) & (se > 0) & pd.notna(scale)
    labels = np.array([str(f) for f in family[in_family]], dtype=object)
    members: dict[str, np.ndarray] = {}
    positions = np.flatnonzero(in_family)
    for label, idx in pd.Series(positions).groupby(labels, sort=True).groups.items():
        members[str(label)] = positions[np.asarray(idx)]
    families: dict[str, dict[str, Any]] = {}
    too_small = 0
    pooled_names: list[str] = []
    for label, pos in members.items():
        use = pos[usable[pos]]
        block: dict[str, Any] = {
            "studies": len(pos),
            "results_pooled": 0,
            "scale": None,
            "pooled_estimate": None,
            "pooled_se": None,
            "tau2": None,
            "not_pooled": None,
        }
        # Estimates (their SE's own scale) take the scale of the family's other results.
        kinds = pd.Series(scale[use[~follows[use]]], dtype=object).value_counts(sort=True)
        if not len(kinds) and len(use):
            kinds = pd.Series(scale[use], dtype=object).value_counts(sort=True)
        if len(use) < 2:
            too_small += len(use)
            block["not_pooled"] = (
                f"fewer than two results to pool ({len(use)} with an effect and an SE)"
            )
        elif len(kinds) > 1:
            listed = ", ".join(f"{k}: {v}" for k, v in kinds.items())
            block["not_pooled"] = (
                f"its results are on different scales ({listed}); give each scale its own "
                "outcome_family"
            )
        else:
            block["scale"] = str(kinds.index[0])
            pooled_names.append(label)
        families[label] = block
    if pooled_names:
        code_of = {name: i for i, name in enumerate(pooled_names)}
        pos = np.concatenate([members[name][usable[members[name]]] for name in pooled_names])
        codes = np.array([code_of[str(f)] for f in family[pos]], dtype=np.intp)
        fit = inverse_variance_pool(codes, effect[pos], se[pos] ** 2, len(pooled_names), pooling)
        for i, name in enumerate(pooled_names):
            families[name].update(
                results_pooled=int(fit["k"][i]),
                pooled_estimate=float(fit["estimate"][i]),
                pooled_se=float(fit["se"][i]),
                tau2=float(fit["tau2"][i]) if pooling == "random" else None,
            )
    return FamilyPool(families, members, scale, follows, too_small, pooling)


@dataclass
class _MemberPower:
    """Power of studies at effects on their family's scale, and how it was reached."""

    power: np.ndarray
    from_se: np.ndarray  # from the result's own SE (the realized design lacks a nuisance value)
    as_d: np.ndarray  # a raw-scale mean design at the family's d
    other_scale: np.ndarray  # on another scale than the family's: no power
    lacking: np.ndarray  # the design cannot give a power and there is no result SE


def _member_power(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    pos: np.ndarray,
    values: np.ndarray,
    family_scale: np.ndarray,
    pool: FamilyPool,
) -> _MemberPower:
    """Design-based power of the studies at rows ``pos`` (repeats allowed) at the effects
    ``values`` on their family's analysis scale ``family_scale``, one entry per pair.

    The study's own realized design, alpha, sides and direction; effects go through
    :meth:`Design.from_analysis`. A mean design on the raw scale in a family pooled as d gets
    its power at that d (:meth:`Design.at_standardized`: no SD needed). Where the design's power
    needs a value the row lacks (an SD) but the result has a standard error, the power is that
    of the design's test (its df) with that SE.
    """
    from audit.designs.means import _MeanDesign
    from audit.metrics import test_settings

    k = len(pos)
    out = _MemberPower(np.full(k, np.nan), *(np.zeros(k, dtype=bool) for _ in range(4)))
    designs = table["design"].to_numpy(dtype=object)[pos]
    result_se = metrics["result_se"].to_numpy(dtype=float)[pos]
    for name, design in DESIGNS.items():
        at = np.flatnonzero(designs == name)
        if not len(at):
            continue
        rows = table.iloc[pos[at]]
        test = test_settings(rows, design)
        real = design.scenario(rows, "realized")
        same = (pool.scale[pos[at]] == family_scale[at]) | pool.follows[pos[at]]
        as_d = (
            ~same
            & isinstance(design, _MeanDesign)
            & (family_scale[at] == getattr(design, "std_scale", None))
        )
        value = values[at]
        with np.errstate(all="ignore"):
            direct = design.power(real, design.from_analysis(value), test)
            sc, eff = design.at_standardized(real, np.abs(value), np.where(value < 0, -1.0, 1.0))
            standardized = design.power(sc, eff, test)
            df = design.analysis_df(real)
            df = np.where(np.isfinite(df) & (df > 0), df, np.inf)
            se = np.where(np.isfinite(result_se[at]) & (result_se[at] > 0), result_se[at], np.nan)
            ncp = test.direction * value / se
            fallback = np.full(len(at), np.nan)
            fine = np.isfinite(ncp)
            if fine.any():
                fallback[fine] = t_power(ncp[fine], df[fine], test.alpha[fine], test.sides[fine])
        got = np.where(same, direct, np.where(as_d, standardized, np.nan))
        from_se = same & np.isnan(got) & np.isfinite(fallback)
        out.power[at] = np.where(from_se, fallback, got)
        out.from_se[at] = from_se
        out.as_d[at] = as_d & np.isfinite(got)
        out.other_scale[at] = ~same & ~as_d
        out.lacking[at] = (same | as_d) & np.isnan(out.power[at])
    return out


def pooled_effect_power(
    table: pd.DataFrame, metrics: pd.DataFrame, valid: np.ndarray, pooling: str
) -> tuple[np.ndarray, pd.DataFrame]:
    """``power_at_pooled_effect`` of every row, with notes where it is null or approximate.

    Each audited study of a pooled family gets the design-based power of its realized design at
    the family's pooled estimate (see :func:`_member_power`). Rows without a family are noted
    by :mod:`audit.metrics`; F-test designs have no signed effect to pool.
    """
    n = len(table)
    power = np.full(n, np.nan)
    note_pos: list[np.ndarray] = []
    note_text: list[np.ndarray] = []

    def note(positions: np.ndarray, text: str | np.ndarray) -> None:
        if len(positions):
            note_pos.append(positions)
            note_text.append(np.broadcast_to(np.asarray(text, dtype=object), positions.shape))

    pool = pool_families(table, metrics, valid, pooling)
    designs = table["design"].to_numpy(dtype=object)
    poolable = [n for n, d in DESIGNS.items() if "power_at_pooled_effect" not in d.not_applicable]
    members, values, scales = [], [], []
    # A non-inferiority or equivalence row's power is that of its margin test (audit.metrics
    # notes it as not applicable here).
    superiority = ~_margin_rows(table)
    for label, pos in pool.members.items():
        block = pool.families[label]
        pos = pos[np.isin(designs[pos], poolable) & superiority[pos]]
        if block["pooled_estimate"] is None:
            note(
                pos,
                f"power_at_pooled_effect: not computed, outcome_family '{label}' is not pooled: "
                f"{block['not_pooled']}",
            )
            continue
        members.append(pos)
        values.append(np.full(len(pos), block["pooled_estimate"]))
        scales.append(np.full(len(pos), block["scale"], dtype=object))
    if members:
        pos = np.concatenate(members)
        scale = np.concatenate(scales)
        got = _member_power(table, metrics, pos, np.concatenate(values), scale, pool)
        power[pos] = got.power
        note(
            pos[got.from_se],
            "power_at_pooled_effect from the result's own standard error: the realized design "
            "lacks what its power needs (see its notes), so it is the power of the design's test "
            "with result_se",
        )
        note(
            pos[got.as_d],
            "power_at_pooled_effect at the family's pooled d (this row's effects are in outcome "
            "units; power at a standardized effect needs no SD)",
        )
        if got.other_scale.any():
            texts = np.array(
                [
                    f"power_at_pooled_effect: not computed, the row's results are on another "
                    f"scale ({a}) than its family's pooled estimate ({b})"
                    for a, b in zip(
                        pool.scale[pos[got.other_scale]], scale[got.other_scale], strict=True
                    )
                ],
                dtype=object,
            )
            note(pos[got.other_scale], texts)
        note(
            pos[got.lacking],
            "power_at_pooled_effect: not computed, the realized design cannot give a power (see "
            "the notes on its realized inputs) and the row has no result_se",
        )
    frame = pd.DataFrame(
        {
            "pos": np.concatenate(note_pos) if note_pos else np.zeros(0, dtype=int),
            "text": np.concatenate(note_text) if note_text else np.zeros(0, dtype=object),
        }
    )
    frame["text"] = frame["text"].astype(object)
    return power, frame


def family_power_grid(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    valid: np.ndarray,
    family: str,
    block: dict[str, Any],
    values: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """The power of each study of a pooled family at each of ``values`` (effects on the
    family's analysis scale): row positions of the studies with a power, and their powers
    (one row per study, one column per value), the computation of ``power_at_pooled_effect``."""
    labels = table["outcome_family"].to_numpy(dtype=object)
    designs = table["design"].to_numpy(dtype=object)
    poolable = [n for n, d in DESIGNS.items() if "power_at_pooled_effect" not in d.not_applicable]
    pos = np.flatnonzero(
        valid
        & (labels == family)
        & np.isin(designs, poolable)
        & pd.notna(labels)
        & ~_margin_rows(table)
    )
    scale, follows = _scales(table, valid & pd.notna(labels))
    pool = FamilyPool({}, {}, scale, follows, 0, "")
    k = len(values)
    repeated = np.repeat(pos, k)
    got = _member_power(
        table,
        metrics,
        repeated,
        np.tile(np.asarray(values, dtype=float), len(pos)),
        np.full(len(repeated), block["scale"], dtype=object),
        pool,
    )
    power = got.power.reshape(len(pos), k)
    drawn = np.isfinite(power).any(axis=1)
    return pos[drawn], power[drawn]


def excess_significance(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    valid: np.ndarray,
    settings: ExcessSettings = EXCESS_DEFAULTS,
    pool: FamilyPool | None = None,
) -> tuple[dict[str, Any] | None, str | None]:
    """The ``excess_significance`` block of the portfolio, or None and the reason it is skipped.

    A study enters when it is audited, its significance at its own alpha is known
    (``result_significant``) and it has a power at the basis. Significance and power use the
    same (Bonferroni) alpha and sides, so a two-sided test counts significant results in either
    direction, as its power does.
    """
    sig = metrics["result_significant"].to_numpy(dtype=float)
    with_result = valid & np.isfinite(sig)
    extra: dict[str, Any] = {}
    power, basis = _excess_power(metrics, settings)
    if settings.basis != "planned":
        if pool is None:
            pool = pool_families(table, metrics, valid, settings.pooling)
        families = {
            name: {
                "studies": block["results_pooled"],
                "pooled_estimate": block["pooled_estimate"],
                "tau2": block["tau2"],
            }
            for name, block in pool.families.items()
            if block["pooled_estimate"] is not None
        }
        extra = {"families": families, "excluded_family_too_small": pool.too_small}
    block, note = excess_block(
        sig == 1.0,
        power,
        with_result,
        method=settings.method,
        min_studies=settings.min_studies,
        basis=basis,
    )
    if block is not None:
        block.update(extra)
    return block, note


def _excess_power(metrics: pd.DataFrame, settings: ExcessSettings) -> tuple[np.ndarray, str]:
    """Each study's power at the basis of the excess-significance test, and the basis in words."""
    if settings.basis == "planned":
        return metrics["power_at_planned_effect"].to_numpy(dtype=float), (
            "planned effect: each study's design-based power at its planned effect, with the "
            "realized design"
        )
    kind = (
        "fixed-effect (inverse-variance)"
        if settings.pooling == "fixed"
        else "random-effects (Paule-Mandel)"
    )
    return metrics["power_at_pooled_effect"].to_numpy(dtype=float), (
        f"pooled estimate: each study's design-based power at the {kind} pooled estimate of "
        "its outcome_family (analysis scale)"
    )


def excess_block(
    significant: np.ndarray,
    power: np.ndarray,
    with_result: np.ndarray,
    *,
    method: str,
    min_studies: int,
    basis: str,
) -> tuple[dict[str, Any] | None, str | None]:
    """One test of excess significance over the studies with a result and a power (the
    portfolio's, or one family's), with its ``deficit``; None and a note when too few."""
    use = with_result & np.isfinite(power)
    counts = {
        "studies_with_results": int(with_result.sum()),
        "excluded_no_power": int((with_result & ~np.isfinite(power)).sum()),
    }
    if use.sum() < min_studies:
        return None, (
            f"excess significance not tested: {int(use.sum())} studies have both a result and a "
            f"power at the basis ({basis.split(':')[0]}); at least {min_studies} are needed"
        )
    sig = np.asarray(significant, dtype=bool)
    result = excess_significance_test(sig[use], power[use], method=method)
    deficit = None
    if result.observed < result.expected:
        deficit = {
            "observed": result.observed,
            "expected": result.expected,
            "p_value": deficit_p_value(sig[use], power[use]),
        }
    method_text = {
        "binomial": "exact binomial (all powers equal)",
        "poisson-binomial": "exact Poisson-binomial over the studies' own powers",
        "chi-square": "chi-square, 1 df (Ioannidis & Trikalinos 2007), one-sided",
    }[result.method]
    block: dict[str, Any] = {
        "observed": result.observed,
        "expected": result.expected,
        "p_value": result.p_value,
        "basis": basis,
        "method": method_text,
        "alternative": "more significant results than the powers predict (one-sided)",
        "studies": result.studies,
        "deficit": deficit,
        **counts,
        "minimum_studies": int(min_studies),
    }
    if result.statistic is not None:
        block["statistic"] = result.statistic
    return block, None


def family_summary(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    valid: np.ndarray,
    settings: ExcessSettings = EXCESS_DEFAULTS,
    pool: FamilyPool | None = None,
) -> dict[str, dict[str, Any]]:
    """The portfolio's ``families`` block: per ``outcome_family`` its studies, pooled estimate
    and SE on its analysis scale, the median power of its studies at the pooled estimate and at
    each reference effect, and its own test of excess significance (on the pooled basis: each
    study's power at the family's pooled estimate, as Ioannidis & Trikalinos define the test
    for one meta-analysis)."""
    if pool is None:
        pool = pool_families(table, metrics, valid, settings.pooling)
    from audit.metrics import reference_columns

    sig = metrics["result_significant"].to_numpy(dtype=float)
    power = metrics["power_at_pooled_effect"].to_numpy(dtype=float)
    references = reference_columns(metrics.columns)
    kind = "fixed-effect" if settings.pooling == "fixed" else "random-effects (Paule-Mandel)"
    out: dict[str, dict[str, Any]] = {}
    for label, pos in pool.members.items():
        block = pool.families[label]
        member = np.zeros(len(table), dtype=bool)
        member[pos] = True
        excess, note = excess_block(
            sig == 1.0,
            np.where(member, power, np.nan),
            member & np.isfinite(sig),
            method=settings.method,
            min_studies=settings.min_studies,
            basis=f"pooled estimate: each study's design-based power at the family's {kind} "
            "pooled estimate",
        )
        out[label] = {
            "studies": block["studies"],
            "results_pooled": block["results_pooled"],
            "pooled_estimate": block["pooled_estimate"],
            "pooled_se": block["pooled_se"],
            "scale": block["scale"],
            "pooling": settings.pooling,
            "tau2": block["tau2"],
            "not_pooled": block["not_pooled"],
            "studies_with_power_at_pooled_effect": int(np.isfinite(power[pos]).sum()),
            "median_power_at_pooled_effect": _median(pd.Series(power[pos])),
            "median_reference_power": {
                key: _median(metrics[column].iloc[pos]) for key, column in references
            },
            "excess_significance": excess,
            "excess_significance_note": note,
        }
    return out


def power_by_basis(metrics: pd.DataFrame, valid: np.ndarray) -> tuple[np.ndarray, np.ndarray, str]:
    """Each audited study's design-based power at the planned effect, else at its family's
    pooled estimate, else at the middle reference effect; with the basis used per row
    (``planned``, ``pooled``, ``reference`` or None) and that reference effect's key.

    The middle reference effect is the median of those in force (the lower middle one of an
    even number): 0.5 by default, a "medium" effect.
    """
    from audit.metrics import reference_columns

    planned = metrics["power_at_planned_effect"].to_numpy(dtype=float)
    pooled = metrics["power_at_pooled_effect"].to_numpy(dtype=float)
    references = reference_columns(metrics.columns)
    key = ""
    reference = np.full(len(metrics), np.nan)
    if references:
        ordered = sorted(references, key=lambda kc: float(kc[0]))
        key, column = ordered[(len(ordered) - 1) // 2]
        reference = metrics[column].to_numpy(dtype=float)
    basis = np.full(len(metrics), None, dtype=object)
    power = np.full(len(metrics), np.nan)
    for name, values in (("planned", planned), ("pooled", pooled), ("reference", reference)):
        take = valid & np.isnan(power) & np.isfinite(values)
        power[take] = values[take]
        basis[take] = name
    return power, basis, key


#: Most distinct values a ``--group-by`` column may hold: a summary per value of a column that
#: is nearly unique (an id, a title) summarises nothing, and the report would list them all.
MAX_GROUPS = 1000
#: The group of the rows that leave a ``--group-by`` column blank.
BLANK_GROUP = "(blank)"


def group_labels(values: np.ndarray | pd.Series) -> np.ndarray:
    """Each cell's group: its text without surrounding spaces, a whole number written as one
    (``2019.0`` from a spreadsheet is the group ``2019``, as ``"2019"`` in a CSV file is), and
    :data:`BLANK_GROUP` for a blank cell.

    >>> cells = np.array([" north ", 2019.0, "2019", None, float("nan"), "", 0.5], dtype=object)
    >>> group_labels(cells).tolist()
    ['north', '2019', '2019', '(blank)', '(blank)', '(blank)', '0.5']
    """
    cells = pd.Series(np.asarray(values, dtype=object), dtype=object)
    codes, uniques = pd.factorize(cells, use_na_sentinel=True)
    labels = []
    for v in uniques.tolist():  # once per distinct value, not per row
        if isinstance(v, (float, np.floating)) and np.isfinite(v) and float(v).is_integer():
            v = int(v)
        text = format(v, ".15g") if isinstance(v, (float, np.floating)) else str(v)
        labels.append(text.strip() or BLANK_GROUP)
    out = np.empty(len(labels) + 1, dtype=object)
    out[:-1] = labels
    out[-1] = BLANK_GROUP
    return out[codes]


def group_summaries(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    valid: np.ndarray,
    findings: pd.DataFrame,
    columns: list[str],
    excess: ExcessSettings = EXCESS_DEFAULTS,
) -> dict[str, dict[str, dict[str, Any]]]:
    """The portfolio summary per value of each column of ``columns`` (``--group-by``):
    ``{column: {value: summary}}``, the values in sorted order, :data:`BLANK_GROUP` last.

    Each summary holds, over the group's rows, the portfolio's own keys (the same functions
    compute them): ``studies``, ``audited``, ``invalid``, ``studies_with_power``,
    ``median_power_at_planned_effect``, ``share_at_target_power``, ``median_mde_std`` (per
    design), ``flag_counts``, ``studies_by_worst_finding``, ``ci_verdict_counts``, and the
    group's own test of excess significance on the run's basis (``excess_significance``, or
    None and ``excess_significance_note``). Pooled powers are those of the whole table: a
    family is pooled over all its studies, whichever group they are in.
    """
    n = len(table)
    power = metrics["power_at_planned_effect"].to_numpy(dtype=float)
    target = table["target_power"].to_numpy(dtype=float)
    designs = table["design"].to_numpy(dtype=object)
    mde_std = metrics["mde_std"].to_numpy(dtype=float)
    verdicts = (
        metrics["ci_verdict"].to_numpy(dtype=object)
        if "ci_verdict" in metrics
        else np.full(n, None, dtype=object)
    )
    sig = metrics["result_significant"].to_numpy(dtype=float)
    basis_power, basis = _excess_power(metrics, excess)
    rank = {s: i for i, s in enumerate(_WORST_FIRST)}
    worst = np.full(n, len(_WORST_FIRST))
    finding_pos = findings["pos"].to_numpy(dtype=int) if len(findings) else np.zeros(0, int)
    if len(findings):
        np.minimum.at(worst, finding_pos, findings["severity"].map(rank).to_numpy(dtype=int))
    rules = findings["rule"].to_numpy(dtype=object) if len(findings) else np.zeros(0, object)
    out: dict[str, dict[str, dict[str, Any]]] = {}
    for column in columns:
        labels = group_labels(table[column].to_numpy(dtype=object))
        names = sorted(set(labels.tolist()) - {BLANK_GROUP}) + (
            [BLANK_GROUP] if (labels == BLANK_GROUP).any() else []
        )
        codes = pd.Categorical(labels, categories=names).codes
        # Rows (and findings) sorted by group once; each group is then a slice.
        order = np.argsort(codes, kind="stable")
        ends = np.cumsum(np.bincount(codes, minlength=len(names)))
        f_codes = codes[finding_pos]
        f_order = np.argsort(f_codes, kind="stable")
        f_ends = np.cumsum(np.bincount(f_codes, minlength=len(names)))
        blocks: dict[str, dict[str, Any]] = {}
        for g, name in enumerate(names):
            pos = order[(ends[g - 1] if g else 0) : ends[g]]
            ok = pos[valid[pos]]
            spread = power_distribution(power[ok], target[ok])
            mde = mde_std_distribution(designs[ok], mde_std[ok])
            mine = f_order[(f_ends[g - 1] if g else 0) : f_ends[g]]
            rule_ids, counts = np.unique(rules[mine].astype(str), return_counts=True)
            verdict_ids, verdict_counts = np.unique(
                [v for v in verdicts[ok].tolist() if isinstance(v, str)], return_counts=True
            )
            test, note = excess_block(
                sig[ok] == 1.0,
                basis_power[ok],
                np.isfinite(sig[ok]),
                method=excess.method,
                min_studies=excess.min_studies,
                basis=basis,
            )
            by_worst = {s: int((worst[ok] == i).sum()) for i, s in enumerate(_WORST_FIRST)}
            by_worst["none"] = int((worst[ok] == len(_WORST_FIRST)).sum())
            blocks[name] = {
                "studies": len(pos),
                "audited": len(ok),
                "invalid": len(pos) - len(ok),
                "studies_with_power": spread["studies"],
                "median_power_at_planned_effect": _median(pd.Series(power[ok])),
                "share_at_target_power": (
                    spread["at_target"] / spread["studies"] if spread["studies"] else None
                ),
                "median_mde_std": {k: d["median"] for k, d in mde.items()},
                "flag_counts": {str(r): int(c) for r, c in zip(rule_ids, counts, strict=True)},
                "studies_by_worst_finding": by_worst,
                "ci_verdict_counts": {
                    str(v): int(c) for v, c in zip(verdict_ids, verdict_counts, strict=True)
                },
                "excess_significance": test,
                "excess_significance_note": note,
            }
        out[column] = blocks
    return out
