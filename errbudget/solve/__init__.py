"""Solving a law with a fixed-step scheme over an ensemble: tableaux, generated compiled
kernels, the stored-trajectory reference path and the quantities read off a solution.
"""
