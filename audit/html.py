"""The HTML report (``check --html OUT``): one self-contained file a panel can open offline.

A renderer like the terminal report: it reads an :class:`~audit.result.AuditResult` and lays
it out, computing no statistic of its own (portfolio numbers come from the portfolio block,
group summaries from ``result.groups``, study lines from :mod:`audit.report`, power curves and
figures from :mod:`audit.plots`). The page is built from Jinja2 templates shipped in
``audit/templates/`` with autoescaping on, so every value from the input file is escaped.

Self-contained means: no external style sheet, script, font or image; the figures are inline
SVG, and a Content-Security-Policy ``default-src 'none'`` forbids the browser to fetch anything,
allowing only inline styles and the one inline script of the template (by its SHA-256 hash).
The script sorts and filters the studies table; without it the page still reads in full.

Large portfolios: every study gets its section and its table row, but power curves are drawn
for at most :data:`MAX_CURVES` studies (the most serious findings first) and a finding's rule
rationale is written out in each study only up to :data:`INLINE_RATIONALE_LIMIT` studies (above,
the finding links to the rules section, which holds every rationale once). The page says so.
"""

from __future__ import annotations

import base64
import hashlib
import math
import re
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from audit import __version__
from audit._format import format_number
from audit.export import CAUTION, atomic_output, refuse_input
from audit.plots import PALETTE
from audit.portfolio import BLANK_GROUP
from audit.report import (
    EFFECT_COLUMNS,
    RESULT_COLUMNS,
    build_overview,
    key_numbers,
    pair_ratio,
    plan_reproduction,
    planned_realized_pairs,
)
from audit.rules import SEVERITY_RANK

if TYPE_CHECKING:
    from audit.result import AuditResult

__all__ = ["INLINE_RATIONALE_LIMIT", "MAX_CURVES", "render_html", "write_html"]

#: Power curves are drawn for at most this many studies (most serious findings first).
MAX_CURVES = 200
#: Up to this many studies, each finding carries its rule's rationale and references inline.
INLINE_RATIONALE_LIMIT = 300

#: The metrics each study section shows (the exports hold all of them). observed_power is left
#: out on purpose: it is a transform of the p-value, never evidence (the observed-power rule
#: explains it where a study reported one).
STUDY_METRICS = (
    "plan_power",
    "n_required_plan",
    "plan_discrepancy",
    "power_at_planned_effect",
    "power_at_sesoi",
    "power_at_pooled_effect",
    "mde",
    "mde_std",
    "se_plan",
    "se_realized",
    "precision_ratio",
    "n_required_realized",
    "power_cost_nuisance",
    "power_cost_attrition",
    "type_s",
    "exaggeration",
    "ci_verdict",
)

_TEMPLATES = Path(__file__).resolve().parent / "templates"
#: Curve plot geometry (SVG user units).
_W, _H, _LEFT, _RIGHT, _TOP, _BOTTOM = 560, 300, 52, 16, 16, 44
_MARK_DASH = {"planned_effect": "", "mde": "6 4", "sesoi": "2 3"}


def _environment() -> Any:
    import jinja2

    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(_TEMPLATES),
        autoescape=True,  # every value is escaped unless marked safe here (the SVG figures)
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def _num(value: object, digits: str = "") -> str:
    """A number for a cell: powers and shares with two decimals (``digits="2"``), other
    numbers as the report writes them; '' where not known."""
    if value is None or isinstance(value, str):
        return "" if value is None else value
    v = float(value)
    if not math.isfinite(v):
        return ""
    if digits == "2":
        return f"{v:.2f}"
    if digits == "%":
        return f"{v:.0%}"
    return format_number(v)


def _sort_key(value: object) -> str:
    """The ``data-sort`` value of a numeric cell: the number, or '' (sorted last)."""
    if value is None or isinstance(value, str):
        return ""
    v = float(value)
    return repr(v) if math.isfinite(v) else ""


def _text(value: object) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return str(value)


# -- figures --------------------------------------------------------------------------------------


