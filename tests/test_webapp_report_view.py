"""The analysis report inside the app follows the app's style (its stylesheet, no style of its own) and stays
self-contained when downloaded."""

from __future__ import annotations

import base64
import re

from webapp_helpers import demo_app, login, read_all, reader_client, wait_job


def test_in_app_report_takes_the_body_and_turns_figures_into_images():
    from webapp.report_view import in_app_report

    svg = '<svg xmlns="http://www.w3.org/2000/svg" width="10" height="10"><path style="fill: #ff0000" d="M0 0"/></svg>'
    page = (
        "<!DOCTYPE html><html><head><title>T</title><style>body{color:red}</style></head><body><h1>Reader study</h1>"
        f"<div class='caution'>C</div><h2>Curves</h2><figure>{svg}<figcaption>cap</figcaption></figure>"
        "<p style='color:red'>text</p><script>alert(1)</script></body></html>"
    )
    out = str(in_app_report(page))
    assert "<style" not in out and "<h1>" not in out and "<title>" not in out and "<script" not in out
    assert "style=" not in out  # no inline style left for the page's CSP to refuse
    assert "<h2>Curves</h2>" in out and "<figcaption>cap</figcaption>" in out and "<p>text</p>" in out
    (data,) = re.findall(r'<img class="figure" alt="[^"]+" src="data:image/svg\+xml;base64,([^"]+)">', out)
    assert base64.b64decode(data).decode() == svg  # the figure itself, its own styles kept inside the image


def test_the_analysis_page_shows_the_report_in_the_app_style_and_offers_it_self_contained(tmp_path):
    app, sid = demo_app(tmp_path, n_practice=0, repeat_fraction=0.0)
    for name in ("reader1", "reader2", "reader3"):
        c, tok = reader_client(app, sid, name)
        read_all(c, sid, tok)
    cc = app.test_client()
    tok = login(cc, "coordinator")
    assert wait_job(cc, cc.post(f"/analysis/studies/{sid}/run", data={"csrf_token": tok}))["state"] == "done"
    r = cc.get(f"/analysis/studies/{sid}")
    page = r.text
    assert "style-src 'self'" in r.headers["Content-Security-Policy"]  # the app's own policy, not the report's
    assert '<link rel="stylesheet" href="/static/limen.css">' in page and "<iframe" not in page
    report = page.split('<article class="report" id="report">')[1].split("</article>")[0]
    assert "<style" not in page and "style=" not in report and "<svg" not in report
    assert "Contrast-detail curves" in report and "Human readers vs model observer" in report
    assert report.count('<img class="figure"') >= 2
    assert "Caution." in report  # the report's own caution stays with it
    css = cc.get("/static/limen.css").text
    assert ".report table" in css and ".report img.figure" in css
    # the download: the stored report, whole, needing nothing from the server
    from webapp.models import AnalysisRun, db

    with app.app_context():
        run = db().query(AnalysisRun).filter_by(study_id=sid).one()
        stored, run_id = run.report_html, run.id
    link = re.search(r'href="([^"]+)" id="report-link" download', page).group(1)
    assert link == f"/analysis/studies/{sid}/report/{run_id}"
    d = cc.get(link)
    assert d.status_code == 200 and d.text == stored
    assert d.headers["Content-Disposition"].startswith('attachment; filename="limen-study-')
    assert "<style>" in d.text and "<svg" in d.text
    assert not re.search(r'(?:href|src)="(?!data:|#)', d.text)  # no link to a stylesheet, script or image elsewhere
