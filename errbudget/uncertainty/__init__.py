"""Parameter uncertainty: the Saltelli design, Sobol indices, observation models and the
fit of parameters to field counts.
"""
