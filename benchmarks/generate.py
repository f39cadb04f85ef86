"""Synthetic portfolios for benchmarking: mixed designs in realistic proportions.

Usage::

    python benchmarks/generate.py --rows 100000 --seed 1 --out benchmarks/data/p100k.csv
    python benchmarks/generate.py --rows 100000 --out benchmarks/data/p100k.xlsx

Every row is an invented study. Planned sizes come from the usual normal-approximation formula
with planning noise (some calculations do not reproduce), realized sizes lose 0-40 % to attrition,
realized nuisance parameters drift from the plan, about a third of the rows report a result, and
about 1 % of the rows carry an invalid value so that validation has work to do.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import special

#: Share of each design in a registry-like portfolio (trials dominate).
MIX = {
    "two_means": 0.30,
    "two_proportions": 0.20,
    "survival": 0.10,
    "cluster_two_means": 0.08,
    "paired_means": 0.07,
    "correlation": 0.06,
    "one_mean": 0.04,
    "k_means": 0.05,
    "regression": 0.05,
    "estimate": 0.05,
}

COLUMNS = [
    "study_id", "title", "design", "alpha", "sides", "target_power", "comparisons",
    "planned_n1", "planned_n2", "realized_n1", "realized_n2", "planned_sd", "realized_sd",
    "effect_scale", "planned_effect", "planned_p1", "planned_p2", "realized_p1", "sesoi",
    "groups", "predictors", "covariates", "covariate_r2", "planned_icc", "realized_icc",
    "planned_cluster_size", "realized_cluster_size", "cluster_size_cv", "planned_events",
    "realized_events", "planned_se", "realized_se", "df", "observed_effect", "observed_se",
    "observed_ci_low", "observed_ci_high", "observed_p", "reported_power", "registry",
]  # fmt: skip


def generate(rows: int, seed: int = 1) -> pd.DataFrame:
    """A DataFrame of ``rows`` invented studies (vectorised; a million rows take seconds)."""
    rng = np.random.default_rng(seed)
    names = np.array(list(MIX))
    design = rng.choice(names, size=rows, p=np.array(list(MIX.values())))
    out = pd.DataFrame({c: np.full(rows, np.nan, dtype=object) for c in COLUMNS})
    out["study_id"] = np.char.add("SYN-", np.arange(1, rows + 1).astype(str))
    out["title"] = np.char.add("Synthetic study ", np.arange(1, rows + 1).astype(str))
    out["design"] = design
    alpha = rng.choice([0.05, 0.05, 0.05, 0.01, 0.025], rows)
    sides = np.where(alpha == 0.025, 1, rng.choice([2, 2, 2, 1], rows))
    power = rng.choice([0.8, 0.8, 0.9, 0.85], rows)
    # F tests (k means, regression) have no one-sided form: their rows say two-sided.
    sides = np.where(np.isin(design, ["k_means", "regression"]), 2, sides)
    out["alpha"], out["sides"], out["target_power"] = alpha, sides, power
    out["comparisons"] = rng.choice([1, 1, 1, 1, 2, 3], rows)
    z = special.ndtri(1 - alpha / sides / out["comparisons"].to_numpy(float)) + special.ndtri(power)
    noise = rng.lognormal(0.0, 0.12, rows)  # planning calculations that do not reproduce
    keep = rng.uniform(0.6, 1.05, rows)  # attrition
    drift = rng.lognormal(0.05, 0.15, rows)  # nuisance parameters vs plan
    d = rng.uniform(0.2, 0.8, rows)

    def put(mask: np.ndarray, column: str, values: np.ndarray) -> None:
        out.loc[mask, column] = np.asarray(values)[mask]

    # Mean designs (raw scale).
    sd = rng.uniform(1, 50, rows)
    for name, groups in (("two_means", 2), ("paired_means", 1), ("one_mean", 1)):
        m = design == name
        per = np.ceil(groups * (z / d) ** 2 * noise) + 2
        put(m, "planned_n1", per)
        put(m, "realized_n1", np.maximum(np.floor(per * keep), 3))
        if groups == 2:
            put(m, "planned_n2", per)
            put(m, "realized_n2", np.maximum(np.floor(per * keep * rng.uniform(0.9, 1.1, rows)), 3))
        put(m, "planned_sd", np.round(sd, 2))
        put(m, "realized_sd", np.round(sd * drift, 2))
        put(m, "planned_effect", np.round(d * sd, 3))
        put(m, "sesoi", np.round(0.7 * d * sd, 3))
        put(m, "effect_scale", np.full(rows, "raw"))
    # Two proportions.
    m = design == "two_proportions"
    p1 = rng.uniform(0.1, 0.6, rows)
    p2 = np.clip(p1 + rng.choice([-1, 1], rows) * rng.uniform(0.05, 0.2, rows), 0.02, 0.95)
    pbar = (p1 + p2) / 2
    per = np.ceil(2 * pbar * (1 - pbar) * (z / (p2 - p1)) ** 2 * noise) + 2
    put(m, "planned_p1", np.round(p1, 3))
    put(m, "planned_p2", np.round(p2, 3))
    put(m, "realized_p1", np.round(np.clip(p1 * drift, 0.01, 0.95), 3))
    put(m, "planned_n1", per)
    put(m, "planned_n2", per)
    put(m, "realized_n1", np.maximum(np.floor(per * keep), 3))
    put(m, "realized_n2", np.maximum(np.floor(per * keep), 3))
    # Correlation.
    m = design == "correlation"
    r = rng.uniform(0.1, 0.5, rows)
    n = np.ceil((z / np.arctanh(r)) ** 2 * noise + 3) + 1
    put(m, "planned_effect", np.round(r, 3))
    put(m, "planned_n1", n)
    put(m, "realized_n1", np.maximum(np.floor(n * keep), 5))
    # k means and regression (Cohen's f and f squared).
    m = design == "k_means"
    k = rng.integers(3, 6, rows)
    f = rng.uniform(0.15, 0.4, rows)
    n = np.ceil((z / f) ** 2 * noise * 1.1) + k
    put(m, "groups", k)
    put(m, "planned_effect", np.round(f, 3))
    put(m, "planned_n1", n)
    put(m, "realized_n1", np.maximum(np.floor(n * keep), k + 2))
    m = design == "regression"
    u = rng.integers(1, 4, rows)
    f2 = rng.uniform(0.02, 0.2, rows)
    n = np.ceil((z**2 + u) / f2 * noise) + u + 3
    put(m, "predictors", u)
    put(m, "covariates", rng.integers(0, 5, rows))
    put(m, "planned_effect", np.round(f2, 4))
    put(m, "planned_n1", n)
    put(m, "realized_n1", np.maximum(np.floor(n * keep), u + 10))
    # Cluster trials.
    m = design == "cluster_two_means"
    icc = rng.uniform(0.01, 0.1, rows)
    csize = rng.integers(8, 40, rows)
    deff = 1 + (csize - 1) * icc
    clusters = np.ceil(2 * (z / d) ** 2 * deff / csize * noise) + 2
    put(m, "planned_icc", np.round(icc, 3))
    put(m, "realized_icc", np.round(icc * drift, 3))
    put(m, "planned_cluster_size", csize)
    put(m, "realized_cluster_size", np.round(csize * keep, 1))
    put(m, "cluster_size_cv", np.round(rng.uniform(0, 0.6, rows), 2))
    put(m, "planned_n1", clusters)
    put(m, "planned_n2", clusters)
    put(m, "realized_n1", np.maximum(clusters - rng.integers(0, 2, rows), 2))
    put(m, "realized_n2", np.maximum(clusters - rng.integers(0, 2, rows), 2))
    put(m, "planned_sd", np.round(sd, 2))
    put(m, "realized_sd", np.round(sd * drift, 2))
    put(m, "planned_effect", np.round(d * sd, 3))
    # Survival.
    m = design == "survival"
    hr = rng.uniform(0.55, 0.85, rows)
    events = np.ceil(4 * z**2 / np.log(hr) ** 2 * noise)
    patients = np.ceil(events / rng.uniform(0.3, 0.7, rows) / 2)
    put(m, "planned_effect", np.round(hr, 3))
    put(m, "planned_events", events)
    put(m, "realized_events", np.maximum(np.floor(events * keep), 5))
    put(m, "planned_n1", patients)
    put(m, "planned_n2", patients)
    put(m, "realized_n1", np.maximum(np.floor(patients * keep), 5))
    put(m, "realized_n2", np.maximum(np.floor(patients * keep), 5))
    # Generic estimates.
    m = design == "estimate"
    se = rng.uniform(0.02, 2, rows)
    put(m, "planned_se", np.round(se, 4))
    put(m, "realized_se", np.round(se * drift, 4))
    put(m, "planned_effect", np.round(z * se * rng.uniform(0.8, 1.3, rows), 4))
    put(m, "df", np.where(rng.uniform(size=rows) < 0.5, np.nan, rng.integers(20, 500, rows)))

    # Results for about a third of the rows (normal-scale estimate and its SE).
    has = rng.uniform(size=rows) < 0.35
    obs_se = rng.uniform(0.05, 3, rows)
    obs = obs_se * rng.normal(1.5, 1.2, rows)
    put(has, "observed_effect", np.round(obs, 4))
    put(has, "observed_se", np.round(obs_se, 4))
    # p-values as papers print them: rounded, never below 0.0001.
    put(has, "observed_p", np.maximum(np.round(2 * special.ndtr(-np.abs(obs / obs_se)), 4), 1e-4))
    put(
        has & (rng.uniform(size=rows) < 0.05),
        "reported_power",
        np.round(rng.uniform(0.2, 0.95, rows), 2),
    )
    out["registry"] = rng.choice(["north", "south", "east"], rows)
    # About 1 % invalid cells of several kinds.
    bad = rng.uniform(size=rows) < 0.01
    kinds = rng.integers(0, 4, rows)
    for column in ("alpha", "realized_n1", "target_power", "design"):
        out[column] = out[column].astype(object)
    put(bad & (kinds == 0), "alpha", np.full(rows, "1.5"))
    put(bad & (kinds == 1), "realized_n1", np.full(rows, "n=40"))
    put(bad & (kinds == 2), "target_power", np.full(rows, "80"))
    put(bad & (kinds == 3), "design", np.full(rows, "crossover"))
    return out


def write(frame: pd.DataFrame, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.suffix.lower() == ".xlsx":
        from openpyxl import Workbook

        wb = Workbook(write_only=True)
        ws = wb.create_sheet("studies")
        ws.append(list(frame.columns))
        values = frame.astype(object).where(frame.notna(), None).to_numpy().tolist()
        for row in values:
            ws.append(row)
        wb.save(path)
    else:
        frame.to_csv(path, index=False)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--out", type=Path, required=True, help=".csv or .xlsx")
    args = parser.parse_args()
    write(generate(args.rows, args.seed), args.out)
    print(f"wrote {args.rows} studies to {args.out}")


if __name__ == "__main__":
    main()
