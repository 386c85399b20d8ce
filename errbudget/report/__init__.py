"""The HTML budget (budget.html): self-contained, printable, every user string escaped."""

from errbudget.report.html import render_html

__all__ = ["render_html"]
