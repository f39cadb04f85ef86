"""Study designs: one module per family, all exposing the interface of :class:`Design`.

To add a design, subclass :class:`~audit.designs._base.Design` (or ``TDesign`` for t-test
designs) in a module of its family and add an instance to ``DESIGNS`` below.
"""

from __future__ import annotations

from audit.designs._base import Design, NullReasons, Scenario, TestSpec
from audit.designs.cluster import ClusterTwoMeans
from audit.designs.correlation import Correlation
from audit.designs.estimate import Estimate
from audit.designs.means import OneMean, PairedMeans, TwoMeans
from audit.designs.proportions import TwoProportions
from audit.designs.survival import Survival
from audit.designs.variance import KMeans, Regression

__all__ = ["DESIGNS", "Design", "NullReasons", "Scenario", "TestSpec"]

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
    )
}
