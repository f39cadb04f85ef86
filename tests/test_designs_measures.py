"""Effect measures of binary outcomes: risk difference, risk ratio, odds ratio (issue 16).

Sources: Fleiss, Levin & Paik (2003) for the sizes; statsmodels (computed with it) for power,
the 2×2 table's estimates and standard errors; closed forms for the conversions; the code of
``main`` before this issue for the risk difference (a stored table).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.contingency_tables import Table2x2
from statsmodels.stats.proportion import confint_proportions_2indep, power_proportions_2indep

import audit
from audit.designs import DESIGNS, TestSpec
from audit.designs._binary import (
    convert_measure,
    counts_result,
    from_log,
    measure_of,
    p2_from,
    to_log,
    wald_se,
)

FIXTURES = Path(__file__).parent / "fixtures"
BASE = DESIGNS["two_proportions"]


def _spec(n, alpha=0.05, sides=2.0, power=0.8, direction=1.0) -> TestSpec:
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy()  # noqa: E731
    return TestSpec(full(alpha), full(sides), full(power), full(direction))


# -- conversions (closed forms) ------------------------------------------------------------------


def test_conversions_round_trip_on_random_values():
    rng = np.random.default_rng(1601)
    p1 = rng.uniform(0.01, 0.99, 500)
    p2 = rng.uniform(0.01, 0.99, 500)
    for m in ("risk_difference", "risk_ratio", "odds_ratio"):
        value = measure_of(m, p1, p2)
        np.testing.assert_allclose(p2_from(m, p1, value), p2, rtol=1e-12)
        np.testing.assert_allclose(from_log(m, to_log(m, value)), value, rtol=1e-12)
    # Closed forms: RR = p2 / p1, OR = p2 q1 / (p1 q2), and between measures at the same p2.
    np.testing.assert_allclose(measure_of("risk_ratio", p1, p2), p2 / p1, rtol=1e-14)
    odds = measure_of("odds_ratio", p1, p2)
    np.testing.assert_allclose(odds, (p2 / (1 - p2)) / (p1 / (1 - p1)), rtol=1e-12)
    rr = convert_measure(odds, "odds_ratio", "risk_ratio", p1)
    np.testing.assert_allclose(rr, p2 / p1, rtol=1e-11)


def test_conversions_outside_their_domain_are_nan():
    with np.errstate(all="ignore"):
        assert np.isnan(p2_from("risk_ratio", 0.6, 2.0))  # p2 = 1.2
        assert np.isnan(p2_from("odds_ratio", 0.3, -1.0))
        assert np.isnan(p2_from("risk_difference", 0.3, 0.8))
        assert np.isnan(measure_of("odds_ratio", 1.2, 0.3))
        assert np.isnan(to_log("odds_ratio", 0.0))


# -- the same test whatever the measure ----------------------------------------------------------


@pytest.mark.parametrize(
    "measure,effect", [("risk_difference", 0.10), ("risk_ratio", 2.0), ("odds_ratio", 2.25)]
)
def test_fleiss_published_size_in_every_measure(measure, effect):
    # Fleiss, Levin & Paik (2003), section 4.2: 0.10 against 0.20, alpha .05 two-sided, power
    # .80: 199 per group. The same pair of proportions as a risk ratio (2.0) and an odds ratio
    # (0.2·0.9 / (0.1·0.8) = 2.25) needs the same size: the test is the same.
    df = pd.DataFrame(
        [
            {"study_id": "a", "design": "two_proportions", "effect_measure": measure,
             "planned_p1": 0.10, "planned_effect": effect, "planned_n1": 199, "planned_n2": 199}
        ]
    )  # fmt: skip
    m = audit.audit_table(df).metrics
    assert m["n_required_plan"].iat[0] == 398
    assert m["planned_effect_used"].iat[0] == pytest.approx(effect)


def test_ratio_plans_give_the_size_and_power_of_the_difference_they_imply():
    rng = np.random.default_rng(1602)
    k = 150
    p1 = rng.uniform(0.05, 0.7, k)
    p2 = np.clip(p1 * rng.uniform(0.4, 1.8, k), 0.02, 0.95)
    n1 = rng.integers(30, 900, k).astype(float)
    base = {
        "design": "two_proportions",
        "planned_p1": p1,
        "planned_n1": n1,
        "planned_n2": np.round(n1 * rng.choice([1.0, 2.0], k)),
        "realized_n1": np.round(n1 * 0.9),
        "realized_n2": np.round(n1 * 0.85),
        "realized_p1": np.clip(p1 + rng.uniform(-0.05, 0.05, k), 0.01, 0.95),
        "alpha": rng.choice([0.05, 0.01], k),
    }
    frames = []
    for m in ("risk_difference", "risk_ratio", "odds_ratio"):
        frames.append(
            pd.DataFrame(
                {
                    **base,
                    "study_id": [f"{m}{i}" for i in range(k)],
                    "effect_measure": m,
                    "planned_effect": measure_of(m, p1, p2),
                }
            )
        )
    res = audit.audit_table(pd.concat(frames, ignore_index=True))
    assert res.valid.all()
    m = res.metrics
    rd, rr, odds = (m.iloc[j * k : (j + 1) * k].reset_index(drop=True) for j in range(3))
    for metric in ("n_required_plan", "plan_power", "mde_std"):
        np.testing.assert_allclose(rr[metric], rd[metric], rtol=1e-9)
        np.testing.assert_allclose(odds[metric], rd[metric], rtol=1e-9)
    # The MDEs are one pair of proportions, written in each measure.
    realized_p1 = base["realized_p1"]
    mde_p2 = realized_p1 + rd["mde"].to_numpy()
    np.testing.assert_allclose(rr["mde"], mde_p2 / realized_p1, rtol=1e-7)
    np.testing.assert_allclose(
        odds["mde"], measure_of("odds_ratio", realized_p1, mde_p2), rtol=1e-7
    )


def test_realized_power_holds_the_planned_measure_fixed():
    # Realized control rate 0.25 instead of 0.30: a risk ratio of 0.7 stays 0.7 (p2 = 0.175), an
    # odds ratio of 0.6 stays 0.6, a risk difference of -0.09 stays -0.09. Reference power:
    # statsmodels power_proportions_2indep (pooled under H0) at those proportions.
    cases = [("risk_difference", -0.09), ("risk_ratio", 0.7), ("odds_ratio", 0.6)]
    rows = [
        {"study_id": m, "design": "two_proportions", "effect_measure": m, "planned_p1": 0.30,
         "planned_effect": e, "planned_n1": 350, "planned_n2": 350, "realized_n1": 310,
         "realized_n2": 330, "realized_p1": 0.25}
        for m, e in cases
    ]  # fmt: skip
    res = audit.audit_table(pd.DataFrame(rows))
    notes = res.by_row(res.notes, "text")
    for i, (m, e) in enumerate(cases):
        p2 = float(p2_from(m, 0.25, e))
        expected = power_proportions_2indep(
            p2 - 0.25, 0.25, 330, ratio=310 / 330, alternative="two-sided", return_results=False
        )
        assert res.metrics["power_at_planned_effect"].iat[i] == pytest.approx(expected, rel=1e-9)
        noun = m.replace("_", " ")
        assert any(f"planned {noun} is held fixed" in t for t in notes[i]), notes[i]


def test_power_against_statsmodels_on_random_ratio_rows():
    rng = np.random.default_rng(1603)
    k = 200
    p1 = rng.uniform(0.02, 0.8, k)
    n1 = rng.integers(10, 1500, k).astype(float)
    n2 = np.round(n1 * rng.choice([0.5, 1.0, 3.0], k))
    alpha = rng.uniform(0.005, 0.1, k)
    sides = rng.integers(1, 3, k).astype(float)
    for m in ("risk_ratio", "odds_ratio"):
        design = BASE.with_measure(m)
        hi = 0.95 / p1 if m == "risk_ratio" else 5.0
        effect = rng.uniform(0.3, np.minimum(hi, 3.0), k)
        direction = np.where(effect < 1, -1.0, 1.0)
        sc = {"n1": n1, "n2": n2, "p1": p1, "continuity_correction": np.zeros(k)}
        got = design.power(sc, effect, TestSpec(alpha, sides, np.full(k, 0.8), direction))
        p2 = p2_from(m, p1, effect)
        for i in range(0, k, 4):
            alt = "two-sided" if sides[i] == 2 else ("larger" if direction[i] > 0 else "smaller")
            ref = power_proportions_2indep(
                p2[i] - p1[i],
                p1[i],
                n2[i],
                ratio=n1[i] / n2[i],
                alpha=alpha[i],
                alternative=alt,
                return_results=False,
            )
            assert got[i] == pytest.approx(ref, rel=1e-9, abs=1e-12)


def test_mde_in_each_measure_gives_the_target_power_back():
    rng = np.random.default_rng(1604)
    k = 200
    n1 = rng.integers(20, 2000, k).astype(float)
    sc = {
        "n1": n1,
        "n2": n1,
        "p1": rng.uniform(0.05, 0.8, k),
        "continuity_correction": rng.choice([0.0, 1.0], k),
    }
    spec = TestSpec(
        rng.uniform(0.01, 0.1, k),
        rng.integers(1, 3, k).astype(float),
        rng.uniform(0.5, 0.95, k),
        rng.choice([-1.0, 1.0], k),
    )
    for m in ("risk_ratio", "odds_ratio"):
        design = BASE.with_measure(m)
        mde = design.mde(sc, spec)
        ok = np.isfinite(mde)
        assert ok.mean() > 0.9
        # A ratio below 1 is a decrease on the log scale.
        assert np.all(np.sign(np.log(mde[ok])) == spec.direction[ok])
        np.testing.assert_allclose(design.power(sc, mde, spec)[ok], spec.power[ok], atol=1e-8)


def test_either_way_sesoi_of_a_ratio_is_the_same_magnitude_both_ways():
    # An odds ratio SESOI of 0.8 or 1.25 is one band [0.8, 1.25]: the same power at it.
    rows = [
        {"study_id": s, "design": "two_proportions", "effect_measure": "odds_ratio",
         "planned_p1": 0.3, "planned_n1": 400, "planned_n2": 400, "realized_n1": 380,
         "realized_n2": 390, "sesoi": s}
        for s in (0.8, 1.25)
    ]  # fmt: skip
    m = audit.audit_table(pd.DataFrame(rows)).metrics
    assert m["direction_used"].tolist() == ["either", "either"]
    assert m["power_at_sesoi"].iat[0] == pytest.approx(m["power_at_sesoi"].iat[1], rel=1e-12)
    assert m["mde"].iat[0] > 1  # a magnitude: a ratio above 1


# -- the risk difference is today's design, number for number ------------------------------------


def _baseline_rows(seed: int = 161, k: int = 120) -> pd.DataFrame:
    # The generator that made tests/fixtures/two_proportions_main.csv with the code of main
    # before effect_measure existed (same seed, same draws in the same order).
    rng = np.random.default_rng(seed)
    n1 = rng.integers(15, 900, k).astype(float)
    n2 = np.round(n1 * rng.choice([0.5, 1.0, 2.0], k))
    p1 = rng.uniform(0.03, 0.8, k)
    p2 = np.clip(p1 + rng.uniform(-0.25, 0.25, k), 0.01, 0.97)
    df = pd.DataFrame(
        {
            "study_id": [f"P{i}" for i in range(k)],
            "design": "two_proportions",
            "alpha": rng.choice([0.01, 0.05, 0.1], k),
            "sides": rng.choice([1, 2], k),
            "target_power": rng.choice([0.8, 0.9], k),
            "planned_n1": n1,
            "planned_n2": n2,
            "realized_n1": np.round(n1 * rng.uniform(0.6, 1.05, k)),
            "realized_n2": np.round(n2 * rng.uniform(0.6, 1.05, k)),
            "planned_p1": p1,
            "planned_p2": p2,
            "realized_p1": np.clip(p1 + rng.uniform(-0.1, 0.1, k), 0.01, 0.97),
            "continuity_correction": rng.choice(["yes", "no"], k),
            "sesoi": rng.uniform(0.01, 0.15, k),
            "observed_effect": rng.uniform(-0.2, 0.2, k),
            "observed_se": rng.uniform(0.01, 0.08, k),
        }
    ).astype(object)
    blank = rng.uniform(size=df.shape) < 0.15
    blank[:, :2] = False
    df = df.mask(blank)
    lower = pd.to_numeric(df["planned_p2"]) < pd.to_numeric(df["planned_p1"])
    df["direction"] = np.where(df["sides"] == 1, np.where(lower, "decrease", "increase"), None)
    return df


@pytest.mark.parametrize("measure_column", [None, "risk_difference"])
def test_risk_difference_gives_exactly_the_numbers_of_before(measure_column):
    stored = pd.read_csv(FIXTURES / "two_proportions_main.csv")
    df = _baseline_rows()
    if measure_column:
        df["effect_measure"] = measure_column
    res = audit.audit_table(df)
    assert res.status.tolist() == stored["status"].tolist()
    for metric in stored.columns[2:]:
        np.testing.assert_array_equal(
            res.metrics[metric].to_numpy(dtype=float), stored[metric].to_numpy(dtype=float), metric
        )


# -- the result from events per arm -------------------------------------------------------------


def test_counts_against_statsmodels_including_empty_cells():
    # statsmodels Table2x2 (rows: intervention, control; columns: event, no event) gives the
    # log odds ratio and log risk ratio and their SEs; a table with an empty cell is given to
    # it with 0.5 added to every cell (Haldane's correction, which the audit applies; statsmodels'
    # own shift_zeros shifts only the empty cells). The risk difference's Wald SE comes from
    # confint_proportions_2indep(method="wald").
    rng = np.random.default_rng(1605)
    n1 = rng.integers(5, 400, 120).astype(float)
    n2 = rng.integers(5, 400, 120).astype(float)
    e1 = np.floor(n1 * rng.uniform(0, 1, 120))
    e2 = np.floor(n2 * rng.uniform(0, 1, 120))
    e1[:10], e2[10:20], e2[20:25] = 0.0, 0.0, n2[20:25]  # empty cells
    for m in ("odds_ratio", "risk_ratio", "risk_difference"):
        res = counts_result(m, e1, n1, e2, n2)
        for i in range(120):
            empty = min(e1[i], e2[i], n1[i] - e1[i], n2[i] - e2[i]) == 0
            cells = np.array([[e2[i], n2[i] - e2[i]], [e1[i], n1[i] - e1[i]]])
            table = Table2x2(cells + 0.5 * empty)
            if m == "odds_ratio":
                assert np.log(res.effect[i]) == pytest.approx(table.log_oddsratio, rel=1e-10)
                assert res.se[i] == pytest.approx(table.log_oddsratio_se, rel=1e-10)
            elif m == "risk_ratio":
                assert np.log(res.effect[i]) == pytest.approx(table.log_riskratio, rel=1e-10)
                assert res.se[i] == pytest.approx(table.log_riskratio_se, rel=1e-10)
            elif not empty:
                low, high = confint_proportions_2indep(
                    e2[i], n2[i], e1[i], n1[i], method="wald", compare="diff"
                )
                assert res.effect[i] == pytest.approx(e2[i] / n2[i] - e1[i] / n1[i], abs=1e-14)
                assert res.se[i] == pytest.approx((high - low) / (2 * 1.959963984540054), rel=1e-8)
        assert res.corrected[:25].all()


def test_events_give_the_result_on_the_rows_scale_with_a_note():
    # 45 of 300 against 30 of 300, odds ratio: (30·255) / (270·45) = 0.6296; Woolf SE of the
    # log odds ratio √(1/30 + 1/270 + 1/45 + 1/255).
    row = {"study_id": "e", "design": "two_proportions", "effect_measure": "odds_ratio",
           "planned_p1": 0.15, "planned_effect": 0.6, "planned_n1": 300, "planned_n2": 300,
           "realized_n1": 300, "realized_n2": 300, "observed_events1": 45,
           "observed_events2": 30}  # fmt: skip
    res = audit.audit_table(pd.DataFrame([row]))
    m = res.metrics.iloc[0]
    assert m["result_effect"] == pytest.approx(30 * 255 / (270 * 45), rel=1e-12)
    se = np.sqrt(1 / 30 + 1 / 270 + 1 / 45 + 1 / 255)
    assert m["result_se"] == pytest.approx(se, rel=1e-12)
    assert m["result_ci_low"] == pytest.approx(
        np.exp(np.log(30 * 255 / (270 * 45)) - 1.959963984540054 * se), rel=1e-9
    )
    notes = res.by_row(res.notes, "text")[0]
    assert any(
        t.startswith("observed_effect and observed_se derived from observed_events") for t in notes
    )
    # The control rate of the events stands in for a blank realized_p1.
    assert any("observed_events1 / realized_n1 is used" in t for t in notes)


def test_realized_proportions_give_the_result_and_a_reported_result_wins():
    rows = [
        {"study_id": "p", "design": "two_proportions", "effect_measure": "risk_ratio",
         "planned_p1": 0.2, "planned_p2": 0.14, "planned_n1": 500, "planned_n2": 500,
         "realized_n1": 480, "realized_n2": 470, "realized_p1": 0.2, "realized_p2": 0.15},
        {"study_id": "both", "design": "two_proportions", "effect_measure": "risk_ratio",
         "planned_p1": 0.2, "planned_p2": 0.14, "planned_n1": 500, "planned_n2": 500,
         "realized_n1": 480, "realized_n2": 470, "observed_events1": 96,
         "observed_events2": 70, "observed_effect": 0.73, "observed_ci_low": 0.55,
         "observed_ci_high": 0.97},
    ]  # fmt: skip
    res = audit.audit_table(pd.DataFrame(rows))
    m = res.metrics
    assert m["result_effect"].iat[0] == pytest.approx(0.75, rel=1e-12)
    se = float(wald_se("risk_ratio", 480, 470, 0.2, 0.15))
    assert m["result_se"].iat[0] == pytest.approx(se, rel=1e-12)
    assert m["result_effect"].iat[1] == 0.73
    notes = res.by_row(res.notes, "text")
    assert any("derived from realized_p1/2" in t for t in notes[0])
    assert any(t.startswith("observed_events1/2 and realized_n1/2 not used") for t in notes[1])


# -- bad input ----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "cells,column,words",
    [
        ({"effect_measure": "odds_ratio", "planned_effect": 0.0}, "planned_effect", "than 0"),
        ({"effect_measure": "odds_ratio", "planned_effect": -0.5}, "planned_effect", "than 0"),
        ({"effect_measure": "risk_ratio", "sesoi": -1.2}, "sesoi", "greater than 0"),
        ({"effect_measure": "risk_ratio", "planned_effect": 4.0}, "planned_effect", "(0, 1)"),
        ({"planned_p1": 1.3}, "planned_p1", "(0, 1)"),
        ({"realized_p2": 0.0}, "realized_p2", "(0, 1)"),
        ({"observed_events1": 501}, "observed_events1", "realized_n1"),
        ({"observed_events2": 7.5}, "observed_events2", "whole number"),
        ({"effect_measure": "hazard_ratio"}, "effect_measure", "one of"),
        ({"effect_measure": "odds_ratio", "planned_p2": 0.2, "planned_effect": 0.9},
         "planned_effect", "disagrees"),
    ],
)  # fmt: skip
def test_bad_cells_are_row_errors_naming_the_column(cells, column, words):
    good = {"study_id": "ok", "design": "two_proportions", "planned_p1": 0.3,
            "planned_effect": 0.7, "effect_measure": "risk_ratio", "planned_n1": 500,
            "planned_n2": 500, "realized_n1": 500, "realized_n2": 500}  # fmt: skip
    bad = {**good, "study_id": "bad", **cells}
    if "planned_p2" in cells:
        bad["planned_p1"] = 0.3
    res = audit.audit_table(pd.DataFrame([good, bad]))
    assert res.status.tolist() == ["audited", "invalid"]
    errors = res.errors
    hit = errors[errors["column"] == column]
    assert len(hit) >= 1, errors
    assert words in hit["reason"].iat[0]


def test_effect_measure_on_a_design_with_one_unit_is_an_error():
    row = {"study_id": "m", "design": "two_means", "planned_sd": 1.0, "planned_effect": 0.6,
           "planned_n1": 40, "planned_n2": 40, "effect_measure": "odds_ratio"}  # fmt: skip
    res = audit.audit_table(pd.DataFrame([row]))
    assert res.status.tolist() == ["invalid"]
    assert res.errors["column"].tolist() == ["effect_measure"]


def test_an_unknown_measure_is_reported_not_a_crash(tmp_path, capsys):
    from audit.cli import main

    path = tmp_path / "bad.csv"
    path.write_text(
        "study_id,design,planned_p1,planned_effect,effect_measure,planned_n1,planned_n2\n"
        "A,two_proportions,0.3,0.7,hazard_ratio,100,100\n"
        "B,two_proportions,0.3,0.7,risk_ratio,100,100\n"
    )
    assert main(["check", str(path), "--study", "A"]) == 0
    out = capsys.readouterr().out
    assert "effect_measure" in out and "hazard_ratio" in out
    res = audit.audit_file(path)
    assert res.status.tolist() == ["invalid", "audited"]
    assert res.errors["column"].tolist() == ["effect_measure"]


def test_outputs_speak_in_the_rows_measure(tmp_path):
    from openpyxl import load_workbook

    from audit.report import key_numbers
    from audit.respond import respond_text
    from audit.template import write_template

    row = {"study_id": "OR1", "design": "two_proportions", "effect_measure": "odds_ratio",
           "planned_p1": 0.18, "planned_effect": 0.7, "planned_n1": 420, "planned_n2": 420,
           "realized_n1": 401, "realized_n2": 398, "observed_events1": 70,
           "observed_events2": 49}  # fmt: skip
    res = audit.audit_table(pd.DataFrame([row]))
    text = respond_text(res, "OR1")
    assert "planned to detect an odds ratio of 0.7" in text
    assert "was an odds ratio of" in text
    assert any(k.startswith("MDE odds ratio ") for k in key_numbers(res, 0))
    # The template's guide names the designs that read each new column.
    path = tmp_path / "t.xlsx"
    write_template(path)
    guide = {r[0]: r[4] for r in load_workbook(path)["guide"].iter_rows(values_only=True) if r[0]}
    assert guide["effect_measure"] == "two_proportions, cluster_two_proportions"
    assert guide["periods"] == "stepped_wedge"
    assert guide["dispersion"] == "two_rates"
    assert guide["period_correlation"] == "crossover"
    assert set(guide["observed_events1"].split(", ")) == {
        "two_proportions",
        "cluster_two_proportions",
        "two_rates",
    }
