"""Growth laws: the built-in laws, checked custom expressions and their evaluators.

Pure mathematics on plain floats; nothing here reads a file or knows a unit.
"""