def _svg_of(fig: Any, salt: str) -> str:
    """A matplotlib figure as inline SVG markup: text kept as text (no embedded font), ids
    salted per figure so that several figures in one page do not share ids, and the XML
    prologue and metadata (which name web addresses) left out."""
    import io

    import matplotlib
    import matplotlib.pyplot as plt

    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": salt}):
        fig.savefig(buffer, format="svg", metadata={"Date": None})
    plt.close(fig)
    text = buffer.getvalue()
    text = text[text.index("<svg") :]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.S)
    # matplotlib escapes the texts it writes; a figure that still held markup able to run
    # would not be shown rather than trusted.
    if re.search(r"<script|<foreignObject|\son[a-z]+\s*=|javascript:", text, re.I):
        return ""
    return text


def _portfolio_figures(result: AuditResult) -> list[dict[str, Any]]:
    from markupsafe import Markup

    from audit.plots import family_figures, portfolio_figures

    captions = {
        "portfolio_power": "Design-based power of the realized designs (at the planned effect, "
        "else the pooled or a reference effect).",
        "portfolio_mde": "Standardized MDE against realized size, by design.",
    }
    out = []
    figures = [*portfolio_figures(result), *(("family_" + n, f) for n, f in family_figures(result))]
    for k, (name, fig) in enumerate(figures):
        svg = _svg_of(fig, f"fig{k}")
        if svg:
            caption = captions.get(
                name,
                "Outcome family " + name.removeprefix("family_") + ": "
                "power of its studies against the true effect.",
            )
            # Ids from our own names only: a family's name is the user's text.
            anchor = name if name.startswith("portfolio_") else f"family-{k}"
            out.append({"name": anchor, "caption": caption, "svg": Markup(svg)})
    return out


def _ticks(low: float, high: float, n: int = 6) -> list[float]:
    from matplotlib.ticker import MaxNLocator

    values = MaxNLocator(nbins=n).tick_values(low, high)
    return [float(v) for v in values if low - 1e-12 <= v <= high + 1e-12]


def _curve_plot(
    result: AuditResult, pos: int, curve: dict[str, np.ndarray] | None, design: Any
) -> dict[str, Any] | None:
    """A study's power curve as plot geometry for the template's SVG (pixel positions only;
    the curves and marks are :mod:`audit.plots`')."""
    from audit.plots import curve_marks

    if curve is None or not np.isfinite(curve["realized"]).any():
        return None
    effect = curve["effect"]
    finite = np.isfinite(effect)
    lo, hi = float(np.min(effect[finite])), float(np.max(effect[finite]))
    if not hi > lo:
        return None
    width, height = _W - _LEFT - _RIGHT, _H - _TOP - _BOTTOM

    def px(x: float) -> float:
        return _LEFT + (x - lo) / (hi - lo) * width

    def py(p: float) -> float:
        return _TOP + (1.0 - p / 1.02) * height

    lines = []
    for stage, label in (("planned", "as planned"), ("realized", "as realized")):
        power = curve[stage]
        ok = finite & np.isfinite(power)
        points = " ".join(
            f"{px(x):.1f},{py(p):.1f}" for x, p in zip(effect[ok], power[ok], strict=True)
        )
        if points:
            lines.append({"points": points, "colour": PALETTE[stage], "label": label})
    marks = []
    for mark in curve_marks(result, pos):
        for x in (mark["x"], mark["mirror"]):
            if x is not None and lo <= x <= hi:
                marks.append(
                    {
                        "x": f"{px(x):.1f}",
                        "colour": PALETTE[mark["kind"]],
                        "dash": _MARK_DASH[mark["kind"]],
                        "label": f"{mark['label']} = {format_number(mark['x'])}",
                        "first": x == mark["x"],
                    }
                )
    target = float(result.table["target_power"].iat[pos])
    achieved = result.metrics["power_at_planned_effect"].iat[pos]
    planned = [m for m in curve_marks(result, pos) if m["kind"] == "planned_effect"]
    dot = None
    if planned and np.isfinite(achieved) and lo <= planned[0]["x"] <= hi:
        dot = {
            "x": f"{px(planned[0]['x']):.1f}",
            "y": f"{py(achieved):.1f}",
            "label": f"{achieved:.2f}",
            "colour": PALETTE["realized"],
        }
    return {
        "width": _W,
        "height": _H,
        "left": _LEFT,
        "right": _W - _RIGHT,
        "top": _TOP,
        "bottom": _H - _BOTTOM,
        "lines": lines,
        "marks": marks,
        "legend": [m for m in marks if m["first"]],
        "target": {"y": f"{py(target):.1f}", "label": f"target {target:.0%}"},
        "dot": dot,
        "xticks": [{"x": f"{px(v):.1f}", "label": format_number(v)} for v in _ticks(lo, hi)],
        "yticks": [{"y": f"{py(v):.1f}", "label": f"{v:.1f}"} for v in np.linspace(0, 1, 6)],
        "xlabel": f"true effect: {design.effect_unit}" if design is not None else "true effect",
    }


