"""budget.html: one self-contained, printable page rendered with Jinja2 (autoescaping on).

The template (``budget.html.j2``) and the stylesheet (``style.css``) sit beside this module;
the stylesheet is inlined into a <style> block, the figures are inline SVG. The page loads
nothing: no script, no font, no image, no stylesheet from anywhere else.
"""

from __future__ import annotations

from functools import cache
from pathlib import Path

import jinja2
from markupsafe import Markup

from errbudget.report import context
from errbudget.report.figure import skipped

HERE = Path(__file__).parent
TEMPLATE = "budget.html.j2"
STYLESHEET = "style.css"


@cache
def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(HERE),
        autoescape=True,  # every user string (title, names, case text, messages) is escaped
        undefined=jinja2.StrictUndefined,  # a typo in the template fails loudly, not blank
        trim_blocks=True,
        lstrip_blocks=True,
    )


def _stylesheet() -> Markup:
    css = (HERE / STYLESHEET).read_text(encoding="utf-8")
    if "</" in css:  # ours, but a closing tag inside would end the <style> block early
        raise ValueError(f"{STYLESHEET} must not contain '</'")
    return Markup(css)


def render_html(budget: dict, series: dict, case_text: str, *, include_figures: bool = True) -> str:
    """The HTML budget of one run.

    Parameters
    ----------
    budget : dict
        budget.json of the run (``Budget.to_dict()``, with ``run.timestamp`` and
        ``since_last`` when the command line set them).
    series : dict
        ``Budget.series``: time series for the forecast figure (may be empty: that figure
        is then replaced by a note).
    case_text : str
        The case file's text, shown escaped in the "How it was made" section.
    include_figures : bool, optional
        False leaves out the matplotlib figures (one note in their place), e.g. for a quick
        preview.

    Returns
    -------
    str
        A complete HTML document.
    """
    page = context.build(budget, case_text)
    if include_figures:
        from errbudget.report import figures  # matplotlib is loaded only to draw figures
        from errbudget.report.rerun import new_counts_figure

        page["figures"] = figures.all_figures(budget, series)
        page["since_figure"] = new_counts_figure(budget, series) if page["new_counts"] else None
    else:
        page["figures"] = [skipped("all", "Figures", "left out of this render")]
        page["since_figure"] = None
    page["css"] = _stylesheet()
    return _environment().get_template(TEMPLATE).render(**page)
