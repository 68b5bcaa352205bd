"""Undo from the browser: reopen a closed study with a reason, delete a draft study or an image of a draft — each
asked for on a confirmation page, audited, refused to readers and to studies readers have seen."""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
from webapp_helpers import accounts_app, demo_app, login, read_all, reader_client


def _dicom(path: Path, seed: int = 0) -> Path:
    from scorer.images import write_dicom

    px = np.random.default_rng(seed).integers(1000, 3000, size=(64, 64)).astype(np.uint16)
    return write_dicom(path, px, (0.085, 0.085))


def _draft(c, tok, name="draft") -> int:
    r = c.post("/coordinator/studies/new", data={"name": name, "layout": "cairn-demo-plate.toml", "csrf_token": tok})
    assert r.status_code == 302, r.text
    return int(r.headers["Location"].rstrip("/").split("/")[-1])


def _upload(c, tok, sid, *paths, detector="panel A"):
    return c.post(
        f"/coordinator/studies/{sid}/images",
        data={
            "csrf_token": tok,
            "detector": detector,
            "images": [(io.BytesIO(Path(p).read_bytes()), Path(p).name) for p in paths],
        },
        content_type="multipart/form-data",
    )


def _store_names(app) -> set[str]:
    return {p.name for p in Path(app.config["STORE_DIR"]).rglob("*") if p.is_file()}


def _audit(app, action):
    from webapp.models import AuditEntry, db

    with app.app_context():
        return [
            (e.user.username if e.user else None, e.study_id, json.loads(e.detail))
            for e in db().query(AuditEntry).filter_by(action=action).order_by(AuditEntry.id)
        ]


def test_reopen_a_closed_study_with_a_reason(tmp_path):
    app, sid = demo_app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    reader, rtok = reader_client(app, sid)
    read_all(reader, sid, rtok, limit=2)
    # only a closed study is reopened
    r = c.post(f"/coordinator/studies/{sid}/reopen", data={"csrf_token": tok, "reason": "early"})
    assert r.status_code == 400 and "only a closed study can be reopened" in r.text and 'id="study-status"' in r.text
    assert c.post(f"/coordinator/studies/{sid}/close", data={"csrf_token": tok}).status_code == 302
    assert reader.get(f"/reading/api/studies/{sid}/next").json["closed"]
    page = c.get(f"/coordinator/studies/{sid}")
    assert 'id="reopen-study"' in page.text
    assert c.get(f"/coordinator/studies/{sid}/reopen").status_code == 200
    # a reason is required, and kept
    r = c.post(f"/coordinator/studies/{sid}/reopen", data={"csrf_token": tok, "reason": "   "})
    assert r.status_code == 400 and "give the reason" in r.text
    reason = "closed by mistake before reader2 had finished"
    r = c.post(f"/coordinator/studies/{sid}/reopen", data={"csrf_token": tok, "reason": reason})
    assert r.status_code == 302
    assert 'id="study-status">open<' in c.get(f"/coordinator/studies/{sid}").text
    ((who, study_id, detail),) = _audit(app, "reopen_study")
    assert who == "coordinator" and study_id == sid and detail["reason"] == reason and detail["closed_at"]
    # the reader continues where they were: the two answers (practice) kept, the next trial follows them
    t = reader.get(f"/reading/api/studies/{sid}/next").json
    assert not t["done"] and t["answered"] + t["practice_answered"] == 2
    assert len(read_all(reader, sid, rtok)) > 0


def test_delete_a_draft_study_after_typing_its_name(tmp_path):
    app = accounts_app(tmp_path, ("coordinator", "reader1"))
    c = app.test_client()
    tok = login(c, "coordinator")
    keep = _draft(c, tok, "keeps a shared image")
    gone = _draft(c, tok, "Pilot — wrong panel")
    shared, own = _dicom(tmp_path / "shared.dcm", 1), _dicom(tmp_path / "own.dcm", 2)
    assert _upload(c, tok, keep, shared).status_code == 302
    assert _upload(c, tok, gone, shared, own).status_code == 302
    before = _store_names(app)
    page = c.get(f"/coordinator/studies/{gone}/delete")
    assert page.status_code == 200 and 'id="confirm_name"' in page.text and "2 image(s)" in page.text
    # no name, or a wrong one: nothing deleted
    assert c.post(f"/coordinator/studies/{gone}/delete", data={"csrf_token": tok}).status_code == 200
    r = c.post(f"/coordinator/studies/{gone}/delete", data={"csrf_token": tok, "confirm_name": "Pilot"})
    assert r.status_code == 400 and "nothing was deleted" in r.text
    assert c.get(f"/coordinator/studies/{gone}").status_code == 200
    r = c.post(f"/coordinator/studies/{gone}/delete", data={"csrf_token": tok, "confirm_name": "Pilot — wrong panel"})
    assert r.status_code == 302
    assert c.get(f"/coordinator/studies/{gone}").status_code == 404
    assert c.get(f"/coordinator/studies/{keep}").status_code == 200
    # the image only the deleted study used is gone from the store; the shared one stays
    after = _store_names(app)
    assert len(before - after) == 1 and after < before
    ((who, study_id, detail),) = _audit(app, "delete_study")
    assert who == "coordinator" and study_id == gone and detail["name"] == "Pilot — wrong panel"
    assert len(detail["images"]) == 2


