"""The ``observed-power-reported`` check: studies that report a post-hoc ("observed") power.

Power computed after the fact from the observed effect is a one-to-one transform of the p-value
(Hoenig & Heisey 2001), so reporting it adds nothing and invites the fallacy that a
non-significant study with "low observed power" was merely unlucky. The check flags every study
that reports such a power, compares the reported value with the one its p-value implies, and
points to what does carry information: the confidence interval (``ci_verdict``) and the
design-based power at the planned effect.

The rule is defined here as data (``RULE``) until the rules engine reads rule files; its
findings have the same shape as any rule's (``pos``, ``rule``, ``severity``, ``message``).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

__all__ = ["RULE", "observed_power_findings"]

RULE: dict[str, Any] = {
    "id": "observed-power-reported",
    "severity": "warning",
    "metric": "observed_power_from_p",
    "tolerance": 0.05,
    "title": "the study reports a post-hoc (observed) power",
    "rationale": (
        "Power computed from the observed effect is a function of the p-value alone: it is "
        "about 0.5 when p equals alpha, below 0.5 whenever the result is not significant and "
        "above it whenever it is. It therefore cannot show that a non-significant result was "
        "informative, nor that it was not; and 'low observed power' is no explanation for a "
        "null result, because every non-significant result has it. What a finished study can "
        "and cannot rule out is read from its confidence interval against the planned effect "
        "and the smallest effect of interest; what it could detect is read from design-based "
        "power at the planned effect with the realized size and variability."
    ),
    "references": [
        "Hoenig, J. M. & Heisey, D. M. (2001). The abuse of power: the pervasive fallacy of "
        "power calculations for data analysis. The American Statistician 55:19-24.",
    ],
}

_FINDING_COLUMNS = ["pos", "rule", "severity", "message"]


def _fmt(values: np.ndarray, digits: int = 2) -> np.ndarray:
    text = pd.Series(values, dtype=float).map(lambda v: f"{v:.{digits}g}" if np.isfinite(v) else "")
    return text.to_numpy(dtype=object)


def observed_power_findings(
    table: pd.DataFrame, metrics: pd.DataFrame, valid: np.ndarray, rule: dict[str, Any] = RULE
) -> pd.DataFrame:
    """One finding per audited study that reports ``reported_power``.

    The message compares the reported power with the observed power implied by the study's p
    (or, without a reported p, by its effect and standard error): when they agree within the
    rule's ``tolerance`` the reported value *is* the observed power; when they differ it was
    computed otherwise (perhaps at a planned effect, which would be legitimate), and the
    message says so.
    """
    reported = (
        table["reported_power"].to_numpy(dtype=float)
        if "reported_power" in table
        else np.full(len(table), np.nan)
    )
    flagged = valid & np.isfinite(reported)
    if not flagged.any():
        return pd.DataFrame({c: pd.Series(dtype=object) for c in _FINDING_COLUMNS})
    pos = np.flatnonzero(flagged)
    from_p = metrics["observed_power_from_p"].to_numpy(dtype=float)[pos]
    from_effect = metrics["observed_power"].to_numpy(dtype=float)[pos]
    p = metrics["result_p"].to_numpy(dtype=float)[pos]
    implied = np.where(np.isfinite(from_p), from_p, from_effect)
    design_power = metrics["power_at_planned_effect"].to_numpy(dtype=float)[pos]
    rep = reported[pos]
    known = np.isfinite(implied)
    agrees = known & (np.abs(rep - implied) <= rule["tolerance"])
    rep_t, imp_t, p_t = _fmt(rep), _fmt(implied), _fmt(p)
    source = np.where(np.isfinite(from_p), "p = " + p_t, "its effect and SE (p = " + p_t + ")")
    head = "reported power " + rep_t
    tail = np.where(
        np.isfinite(design_power),
        "; design-based power at the planned effect is " + _fmt(design_power),
        "",
    )
    why = ": a transform of the p-value that adds nothing to it (Hoenig & Heisey 2001)"
    message = np.where(
        agrees,
        head + " is the observed power implied by " + source + " (" + imp_t + ")" + why + tail,
        np.where(
            known,
            head
            + " differs from the observed power implied by "
            + source
            + " ("
            + imp_t
            + "); if it was computed from the observed effect, it still adds nothing to the "
            "p-value (Hoenig & Heisey 2001)" + tail,
            head
            + ": power computed from the observed effect adds nothing to the p-value (Hoenig & "
            "Heisey 2001); read the confidence interval instead" + tail,
        ),
    )
    return pd.DataFrame(
        {
            "pos": pos,
            "rule": rule["id"],
            "severity": rule["severity"],
            "message": message.astype(object),
        }
    )
