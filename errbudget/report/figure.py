"""One figure of the report as the template shows it (no matplotlib needed to read this)."""

from __future__ import annotations

from dataclasses import dataclass

from markupsafe import Markup


@dataclass(frozen=True)
class Figure:
    """One figure of the report: inline SVG (ours, trusted), alt text and caption."""

    key: str
    title: str
    caption: str
    alt: str
    svg: Markup | None = None
    note: str | None = None


def skipped(key: str, title: str, note: str) -> Figure:
    """A figure left out, with a one-line note in its place."""
    return Figure(key, title, caption="", alt="", note=note)
