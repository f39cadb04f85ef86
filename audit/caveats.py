"""Plain-language caveats for the report: what the retrospective numbers mean and do not mean.

Each caveat is a short paragraph for a reader who is not a statistician. :func:`caveats` picks
the ones that apply to an audit (the general caution always does); reports and exports render
them as given.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

__all__ = ["CAVEATS", "caveats"]

#: Topic -> (title, text). Order is the order of the report's caveats section.
CAVEATS: dict[str, tuple[str, str]] = {
    "observed_power": (
        "Design-based power, not observed power.",
        "Power and MDE here describe the design as it was actually run (realized size and "
        "variability) against an effect fixed in advance: the planned effect or the SESOI. They "
        "say what the study could detect, whatever it found. 'Observed power', computed at the "
        "effect a study happened to observe, is only the p-value written another way: about 50 % "
        "when p equals the significance level, less whenever the result was not significant "
        "(Hoenig & Heisey 2001). It cannot tell whether a non-significant study was "
        "informative; the audit shows it (observed_power) only to make that plain, and flags "
        "studies that report it.",
    ),
    "ci_verdict": (
        "What a result rules out.",
        "ci_verdict reads the confidence interval at the level of the study's own test. "
        "'detected': the test was significant. 'excludes_sesoi' or 'excludes_planned_effect': "
        "not significant, but the interval rules out effects as large as the smallest effect "
        "of interest or the planned effect: an informative null result. 'inconclusive': the "
        "interval still holds both no effect and the effects that mattered, so the study "
        "neither found nor ruled out what it looked for. Intervals derived from an estimate "
        "and a p-value or standard error assume a symmetric interval on the analysis scale "
        "(log for ratios).",
    ),
    "margins": (
        "Non-inferiority and equivalence trials.",
        "Rows whose hypothesis is non_inferiority or equivalence are audited against their "
        "margin: power is the chance of showing non-inferiority (or equivalence) at the planned "
        "true difference, detectable_margin replaces the MDE, and the interval at level "
        "1 - 2 alpha is read against the margin ('non_inferior', 'inferior', 'equivalent', "
        "'not_equivalent', 'inconclusive'). Failing to show non-inferiority is not evidence of "
        "inferiority, and a non-significant test of difference never shows similarity. The "
        "audit takes the margin as given; whether it is clinically justified, and whether the "
        "analysis population suits a non-inferiority question, it cannot judge.",
    ),
    "type_sm": (
        "Sign and size of a significant result.",
        "type_s and exaggeration describe what a significant result from this design would look "
        "like if the true effect were the planned one (or the SESOI): the chance it points the "
        "wrong way (Type S), and how much larger than the truth it would be on average (Type M, "
        "the exaggeration ratio; Gelman & Carlin 2014). A weak design that reaches significance "
        "usually overstates the effect, sometimes several-fold. These are properties of the "
        "design, not of the reported result, and assume an approximately normal estimate with "
        "the realized standard error.",
    ),
    "precision": (
        "Precision achieved.",
        "ci_halfwidth_observed is half the width of the reported interval, set against the "
        "half-width the plan implied (ratio_plan) and the one the realized size and "
        "variability imply (ratio_realized). A ratio well above 1 means the study measured "
        "less precisely than expected, for reasons the design numbers alone do not show (a "
        "different analysis, more variability, missing data).",
    ),
    "excess_significance": (
        "More significant results than expected?",
        "The test of excess significance (Ioannidis & Trikalinos 2007) counts the significant "
        "results and compares them with the number the studies' power predicts. Too many "
        "suggests selective reporting, flexible analyses or optimistic power assumptions, or "
        "that the true effects are larger than the basis assumes. It is exploratory: it says "
        "nothing about which study is affected, it assumes the studies are independent, and "
        "with few studies it has little power.",
    ),
    "pooled_power": (
        "Power at a pooled or a conventional effect.",
        "power_at_pooled_effect is each study's design-based power at the pooled estimate of its "
        "outcome_family, reference_power its power at conventional standardized effects (the "
        "same numbers in every design's unit: d, d_z, h, r, f, f2, log hazard ratio, which do "
        "not describe the same size of effect across units; choose them for the field with "
        "--reference-effects). A pooled estimate inherits the selection of the studies it "
        "pools: where significant results were likelier to be published or reported, it is "
        "inflated, and the powers at it are optimistic. A family whose studies are mostly far "
        "below 80 % power at its own pooled effect could not have answered its question "
        "study by study.",
    ),
    "reported_forms": (
        "Results derived from what papers report.",
        "Where a study gives a test statistic, arm means and SDs, or an estimate with a p-value "
        "instead of an estimate with its standard error, the audit derives the result (its notes "
        "say from what): t, z, F and chi-square on 1 df and r are read as the test of the "
        "study's design (the pooled-variance t, the pooled z test for proportions, Schoenfeld's "
        "variance for a log hazard ratio, Fisher's z for r). A reported p-value is checked "
        "against the other reported numbers with every printed number taken as rounded "
        "(reported_p_discrepancy); a mismatch means a number is wrong somewhere, not which.",
    ),
    "thresholds": (
        "Thresholds are choices.",
        "Each rule's thresholds are documented parameters (study-audit rules ID); change them "
        "with --rules FILE to match your field's standards.",
    ),
    "judgment": (
        "A support, not a verdict.",
        "This audit supports, and does not replace, the judgment of a qualified statistician. "
        "Its numbers rest on the planning and result values as entered; read them in context "
        "(the analysis actually used, multiplicity, how missing data were handled, what was at "
        "stake for the people in the study) before any decision about people, funding or "
        "publication rests on them.",
    ),
}


def caveats(metrics: pd.DataFrame, portfolio: dict[str, Any]) -> list[dict[str, str]]:
    """The caveats that apply to an audit, as ``{"topic", "title", "text"}`` records."""

    def present(name: str) -> bool:
        if name not in metrics:
            return False
        return bool(pd.notna(metrics[name]).to_numpy(dtype=bool).any())

    wanted = {
        "judgment": True,
        "thresholds": True,
        "observed_power": True,
        "ci_verdict": present("ci_verdict"),
        "margins": present("detectable_margin") or present("margin_share_of_control_effect"),
        "type_sm": present("type_s") or present("exaggeration"),
        "precision": present("ci_halfwidth_observed"),
        "excess_significance": portfolio.get("excess_significance") is not None,
        "pooled_power": present("power_at_pooled_effect")
        or any(c.startswith("reference_power_") and present(c) for c in metrics.columns),
        "reported_forms": present("reported_p_recomputed"),
    }
    return [
        {"topic": topic, "title": title, "text": text}
        for topic, (title, text) in CAVEATS.items()
        if wanted[topic]
    ]
