"""``limen users`` and ``limen serve``: accounts from the command line; the demo server a newcomer starts."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
from pathlib import Path

from click.testing import CliRunner
from helpers import free_port

from scorer.cli import main


def test_users_add_generated_prompted_duplicate_and_list(tmp_path):
    inst = str(tmp_path / "inst")
    r = CliRunner().invoke(main, ["users", "add", "dr.hale", "--role", "coordinator", "--generate", "--instance", inst])
    assert r.exit_code == 0, r.output
    password = re.search(r"password \(shown once\): (\S+)", r.output).group(1)
    r = CliRunner().invoke(
        main,
        ["users", "add", "reader_07", "--role", "reader", "--instance", inst],
        input="correct horse battery\ncorrect horse battery\n",
    )
    assert r.exit_code == 0, r.output
    assert "correct horse" not in r.output  # a prompted password is never echoed
    r = CliRunner().invoke(main, ["users", "add", "reader_07", "--role", "reader", "--generate", "--instance", inst])
    assert r.exit_code == 2 and "error: user name 'reader_07' is taken" in r.output
    r = CliRunner().invoke(main, ["users", "add", "bad name!", "--role", "reader", "--generate", "--instance", inst])
    assert r.exit_code == 2 and r.output.count("\n") == 1
    r = CliRunner().invoke(main, ["users", "add", "x", "--role", "admin", "--generate", "--instance", inst])
    assert r.exit_code == 2
    r = CliRunner().invoke(main, ["users", "list", "--instance", inst])
    assert r.exit_code == 0 and re.search(r"dr\.hale\s+coordinator\s+active", r.output)
    # the accounts work in the app built on the same instance folder
    from webapp_helpers import csrf_from

    from webapp import create_app

    app = create_app({"INSTANCE_PATH": inst})
    c = app.test_client()
    tok = csrf_from(c.get("/login").text)
    assert c.post("/login", data={"username": "dr.hale", "password": password, "csrf_token": tok}).status_code == 302
    tok = csrf_from(c.get("/login").text)
    c2 = app.test_client()
    tok2 = csrf_from(c2.get("/login").text)
    assert (
        c2.post(
            "/login", data={"username": "reader_07", "password": "correct horse battery", "csrf_token": tok2}
        ).status_code
        == 302
    )
    audit = c.get("/coordinator/audit").text
    assert audit.count("add_user") == 2


def test_serve_demo_gives_a_study_a_newcomer_can_read(tmp_path):
    import requests

    port = free_port()
    exe = Path(sys.executable).with_name("limen")
    proc = subprocess.Popen(
        [str(exe), "serve", "--demo", "--port", str(port), "--instance", str(tmp_path / "i")],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    lines = []
    try:
        deadline = time.time() + 180
        while time.time() < deadline:
            line = proc.stdout.readline()
            if not line:
                break
            lines.append(line)
            if "http://127.0.0.1" in line:
                break
        out = "".join(lines)
        assert f"http://127.0.0.1:{port}/" in out, out
        pw = re.search(r"reader1\s+(\S+)", out).group(1)
        s = requests.Session()
        page = s.get(f"http://127.0.0.1:{port}/login", timeout=10).text
        tok = re.search(r'name="csrf_token" value="([^"]+)"', page).group(1)
        r = s.post(
            f"http://127.0.0.1:{port}/login",
            data={"username": "reader1", "password": pw, "csrf_token": tok},
            timeout=10,
        )
        assert r.status_code == 200 and "Demo reader study" in r.text and "Start" in r.text
    finally:
        proc.terminate()
        proc.wait(timeout=20)


def test_users_disable_enable_and_password_reset(tmp_path):
    """A reader who leaves is disabled: no new sign-in, and a session already open ends at its next request
    (common practice for shared clinical systems); enabling restores the account; a reset password replaces the
    old one; every change is in the audit log; an unknown name is one line, exit 2."""
    from webapp_helpers import csrf_from

    from webapp import create_app

    inst = str(tmp_path / "inst")

    def cli(*args, **kw):
        return CliRunner().invoke(main, ["users", *args, "--instance", inst], **kw)

    r = cli("add", "dr.hale", "--role", "coordinator", "--generate")
    coord_pw = re.search(r"password \(shown once\): (\S+)", r.output).group(1)
    r = cli("add", "reader_07", "--role", "reader", "--generate")
    old_pw = re.search(r"password \(shown once\): (\S+)", r.output).group(1)
    app = create_app({"INSTANCE_PATH": inst})

    def sign_in(name, pw):
        c = app.test_client()
        tok = csrf_from(c.get("/login").text)
        return c, c.post("/login", data={"username": name, "password": pw, "csrf_token": tok}).status_code

    reader, code = sign_in("reader_07", old_pw)
    assert code == 302 and reader.get("/reading/").status_code == 200
    r = cli("disable", "reader_07")
    assert r.exit_code == 0 and "disabled reader_07" in r.output
    assert reader.get("/reading/").status_code in (302, 401)  # the open session is over
    assert sign_in("reader_07", old_pw)[1] != 302
    r = cli("list")
    assert re.search(r"reader_07\s+reader\s+disabled", r.output)
    assert cli("enable", "reader_07").exit_code == 0
    assert sign_in("reader_07", old_pw)[1] == 302
    r = cli("password", "reader_07", input="a new long secret\na new long secret\n")
    assert r.exit_code == 0 and "a new long secret" not in r.output
    assert sign_in("reader_07", old_pw)[1] != 302
    assert sign_in("reader_07", "a new long secret")[1] == 302
    r = cli("password", "reader_07", input="short\nshort\n")
    assert r.exit_code == 2 and "at least 10 characters" in r.output
    r = cli("disable", "nobody")
    assert r.exit_code == 2 and r.output.count("\n") == 1 and "no account named 'nobody'" in r.output
    coord, code = sign_in("dr.hale", coord_pw)
    audit = coord.get("/coordinator/audit").text
    assert all(a in audit for a in ("disable_user", "enable_user", "reset_password"))
