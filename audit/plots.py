"""Figures (``check --plots DIR``): power curves per study and two portfolio views.

* ``study_<id>.png`` — power against the true effect for the design as planned and as realized,
  with the planned effect, the SESOI and the MDE marked. Written for at most ``max_studies``
  studies: those with the most serious findings first, then in input order.
* ``portfolio_power.png`` — distribution of design-based power at the planned effect; where some
  studies have no planned effect, their power at their family's pooled effect or else at the
  middle reference effect is stacked on it (the legend says how many of each).
* ``portfolio_mde.png`` — standardized MDE against realized size, one colour per design.
* ``family_<name>.png`` — per pooled ``outcome_family``, each study's power across a range of true
  effects on the family's analysis scale (standardized where the results are: d, d_z, Fisher z,
  log HR), one curve per study, the pooled estimate marked (:func:`family_figures`).

Curves are computed with the designs' own vectorised power functions over a grid (one call per
design for all plotted studies). Rendering uses matplotlib's Agg backend: no display is needed.
"""

from __future__ import annotations

import re
import textwrap
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from audit import hypotheses
from audit.designs import DESIGNS, design_groups, design_of
from audit.errors import OutputError
from audit.metrics import test_settings

if TYPE_CHECKING:
    from audit.pipeline import AuditResult

__all__ = [
    "PALETTE",
    "chosen_studies",
    "curve_marks",
    "family_curves",
    "family_figures",
    "portfolio_figures",
    "power_curves",
    "study_figure",
    "write_plots",
]

#: The project's colours: planned design, realized design, markers, portfolio bars.
PALETTE = {
    "planned": "#5B7DA8",
    "realized": "#C0612B",
    "planned_effect": "#3D3D3D",
    "sesoi": "#7A9A3A",
    "mde": "#8E4A8E",
    "bars": "#6E9C9A",
    "bars_pooled": "#B8963A",
    "bars_reference": "#A9A9C8",
    "grid": "#E3E3E3",
    "designs": ["#5B7DA8", "#C0612B", "#7A9A3A", "#8E4A8E", "#B8963A", "#3F8F8C", "#A8525E",
                "#6B6B6B", "#4F6F3A", "#9C7BB5"],
}  # fmt: skip

_GRID = 121
_SEVERITY_RANK = {"serious": 0, "warning": 1, "note": 2}


def _style(ax) -> None:
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.grid(True, color=PALETTE["grid"], linewidth=0.8)
    ax.set_axisbelow(True)


def power_curves(
    result: AuditResult, positions: np.ndarray, grid: int = _GRID
) -> dict[int, dict[str, np.ndarray]]:
    """Power of the planned and the realized design over a grid of true effects.

    Returns, per row position, ``effect`` (effect units), ``planned`` and ``realized`` (power),
    computed with one vectorised call per design.
    """
    table, metrics = result.table, result.metrics
    out: dict[int, dict[str, np.ndarray]] = {}
    for design, pos in design_groups(table, np.asarray(positions, dtype=int)):
        margin = hypotheses.margin_rows(table.iloc[pos])
        if margin.any():
            out.update(_margin_curves(design, table.iloc[pos[margin]], pos[margin], grid))
            pos = pos[~margin]
            if not len(pos):
                continue
        rows = table.iloc[pos]
        test = test_settings(rows, design)
        effect = design.planned_effect(rows)
        anchors = [
            design.to_analysis(effect),
            design.to_analysis(metrics["mde"].to_numpy()[pos]),
            design.to_analysis(metrics["sesoi_used"].to_numpy()[pos]),
        ]
        with np.errstate(invalid="ignore", divide="ignore"):
            reach = np.nanmax(np.abs(np.vstack(anchors)), axis=0) * 1.6
        reach = np.where(np.isfinite(reach) & (reach > 0), reach, 1.0)
        k = len(pos)
        frac = np.linspace(0.0, 1.0, grid)
        # A row with no direction is drawn on both sides of no effect (its SESOI is a band).
        span = np.where(test.either[:, None], 2.0 * frac[None, :] - 1.0, frac[None, :])
        analysis = test.direction[:, None] * reach[:, None] * span
        effects = design.from_analysis(analysis).reshape(-1)

        def tile(a: np.ndarray) -> np.ndarray:
            return np.repeat(a, grid)

        big_test = type(test)(
            tile(test.alpha),
            tile(test.sides),
            tile(test.power),
            tile(test.direction),
            tile(test.either),
        )
        curves = {}
        for stage in ("planned", "realized"):
            sc = {key: tile(v) for key, v in design.scenario(rows, stage).items()}
            with np.errstate(all="ignore"):
                curves[stage] = design.power(sc, effects, big_test).reshape(k, grid)
        effects = effects.reshape(k, grid)
        for i, p in enumerate(pos):
            out[int(p)] = {
                "effect": effects[i],
                "planned": curves["planned"][i],
                "realized": curves["realized"][i],
            }
    return out


