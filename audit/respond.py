"""Reviewer-ready text for one study: ``study-audit respond FILE STUDY_ID``.

A short Markdown draft an author can adapt when a referee asks about power: the sensitivity
analysis (MDE at the realized size for 80 % and 90 % power), design-based power at the planned
effect and at the SESOI (or at an effect the referee names), what the confidence interval rules
out, why observed power is not reported, and the references. Numbers are printed as a journal
would: powers as proportions with two decimals (as in the terminal report), effects with three
significant digits, P values without a leading zero.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from audit import hypotheses
from audit._format import format_number
from audit.designs import Design, design_of
from audit.designs.means import standardized_rows
from audit.errors import ConfigError
from audit.metrics import directed_mde, test_settings
from audit.terminal import clean

if TYPE_CHECKING:
    from audit.pipeline import AuditResult

__all__ = ["REFERENCES", "format_p", "respond_text"]

REFERENCES = {
    "hoenig": "Hoenig, J. M., & Heisey, D. M. (2001). The abuse of power: The pervasive fallacy "
    "of power calculations for data analysis. *The American Statistician*, 55(1), 19–24.",
    "gelman": "Gelman, A., & Carlin, J. (2014). Beyond power calculations: Assessing Type S "
    "(sign) and Type M (magnitude) errors. *Perspectives on Psychological Science*, 9(6), "
    "641–651.",
    "cohen": "Cohen, J. (1988). *Statistical power analysis for the behavioral sciences* (2nd "
    "ed.). Lawrence Erlbaum.",
    "bloom": "Bloom, H. S. (1995). Minimum detectable effects: A simple way to report the "
    "statistical power of experimental designs. *Evaluation Review*, 19(5), 547–556.",
    "blackwelder": 'Blackwelder, W. C. (1982). "Proving the null hypothesis" in clinical '
    "trials. *Controlled Clinical Trials*, 3(4), 345–353.",
    "schuirmann": "Schuirmann, D. J. (1987). A comparison of the two one-sided tests procedure "
    "and the power approach for assessing the equivalence of average bioavailability. *Journal "
    "of Pharmacokinetics and Biopharmaceutics*, 15(6), 657–680.",
    "piaggio": "Piaggio, G., Elbourne, D. R., Pocock, S. J., Evans, S. J. W., & Altman, D. G. "
    "(2012). Reporting of noninferiority and equivalence randomized trials: Extension of the "
    "CONSORT 2010 statement. *JAMA*, 308(24), 2594–2604.",
}


def format_p(p: float) -> str:
    """A P value as journals print it.

    >>> format_p(0.0312), format_p(0.0004), format_p(0.5)
    ('P = .031', 'P < .001', 'P = .50')
    """
    if p < 0.001:
        return "P < .001"
    text = f"{p:.3f}" if p < 0.01 or (p < 0.1 and round(p, 2) != p) else f"{p:.2f}"
    return "P = " + text.lstrip("0")


#: What the effect of each design is called in a sentence ("a ... of 0.5").
EFFECT_NOUNS = {
    "one_mean": "mean difference from the reference value",
    "paired_means": "mean within-pair difference",
    "two_means": "difference in means",
    "two_proportions": "risk difference",
    "correlation": "correlation",
    "k_means": "Cohen's f",
    "regression": "Cohen's f²",
    "cluster_two_means": "difference in means",
    "survival": "hazard ratio",
    "estimate": "effect",
    "cluster_two_proportions": "risk difference",
    "two_rates": "rate ratio",
    "crossover": "difference between the treatments",
    "paired_proportions": "difference in paired proportions",
    "stepped_wedge": "difference in means",
}
_STANDARDIZED_NOUNS = {"paired_means": "standardized mean difference (d_z)"}
#: What the sizes count, by design.
UNIT_NOUNS = {
    "paired_means": "pairs",
    "cluster_two_means": "clusters",
    "survival": "participants",
    "cluster_two_proportions": "clusters",
    "stepped_wedge": "clusters",
    "paired_proportions": "pairs",
    "crossover": "participants",
    "two_rates": "participants",
}


def _num(value: float) -> str:
    """Three significant digits, with a true minus sign."""
    return format_number(value).replace("-", "−")


def _fixed(value: float, decimals: int) -> str:
    return f"{value:.{decimals}f}".replace("-", "−")


def _decimals(spread: float) -> int:
    """Decimals that show an interval of this half-width to about two significant digits."""
    if not math.isfinite(spread) or spread <= 0:
        return 2
    return int(min(6, max(0, 1 - math.floor(math.log10(spread)))))


def _power(value: float) -> str:
    return f"{value:.2f}"


def _alpha_phrase(alpha: float, sides: float, comparisons: float) -> str:
    side = "two-sided" if sides == 2 else "one-sided"
    text = f"{side} α = {format_number(alpha)}"
    if comparisons > 1:
        text += f" shared by {int(comparisons)} comparisons (Bonferroni)"
    return text


def _effect_phrase(
    design: Design,
    standardized: bool,
    value: float,
    std: float | None,
    either: bool = False,
) -> str:
    """'a difference in means of 5 (d = 0.5)'; with no direction, a ratio is given both ways
    ('a hazard ratio of 1.75 or 0.571 (log HR = ±0.56)')."""
    design_name = design.name
    if standardized:
        noun = _STANDARDIZED_NOUNS.get(design_name, "standardized mean difference (d)")
        return f"a {noun} of {_num(value)}"
    shown = _num(value)
    sign = ""
    if either and design.is_ratio and math.isfinite(value) and value > 0:
        big = max(value, 1.0 / value)
        shown, sign = f"{_num(big)} or {_num(1.0 / big)}", "±"
        std = abs(std) if std is not None else None
    noun = design.noun or EFFECT_NOUNS.get(design_name, "effect")
    text = f"{_article(noun)} {noun} of {shown}"
    label = design.standardized_as
    if std is not None and math.isfinite(std) and label and not math.isclose(abs(std), abs(value)):
        text += f" ({label} = {sign}{_num(std)})"
    return text


def _mde_at(result: AuditResult, pos: int, power: float) -> tuple[float, float]:
    """MDE (effect units and standardized) of the realized design at another target power."""
    design = design_of(result.table, pos)
    rows = result.table.iloc[[pos]]
    test = test_settings(rows, design).with_power(np.array([power]))
    real = design.scenario(rows, "realized")
    with np.errstate(all="ignore"):
        mde, std = directed_mde(design, real, test)
    return float(mde[0]), float(std[0])


def _article(noun: str) -> str:
    return "an" if noun[:1] in "aeiou" else "a"


def _either_way(design: Design, value: float) -> str:
    """A magnitude with no direction: '0.2 either way', for ratios '1.25 (or 0.8) either way'."""
    if design.is_ratio and math.isfinite(value) and value > 0:
        big = max(value, 1.0 / value)
        return f"{_num(big)} or {_num(1.0 / big)}, either way"
    return f"{_num(abs(value))} either way"


def _power_at(result: AuditResult, pos: int, effect: float) -> float:
    design = design_of(result.table, pos)
    rows = result.table.iloc[[pos]]
    real = design.scenario(rows, "realized")
    with np.errstate(all="ignore"):
        return float(design.power(real, np.array([effect]), test_settings(rows, design))[0])


def _reproduction_sentences(m, row, units: str) -> list[str]:
    """What redoing the stated calculation gave: the published method that reproduces it
    (plan_reproduced_by), or the closest one and how far the planned size is from it."""
    closest = m.get("plan_closest_method")
    required = m.get("n_required_closest", np.nan)
    discrepancy = m.get("plan_discrepancy_closest", np.nan)
    if not isinstance(closest, str) or not math.isfinite(required):
        return []
    dropout = row.get("planned_dropout")
    needs = f"{int(required)} {units}"
    if dropout is not None and math.isfinite(float(dropout)) and float(dropout) > 0:
        plain = units.removeprefix("analysable ")
        needs = (
            f"{int(required)} {plain} to be recruited, allowing for the stated "
            f"{float(dropout):.0%} dropout,"
        )
    by = m.get("plan_reproduced_by")
    if isinstance(by, str):
        return [
            f"Recomputed from its stated inputs with {_method_phrase(by)}, that calculation "
            f"requires {needs.rstrip(',')}, in line with the planned size."
        ]
    way = "larger" if discrepancy > 0 else "smaller"
    return [
        f"Recomputed from its stated inputs, that calculation does not reproduce with any of "
        f"the standard methods: the closest, {_method_phrase(closest)}, requires {needs} and "
        f"the planned size is {abs(discrepancy):.0%} {way} than that."
    ]


#: Method names (plan_reproduced_by) as they read inside a sentence.
_METHOD_PHRASES = {
    "Fleiss": "Fleiss' method",
    "Fleiss continuity correction": "Fleiss' method with the continuity correction",
    "Schoenfeld": "Schoenfeld's method",
    "Freedman": "Freedman's method",
    "Fisher z": "Fisher's z",
    "exact r": "the exact distribution of r",
    "arcsine (Cohen's h)": "the arcsine method (Cohen's h)",
}


def _method_phrase(name: str) -> str:
    """A method's name inside a sentence: 'the exact t', 'Freedman's method', 'the normal
    approximation with Guenther correction'."""
    if name in _METHOD_PHRASES:
        return _METHOD_PHRASES[name]
    return "the " + name.replace("ANCOVA, ", "ANCOVA ").replace(", ", " with ")


