"""Every design through the whole audit: the demo covers them, and no null goes unexplained."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import audit
from audit import DESIGNS, METRICS
from audit.cli import main
from audit.resources import bundled_dir

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"


def test_demo_has_an_audited_study_of_every_design(tmp_path):
    out = tmp_path / "demo.json"
    assert main(["check", str(DEMO), "--json", str(out), "--quiet"]) == 0
    studies = json.loads(out.read_text())["studies"]
    audited = {s["design"] for s in studies if s["status"] == "audited"}
    assert audited == set(DESIGNS)
    for s in studies:
        if s["status"] == "audited":
            assert set(METRICS) <= set(s["metrics"])
            if s["metrics"]["planned_effect_used"] is not None:
                assert s["metrics"]["power_at_planned_effect"] is not None, s["study_id"]
            # Non-inferiority and equivalence rows have detectable_margin in place of the MDE.
            shown = "detectable_margin" if s["metrics"]["detectable_margin"] is not None else "mde"
            assert s["metrics"][shown] is not None, s["study_id"]


def _explained(metric: str, notes: list[str]) -> bool:
    for text in notes:
        if text.startswith(f"{metric}:"):
            return True
        # Grouped notes end with ": metric, metric, ..." (not applicable; no result reported).
        if metric in text.rsplit(": ", 1)[-1].split(", "):
            return True
    return False


def _random_rows(rng: np.random.Generator, k: int) -> pd.DataFrame:
    """Plausible rows of every design with about a quarter of the cells blank."""
    n1 = rng.integers(20, 400, k).astype(float)
    n2 = np.round(n1 * rng.choice([0.5, 1.0, 2.0], k))
    design = rng.choice([d for d in DESIGNS if d != "estimate"], k)
    p1 = rng.uniform(0.05, 0.6, k)
    data = {
        "study_id": [f"R{i}" for i in range(k)],
        "design": design,
        "alpha": rng.choice([0.01, 0.05, 0.1], k),
        "sides": rng.choice([1, 2], k),
        "target_power": rng.choice([0.8, 0.9], k),
        "planned_n1": n1,
        "planned_n2": n2,
        "realized_n1": np.round(n1 * rng.uniform(0.6, 1.1, k)),
        "realized_n2": np.round(n2 * rng.uniform(0.6, 1.1, k)),
        "planned_sd": rng.uniform(1, 20, k),
        "realized_sd": rng.uniform(1, 20, k),
        "planned_p1": p1,
        "planned_p2": np.clip(p1 + rng.uniform(-0.04, 0.3, k), 0.01, 0.99),
        "realized_p1": np.clip(p1 + rng.uniform(-0.1, 0.1, k), 0.01, 0.99),
        "continuity_correction": rng.choice(["yes", "no"], k),
        "groups": rng.integers(2, 6, k),
        "predictors": rng.integers(1, 4, k),
        "covariates": rng.integers(0, 4, k),
        "planned_icc": rng.uniform(0.0, 0.2, k),
        "realized_icc": rng.uniform(0.0, 0.3, k),
        "planned_cluster_size": rng.uniform(2, 40, k),
        "realized_cluster_size": rng.uniform(2, 40, k),
        "cluster_size_cv": rng.uniform(0, 0.8, k),
        "sesoi": rng.uniform(0.01, 0.2, k),
        "effect_measure": rng.choice(["risk_difference", "risk_ratio", "odds_ratio"], k),
        "periods": rng.integers(3, 8, k),
        "planned_rate1": rng.uniform(0.2, 3.0, k),
        "realized_rate1": rng.uniform(0.2, 3.0, k),
        "exposure": rng.uniform(0.5, 2.0, k),
        "dispersion": rng.uniform(0.0, 1.0, k),
        "period_correlation": rng.uniform(0.0, 0.9, k),
        "observed_events1": np.floor(n1 * rng.uniform(0.0, 0.5, k)),
        "observed_events2": np.floor(n2 * rng.uniform(0.0, 0.5, k)),
    }
    ratio_sesoi = np.exp(rng.uniform(0.05, 0.5, k))
    ratio = np.isin(design, ["two_rates"]) | (
        np.isin(design, ["two_proportions", "cluster_two_proportions"])
        & (data["effect_measure"] != "risk_difference")
    )
    data["sesoi"] = np.where(ratio, ratio_sesoi, data["sesoi"])
    # Paired proportions: discordant shares that leave room for each other.
    data["planned_p1"] = np.where(design == "paired_proportions", p1 / 3, data["planned_p1"])
    data["planned_p2"] = np.where(
        design == "paired_proportions",
        np.clip(p1 / 3 + rng.uniform(-0.04, 0.2, k), 0.01, 0.5),
        data["planned_p2"],
    )
    effect = {
        "correlation": rng.uniform(-0.5, 0.5, k),
        "k_means": rng.uniform(0.0, 0.5, k),
        "regression": rng.uniform(0.0, 0.3, k),
        "survival": np.exp(rng.uniform(-0.8, 0.8, k)),
        "two_rates": np.exp(rng.uniform(-0.8, 0.8, k)),
    }
    planned_effect = rng.uniform(-5, 5, k)
    for name, values in effect.items():
        planned_effect = np.where(design == name, values, planned_effect)
    binary = np.isin(design, ["two_proportions", "cluster_two_proportions", "paired_proportions"])
    data["planned_effect"] = np.where(binary, np.nan, planned_effect)
    total = n1 + n2
    data["planned_events"] = np.round(total * rng.uniform(0.1, 0.9, k))
    data["realized_events"] = np.round(total * 0.6 * rng.uniform(0.1, 0.9, k))
    df = pd.DataFrame(data).astype(object)
    blank = rng.uniform(size=df.shape) < 0.25
    blank[:, :2] = False  # study_id and design are always given
    # Each row fills only what its design reads (other columns get notes or errors, tested in
    # test_ignored_columns_*), and a one-sided test says which way it looks.
    for j, column in enumerate(df.columns):
        blank[:, j] |= ~np.isin(design, [n for n, d in DESIGNS.items() if column in d.inputs()])
    df = df.mask(blank)
    df["direction"] = np.where(df["sides"] == 1, rng.choice(["increase", "decrease"], k), None)
    no_effect = df["planned_effect"].isna() & df["planned_p2"].isna()
    df["direction"] = np.where(no_effect, df["direction"], None)
    return df


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_every_null_metric_has_a_note_on_random_rows(seed):
    # Rows of every design with random blanks: none raises (RuntimeWarnings are errors in the
    # test run), every row is reported, and each null metric of an audited row is explained.
    df = _random_rows(np.random.default_rng(seed), 400)
    result = audit.audit_table(df)
    assert len(result.table) == len(df)
    notes = result.by_row(result.notes, "text")
    audited = np.flatnonzero(result.valid)
    assert len(audited) > 100
    for i in audited:
        row = result.metrics.iloc[i]
        design = DESIGNS[result.table["design"].iat[i]]
        # Echoes of an input are blank exactly where the input is.
        assert pd.isna(row["sesoi_used"]) == pd.isna(result.table["sesoi"].iat[i])
        planned = design.planned_effect(result.table.iloc[[i]])[0]
        assert pd.isna(row["planned_effect_used"]) == np.isnan(planned)
        for metric in METRICS:
            if pd.isna(row[metric]):
                assert _explained(metric, notes[i]), (
                    result.table.iloc[i]["design"],
                    metric,
                    notes[i],
                )


def test_unchanged_nuisance_parameters_cost_exactly_no_power():
    # Issue 13: power_cost_nuisance was shown as -1.04e-17 where the realized nuisance
    # parameters equal the planned ones (the same power reached by two paths of arithmetic).
    rows = [
        {"study_id": "m", "design": "two_means", "planned_n1": 50, "planned_n2": 50,
         "realized_n1": 45, "realized_n2": 47, "planned_sd": 7.3, "realized_sd": 7.3,
         "planned_effect": 3.1},
        {"study_id": "c", "design": "cluster_two_means", "planned_n1": 9, "planned_n2": 9,
         "realized_n1": 9, "realized_n2": 8, "planned_sd": 3.3, "realized_sd": 3.3,
         "planned_icc": 0.07, "realized_icc": 0.07, "planned_cluster_size": 17,
         "planned_effect": 1.7},
        {"study_id": "s", "design": "survival", "planned_n1": 301, "planned_n2": 299,
         "realized_n1": 290, "realized_n2": 288, "planned_events": 380,
         "realized_events": 367, "planned_effect": 0.77},
    ]  # fmt: skip
    m = audit.audit_table(pd.DataFrame(rows)).metrics
    cost = m["power_cost_nuisance"].to_numpy()
    assert cost[0] == 0.0 and cost[1] == 0.0
    # The survival row's event share did change (367 of 578 against 380 of 600): a real cost.
    assert abs(cost[2]) > 1e-6
