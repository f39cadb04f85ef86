"""Study designs: one module per family, all exposing the interface of :class:`Design`.

To add a design, subclass :class:`~audit.designs._base.Design` (or ``TDesign`` for t-test
designs) in a module of its family and add an instance to ``DESIGNS`` below.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from audit.designs._base import Design, NullReasons, Scenario, TestSpec
from audit.designs.cluster import ClusterTwoMeans
from audit.designs.cluster_proportions import ClusterTwoProportions
from audit.designs.correlation import Correlation
from audit.designs.crossover import Crossover
from audit.designs.estimate import Estimate
from audit.designs.means import OneMean, PairedMeans, TwoMeans
from audit.designs.paired_proportions import PairedProportions
from audit.designs.proportions import TwoProportions
from audit.designs.rates import TwoRates
from audit.designs.stepped_wedge import SteppedWedge
from audit.designs.survival import Survival
from audit.designs.variance import KMeans, Regression

__all__ = [
    "DESIGNS",
    "Design",
    "NullReasons",
    "Scenario",
    "TestSpec",
    "design_groups",
    "design_of",
]

#: Every design the ``design`` column may name, by that name.
DESIGNS: dict[str, Design] = {
    d.name: d
    for d in (
        OneMean(),
        PairedMeans(),
        TwoMeans(),
        TwoProportions(),
        Correlation(),
        KMeans(),
        Regression(),
        ClusterTwoMeans(),
        Survival(),
        Estimate(),
        ClusterTwoProportions(),
        TwoRates(),
        Crossover(),
        PairedProportions(),
        SteppedWedge(),
    )
}


def design_groups(
    table: pd.DataFrame, positions: np.ndarray | None = None
) -> list[tuple[Design, np.ndarray]]:
    """``(design, positions)`` for the rows at ``positions`` (all rows when None), one group per
    design and effect measure (:meth:`Design.variants`), in registry order; unknown designs are
    left out. Everything that applies a design's maths to rows goes through this."""
    if positions is None:
        positions = np.arange(len(table))
    names = table["design"].to_numpy(dtype=object)[positions]
    out = []
    for name, design in DESIGNS.items():
        pos = positions[names == name]
        if len(pos):
            for variant, mask in design.variants(table.iloc[pos]):
                out.append((variant, pos[mask]))
    return out


def design_of(table: pd.DataFrame, pos: int) -> Design | None:
    """The design (the variant of its effect measure) of the row at ``pos``; None if unknown."""
    design = DESIGNS.get(table["design"].iat[pos]) if "design" in table.columns else None
    if design is None:
        return None
    parts = design.variants(table.iloc[[pos]])
    # A measure the design does not take (an invalid row): the design as registered.
    return parts[0][0] if parts else design
