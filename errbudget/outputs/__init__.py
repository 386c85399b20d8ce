"""Outputs written at the edge: atomic writes, CSV tables, the history of runs and the
JSON Schema of budget.json.
"""
