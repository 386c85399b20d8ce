"""Resource limits of a run, checked when a case is loaded so that nothing fails mid-run."""

# Steps of the finest refinement level at most, whatever the case: the passes stream (no
# memory per step), so this bounds the work of the nominal ladder, about a second.
MAX_FINEST_STEPS = 2**22
LADDER_HALVINGS = 4  # the ladder halves the case's step at least this often (five levels)
