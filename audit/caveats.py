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
    "judgment": (
        "An aid to judgment",
        "This audit supports, and does not replace, the judgment of a qualified statistician. "
        "Its numbers rest on the planning and result values as entered; a study's context "
        "(its outcome, its analysis, what was at stake for the people in it) decides what "
        "they mean.",
    ),
    "observed_power": (
        "Observed power is not evidence",
        "Power computed from a study's own observed effect ('observed' or 'post-hoc' power) is "
        "only the p-value written another way: about 50 % when p equals the significance "
        "level, less whenever the result was not significant. It cannot tell whether a "
        "non-significant study was informative. The audit shows it (observed_power) only to "
        "make that plain, and flags studies that report it. Use the confidence interval and "
        "the power the design had for the effect it was planned around.",
    ),
    "ci_verdict": (
        "What a result rules out",
        "ci_verdict reads the confidence interval at the level of the study's own test. "
        "'detected': the test was significant. 'excludes_sesoi' or 'excludes_planned_effect': "
        "not significant, but the interval rules out effects as large as the smallest effect "
        "of interest or the planned effect — an informative null result. 'inconclusive': the "
        "interval still holds both no effect and the effects that mattered, so the study "
        "neither found nor ruled out what it looked for. Intervals derived from an estimate "
        "and a p-value or standard error assume a symmetric interval on the analysis scale "
        "(log for ratios).",
    ),
    "type_sm": (
        "Sign and size of a significant result",
        "type_s and exaggeration describe what a significant result from this design would look "
        "like if the true effect were the planned one (or the SESOI): the chance it points the "
        "wrong way, and how much larger than the truth it would be on average. A weak design "
        "that reaches significance usually overstates the effect, sometimes several-fold. These "
        "are properties of the design, not of the reported result, and assume an approximately "
        "normal estimate with the realized standard error.",
    ),
    "precision": (
        "Precision achieved",
        "ci_halfwidth_observed is half the width of the reported interval, set against the "
        "half-width the plan implied (ratio_plan) and the one the realized size and "
        "variability imply (ratio_realized). A ratio well above 1 means the study measured "
        "less precisely than expected, for reasons the design numbers alone do not show (a "
        "different analysis, more variability, missing data).",
    ),
    "excess_significance": (
        "More significant results than expected?",
        "The test of excess significance counts the significant results and compares them with "
        "the number the studies' power predicts. Too many suggests selective reporting, "
        "flexible analyses or optimistic power assumptions — or that the true effects are "
        "larger than the basis assumes. It is exploratory: it says nothing about which study is "
        "affected, it assumes the studies are independent, and with few studies it has little "
        "power.",
    ),
}


def caveats(metrics: pd.DataFrame, portfolio: dict[str, Any]) -> list[dict[str, str]]:
    """The caveats that apply to an audit, as ``{"topic", "title", "text"}`` records."""

    def present(name: str) -> bool:
        if name not in metrics:
            return False
        return bool(pd.notna(metrics[name]).to_numpy(dtype=bool).any())

    has_results = present("result_significant") or present("result_p")
    wanted = {
        "judgment": True,
        "observed_power": has_results
        or "observed-power-reported" in (portfolio.get("flag_counts") or {}),
        "ci_verdict": present("ci_verdict"),
        "type_sm": present("type_s") or present("exaggeration"),
        "precision": present("ci_halfwidth_observed"),
        "excess_significance": portfolio.get("excess_significance") is not None,
    }
    return [
        {"topic": topic, "title": title, "text": text}
        for topic, (title, text) in CAVEATS.items()
        if wanted[topic]
    ]
