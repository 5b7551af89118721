"""The design space: the polytope and its discrete levels, feasibility, sampling, starting designs.

The public names are those in ``__all__``; import them from here
(``from guardband.planner.space import DesignSpace``). The modules behind
them: ``polytope`` (the :class:`DesignSpace` data), ``feasibility`` (the
cvxpy checks), ``levels``, ``slices``, ``sampler``, ``projection`` and
``designs`` (starting designs).
"""

from guardband.planner.space.designs import (
    MixtureDesign,
    MixtureKind,
    maximin,
    mixture_design,
    mixture_rows,
    pseudo_to_real,
    real_to_pseudo,
    simplex_centroid,
    simplex_lattice,
    starting_design,
)
from guardband.planner.space.feasibility import SpaceCheck
from guardband.planner.space.polytope import DesignSpace

__all__ = [
    "DesignSpace",
    "SpaceCheck",
    "starting_design",
    "maximin",
    "mixture_design",
    "MixtureDesign",
    "MixtureKind",
    "mixture_rows",
    "simplex_lattice",
    "simplex_centroid",
    "pseudo_to_real",
    "real_to_pseudo",
]
