"""The stored analysis report shown inside the app, in the app's own style.

The report :func:`scorer.reports.study.report_html` writes is a self-contained page (its own ``<style>``, figures as
inline SVG): that is what a coordinator downloads and files.  Inside the app the same report is shown as part of
the analysis page, styled by the app's stylesheet (``limen.css``, rules under ``.report``) — so its body is taken
out of the stored page, its own title and style left behind, and each SVG figure becomes an ``<img>`` whose source
is the SVG itself (a ``data:`` URL).  A figure as an image keeps the inline ``style`` attributes matplotlib writes
while the page keeps its Content-Security-Policy (``style-src 'self'``, which would ignore them in the page), and
the image cannot run anything.  The text of the report is Limen's own (every value escaped when it was written);
no inline script or style attribute survives, and the app page's CSP forbids both anyway.
"""

from __future__ import annotations

import base64
import re

from markupsafe import Markup

_BODY = re.compile(r"<body[^>]*>(.*)</body>", re.S | re.I)
_TITLE = re.compile(r"^\s*<h1>.*?</h1>", re.S)
_SVG = re.compile(r"<svg\b.*?</svg>", re.S)
_STYLE_ATTR = re.compile(r"""\sstyle\s*=\s*("[^"]*"|'[^']*')""", re.I)
_SCRIPT = re.compile(r"<script\b.*?</script\s*>", re.S | re.I)


def _figure(match: re.Match) -> str:
    svg = match.group(0)
    if "xmlns=" not in svg[:400]:  # a standalone SVG image needs its namespace
        svg = svg.replace("<svg", '<svg xmlns="http://www.w3.org/2000/svg"', 1)
    data = base64.b64encode(svg.encode("utf-8")).decode("ascii")
    return f'<img class="figure" alt="figure of the analysis" src="data:image/svg+xml;base64,{data}">'


def in_app_report(report_html: str) -> Markup:
    """The stored report's content for the analysis page: body only, without its title, figures as images."""
    m = _BODY.search(report_html)
    body = m.group(1) if m else report_html
    body = _TITLE.sub("", body, count=1)
    body = _SVG.sub(_figure, body)
    body = _SCRIPT.sub("", body)
    body = _STYLE_ATTR.sub("", body)
    return Markup(body)
