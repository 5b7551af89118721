"""The design space: the polytope and its discrete levels, feasibility, sampling, starting designs."""