def _margin_curves(design, rows, pos: np.ndarray, grid: int) -> dict[int, dict[str, np.ndarray]]:  # type: ignore[no-untyped-def]
    """Power of non-inferiority and equivalence tests over true differences: from 1.5 margins
    on the worse side to one margin on the better side (equivalence: 1.5 margins both ways),
    the margin's edges marked by the caller (``margin_low`` / ``margin_high``)."""
    mt = hypotheses.margin_test(design, rows, test_settings(rows, design))
    frac = np.linspace(0.0, 1.0, grid)[None, :]
    m = mt.margin[:, None]
    span = np.where(mt.equivalence[:, None], -1.5 * m + 3.0 * m * frac, -1.5 * m + 2.5 * m * frac)
    truth = (mt.better[:, None] * span).reshape(-1)
    tiled = hypotheses.MarginTest(
        *(np.repeat(getattr(mt, f), grid) for f in mt.__dataclass_fields__)
    )
    curves = {}
    for stage in ("planned", "realized"):
        sc = {key: np.repeat(v, grid) for key, v in design.scenario(rows, stage).items()}
        with np.errstate(all="ignore"):
            curves[stage] = hypotheses.power_curve(design, sc, tiled, truth).reshape(-1, grid)
    with np.errstate(all="ignore"):
        effects = design.from_analysis(truth).reshape(-1, grid)
    low, high = hypotheses.margin_bounds(design, mt)
    return {
        int(p): {
            "effect": effects[i],
            "planned": curves["planned"][i],
            "realized": curves["realized"][i],
            "margin_low": low[i],
            "margin_high": high[i],
        }
        for i, p in enumerate(pos)
    }


def chosen_studies(
    result: AuditResult, max_studies: int, study: str | Sequence[str] | None = None
) -> np.ndarray:
    """Row positions of the studies whose figures are drawn, in input order: ``study`` (an id
    or several) if given, else at most ``max_studies`` audited studies, those with the most
    serious findings first."""
    audited = np.flatnonzero(result.valid)
    if study is not None:
        wanted = [study] if isinstance(study, str) else list(study)
        ids = result.table["study_id"].to_numpy(dtype=object)
        return audited[np.isin(ids[audited], wanted)]
    rank = np.full(len(result.table), 3)
    f = result.findings
    if len(f):
        sev = f["severity"].map(_SEVERITY_RANK).fillna(3).to_numpy(dtype=int)
        np.minimum.at(rank, f["pos"].to_numpy(dtype=int), sev)
    order = audited[np.argsort(rank[audited], kind="stable")]
    return np.sort(order[:max_studies])


def _safe_name(text: object) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", str(text)).strip("_")[:80] or "study"


def write_plots(
    result: AuditResult,
    folder: str | Path,
    *,
    fmt: str = "png",
    max_studies: int = 60,
    study: str | Sequence[str] | None = None,
) -> list[Path]:
    """Write the figures into ``folder``; returns the files written.

    ``study``: draw only these studies (an id or several) instead of the most flagged ones.

    Raises
    ------
    OutputError
        ``folder`` is an existing file, or cannot be made.
    """
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise OutputError(f"--plots needs a folder, but {folder} is a file.")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot make the figures folder {folder}: {exc.strerror}.") from exc
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    written: list[Path] = []
    positions = chosen_studies(result, max_studies, study)
    curves = power_curves(result, positions)
    ids = result.table["study_id"].to_numpy(dtype=object)
    for pos in positions:
        fig = study_figure(result, int(pos), curves.get(int(pos)))
        if fig is None:
            continue
        path = folder / f"study_{_safe_name(ids[pos])}.{fmt}"
        fig.savefig(path)
        plt.close(fig)
        written.append(path)
    if study is None:
        for name, fig in portfolio_figures(result):
            path = folder / f"{name}.{fmt}"
            fig.savefig(path)
            plt.close(fig)
            written.append(path)
        for name, fig in family_figures(result):
            path = folder / f"family_{_safe_name(name)}.{fmt}"
            fig.savefig(path)
            plt.close(fig)
            written.append(path)
    return written