def respond_text(result: AuditResult, study_id: str, effect: float | None = None) -> str:
    """The Markdown draft for ``study_id`` (the first audited row with that id).

    Raises
    ------
    ConfigError
        No audited study has that id.
    """
    positions = [p for p in result.positions_of(study_id) if result.valid[p]]
    if not positions:
        known = result.positions_of(study_id)
        why = "its row was not audited (see the report)" if known else "no such study_id"
        raise ConfigError(f"cannot write a response for '{study_id}': {why}.")
    pos = positions[0]
    row = result.table.iloc[pos]
    m = result.metrics.iloc[pos]
    name = str(row["design"])
    design = design_of(result.table, pos)
    alpha, sides = float(row["alpha"]), float(row["sides"])
    comparisons = float(row["comparisons"])
    target = float(row["target_power"])
    refs = ["hoenig"]
    paragraphs: list[str] = []
    # effect_scale = d, or a row with nothing in outcome units, which is read as d.
    standardized = name in (
        "one_mean",
        "paired_means",
        "two_means",
        "cluster_two_means",
        "crossover",
        "stepped_wedge",
    ) and bool(standardized_rows(result.table.iloc[[pos]])[0])
    units = UNIT_NOUNS.get(name, "analysable units")
    either = m.get("direction_used") == "either"
    sesoi_used = float(m.get("sesoi_used", np.nan))
    sesoi_text = _either_way(design, sesoi_used) if either else _num(sesoi_used)
    title = row.get("title")
    heading = f"## Power and sensitivity: {row['study_id']}"
    if isinstance(title, str) and title:
        heading += f" ({title})"

    hypothesis = row.get("hypothesis")
    if hypothesis in ("non_inferiority", "equivalence"):
        paragraphs = _margin_paragraphs(result, pos, design, str(hypothesis), units, refs)
        return _assemble(heading, paragraphs, refs, row)

    # -- the plan -------------------------------------------------------------------------
    planned = design.planned_effect(result.table.iloc[[pos]])[0]
    plan_bits = []
    if math.isfinite(planned):
        std_planned = float(
            design.standardize(
                design.scenario(result.table.iloc[[pos]], "planned"), np.array([planned])
            )[0]
        )
        plan_bits.append(
            f"The study was planned to detect "
            f"{_effect_phrase(design, standardized, planned, std_planned)} with {target:.0%} "
            f"power at a "
            f"{_alpha_phrase(alpha, sides, comparisons)}."
        )
        plan_bits.extend(_reproduction_sentences(m, row, units))
    ratio = m.get("n_ratio", np.nan)
    if math.isfinite(ratio):
        plan_bits.append(f"The analysed sample was {ratio:.0%} of the planned size.")
    sd_ratio = m.get("sd_ratio", np.nan)
    if math.isfinite(sd_ratio) and abs(sd_ratio - 1) >= 0.05:
        plan_bits.append(
            f"The observed standard deviation was {sd_ratio:.2f} times the planning value."
        )
    if plan_bits:
        paragraphs.append(" ".join(plan_bits))

    # -- sensitivity ----------------------------------------------------------------------
    sens = []
    mde80, std80 = _mde_at(result, pos, 0.80)
    mde90, std90 = _mde_at(result, pos, 0.90)
    if math.isfinite(mde80):
        tested = _alpha_phrase(alpha, sides, comparisons)
        at90 = (
            f", and {_effect_phrase(design, standardized, mde90, std90, either)} with 90% power."
            if math.isfinite(mde90)
            else "."
        )
        way = " in either direction" if either else ""
        sens.append(
            f"**Sensitivity analysis.** With the realized sample size and variability, the "
            f"smallest effect the study could detect{way} with 80% power ({tested}) was "
            f"{_effect_phrase(design, standardized, mde80, std80, either)}{at90}"
        )
        refs.append("bloom")
        if design.standardized_as in ("d", "d_z", "f", "f2", "r", "h"):
            refs.append("cohen")
    target_mde = m.get("mde", np.nan)
    if (
        math.isfinite(target_mde)
        and not math.isclose(target, 0.8)
        and not math.isclose(target, 0.9)
    ):
        sens.append(
            f"At the study's own target of {target:.0%} power, the minimal detectable effect was "
            f"{_num(target_mde)}."
        )
    powers = []
    p_plan = m.get("power_at_planned_effect", np.nan)
    if math.isfinite(p_plan):
        powers.append(
            f"design-based power for the planned effect of {_num(planned)} was {_power(p_plan)}"
        )
    if effect is not None:
        p_eff = _power_at(result, pos, effect)
        if math.isfinite(p_eff):
            powers.append(f"for an effect of {_num(effect)} it was {_power(p_eff)}")
    else:
        p_sesoi = m.get("power_at_sesoi", np.nan)
        if math.isfinite(p_sesoi):
            powers.append(
                f"for the smallest effect of interest ({sesoi_text}) it was {_power(p_sesoi)}"
            )
    if powers:
        text = "; ".join(powers)
        sens.append(text[0].upper() + text[1:] + ".")
    if sens:
        paragraphs.append(" ".join(sens))

    # -- the result -------------------------------------------------------------------------
    verdict = m.get("ci_verdict")
    low, high = m.get("result_ci_low", np.nan), m.get("result_ci_high", np.nan)
    estimate, p = m.get("result_effect", np.nan), m.get("result_p", np.nan)
    if isinstance(verdict, str) and math.isfinite(low) and math.isfinite(high):
        level = m.get("result_ci_level", np.nan)
        level_text = f"{level * 100:g}%" if math.isfinite(level) else "the"
        places = _decimals(
            (high - low) / 2
            if not design.is_ratio
            else min(abs(high - estimate), abs(estimate - low))
        )
        bits = [
            f"**What the result rules out.** The estimate was {_fixed(estimate, places)} "
            f"({level_text} CI {_fixed(low, places)} to {_fixed(high, places)}"
            + (f"; {format_p(p)})." if math.isfinite(p) else ").")
        ]
        if verdict == "detected":
            bits.append(
                "The result was statistically significant: the interval excludes the null "
                "value (no effect)."
            )
            exaggeration = m.get("exaggeration", np.nan)
            if math.isfinite(exaggeration) and exaggeration >= 1.25 and math.isfinite(p_plan):
                refs.append("gelman")
                bits.append(
                    f"Because power at the planned effect was {_power(p_plan)}, a significant "
                    f"estimate from this design would overstate a true effect of that size by "
                    f"about {exaggeration:.1f}-fold on average (Type M error; Gelman & Carlin, "
                    f"2014), so the estimate should be read with that in mind."
                )
        elif verdict == "excludes_sesoi":
            where = "lies wholly within" if either else "excludes effects as large as"
            bits.append(
                f"The result was not statistically significant, and the interval {where} the "
                f"smallest effect of interest ({sesoi_text}): the data argue against an effect "
                f"of relevant size."
            )
        elif verdict == "excludes_planned_effect":
            bits.append(
                f"The result was not statistically significant, and the interval excludes the "
                f"planned effect of {_num(planned)}, though not all smaller effects."
            )
        elif math.isfinite(planned) and not either:
            bits.append(
                "The result was not statistically significant, and the interval includes both "
                "no effect and the planned effect: the study can neither confirm nor rule out "
                "an effect of the size it was designed to detect."
            )
        else:
            bits.append(
                "The result was not statistically significant, and the interval includes both "
                f"no effect and effects as large as the smallest effect of interest "
                f"({sesoi_text}): the study can neither confirm nor rule out an effect of "
                "relevant size."
            )
        paragraphs.append(" ".join(bits))

    return _assemble(heading, paragraphs, refs, row)


