"""The HTML reports are rendered by Jinja2 templates shipped as package data, with autoescaping on (issue 22).

Escaping rule checked: the HTML 5 specification's character references for text content (WHATWG HTML,
"13.1.4 Character references"; common practice: <, >, & and quotes escaped in text and attribute values).
"""

from __future__ import annotations

import fnmatch
import html
import tomllib
from pathlib import Path

from scorer.reports.html import CAUTION, DOSE_CAUTION, NOT_FOR_DIAGNOSIS, html_page, table_html
from scorer.reports.templating import stylesheet

ROOT = Path(__file__).resolve().parents[1]
TEMPLATES = ROOT / "scorer" / "reports" / "templates"


def test_every_template_file_is_declared_package_data_so_the_wheel_carries_it() -> None:
    data = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]["package-data"]
    # the templates folder is a package of its own (declared in [tool.setuptools] packages, as the web app's are)
    patterns = data.get("scorer.reports.templates", [])
    files = [p.relative_to(TEMPLATES).as_posix() for p in TEMPLATES.rglob("*") if p.is_file()]
    assert {"page.html", "table.html", "report.css"} <= set(files)
    assert all(any(fnmatch.fnmatch(f, pat) for pat in patterns) for f in files), (files, patterns)


def test_page_escapes_text_and_keeps_the_reports_html() -> None:
    page = html_page(
        "Room <3> & 'B'",
        [("Heading <i>", "<p class='x'>kept <b>bold</b></p>")],
        {"note": "<meta>"},
        simulated="Made by <sim> & co",
        dose=True,
    )
    assert "<title>Room &lt;3&gt; &amp; &#39;B&#39;</title>" in page and "<h1>Room &lt;3&gt;" in page
    assert "<h2>Heading &lt;i&gt;</h2>" in page and "<p class='x'>kept <b>bold</b></p>" in page
    assert "Made by &lt;sim&gt; &amp; co" in page and "&lt;meta&gt;" in page
    text = html.unescape(page)
    assert CAUTION in text and NOT_FOR_DIAGNOSIS in text and DOSE_CAUTION in text and "Simulated data." in text
    assert page.count("<style>") == 1 and str(stylesheet()).strip() in page and ".caution{" in page


def test_page_without_simulated_inputs_has_no_banner_but_every_caution() -> None:
    text = html.unescape(html_page("T", [("", "<p>x</p>")]))
    assert "Simulated data." not in text and CAUTION in text and NOT_FOR_DIAGNOSIS in text
    assert DOSE_CAUTION not in text


def test_table_cells_are_escaped_numbers_formatted_and_verdicts_classed() -> None:
    out = table_html(
        [{"name": "<a>", "x": 1.234567, "verdict": "fail", "y": None}, {"name": "b", "x": float("nan")}],
        left=["name"],
    )
    assert '<td class="l">&lt;a&gt;</td>' in out and '<td class="">1.235</td>' in out
    assert '<td class="fail">fail</td>' in out and out.count("—") == 4  # None, NaN, two missing keys
    assert table_html([]) == "<p><em>No rows.</em></p>"