# -- the page -------------------------------------------------------------------------------------


def _worst(result: AuditResult) -> np.ndarray:
    """Each row's most severe finding ('' where none): for the table's column and filter."""
    from audit.rules import SEVERITIES

    n = len(result.table)
    worst = np.full(n, -1)
    f = result.findings
    if len(f):
        np.maximum.at(
            worst, f["pos"].to_numpy(dtype=int), f["severity"].map(SEVERITY_RANK).to_numpy(int)
        )
    names = np.array([*SEVERITIES, ""], dtype=object)
    return names[worst]


def _group_blocks(result: AuditResult) -> list[dict[str, Any]]:
    """The ``--group-by`` summaries laid out: one table per column, one line per value."""
    headers = dict(zip(result.groups, result.settings.get("group_by", []), strict=False))
    out = []
    for column, groups in result.groups.items():
        rows = []
        for value, g in groups.items():
            excess = g.get("excess_significance")
            if excess:
                excess_text = (
                    f"{excess['observed']} observed, {excess['expected']:.1f} expected; "
                    f"p = {format_number(excess['p_value'])}"
                )
            else:
                excess_text = "not tested"
            worst = g["studies_by_worst_finding"]
            rows.append(
                {
                    "value": value,
                    "blank": value == BLANK_GROUP,
                    "studies": g["studies"],
                    "audited": g["audited"],
                    "invalid": g["invalid"],
                    "with_power": g["studies_with_power"],
                    "median_power": _num(g["median_power_at_planned_effect"], "2"),
                    "share": _num(g["share_at_target_power"], "%"),
                    "worst": worst,
                    "mde": ", ".join(
                        f"{d} {format_number(v)}" for d, v in g["median_mde_std"].items()
                    ),
                    "excess": excess_text,
                    "excess_note": g.get("excess_significance_note") or "",
                }
            )
        out.append({"column": headers.get(column, column), "rows": rows})
    return out


def _study_rows(result: AuditResult, worst: np.ndarray) -> list[dict[str, Any]]:
    """The studies table: one line per input row, in input order."""
    table, metrics = result.table, result.metrics
    ids = table["study_id"].to_numpy(dtype=object)
    titles = table["title"].to_numpy(dtype=object) if "title" in table else [None] * len(table)
    designs = table["design"].to_numpy(dtype=object)
    rows_ = table["_row"].to_numpy()
    power = metrics["power_at_planned_effect"].to_numpy(dtype=float)
    target = table["target_power"].to_numpy(dtype=float)
    mde_std = np.abs(metrics["mde_std"].to_numpy(dtype=float))
    n_ratio = metrics["n_ratio"].to_numpy(dtype=float)
    verdict = metrics["ci_verdict"].to_numpy(dtype=object)
    counts = (
        np.bincount(result.findings["pos"].to_numpy(dtype=int), minlength=len(table))
        if len(result.findings)
        else np.zeros(len(table), dtype=int)
    )
    out = []
    for pos in range(len(table)):
        out.append(
            {
                "anchor": f"study-{pos}",
                "row": int(rows_[pos]),
                "id": _text(ids[pos]),
                "title": _text(titles[pos]),
                "design": _text(designs[pos]),
                "status": str(result.status[pos]),
                "worst": worst[pos] or ("none" if result.valid[pos] else ""),
                "worst_rank": SEVERITY_RANK.get(worst[pos], -1) if result.valid[pos] else -2,
                "findings": int(counts[pos]),
                "power": _num(power[pos], "2"),
                "power_sort": _sort_key(power[pos]),
                "target": _num(target[pos], "2"),
                "mde_std": _num(mde_std[pos]),
                "mde_std_sort": _sort_key(mde_std[pos]),
                "n_ratio": _num(n_ratio[pos], "%"),
                "n_ratio_sort": _sort_key(n_ratio[pos]),
                "verdict": _text(verdict[pos]),
            }
        )
    return out