def _assemble(heading: str, paragraphs: list[str], refs: list[str], row) -> str:  # type: ignore[no-untyped-def]
    """The draft: the paragraphs, why observed power is left out, the references."""
    # -- observed power -------------------------------------------------------------------
    obs = (
        "**Why observed power is not reported.** Power calculated from the observed effect is "
        "a one-to-one function of the P value and adds no information beyond it (Hoenig & "
        'Heisey, 2001); a non-significant result always has low "observed power". We '
        "therefore report power for effects fixed in advance and the confidence interval "
        "instead."
    )
    reported = row.get("reported_power")
    if reported is not None and math.isfinite(float(reported)):
        obs += (
            f" The post-hoc power of {float(reported):.2f} given in the manuscript should be "
            f"removed for that reason."
        )
    paragraphs.append(obs)

    out = [heading, "", *[p + "\n" for p in paragraphs]]
    out.append("### References\n")
    for key in dict.fromkeys(refs):
        out.append(f"- {REFERENCES[key]}")
    out.append("")
    out.append(
        "_Draft written by study-audit from the values in the input file; check each number "
        "against the analysis actually reported. It supports, and does not replace, the "
        "judgment of a qualified statistician._"
    )
    # The draft is shown in a terminal or pasted into a letter: no user value in it carries an
    # escape sequence or a control character (audit.terminal).
    return clean("\n".join(out)) + "\n"