def study_figure(result: AuditResult, pos: int, curve: dict[str, np.ndarray] | None):
    """The power-curve figure of the study at row position ``pos`` (its curve from
    :func:`power_curves`), or None where the realized design has no power to draw. The caller
    saves and closes it."""
    if curve is None or not np.isfinite(curve["realized"]).any():
        return None
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    c = curve
    table, metrics = result.table, result.metrics
    row = table.iloc[pos]
    design = design_of(table, pos)
    fig, ax = plt.subplots(figsize=(6.4, 4.6), dpi=110)
    _style(ax)
    ax.plot(c["effect"], c["planned"], color=PALETTE["planned"], lw=2, label="as planned")
    ax.plot(c["effect"], c["realized"], color=PALETTE["realized"], lw=2, label="as realized")
    target = float(row["target_power"])
    ax.axhline(target, color="#9A9A9A", lw=0.9, ls="-", zorder=0)
    ax.text(
        0.995,
        target,
        f"target {target:.0%}",
        va="bottom",
        ha="right",
        fontsize=8,
        color="#555555",
        transform=ax.get_yaxis_transform(),
    )
    styles = {"planned_effect": "-", "mde": "--", "sesoi": ":"}
    marks = curve_marks(result, pos)
    for mark in marks:
        kind, x = mark["kind"], mark["x"]
        colour = PALETTE[kind]
        ax.axvline(x, color=colour, lw=1.3, ls=styles[kind], label=f"{mark['label']} = {x:.3g}")
        if mark["mirror"] is not None:
            ax.axvline(mark["mirror"], color=colour, lw=1.3, ls=styles[kind])
    achieved = metrics["power_at_planned_effect"].iat[pos]
    planned = [m["x"] for m in marks if m["kind"] == "planned_effect"]
    if np.isfinite(achieved) and planned:
        ax.plot(planned, [achieved], "o", color=PALETTE["realized"], ms=6, zorder=5)
        ax.annotate(
            f"{achieved:.2f}",
            (planned[0], achieved),
            textcoords="offset points",
            xytext=(6, -12),
            fontsize=8,
            color=PALETTE["realized"],
        )
    ax.set_ylim(0, 1.02)
    hypothesis = row.get("hypothesis")
    tested = (
        f" ({str(hypothesis).replace('_', '-')} test)"
        if hypothesis in hypotheses.MARGIN_HYPOTHESES
        else ""
    )
    ax.set_xlabel(f"true effect: {design.effect_unit}{tested}")
    ax.set_ylabel("design-based power")
    title = str(row["study_id"])
    if isinstance(row.get("title"), str):
        title += " — " + textwrap.shorten(row["title"], width=64, placeholder="…")
    ax.set_title(title, loc="left", fontsize=10)
    ax.legend(frameon=False, fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=3)
    fig.tight_layout()
    return fig


def curve_marks(result: AuditResult, pos: int) -> list[dict[str, object]]:
    """The effects marked on a study's power curve: ``kind`` (``planned_effect``, ``mde``,
    ``sesoi``), ``label``, ``x`` (effect units) and ``mirror``, the same magnitude on the other
    side of no effect for a study that looked either way (None otherwise; never for the
    planned effect). Marks that are not known are left out."""
    table, metrics = result.table, result.metrics
    design = design_of(table, pos)
    rows = table.iloc[[pos]]
    if hypotheses.margin_rows(rows)[0]:
        return _margin_marks(design, rows)
    either = metrics["direction_used"].iat[pos] == "either"
    out: list[dict[str, object]] = []
    for kind, label, x in (
        ("planned_effect", "planned effect", design.planned_effect(table.iloc[[pos]])[0]),
        ("mde", "MDE (realized)", metrics["mde"].iat[pos]),
        ("sesoi", "SESOI", metrics["sesoi_used"].iat[pos]),
    ):
        if x is None or not np.isfinite(x):
            continue
        mirror = None
        if either and kind != "planned_effect":
            mirror = float(design.from_analysis(-design.to_analysis(np.array([x])))[0])
        out.append({"kind": kind, "label": label, "x": float(x), "mirror": mirror})
    return out


