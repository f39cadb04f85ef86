"""Portfolio-level statistics over all audited studies."""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["portfolio_summary"]


def _median(x: pd.Series) -> float | None:
    x = x.dropna()
    return float(np.median(x)) if len(x) else None


def portfolio_summary(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    valid: np.ndarray,
    findings: pd.DataFrame,
    blank_rows: int = 0,
) -> dict[str, object]:
    """The contract's portfolio block (DESIGN.md section 5).

    ``share_at_target_power`` is the share of studies with a computable power at the planned
    effect whose power reaches that study's own target; ``median_mde_std`` is given per design
    (standardized MDEs are comparable only within a design).
    """
    audited = metrics.loc[valid]
    power = audited["power_at_planned_effect"]
    target = table.loc[valid, "target_power"]
    known = power.notna()
    share = float((power[known] >= target[known] - 1e-12).mean()) if known.any() else None
    by_design: dict[str, float | None] = {}
    designs = table.loc[valid, "design"]
    for name in sorted(designs.dropna().unique()):
        value = _median(audited.loc[designs == name, "mde_std"])
        if value is not None:
            by_design[name] = value
    flag_counts = (
        {str(k): int(v) for k, v in findings["rule"].value_counts().sort_index().items()}
        if len(findings)
        else {}
    )
    return {
        "studies": len(table),
        "audited": int(valid.sum()),
        "invalid": int((~valid).sum()),
        "blank_rows_skipped": int(blank_rows),
        "studies_with_power": int(known.sum()),
        "median_power_at_planned_effect": _median(power),
        "share_at_target_power": share,
        "median_mde_std": by_design,
        "flag_counts": flag_counts,
        "excess_significance": None,
    }
