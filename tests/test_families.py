"""Outcome families: pooled estimates, power at the pooled and at reference effects, per-family
excess significance, rule applicability on a field of reported-only studies, and the figures.

References: statsmodels' ``combine_effects`` (fixed effect and Paule-Mandel random effects) for the
pooled estimates; statsmodels' power classes and closed-form normal power for each design's
power at the pooled estimate; scipy.stats.poisson_binom for the per-family test; Cohen (1988)
for power at conventional effects.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects
from statsmodels.stats.power import NormalIndPower, TTestIndPower, TTestPower

import audit
from audit.cli import main
from audit.portfolio import inverse_variance_pool
from audit.resources import bundled_dir

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"


def _audit(rows: list[dict], **kw) -> audit.AuditResult:
    frame = pd.DataFrame([{"study_id": f"S{i}", **r} for i, r in enumerate(rows)])
    return audit.audit_table(frame.astype(object), **kw)


def _field(rng: np.random.Generator, k: int, family: str = "memory", d: float = 0.4) -> list[dict]:
    """Reported-only two-group studies: sizes and a t statistic drawn around a true d."""
    rows = []
    for _ in range(k):
        n1, n2 = (int(v) for v in rng.integers(8, 90, 2))
        se = np.sqrt(1 / n1 + 1 / n2)
        t = float(np.round(rng.normal(d / se, 1.0), 2))
        rows.append(
            {"design": "two_means", "realized_n1": n1, "realized_n2": n2,
             "observed_statistic": t, "statistic_type": "t", "statistic_df1": n1 + n2 - 2,
             "outcome_family": family}
        )  # fmt: skip
    return rows


# -- pooling ------------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_pooled_estimates_against_statsmodels_combine_effects(seed):
    # Several groups at once, fixed and random effects (statsmodels' "iterated" method is the
    # Paule-Mandel estimator; its own stopping tolerance is about 1e-5 on the estimating
    # equation, hence rtol 1e-4 for tau2 and 1e-5 for the estimates).
    rng = np.random.default_rng(seed)
    sizes = rng.integers(2, 15, 5)
    codes = np.repeat(np.arange(5), sizes)
    effect = rng.normal(0.3, 0.4, len(codes))
    variance = rng.uniform(0.01, 0.2, len(codes))
    fixed = inverse_variance_pool(codes, effect, variance, 5, "fixed")
    random = inverse_variance_pool(codes, effect, variance, 5, "random")
    for g in range(5):
        ref = combine_effects(effect[codes == g], variance[codes == g], method_re="iterated")
        assert fixed["estimate"][g] == pytest.approx(ref.mean_effect_fe, rel=1e-12)
        assert fixed["se"][g] == pytest.approx(ref.sd_eff_w_fe, rel=1e-12)
        assert random["tau2"][g] == pytest.approx(ref.tau2, rel=1e-4, abs=1e-8)
        assert random["estimate"][g] == pytest.approx(ref.mean_effect_re, rel=1e-5, abs=1e-8)
        assert random["se"][g] == pytest.approx(ref.sd_eff_w_re, rel=1e-5)


def test_families_block_pools_the_results_derived_from_t_statistics():
    # The family's pooled d is statsmodels' combine_effects over the studies' result_effect and
    # result_se (d and Borenstein's variance, derived from each t and its sizes).
    rows = _field(np.random.default_rng(5), 12)
    for pooling in ("fixed", "random"):
        result = _audit(rows, excess_pooling=pooling)
        m = result.metrics
        ref = combine_effects(
            m["result_effect"].to_numpy(), m["result_se"].to_numpy() ** 2, method_re="iterated"
        )
        block = result.portfolio["families"]["memory"]
        expected = ref.mean_effect_fe if pooling == "fixed" else ref.mean_effect_re
        assert block["pooled_estimate"] == pytest.approx(expected, rel=1e-5)
        se = ref.sd_eff_w_fe if pooling == "fixed" else ref.sd_eff_w_re
        assert block["pooled_se"] == pytest.approx(se, rel=1e-5)
        assert block["scale"] == "d" and block["studies"] == 12 and block["results_pooled"] == 12
        assert block["pooling"] == pooling
        doc = json.loads(json.dumps(result.to_dict(), allow_nan=False))
        shape = doc["portfolio"]["families"]["memory"]
        assert {"studies", "pooled_estimate", "pooled_se", "scale",
                "median_power_at_pooled_effect", "median_reference_power",
                "excess_significance"} <= set(shape)  # fmt: skip
        assert set(shape["median_reference_power"]) == {"0.2", "0.5", "0.8"}


def test_power_at_the_pooled_effect_is_each_designs_own_method():
    # d family: statsmodels TTestIndPower at the pooled d; a paired family (d_z): TTestPower;
    # a correlation family: the normal power of atanh(r) sqrt(n - 3); a survival family:
    # Schoenfeld's normal power; an estimate family: the normal power with the estimate's SE.
    rng = np.random.default_rng(9)
    rows = _field(rng, 6)
    for n in (30, 45, 60):
        rows.append(
            {
                "design": "paired_means",
                "realized_n1": n,
                "observed_statistic": 2.0,
                "statistic_type": "t",
                "statistic_df1": n - 1,
                "outcome_family": "pairs",
            }
        )
        rows.append(
            {
                "design": "correlation",
                "realized_n1": n,
                "observed_statistic": 0.3,
                "statistic_type": "r",
                "outcome_family": "corr",
            }
        )
    for d_events, z in ((100, -2.1), (160, -1.5), (220, -2.8)):
        rows.append(
            {
                "design": "survival",
                "realized_n1": 200,
                "realized_n2": 200,
                "realized_events": d_events,
                "observed_statistic": z,
                "statistic_type": "z",
                "outcome_family": "time",
            }
        )
    for se, est in ((0.2, 0.5), (0.3, 0.2), (0.25, 0.6)):
        rows.append({"design": "estimate", "realized_se": se, "observed_effect": est,
                     "observed_se": se, "outcome_family": "est"})  # fmt: skip
    result = _audit(rows)
    m, table = result.metrics, result.table
    fam = result.portfolio["families"]
    got = m["power_at_pooled_effect"].to_numpy()
    for i, row in enumerate(rows):
        pooled = fam[row["outcome_family"]]["pooled_estimate"]
        if row["design"] == "two_means":
            ref = TTestIndPower().power(
                pooled, row["realized_n1"], 0.05, ratio=row["realized_n2"] / row["realized_n1"]
            )
        elif row["design"] == "paired_means":
            ref = TTestPower().power(pooled, row["realized_n1"], 0.05)
        elif row["design"] == "correlation":
            lam = pooled * np.sqrt(row["realized_n1"] - 3)
            ref = stats.norm.sf(1.959964 - lam) + stats.norm.cdf(-1.959964 - lam)
        elif row["design"] == "survival":
            lam = abs(pooled) * np.sqrt(row["realized_events"] * 0.25)
            ref = stats.norm.sf(1.959964 - lam) + stats.norm.cdf(-1.959964 - lam)
        else:
            ref = NormalIndPower().power(pooled / row["realized_se"], 1, 0.05, ratio=0)
        assert got[i] == pytest.approx(ref, rel=1e-6), (i, row["design"])
    assert fam["corr"]["scale"] == "Fisher z"
    assert fam["corr"]["pooled_estimate"] == pytest.approx(np.arctanh(0.3), rel=1e-12)
    assert fam["time"]["scale"] == "log hazard ratio"
    assert table["outcome_family"].notna().all()


def test_raw_rows_and_rows_on_other_scales():
    # A raw-scale mean row without a result in a d family: its power at the pooled d needs no
    # SD (TTestIndPower); a family mixing d with log hazard ratios is not pooled, with a note.
    rows = _field(np.random.default_rng(2), 5)
    rows.append(
        {
            "design": "two_means",
            "realized_n1": 40,
            "realized_n2": 40,
            "realized_sd": 7,
            "outcome_family": "memory",
        }
    )
    rows.append(
        {
            "design": "two_means",
            "realized_n1": 30,
            "realized_n2": 30,
            "observed_statistic": 2.0,
            "statistic_type": "t",
            "outcome_family": "mixed",
        }
    )
    rows.append({"design": "survival", "realized_events": 90, "observed_statistic": -2.0,
                 "statistic_type": "z", "outcome_family": "mixed"})  # fmt: skip
    result = _audit(rows)
    fam = result.portfolio["families"]
    got = result.metrics["power_at_pooled_effect"].to_numpy()
    assert got[5] == pytest.approx(
        TTestIndPower().power(fam["memory"]["pooled_estimate"], 40, 0.05), rel=1e-6
    )
    assert fam["mixed"]["pooled_estimate"] is None
    assert "different scales" in fam["mixed"]["not_pooled"]
    notes = result.by_row(result.notes, "text")
    assert any("is not pooled: its results are on different scales" in n for n in notes[6])
    assert any("at the family's pooled d" in n for n in notes[5])


def test_each_family_has_its_own_excess_test_and_deficit():
    # Per family: O significant against E = sum of powers at the family's pooled estimate, the
    # exact Poisson-binomial tail and its lower tail (scipy.stats.poisson_binom).
    rng = np.random.default_rng(4)
    rows = _field(rng, 14, "a", 0.5) + _field(rng, 9, "b", 0.2)
    # Family c: two very large significant studies set the pooled d near 0.45, at which ten
    # smaller studies had power near 0.6, yet none of them is significant (a deficit).
    for i in range(12):
        n, t = (2000, 15.0) if i < 2 else (40, 0.3)
        rows.append({"design": "two_means", "realized_n1": n, "realized_n2": n,
                     "observed_statistic": t, "statistic_type": "t", "statistic_df1": 2 * n - 2,
                     "outcome_family": "c"})  # fmt: skip
    result = _audit(rows)
    m = result.metrics
    for name in ("a", "b", "c"):
        block = result.portfolio["families"][name]["excess_significance"]
        members = (result.table["outcome_family"] == name).to_numpy()
        sig = m.loc[members, "result_significant"].to_numpy() == 1.0
        power = m.loc[members, "power_at_pooled_effect"].to_numpy()
        assert block["observed"] == int(sig.sum())
        assert block["expected"] == pytest.approx(power.sum(), rel=1e-9)
        dist = stats.poisson_binom(power)
        assert block["p_value"] == pytest.approx(dist.sf(int(sig.sum()) - 1), rel=1e-8)
        if block["observed"] < block["expected"]:
            assert block["deficit"]["p_value"] == pytest.approx(dist.cdf(int(sig.sum())), rel=1e-8)
    assert result.portfolio["families"]["c"]["excess_significance"]["deficit"]["p_value"] < 0.05


def test_the_excess_test_on_the_pooled_basis_uses_power_at_the_pooled_effect():
    result = _audit(_field(np.random.default_rng(6), 10), excess_basis="pooled")
    block = result.portfolio["excess_significance"]
    power = result.metrics["power_at_pooled_effect"].to_numpy()
    assert block["expected"] == pytest.approx(power.sum(), rel=1e-12)
    assert block["families"]["memory"]["pooled_estimate"] == pytest.approx(
        result.portfolio["families"]["memory"]["pooled_estimate"]
    )


# -- reference effects -----------------------------------------------------------------------------


def test_reference_power_at_cohens_conventional_effects():
    # Cohen (1988), Table 2.4.1 (from memory): 393, 64 and 26 per group detect d = 0.2, 0.5
    # and 0.8 with power .80 (two-sided .05); r = .30 needs about 85 (Fisher z). Exact values
    # from statsmodels TTestIndPower; correlation by the normal power of the Fisher z test.
    rows = [
        {"design": "two_means", "realized_n1": n, "realized_n2": n, "observed_p": 0.5}
        for n in (393, 64, 26)
    ] + [{"design": "correlation", "realized_n1": 85, "observed_p": 0.5}]
    result = _audit(rows)
    m = result.metrics
    for i, (n, d) in enumerate(((393, 0.2), (64, 0.5), (26, 0.8))):
        column = f"reference_power_{d:g}"
        assert m[column].iat[i] == pytest.approx(TTestIndPower().power(d, n, 0.05), rel=1e-8)
        assert m[column].iat[i] == pytest.approx(0.80, abs=0.01)
    assert m["reference_power_0.2"].iat[3] == pytest.approx(
        stats.norm.sf(1.959964 - np.arctanh(0.2) * np.sqrt(82))
        + stats.norm.cdf(-1.959964 - np.arctanh(0.2) * np.sqrt(82)),
        rel=1e-6,
    )
    custom = _audit(rows[-1:], reference_effects="0.3")
    assert custom.metrics["reference_power_0.3"].iat[0] == pytest.approx(0.80, abs=0.01)
    assert custom.settings["reference_effects"] == [0.3]


def test_reference_power_in_json_is_an_object_and_bad_effects_are_refused(tmp_path):
    out = tmp_path / "a.json"
    assert main(["check", str(DEMO), "--json", str(out), "--quiet",
                 "--reference-effects", "0.1,0.3,0.5"]) == 0  # fmt: skip
    doc = json.loads(out.read_text())
    assert doc["settings"]["reference_effects"] == [0.1, 0.3, 0.5]
    audited = [s for s in doc["studies"] if s["status"] == "audited"]
    for s in audited:
        value = s["metrics"]["reference_power"]
        assert value is None or set(value) == {"0.1", "0.3", "0.5"}
        assert not any(k.startswith("reference_power_") for k in s["metrics"])
    invalid = [s for s in doc["studies"] if s["status"] == "invalid"]
    assert invalid and all(s["metrics"]["reference_power"] is None for s in invalid)
    with pytest.raises(SystemExit) as refused:  # argparse: a usage error, exit status 2
        main(["check", str(DEMO), "--reference-effects", "0,-1", "--quiet"])
    assert refused.value.code == 2
    with pytest.raises(audit.errors.ConfigError, match="reference_effects"):
        audit.audit_table(pd.DataFrame({"study_id": ["a"], "design": ["estimate"]}),
                          reference_effects=["big"])  # fmt: skip


def test_power_histogram_falls_back_on_pooled_and_reference_effects():
    rows = _field(np.random.default_rng(3), 6)
    rows.append({"design": "two_means", "realized_n1": 20, "realized_n2": 20, "observed_p": 0.3})
    rows.append({"design": "two_means", "planned_n1": 50, "planned_n2": 50, "realized_n1": 50,
                 "realized_n2": 50, "effect_scale": "d", "planned_effect": 0.5})  # fmt: skip
    result = _audit(rows)
    spread = result.portfolio["power_distribution_by_basis"]
    assert spread["basis_counts"] == {"planned": 1, "pooled": 6, "reference": 1}
    assert spread["reference_effect"] == "0.5"
    assert spread["studies"] == 8


# -- a field audit's rules ----------------------------------------------------------------------


def test_rules_needing_a_planned_effect_or_sesoi_stay_quiet_on_a_field_of_reported_studies():
    # 200 invented published studies: sizes, a t or F statistic, a p; no planned effect, no
    # SESOI. Only rules about the reported numbers may fire; the others judge no row.
    rng = np.random.default_rng(12)
    rows = _field(rng, 150)
    for row in rows:
        row["observed_p"] = float(
            np.round(2 * stats.t.sf(abs(row["observed_statistic"]), row["statistic_df1"]), 3)
        )
    for _ in range(50):
        n = int(rng.integers(30, 150))
        f = float(np.round(rng.gamma(2.0, 1.5), 2))
        rows.append(
            {
                "design": "k_means",
                "groups": 3,
                "realized_n1": n,
                "observed_statistic": f,
                "statistic_type": "F",
                "statistic_df1": 2,
                "statistic_df2": n - 3,
                "observed_p": float(np.round(stats.f.sf(f, 2, n - 3), 3)) or "< .001",
            }
        )
    result = _audit(rows)
    assert result.valid.all()
    needs_effect = {"mde-exceeds-sesoi", "power-below-target", "power-critically-low",
                    "null-result-inconclusive", "significant-result-likely-exaggerated",
                    "sample-size-not-reproducible", "size-short-of-plan",
                    "sd-assumption-optimistic", "icc-assumption-optimistic",
                    "fewer-events-than-planned"}  # fmt: skip
    fired = set(result.findings["rule"])
    assert not fired & needs_effect
    judged = result.rules_judged
    # A single comparison with a value such rows lack is never decided; a rule that also asks
    # for a significant (or a non-significant) result is decided, false, on the other rows.
    for rule in ("mde-exceeds-sesoi", "power-below-target", "power-critically-low",
                 "sample-size-not-reproducible", "size-short-of-plan",
                 "fewer-events-than-planned"):  # fmt: skip
        assert judged[rule] == 0, rule
    detected = int((result.metrics["ci_verdict"] == "detected").sum())
    assert judged["null-result-inconclusive"] == detected
    assert judged["significant-result-likely-exaggerated"] == 200 - detected - int(
        result.metrics["ci_verdict"].isna().sum()
    )
    # The p-check judged every row (a p and a statistic on each), and agreed with all.
    assert judged["reported-p-inconsistent"] == 200
    assert "reported-p-inconsistent" not in fired
    assert result.portfolio["rows_judged_by_rule"] == judged
    # Every study has a power: at the family's pooled d, or at reference effects (k_means).
    assert np.isfinite(result.metrics["power_at_pooled_effect"].to_numpy()[:150]).all()
    assert np.isfinite(result.metrics["reference_power_0.5"].to_numpy()).all()
    assert result.portfolio["power_distribution_by_basis"]["studies"] == 200


def test_the_report_shows_families_and_rows_judged():
    import io

    from rich.console import Console

    from audit.report import THEME, render_report

    rows = _field(np.random.default_rng(1), 8)
    result = _audit(rows)
    console = Console(file=io.StringIO(), width=120, color_system=None, theme=THEME)
    render_report(result, console)
    text = console.file.getvalue()
    assert "Outcome families (1)" in text and "memory" in text
    assert "judged" in text
    assert "with the pooled or a reference effect where a study has no planned effect" in text


# -- figures -------------------------------------------------------------------------------------


def test_family_figures_pass_through_the_power_at_the_pooled_effect(tmp_path):
    from audit.plots import family_curves, write_plots
    from audit.portfolio import family_power_grid

    result = _audit(_field(np.random.default_rng(2), 7))
    block = result.portfolio["families"]["memory"]
    pos, power = family_power_grid(
        result.table, result.metrics, result.valid, "memory", block,
        np.array([block["pooled_estimate"]]),
    )  # fmt: skip
    np.testing.assert_allclose(
        power[:, 0], result.metrics["power_at_pooled_effect"].to_numpy()[pos], rtol=1e-12
    )
    curves = family_curves(result, "memory", grid=21)
    assert curves["power"].shape == (7, 21)
    assert np.all(np.diff(curves["power"], axis=1) > 0)  # power rises with the effect
    # At no effect every two-sided study has power alpha (a fact of the trade).
    np.testing.assert_allclose(curves["power"][:, 0], 0.05, rtol=1e-9)
    files = write_plots(result, tmp_path)
    names = {f.name for f in files}
    assert "family_memory.png" in names and "portfolio_power.png" in names
    assert (tmp_path / "family_memory.png").stat().st_size > 5000


def test_reference_power_for_proportions_is_at_cohens_h_on_the_harder_side():
    # Cohen's h = 2 asin(sqrt p2) - 2 asin(sqrt p1) (Cohen 1988, ch. 6): p2 = sin^2(asin(sqrt
    # p1) + h / 2). With no direction the side of lower power counts (as for the SESOI). Power
    # from statsmodels power_proportions_2indep (pooled variance under H0, both tails).
    from statsmodels.stats.proportion import power_proportions_2indep

    result = _audit(
        [{"design": "two_proportions", "realized_n1": 150, "realized_n2": 150,
          "realized_p1": 0.2, "observed_p": 0.4},
         {"design": "two_proportions", "realized_n1": 150, "realized_n2": 150,
          "realized_p1": 0.2, "direction": "decrease", "observed_p": 0.4}]
    )  # fmt: skip
    powers = {}
    for sign in (1, -1):
        p2 = np.sin(np.arcsin(np.sqrt(0.2)) + sign * 0.25) ** 2
        powers[sign] = power_proportions_2indep(
            p2 - 0.2, 0.2, 150, ratio=1.0, alpha=0.05, alternative="two-sided",
            return_results=False,
        )  # fmt: skip
    m = result.metrics
    assert m["reference_power_0.5"].iat[0] == pytest.approx(min(powers.values()), rel=1e-9)
    assert m["reference_power_0.5"].iat[1] == pytest.approx(powers[-1], rel=1e-9)