def _study_sections(
    result: AuditResult, worst: np.ndarray, curves: dict[int, dict], inline: bool
) -> list[dict[str, Any]]:
    """One section per study: what the terminal's one-study view shows, laid out for a page."""
    table, metrics = result.table, result.metrics
    rules = {r.id: r for r in result.rules}
    errors = result.error_texts()
    notes = result.by_row(result.notes, "text")
    f = result.findings
    if len(f):
        order = np.lexsort(
            (
                np.arange(len(f)),
                -f["severity"].map(SEVERITY_RANK).to_numpy(int),
                f["pos"].to_numpy(dtype=int),
            )
        )
        f = f.iloc[order]
    findings = result.by_row(
        f.assign(item=list(zip(f["severity"], f["rule"], f["message"], strict=True)))
        if len(f)
        else f.assign(item=[]),
        "item",
    )
    pairs = planned_realized_pairs()
    wanted = [
        "study_id", "title", "_row", "design", "sides", "alpha", "comparisons", "target_power",
        *(c for _, a, b in pairs for c in (a, b)), *EFFECT_COLUMNS, *RESULT_COLUMNS,
    ]  # fmt: skip
    # Plain records and columns once (a frame's row lookups cost per call).
    rows = table[[c for c in dict.fromkeys(wanted) if c in table.columns]].to_dict("records")
    shown = [m for m in STUDY_METRICS if m in metrics.columns]
    values = {m: metrics[m].to_numpy() for m in shown}
    variants = _designs(table)
    out = []
    for pos in range(len(table)):
        row = rows[pos]
        design = variants[pos]
        section: dict[str, Any] = {
            "anchor": f"study-{pos}",
            "id": _text(row["study_id"]),
            "title": _text(row.get("title")),
            "row": int(row["_row"]),
            "design": _text(row["design"]),
            "design_title": design.title if design is not None else "",
            "status": str(result.status[pos]),
            "worst": worst[pos],
            "errors": errors[pos],
            "notes": notes[pos],
            "test": "",
            "pairs": [],
            "effects": [],
            "reported": [],
            "reproduction": "",
            "key_numbers": [],
            "metrics": [],
            "findings": [],
            "curve": None,
        }
        out.append(section)
        if not result.valid[pos]:
            continue
        sides = "one-sided" if float(row["sides"]) == 1.0 else "two-sided"
        section["test"] = (
            f"alpha {_num(row['alpha'])} {sides}, {_num(row['comparisons'])} comparison(s), "
            f"target power {_num(row['target_power'])}"
        )
        section["pairs"] = []
        for label, planned, realized in pairs:
            a, b = row.get(planned), row.get(realized)
            if _num(a) == "" and _num(b) == "":
                continue
            section["pairs"].append(
                {"label": label, "planned": _num(a), "realized": _num(b), "ratio": pair_ratio(a, b)}
            )
        section["effects"] = [(c, _num(row[c])) for c in EFFECT_COLUMNS if _num(row.get(c))]
        section["reported"] = [(c, _num(row[c])) for c in RESULT_COLUMNS if _num(row.get(c))]
        section["reproduction"] = plan_reproduction(result, pos)
        section["key_numbers"] = key_numbers(result, pos)
        cells = [(name, _num(values[name][pos])) for name in shown]
        section["metrics"] = [(name, v) for name, v in cells if v != ""]
        section["findings"] = []
        for severity, rule_id, message in findings[pos]:
            rule = rules.get(rule_id)
            section["findings"].append(
                {
                    "severity": severity,
                    "rule": rule_id,
                    "title": rule.title if rule is not None else "",
                    "message": message,
                    "rationale": " ".join(rule.rationale.split()) if rule and inline else "",
                    "references": list(rule.references) if rule and inline else [],
                }
            )
        section["curve"] = _curve_plot(result, pos, curves.get(pos), design)
    return out


