"""Jinja2 templates of the HTML reports (package data in ``scorer/reports/templates``), autoescaping on.

Text passed to a template is escaped; report fragments built by other templates (or SVG figures from
matplotlib) are passed as :class:`markupsafe.Markup`, which says they are HTML already.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

from jinja2 import Environment, PackageLoader, select_autoescape
from markupsafe import Markup


@lru_cache(maxsize=1)
def environment() -> Environment:
    """The reports' Jinja2 environment: templates from the package, every template autoescaped."""
    return Environment(
        loader=PackageLoader("scorer.reports", "templates"),
        autoescape=select_autoescape(default=True, default_for_string=True),
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render(template: str, **context: Any) -> Markup:
    """``template`` (a file name under ``scorer/reports/templates``) rendered with ``context``, as HTML."""
    return Markup(environment().get_template(template).render(**context))


@lru_cache(maxsize=1)
def stylesheet() -> Markup:
    """The reports' one stylesheet (``templates/report.css``), inlined into every page's ``<style>``."""
    loader = environment().loader
    assert loader is not None
    source, _path, _uptodate = loader.get_source(environment(), "report.css")
    return Markup(source)
