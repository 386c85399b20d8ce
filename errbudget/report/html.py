"""Minimal HTML rendering (to be extended): Jinja2 with autoescaping."""

from __future__ import annotations

import jinja2

_TEMPLATE = """<!doctype html><html lang="en"><head><meta charset="utf-8">
<title>Error budget: {{ b.case.title }}</title></head><body>
<h1>{{ b.case.title }}</h1><p>{{ b.verdict.reason }}</p>
<pre>{{ case_text }}</pre></body></html>"""


def render_html(budget: dict, series: dict, case_text: str) -> str:
    env = jinja2.Environment(autoescape=True)
    return env.from_string(_TEMPLATE).render(b=budget, case_text=case_text)
