"""Named numerical tolerances and defaults, in one place.

Inner code imports these instead of scattering literals.
"""

from __future__ import annotations

#: Tolerance for "a point lies inside the design space", in factor-scaled
#: units: each factor mapped onto [0, 1] by its declared span (its magnitude
#: when fixed), each rule divided by its largest coefficient there
#: (``DesignSpace.normalise_rows``), so the same study written in mol/L or in
#: nmol/L is judged the same.
FEASIBILITY_TOL = 1e-9
#: Tolerance on a mixture total when reading measured runs (absolute, fraction units).
MIXTURE_SUM_TOL = 2e-3
#: Relative tolerance (times max(1, |upper bound|)) when a measured run's
#: factor value is compared with its bounds and discrete levels.
FACTOR_VALUE_RTOL = 1e-9
#: How far a measured run may break a rule of the protocol's constraints, in
#: the factor-scaled units of FEASIBILITY_TOL, before it is flagged: values
#: typed to five or six digits leave a run on a rule's edge this close to it.
RUN_RULE_TOL = 1e-4
#: A measured run with a planned run's id counts against that plan's promise only
#: when each factor lies within this share of its declared span (or half its
#: resolution, if larger) of the proposal: weighed to a few digits, not made elsewhere.
AS_PROPOSED_RTOL = 0.01
#: A factor whose reachable range is narrower than this share of its declared
#: span (its magnitude when fixed by its bounds) is treated as fixed.
FIXED_RANGE_TOL = 1e-9
#: Initial Cholesky jitter, relative to the mean diagonal of the kernel matrix.
JITTER_START = 1e-10
#: Largest jitter tried before a factorisation is declared failed.
JITTER_MAX = 1e-4
#: Kernel entries (candidates x runs) computed at once when predicting: bounds
#: memory for large pools, and small enough (2 MB) to stay in cache, which
#: measured about twice as fast as 10 MB chunks (W1, 300 runs).
PREDICT_CHUNK_ENTRIES = 2**18
#: Hit-and-run steps discarded before the first kept sample.
HIT_AND_RUN_BURN_IN = 200
#: Hit-and-run steps between kept samples per chain.
HIT_AND_RUN_THIN = 5
#: Number of near misses kept in a decision-log record, at least.
NEAR_MISS_COUNT = 20
#: Normal quantile of a two-sided 95% interval.
Z95 = 1.959963984540054
#: A model whose leave-one-out 95% intervals hold less than this share of
#: its measured values, with at least COVERAGE_MIN_RUNS runs, is reported as
#: looking overconfident (the plan's messages and the report's model checks).
COVERAGE_WARNING = 0.80
COVERAGE_MIN_RUNS = 8

# --------------------------------------------- generated problem family
#: Problems in the generated family by default (planner.simulation.family).
FAMILY_SIZE = 112
#: Starting runs and planned runs suggested for a generated problem.
FAMILY_N_START = 10
FAMILY_BUDGET = 24
#: Share of the design space that meets every limit: a generated problem
#: outside this range is drawn again.
FAMILY_FEASIBLE_SHARE = (0.10, 0.80)
#: Share of the starting region that meets every limit, at least; a campaign
#: starting in the whole space needs this share of the whole space.
FAMILY_START_SHARE = 0.30
#: A starting box around a well-inside point must have this share feasible.
FAMILY_START_BOX_SHARE = 0.70
#: Starting designs (FAMILY_N_START runs) must hold at least this many runs
#: meeting every limit, on average.
FAMILY_START_MIN_FEASIBLE = 2
#: Measurement noise sd as a share of each response's range (1% to 99%
#: quantiles over the design space); 0 is noise-free.
FAMILY_NOISE_SHARES = (0.0, 0.02, 0.05)
#: The limits must cost the objective at least this share of its range
#: (best sampled point against best sampled point meeting every limit).
FAMILY_BIND_MIN = 0.02
#: At the optimum some limit must be this close to its bound (share of the
#: response's range), so that the best feasible region touches a limit.
FAMILY_ACTIVE_TOL = 1e-3
#: Dense sample of locate_optimum for a generated problem, and its polished starts.
FAMILY_OPTIMUM_SAMPLES = 20_000
FAMILY_OPTIMUM_POLISH = 2
#: Smallest signal variance of a limit model, in its standardised units (the
#: runs' root-mean-square distance from the limit): a limit model may not
#: claim that its response varies by less than its runs' distance from the
#: limit. Runs that all read alike (a saturated response) say nothing about
#: how far the response can move once it leaves them.
LIMIT_SIGNAL_VARIANCE_MIN = 1.0

# --------------------------------------------- campaign folders
#: Largest input copy (protocol or runs file) a replay or a summary reads
#: from a campaign folder; a larger file is refused, not read.
CAMPAIGN_FILE_MAX_BYTES = 64 * 2**20
# --------------------------------------------------------------- inputs
#: Largest size of each input file the tool reads, in bytes (larger files are
#: refused before they are read; a protocol is a page of text, a runs file a
#: table of at most some thousands of rows, a log grows one record per step).
MAX_PROTOCOL_BYTES = 1 << 20
MAX_RUNS_FILE_BYTES = 64 << 20
MAX_LOG_BYTES = 512 << 20
#: Deepest nesting of tables and arrays in a protocol, and of parentheses and
#: signs in one rule; anything deeper is refused by name (no protocol needs
#: more than a few levels).
MAX_PROTOCOL_NESTING = 16
MAX_RULE_NESTING = 40
#: Largest magnitude of any number read from an input (protocol setting,
#: rule, runs cell, after any unit conversion). Squares and products of such
#: numbers stay far from the largest double (about 1.8e308); a larger value
#: is refused by name, with advice to state it in another unit.
MAX_INPUT_MAGNITUDE = 1e100
#: Most runs (rows) a planning step takes by default; `plan --max-runs` raises
#: it. The models' fitting time grows with the cube of the number of runs:
#: 1,000 runs took about 30 s on the project's shared 2-core machine.
MAX_RUNS_DEFAULT = 1000
#: Largest workbook sheet read, by its declared dimensions (rows x columns)
#: and by its rows, checked before any cell is loaded.
MAX_SHEET_CELLS = 2_000_000
MAX_SHEET_ROWS = 200_000
#: Runs closer than this (unit-scaled, in every factor) count as repeats of the
#: same factor settings when a model cannot be fitted and the message names them.
REPEATED_RUN_DISTANCE = 1e-6
#: Two measurements at the same settings that differ by more than this many times
#: sqrt(2) stated measurement sds (a chance of 6e-5 for normal errors) contradict
#: the stated ``measurement_sd``, and the plan says so.
REPLICATE_SPREAD_SDS = 4.0
