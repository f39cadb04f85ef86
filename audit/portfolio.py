"""Portfolio-level statistics over all audited studies."""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from audit.designs import DESIGNS, design_groups
from audit.designs._power import t_power
from audit.excess import deficit_p_value, excess_significance_test

__all__ = ["EXCESS_DEFAULTS", "ExcessSettings", "excess_significance", "portfolio_summary"]


@dataclass(frozen=True)
class ExcessSettings:
    """How the test of excess significance is run (keyword arguments of ``audit_table``).

    Attributes
    ----------
    basis : ``"planned"`` — each study's design-based power at its planned effect (realized
        design); ``"pooled"`` — each study's power, with its own standard error, at the pooled
        estimate of its ``outcome_family``.
    method : ``"exact"`` (Poisson-binomial; binomial when all powers are equal) or ``"chi2"``
        (the chi-square statistic of Ioannidis & Trikalinos 2007).
    pooling : for the pooled basis, ``"fixed"`` (inverse-variance) or ``"random"``
        (random-effects, Paule-Mandel between-study variance), both from statsmodels'
        ``combine_effects``.
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
) -> dict[str, object]:
    """The contract's portfolio block (DESIGN.md section 5).

    ``share_at_target_power`` is the share of studies with a computable power at the planned
    effect whose power reaches that study's own target; ``median_mde_std`` is the median of the
    magnitudes of ``mde_std`` per design (standardized MDEs are comparable only within a
    design, and their sign only says which way a study looked). The report and the figures
    read these numbers; they compute none of their own.
    """
    audited = metrics.loc[valid]
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
    excess_block, excess_note = excess_significance(table, metrics, valid, excess)
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
        "excess_significance": excess_block,
        "excess_significance_note": excess_note,
    }


def _per_design(table: pd.DataFrame, rows: np.ndarray, func) -> np.ndarray:
    """``func(design, sub_table)`` evaluated per design over the selected rows (nan elsewhere)."""
    out = np.full(len(table), np.nan)
    for design, pos in design_groups(table, np.flatnonzero(rows)):
        out[pos] = func(design, table.iloc[pos])
    return out


def _pooled_power(
    table: pd.DataFrame, metrics: pd.DataFrame, rows: np.ndarray, pooling: str
) -> tuple[np.ndarray, dict[str, Any], int]:
    """Each study's power, with its own SE, at the pooled estimate of its outcome family.

    Returns the powers (nan where there is none), a summary per family, and the number of
    studies left out because their family has fewer than two results to pool.
    """
    from statsmodels.stats.meta_analysis import combine_effects

    def analysis(design, sub):
        with np.errstate(all="ignore"):
            return design.to_analysis(metrics.loc[sub.index, "result_effect"].to_numpy(float))

    family = table["outcome_family"].to_numpy(dtype=object)
    se = metrics["result_se"].to_numpy(dtype=float)
    effect = _per_design(table, rows, analysis)
    usable = rows & pd.notna(family) & np.isfinite(effect) & np.isfinite(se) & (se > 0)
    # The direction the audit used (either way: two-sided, so the sign does not matter).
    sign = np.where(metrics["direction_used"].to_numpy(dtype=object) == "decrease", -1.0, 1.0)
    alpha = (table["alpha"] / table["comparisons"]).to_numpy(dtype=float)
    sides = table["sides"].to_numpy(dtype=float)
    power = np.full(len(table), np.nan)
    families: dict[str, Any] = {}
    too_small = 0
    labels = pd.Series(family[usable]).astype(str)
    index = np.flatnonzero(usable)
    # One meta-analysis per family (a handful of calls), never one per study.
    for label, members in labels.groupby(labels, sort=True).groups.items():
        pos = index[np.asarray(members)]
        if len(pos) < 2:
            too_small += len(pos)
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            fit = combine_effects(effect[pos], se[pos] ** 2, method_re="iterated")
        pooled = float(fit.mean_effect_fe if pooling == "fixed" else fit.mean_effect_re)
        power[pos] = t_power(sign[pos] * pooled / se[pos], np.inf, alpha[pos], sides[pos])
        families[str(label)] = {
            "studies": len(pos),
            "pooled_estimate": pooled,
            "tau2": float(fit.tau2) if pooling == "random" else None,
        }
    return power, families, too_small


def excess_significance(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    valid: np.ndarray,
    settings: ExcessSettings = EXCESS_DEFAULTS,
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
    if settings.basis == "planned":
        power = metrics["power_at_planned_effect"].to_numpy(dtype=float)
        basis = (
            "planned effect: each study's design-based power at its planned effect, with the "
            "realized design"
        )
    else:
        power, families, too_small = _pooled_power(table, metrics, with_result, settings.pooling)
        kind = (
            "fixed-effect (inverse-variance)"
            if settings.pooling == "fixed"
            else "random-effects (Paule-Mandel)"
        )
        basis = (
            f"pooled estimate: each study's power, with its own standard error, at the {kind} "
            "pooled estimate of its outcome_family (statsmodels combine_effects; analysis scale)"
        )
        extra = {"families": families, "excluded_family_too_small": too_small}
    use = with_result & np.isfinite(power)
    counts = {
        "studies_with_results": int(with_result.sum()),
        "excluded_no_power": int((with_result & ~np.isfinite(power)).sum()),
    }
    if use.sum() < settings.min_studies:
        return None, (
            f"excess significance not tested: {int(use.sum())} studies have both a result and a "
            f"power at the basis ({basis.split(':')[0]}); at least {settings.min_studies} are "
            "needed"
        )
    result = excess_significance_test(sig[use] == 1.0, power[use], method=settings.method)
    deficit = None
    if result.observed < result.expected:
        deficit = {
            "observed": result.observed,
            "expected": result.expected,
            "p_value": deficit_p_value(sig[use] == 1.0, power[use]),
        }
    method = {
        "binomial": "exact binomial (all powers equal)",
        "poisson-binomial": "exact Poisson-binomial over the studies' own powers",
        "chi-square": "chi-square, 1 df (Ioannidis & Trikalinos 2007), one-sided",
    }[result.method]
    block: dict[str, Any] = {
        "observed": result.observed,
        "expected": result.expected,
        "p_value": result.p_value,
        "basis": basis,
        "method": method,
        "alternative": "more significant results than the powers predict (one-sided)",
        "studies": result.studies,
        "deficit": deficit,
        **counts,
        "minimum_studies": int(settings.min_studies),
    }
    if result.statistic is not None:
        block["statistic"] = result.statistic
    block.update(extra)
    return block, None