def _margin_paragraphs(
    result: AuditResult, pos: int, design: Design, hypothesis: str, units: str, refs: list[str]
) -> list[str]:
    """The plan, the sensitivity and the result of a non-inferiority or equivalence trial,
    read against its margin (DESIGN.md 9.1)."""
    row = result.table.iloc[pos]
    m = result.metrics.iloc[pos]
    rows = result.table.iloc[[pos]]
    test = test_settings(rows, design)
    mt = hypotheses.margin_test(design, rows, test)
    alpha, target = float(mt.alpha[0]), float(row["target_power"])
    margin_a, better = float(mt.margin[0]), float(mt.better[0])
    margin = float(mt.margin_effect[0])
    noun = design.noun or EFFECT_NOUNS.get(design.name, "effect")
    ni = hypothesis == "non_inferiority"
    refs.insert(0, "blackwelder" if ni else "schuirmann")
    refs.append("piaggio")
    level = 1.0 - 2.0 * alpha
    planned = float(design.planned_effect(rows)[0])
    truth = (
        f"a true {noun} of {_num(planned)}"
        if math.isfinite(planned)
        else "no true difference between the groups"
    )
    # The margin's boundaries in effect units (for ratios: the ratio and its reciprocal).
    worse_bound = float(design.from_analysis(np.array([-better * margin_a]))[0])
    low_bound = float(design.from_analysis(np.array([-margin_a]))[0])
    high_bound = float(design.from_analysis(np.array([margin_a]))[0])
    paragraphs = []
    if ni:
        side = "lower" if better > 0 else "upper"
        plan = (
            f"The study was planned as a non-inferiority trial: to show that the intervention is "
            f"not worse than the control by more than a margin of {_num(margin)} (on the "
            f"{noun} scale, a {side} limit beyond {_num(worse_bound)}), by a one-sided test at "
            f"α = {format_number(alpha)} (equivalently, the {side} limit of the "
            f"{level:.0%} confidence interval), with {target:.0%} power assuming {truth}."
        )
    else:
        plan = (
            f"The study was planned as an equivalence trial: to show that the {noun} lies "
            f"within ±{_num(margin)} (from {_num(low_bound)} to {_num(high_bound)}) by two "
            f"one-sided tests, each at α = {format_number(alpha)} (equivalently, the "
            f"{level:.0%} confidence interval lying inside that range), with {target:.0%} power "
            f"assuming {truth}."
        )
    bits = [plan, *_reproduction_sentences(m, row, units)]
    ratio = m.get("n_ratio", np.nan)
    if math.isfinite(ratio):
        bits.append(f"The analysed sample was {ratio:.0%} of the planned size.")
    paragraphs.append(" ".join(bits))

    sens = []
    p_real = m.get("power_at_planned_effect", np.nan)
    shown = "non-inferiority" if ni else "equivalence"
    if math.isfinite(p_real):
        sens.append(
            f"**Sensitivity analysis.** With the realized sample size and variability, the "
            f"design-based power to show {shown} at the margin of {_num(margin)} was "
            f"{_power(p_real)} (assuming {truth})."
        )
    dm = m.get("detectable_margin", np.nan)
    if math.isfinite(dm):
        sens.append(
            f"The smallest margin the realized design could demonstrate with {target:.0%} power "
            f"was {_num(dm)}."
        )
    sens.append(
        "Power for a superiority test is not the relevant quantity for this design: under no "
        "true difference it equals α by construction."
    )
    paragraphs.append(" ".join(sens))

    verdict = m.get("ci_verdict")
    low, high = m.get("result_ci_low", np.nan), m.get("result_ci_high", np.nan)
    estimate = m.get("result_effect", np.nan)
    if isinstance(verdict, str) and math.isfinite(low) and math.isfinite(high):
        places = _decimals(
            (high - low) / 2
            if not design.is_ratio
            else min(abs(high - estimate), abs(estimate - low))
        )
        interval = (
            f"**What the result shows against the margin.** The estimate was "
            f"{_fixed(estimate, places)} ({m['result_ci_level'] * 100:g}% CI "
            f"{_fixed(low, places)} to {_fixed(high, places)})."
        )
        limit = low if better > 0 else high
        side = "lower" if better > 0 else "upper"
        where = "above" if better > 0 else "below"
        beyond = "below" if better > 0 else "above"
        texts = {
            "non_inferior": f"The {side} limit ({_fixed(limit, places)}) lies {where} the margin "
            f"({_num(worse_bound)}): non-inferiority is shown at a one-sided "
            f"α = {format_number(alpha)}.",
            "inferior": f"The whole interval lies {beyond} the margin ({_num(worse_bound)}): "
            "the intervention is worse than the control by more than the margin.",
            "equivalent": f"The whole interval lies within the equivalence range "
            f"({_num(low_bound)} to {_num(high_bound)}): equivalence is shown by two one-sided "
            f"tests at α = {format_number(alpha)}.",
            "not_equivalent": f"The whole interval lies outside the equivalence range "
            f"({_num(low_bound)} to {_num(high_bound)}): the groups differ by more than the "
            "margin.",
        }
        inconclusive = (
            f"The interval includes the margin ({_num(worse_bound)}): the trial neither shows "
            "non-inferiority nor rules it out, and a non-significant test of difference would "
            "not show similarity."
            if ni
            else f"The interval crosses the edge of the equivalence range ({_num(low_bound)} to "
            f"{_num(high_bound)}): the trial neither shows equivalence nor rules it out."
        )
        paragraphs.append(interval + " " + texts.get(str(verdict), inconclusive))
    return paragraphs