def _margin_marks(design, rows) -> list[dict[str, object]]:  # type: ignore[no-untyped-def]
    """A non-inferiority or equivalence study's marks: the assumed true difference (no
    difference where the row gives none) and the margin's edges, drawn as the SESOI is."""
    mt = hypotheses.margin_test(design, rows, test_settings(rows, design))
    low, high = hypotheses.margin_bounds(design, mt)
    truth = design.planned_effect(rows)[0]
    if not np.isfinite(truth):
        truth = design.from_analysis(np.zeros(1))[0]
    out: list[dict[str, object]] = [
        {"kind": "planned_effect", "label": "assumed true difference", "x": float(truth),
         "mirror": None},
    ]  # fmt: skip
    for edge in (low[0], high[0]):
        if edge is not None and np.isfinite(edge):
            out.append({"kind": "sesoi", "label": "margin", "x": float(edge), "mirror": None})
    return out


def family_curves(
    result: AuditResult, family: str, grid: int = _GRID
) -> dict[str, np.ndarray] | None:
    """Power of each study of a pooled outcome family over a grid of true effects.

    Returns ``effect`` (the family's analysis scale, from no effect to twice the pooled
    estimate or to the largest reference effect, in the pooled estimate's direction),
    ``positions`` (row positions of the studies drawn) and ``power`` (one row per study), or
    None where the family was not pooled. The powers are those of
    :func:`audit.portfolio.family_power_grid`: the same computation as
    ``power_at_pooled_effect``, so each curve passes through the study's power at the pooled
    estimate.
    """
    from audit.portfolio import family_power_grid

    block = result.portfolio.get("families", {}).get(family)
    if not block or block["pooled_estimate"] is None:
        return None
    pooled = float(block["pooled_estimate"])
    standardized = block["scale"] in _STANDARDIZED_SCALES
    effects = result.settings.get("reference_effects") or []
    reach = 2.0 * abs(pooled)
    if standardized and effects:
        reach = max(reach, 1.1 * max(effects))
    if not reach > 0:
        reach = 1.0
    sign = -1.0 if pooled < 0 else 1.0
    values = sign * np.linspace(0.0, reach, grid)
    positions, power = family_power_grid(
        result.table, result.metrics, result.valid, family, block, values
    )
    return {"effect": values, "positions": positions, "power": power}


#: Analysis scales that are standardized effects (their x axis reaches the reference effects).
_STANDARDIZED_SCALES = frozenset({"d", "d_z", "d (one sample)", "Fisher z", "log hazard ratio"})


