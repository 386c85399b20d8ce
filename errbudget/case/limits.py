"""Resource limits of a run, checked when a case is loaded or an option is read, before
anything is allocated: each refusal is an exit code 2 naming the key and the limit.

The memory estimate of a run itself (``[budget] memory_limit``) is applied by the run; the
limits here are hard ceilings that keep the loader, the design and the results bounded
whatever a case file or an option says.
"""

# --- files
MAX_CASE_BYTES = 1_000_000  # a case file is a few kilobytes; refuse anything absurd
MAX_COUNTS_BYTES = 20 * 1024 * 1024  # counts are small tables; a larger file is a wrong file
MAX_COUNT_ROWS = 10_000  # data rows of a counts file: daily counts for 27 years

# --- the case
MIN_SAMPLES = 16  # smallest Sobol base sample (see uncertainty.spread.MIN_BASE_SAMPLES)
MAX_QUANTITIES = 50  # [[quantity]] tables per case; each adds a column to every pass
# Steps of the finest refinement level at most, whatever the case: the passes stream (no
# memory per step), so this bounds the work of the nominal ladder, about a second.
MAX_FINEST_STEPS = 2**22
LADDER_HALVINGS = 4  # the ladder halves the case's step at least this often (five levels)
# Parameter sets of the Saltelli design, samples x (groups + 2): 2**20 is 3.2 times the
# 65,536-sample benchmark run of three inputs (327,680 rows, 1.1 GB peak, benchmarks/results.md).
MAX_DESIGN_ROWS = 2**20
# Design rows x quantities, the per-member results kept through the run: measured, 655,360 rows
# x 2 quantities (crayfish pond, --samples 131072) peaked at 2.0 GB; 2**21 is 1.6 times that,
# about 3.2 GB scaled linearly, under the default [budget] memory_limit of 4096 MB.
MAX_DESIGN_CELLS = 2**21

# --- quantity strings ("7 day", "0.06 / day", "mussel / m**2")
MAX_QUANTITY_TEXT = 200  # characters in one quantity or unit string
MAX_UNIT_EXPONENT = 12  # largest |exponent| after **: units need 1 to 3, 10**12 is plenty
MAX_NESTING = 4  # parentheses inside parentheses
MAX_MAGNITUDE = 1e100  # largest |number| in internal units: products of two such stay finite

# --- distributions
# Smallest cumulative probability the Sobol design maps through a distribution: the design is
# clipped to [p, 1 - p] (errbudget.uncertainty.design.UNIT_CLIP); a support bound with less
# probability beyond it than p can never be crossed by a draw.
SMALLEST_DESIGN_PROBABILITY = 1e-12
# A normal on a parameter that must be positive (or not negative) is truncated at zero when it
# puts at least this share of its draws at or below zero (mean < 6.0 sd). Below it the normal
# is kept as written: n draws reach a tail of share p with a chance of about n p (one Sobol
# point per 1/n of (0, 1)), under 1e-3 even for MAX_DESIGN_ROWS draws of one input.
NEGLIGIBLE_TAIL = 1e-9
# A truncation is flagged in budget.json when it removes at least this share of the draws:
# below it the mean and sd move by less than about a thousandth of the sd (common practice,
# no source).
NOTEWORTHY_TAIL = 1e-3


def is_design_size(samples: int) -> bool:
    """Whether ``samples`` can be the base size of a Sobol design (a power of two >= 16)."""
    return samples >= MIN_SAMPLES and not samples & (samples - 1)
