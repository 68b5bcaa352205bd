"""A batch upload with bad files keeps the good ones and lists each refused file with its one-line reason on the
study's page; a refused file leaves nothing in the store; a refused form stays on the study's page."""

from __future__ import annotations

import html
import io
import json
import re
from pathlib import Path

import numpy as np
from webapp_helpers import accounts_app, login

MB = 1024 * 1024


def _dicom(path: Path, seed: int) -> bytes:
    from scorer.images import write_dicom

    px = np.random.default_rng(seed).integers(1000, 3000, size=(64, 64)).astype(np.uint16)
    return write_dicom(path, px, (0.085, 0.085)).read_bytes()


def _setup(tmp_path):
    app = accounts_app(tmp_path, ("coordinator",), MAX_IMAGE_BYTES=1 * MB)
    c = app.test_client()
    tok = login(c, "coordinator")
    r = c.post("/coordinator/studies/new", data={"name": "batch", "layout": "cairn-demo-plate.toml", "csrf_token": tok})
    return app, c, tok, int(r.headers["Location"].rstrip("/").split("/")[-1])


def _post(c, tok, sid, files, **form):
    return c.post(
        f"/coordinator/studies/{sid}/images",
        data={"csrf_token": tok, "detector": "panel A", **form, "images": [(io.BytesIO(b), n) for n, b in files]},
        content_type="multipart/form-data",
    )


def _refused_rows(page: str) -> dict[str, str]:
    table = page.split('id="refused-files"', 1)[1].split("</table>", 1)[0]
    rows = re.findall(r"<tr><td>([^<]*)</td><td>([^<]*)</td></tr>", table)
    return {html.unescape(a): html.unescape(b) for a, b in rows}


def _store(app) -> list[Path]:
    return sorted(p for p in Path(app.config["STORE_DIR"]).rglob("*") if p.is_file())


def test_good_files_of_a_batch_are_kept_and_each_refused_file_is_listed(tmp_path):
    app, c, tok, sid = _setup(tmp_path)
    good_a, good_b = _dicom(tmp_path / "a.dcm", 1), _dicom(tmp_path / "b.dcm", 2)
    files = [
        ("plate-a.dcm", good_a),
        ("tiny.png", b"not an image at all"),  # 19 bytes of text named as a PNG
        ("notes.txt", b"readers: 4"),
        ("empty.tif", b""),
        ("huge.dcm", b"\0" * (2 * MB)),  # over the per-file limit of 1 MB
        ("plate-b.dcm", good_b),
        ("again-a.dcm", good_a),  # the same image twice: skipped, not refused
    ]
    r = _post(c, tok, sid, files)
    assert r.status_code == 200, r.text[:500]
    assert 'id="upload-result"' in r.text and 'id="image-table"' in r.text  # the study's own page
    refused = _refused_rows(r.text)
    assert set(refused) == {"tiny.png", "notes.txt", "empty.tif", "huge.dcm"}
    assert "must be one of" in refused["notes.txt"] and "'.txt'" in refused["notes.txt"]
    assert refused["empty.tif"] == "file is empty"
    assert refused["huge.dcm"] == "file is larger than the limit of 1 MB"
    assert refused["tiny.png"] and all("\n" not in why for why in refused.values())
    assert "2 image(s) added" in r.text and "1 already in the study" in r.text
    # what was accepted is in the study and the store; the refused files left nothing
    from webapp.models import AuditEntry, StudyImage, db

    with app.app_context():
        assert sorted(im.label for im in db().query(StudyImage).filter_by(study_id=sid)) == [
            "plate-a.dcm",
            "plate-b.dcm",
        ]
        entry = db().query(AuditEntry).filter_by(action="add_images").one()
    assert [p.suffix for p in _store(app)] == [".dcm", ".dcm"]
    detail = json.loads(entry.detail)
    assert [a["label"] for a in detail["images"]] == ["plate-a.dcm", "plate-b.dcm"]
    assert {x["label"] for x in detail["refused"]} == set(refused)


def test_a_batch_with_no_good_file_keeps_nothing_and_says_why(tmp_path):
    from scorer.images import ConversionFunction, save_conversion

    app, c, tok, sid = _setup(tmp_path)
    save_conversion(ConversionFunction("linear", 50.0, 20.0), tmp_path / "conversion.toml")
    conv = (io.BytesIO((tmp_path / "conversion.toml").read_bytes()), "conversion.toml")
    r = _post(c, tok, sid, [("x.dcm", b"garbage" * 10), ("y.npy", b"\x93NUMPY broken")], conversion_file=conv)
    assert r.status_code == 400 and set(_refused_rows(r.text)) == {"x.dcm", "y.npy"}
    assert _store(app) == []  # not even the conversion function sent with them


def test_a_refused_form_stays_on_the_study_page(tmp_path):
    app, c, tok, sid = _setup(tmp_path)
    good = _dicom(tmp_path / "a.dcm", 1)
    for form, said in (
        ({"detector": ""}, "detector label"),
        ({"pixel_spacing_mm": "wide"}, "pixel spacing (mm) must be a number"),
    ):
        r = _post(c, tok, sid, [("a.dcm", good)], **form)
        assert r.status_code == 400 and 'id="form-error"' in r.text and said in r.text, (form, r.text[:400])
        assert 'id="upload"' in r.text  # the form is there to try again
    r = c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok})
    assert r.status_code == 400 and "no images yet" in r.text and 'id="form-error"' in r.text
    assert _store(app) == []
