"""Estimates of the numerical error: grid convergence and Richardson extrapolation, the
refinement ladder, round-off, stability limits, artefacts and validation against counts.
"""