def test_an_opened_study_cannot_be_deleted_nor_lose_an_image(tmp_path):
    app, sid = demo_app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    from webapp.models import StudyImage, db

    with app.app_context():
        image_id = db().query(StudyImage).filter_by(study_id=sid).first().id
    r = c.post(f"/coordinator/studies/{sid}/delete", data={"csrf_token": tok, "confirm_name": "x"})
    assert r.status_code == 400 and "only before the study is opened" in r.text
    assert c.get(f"/coordinator/studies/{sid}/delete").status_code == 400
    r = c.post(f"/coordinator/studies/{sid}/images/{image_id}/delete", data={"csrf_token": tok, "confirm": "yes"})
    assert r.status_code == 400 and "only before the study is opened" in r.text
    with app.app_context():
        assert db().get(StudyImage, image_id) is not None
    assert not _audit(app, "delete_study") and not _audit(app, "delete_image")


def test_remove_an_image_from_a_draft_after_confirmation(tmp_path):
    app = accounts_app(tmp_path, ("coordinator",))
    c = app.test_client()
    tok = login(c, "coordinator")
    sid = _draft(c, tok)
    assert _upload(c, tok, sid, _dicom(tmp_path / "a.dcm", 1), _dicom(tmp_path / "b.dcm", 2)).status_code == 302
    from webapp.models import StudyImage, db

    with app.app_context():
        ims = {im.label: (im.id, im.stored_name) for im in db().query(StudyImage).filter_by(study_id=sid)}
    image_id, stored = ims["a.dcm"]
    assert f"/images/{image_id}/delete" in c.get(f"/coordinator/studies/{sid}").text
    assert 'id="confirm-delete-image"' in c.get(f"/coordinator/studies/{sid}/images/{image_id}/delete").text
    # a POST that did not come from the confirmation page leads to it and changes nothing
    r = c.post(f"/coordinator/studies/{sid}/images/{image_id}/delete", data={"csrf_token": tok})
    assert r.status_code == 302 and r.headers["Location"].endswith(f"/images/{image_id}/delete")
    assert stored in _store_names(app)
    r = c.post(f"/coordinator/studies/{sid}/images/{image_id}/delete", data={"csrf_token": tok, "confirm": "yes"})
    assert r.status_code == 302
    with app.app_context():
        assert [im.label for im in db().query(StudyImage).filter_by(study_id=sid)] == ["b.dcm"]
    assert stored not in _store_names(app)
    ((who, study_id, detail),) = _audit(app, "delete_image")
    assert who == "coordinator" and study_id == sid and detail["label"] == "a.dcm"
    # an image of another study, through this study's address: not found
    other = _draft(c, tok, "other")
    b_id = ims["b.dcm"][0]
    assert c.get(f"/coordinator/studies/{other}/images/{b_id}/delete").status_code == 404


def test_readers_cannot_undo(tmp_path):
    app, sid = demo_app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    assert c.post(f"/coordinator/studies/{sid}/close", data={"csrf_token": tok}).status_code == 302
    reader = app.test_client()
    rtok = login(reader, "reader1")
    from webapp.models import Study, StudyImage, db

    with app.app_context():
        image_id = db().query(StudyImage).filter_by(study_id=sid).first().id
    for url, form in (
        (f"/coordinator/studies/{sid}/reopen", {"reason": "I want more trials"}),
        (f"/coordinator/studies/{sid}/delete", {"confirm_name": "x"}),
        (f"/coordinator/studies/{sid}/images/{image_id}/delete", {"confirm": "yes"}),
    ):
        assert reader.post(url, data={**form, "csrf_token": rtok}).status_code == 403, url
        assert reader.get(url).status_code == 403, url
    with app.app_context():
        assert db().get(Study, sid).status == "closed"
    assert not _audit(app, "reopen_study")
    refused = _audit(app, "refused")  # the refusals are in the audit log, under the reader's name
    assert refused and {who for who, _, _ in refused} == {"reader1"}
    assert {d["status"] for _, _, d in refused} == {403}
