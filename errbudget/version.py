"""The package's version, read from the installed package's metadata (pyproject.toml)."""

from __future__ import annotations

from importlib import metadata


def package_version() -> str:
    """The installed version of errbudget, or "0+unknown" when run from an uninstalled tree."""
    try:
        return metadata.version("errbudget")
    except metadata.PackageNotFoundError:
        return "0+unknown"