def _designs(table: Any) -> np.ndarray:
    """Each row's design (the variant of its effect measure), None where unknown: grouped once
    rather than looked up row by row."""
    from audit.designs import design_groups

    out = np.full(len(table), None, dtype=object)
    for design, pos in design_groups(table):
        out[pos] = design
    return out


def _rule_blocks(result: AuditResult) -> list[dict[str, Any]]:
    counts = (
        result.findings.groupby("rule")["pos"].nunique().to_dict() if len(result.findings) else {}
    )
    return [
        {
            "id": r.id,
            "severity": r.severity,
            "title": r.title,
            "rationale": " ".join(r.rationale.split()),
            "references": list(r.references),
            "studies": int(counts.get(r.id, 0)),
        }
        for r in result.rules
    ]


def _glossary() -> list[tuple[str, str]]:
    from audit.metrics import METRICS

    return [(name, str(METRICS[name])) for name in STUDY_METRICS if name in METRICS]


def _script() -> tuple[str, str]:
    """The inline script and its CSP source expression (``'sha256-...'``)."""
    text = (_TEMPLATES / "report.js").read_text("utf-8")
    digest = base64.b64encode(hashlib.sha256(text.encode("utf-8")).digest()).decode("ascii")
    return text, f"'sha256-{digest}'"


def render_html(
    result: AuditResult,
    *,
    fail_on: str | None = None,
    max_curves: int = MAX_CURVES,
    inline_rationale: int = INLINE_RATIONALE_LIMIT,
) -> str:
    """The HTML report of ``result`` as text (see the module docstring)."""
    from markupsafe import Markup

    from audit.plots import chosen_studies, power_curves

    overview = build_overview(result)
    worst = _worst(result)
    drawn = chosen_studies(result, max_curves)
    curves = power_curves(result, drawn)
    drawable = sum(1 for c in curves.values() if c is not None and np.isfinite(c["realized"]).any())
    inline = len(result.table) <= inline_rationale
    script, script_hash = _script()
    page = {
        "version": __version__,
        "source": str(result.settings.get("source", "")),
        "sheet": result.settings.get("sheet"),
        "caution": CAUTION,
        "fail_on": fail_on,
        "view": overview,
        "portfolio": result.portfolio,
        "figures": _portfolio_figures(result),
        "groups": _group_blocks(result),
        "studies": _study_rows(result, worst),
        "sections": _study_sections(result, worst, curves, inline),
        "rules": _rule_blocks(result),
        "glossary": _glossary(),
        "caveats": result.caveats,
        "curves_drawn": drawable,
        "curves_limited": int(result.valid.sum()) > len(drawn),
        "max_curves": max_curves,
        "inline_rationale": inline,
        "inline_limit": inline_rationale,
        "css": Markup((_TEMPLATES / "report.css").read_text("utf-8")),
        "script": Markup(script),
        "script_hash": script_hash,
        "num": _num,
        "blank_label": BLANK_GROUP,
    }
    return _environment().get_template("report.html.j2").render(**page)


def write_html(
    result: AuditResult, path: str | Path, *, fail_on: str | None = None, **options: Any
) -> None:
    """Write the HTML report atomically (``"-"``: standard output).

    Raises
    ------
    OutputError
        ``path`` is a file the run reads, or a folder.
    """
    refuse_input(result, path)
    text = render_html(result, fail_on=fail_on, **options)
    with atomic_output(path) as handle:
        handle.write(text)
