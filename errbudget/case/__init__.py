"""Case files: reading the TOML, units, parameters and their distributions, counts files.

Everything is converted once, here, to plain floats in the case's internal units.
"""