def family_figures(result: AuditResult, grid: int = _GRID) -> list[tuple[str, object]]:
    """One matplotlib figure per pooled outcome family, ``(family, figure)`` in family order,
    for ``--plots`` and for any report that embeds figures (the caller closes them)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out = []
    ids = result.table["study_id"].to_numpy(dtype=object)
    for name, block in result.portfolio.get("families", {}).items():
        curves = family_curves(result, name, grid)
        if curves is None or not np.isfinite(curves["power"]).any():
            continue
        fig, ax = plt.subplots(figsize=(6.4, 4.4), dpi=110)
        _style(ax)
        many = len(curves["positions"]) > 12
        for i, pos in enumerate(curves["positions"]):
            colour = PALETTE["designs"][i % len(PALETTE["designs"])]
            label = None if many else str(ids[pos])
            ax.plot(
                curves["effect"],
                curves["power"][i],
                color=PALETTE["realized"] if many else colour,
                lw=1.0 if many else 1.6,
                alpha=0.45 if many else 0.9,
                label=label,
            )
        pooled = float(block["pooled_estimate"])
        ax.axvline(
            pooled,
            color=PALETTE["planned_effect"],
            lw=1.4,
            ls="--",
            label=f"pooled estimate {pooled:.3g}",
        )
        at = result.metrics["power_at_pooled_effect"].to_numpy(dtype=float)[curves["positions"]]
        ax.plot(np.full(len(at), pooled), at, "o", color=PALETTE["planned_effect"], ms=3.5)
        ax.axhline(0.8, color="#9A9A9A", lw=0.9, zorder=0)
        ax.set_ylim(0, 1.02)
        ax.set_xlabel(f"true effect on the family's scale: {block['scale']}")
        ax.set_ylabel("design-based power (realized design)")
        median = block["median_power_at_pooled_effect"]
        title = f"{name}: {len(curves['positions'])} studies"
        if median is not None:
            title += f", median power {median:.2f} at the pooled estimate"
        ax.set_title(textwrap.shorten(title, width=90, placeholder="…"), loc="left", fontsize=10)
        ax.legend(frameon=False, fontsize=7, loc="lower right", ncol=2 if not many else 1)
        fig.tight_layout()
        out.append((name, fig))
    return out


def portfolio_figures(result: AuditResult) -> list[tuple[str, object]]:
    """The portfolio figures, ``(name, figure)``: ``portfolio_power`` (the spread of
    design-based power) and ``portfolio_mde`` (standardized MDE against size), where there is
    something to draw. The caller saves and closes them."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.ticker import FuncFormatter

    from audit.portfolio import power_by_basis

    written = []
    metrics = result.metrics
    # Each study's power at its planned effect, else at its family's pooled estimate, else at
    # the middle reference effect: the portfolio's own choice (audit.portfolio.power_by_basis).
    values, basis, key = power_by_basis(metrics, result.valid)
    spread = result.portfolio.get("power_distribution_by_basis") or {}
    counts = spread.get("basis_counts") or {}
    if np.isfinite(values).any():
        fig, ax = plt.subplots(figsize=(6.4, 3.8), dpi=110)
        _style(ax)
        bins = np.linspace(0, 1, 21)
        only_planned = not counts.get("pooled") and not counts.get("reference")
        if only_planned:
            power = values[basis == "planned"]
            ax.hist(power, bins=bins, color=PALETTE["bars"], edgecolor="white")
            median = float(result.portfolio["median_power_at_planned_effect"])
            xlabel = "design-based power at the planned effect (realized design)"
            title = f"Power at the planned effect, {len(power)} studies"
        else:
            kinds = [
                ("planned", "at the planned effect", PALETTE["bars"]),
                ("pooled", "at the family's pooled effect", PALETTE["bars_pooled"]),
                ("reference", f"at the reference effect {key}", PALETTE["bars_reference"]),
            ]
            stacks = [(values[basis == k], f"{counts.get(k, 0)} {text}", c) for k, text, c in kinds]
            stacks = [s for s in stacks if len(s[0])]
            ax.hist(
                [s[0] for s in stacks],
                bins=bins,
                stacked=True,
                color=[s[2] for s in stacks],
                label=[s[1] for s in stacks],
                edgecolor="white",
            )
            median = float(spread["quartiles"][1])
            xlabel = (
                "design-based power (realized design) at the planned effect, else the pooled "
                "or reference effect"
            )
            title = (
                f"Design-based power of {int(np.isfinite(values).sum())} studies: at the planned "
                "effect, else the pooled or a reference effect"
            )
        ax.axvline(median, color=PALETTE["realized"], lw=1.6, label=f"median {median:.2f}")
        ax.axvline(0.8, color=PALETTE["planned_effect"], lw=1.0, ls=":", label="0.80")
        ax.set_xlabel(xlabel, fontsize=8 if not only_planned else None)
        ax.set_ylabel("studies")
        ax.set_title(title, loc="left", fontsize=10)
        ax.legend(frameon=False, fontsize=7 if not only_planned else 8)
        fig.tight_layout()
        written.append(("portfolio_power", fig))
    table = result.table
    mde_std = np.abs(metrics["mde_std"].to_numpy(dtype=float))
    size = np.nansum(
        np.column_stack(
            [table.get("realized_n1", np.nan), table.get("realized_n2", np.nan)]
        ).astype(float),
        axis=1,
    )
    ok = np.isfinite(mde_std) & (size > 0) & result.valid
    if ok.any():
        fig, ax = plt.subplots(figsize=(6.4, 4.2), dpi=110)
        _style(ax)
        designs = table["design"].to_numpy(dtype=object)
        for k, name in enumerate(sorted(set(designs[ok]))):
            sel = ok & (designs == name)
            std = DESIGNS[name].standardized_as or "std"
            ax.scatter(
                size[sel],
                mde_std[sel],
                s=18,
                alpha=0.8,
                color=PALETTE["designs"][k % len(PALETTE["designs"])],
                label=f"{name} ({std})",
            )
        ax.set_xscale("log")
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        ax.xaxis.set_minor_formatter(FuncFormatter(lambda v, _: ""))
        ax.set_xlabel("realized size (units in n1 + n2; clusters for cluster trials)")
        ax.set_ylabel("standardized MDE (magnitude)")
        ax.set_title("What each study could detect, by size", loc="left", fontsize=10)
        ax.legend(frameon=False, fontsize=7, ncol=2)
        fig.tight_layout()
        written.append(("portfolio_mde", fig))
    return written
