"""Resource limits of a run, checked when a case is loaded so that nothing fails mid-run."""

MAX_FINEST_STEPS = 2**19  # steps of the finest refinement level at most, whatever the case
