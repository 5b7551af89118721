"""The design space: the polytope and its discrete levels, feasibility, sampling, starting designs.

The public names are those in ``__all__``; import them from here
(``from guardband.planner.space import DesignSpace``). The modules behind
them: ``polytope`` (the :class:`DesignSpace` data), ``feasibility``
(emptiness, ranges, centre), ``lp`` (its linear programmes), ``levels``,
``slices``, ``sampler``, ``projection`` and ``designs`` (starting designs).
Each name loads its module on first use.
"""

from guardband.planner.lazy import lazy_names

#: public name -> the module that defines it (loaded on first use)
_NAMES = {
    "DesignSpace": "guardband.planner.space.polytope",
    "SpaceCheck": "guardband.planner.space.feasibility",
    "starting_design": "guardband.planner.space.designs",
    "maximin": "guardband.planner.space.designs",
    "mixture_design": "guardband.planner.space.designs",
    "MixtureDesign": "guardband.planner.space.designs",
    "MixtureKind": "guardband.planner.space.designs",
    "mixture_rows": "guardband.planner.space.designs",
    "simplex_lattice": "guardband.planner.space.designs",
    "simplex_centroid": "guardband.planner.space.designs",
    "pseudo_to_real": "guardband.planner.space.designs",
    "real_to_pseudo": "guardband.planner.space.designs",
}

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

__getattr__, __dir__ = lazy_names(__name__, _NAMES)
