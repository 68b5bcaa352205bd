"""Hostile input to `nightly`, its configuration, `baseline set`, `users` and `serve` (issue 24, items A–D).

The rule (helper rules, DESIGN.md "Conventions"): a bad input gives exit status 2 and one line ``error: …`` on
stderr naming the file or option and the problem; never a traceback, never a hang, never silently wrong numbers.
An inbox entry that cannot be used is not a bad input to the run: the valid images are scored (exit 0) and the
entry is said in one ``warning: …`` line naming it, on the first night only. Each case failed on the code before
this file was written (a traceback, a hang, a silent skip or acceptance, or several lines), except where a
comment says it guards a behaviour that was already right.
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import socket
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner
from qc_helpers import D1, night, write_config
from test_hostile_inputs import _error_lines

from scorer.cli import main


def _run(args, **kw):
    return CliRunner().invoke(main, [str(a) for a in args], **kw)


def _limen(args, timeout=300, **kw):
    """``limen`` as its own process (no terminal, its own session): for what may hang or needs a real stdin."""
    return subprocess.run(
        [sys.executable, "-m", "scorer.cli", *map(str, args)],
        capture_output=True,
        text=True,
        timeout=timeout,
        stdin=subprocess.DEVNULL,
        start_new_session=True,
        **kw,
    )


def _one_error(stderr: str, names: str) -> str:
    """The single ``error: …`` line of ``stderr`` (nothing else on it, no traceback), which names ``names``."""
    assert "Traceback" not in stderr, stderr
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    errs = _error_lines(stderr)
    assert len(lines) == 1 and len(errs) == 1 and errs[0].startswith("error: "), stderr
    assert names in errs[0], f"the error does not name {names}: {errs[0]}"
    assert len(errs[0]) < 400, errs[0]
    return errs[0]


def _warnings(stderr: str) -> list[str]:
    assert "Traceback" not in stderr, stderr
    return [ln for ln in stderr.splitlines() if ln.startswith("warning: ")]


# --------------------------------------------------------------------------- A. the nightly inbox
@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """One complete simulated session (4 images of the direct panel, mini plate) and its configuration."""
    root = tmp_path_factory.mktemp("hostile-nightly")
    night(root / "inbox", D1, ["direct"], seed=1)
    return root, write_config(root / "cfg")


@pytest.fixture
def inbox(base, tmp_path):
    box = tmp_path / "inbox"
    shutil.copytree(base[0] / "inbox", box)
    return box


def _nightly_args(inbox, cfg, *extra, db=None):
    db = db or inbox.parent / "nightly.sqlite"
    return ["nightly", "--settle-seconds", "0", "--inbox", inbox, "--config", cfg, "--db", db, "--json", *extra]


def _nightly(inbox, cfg, *extra, db=None):
    res = _run(_nightly_args(inbox, cfg, *extra, db=db))
    assert res.exception is None or isinstance(res.exception, SystemExit), repr(res.exception)
    return res


def _scored_all(stdout: str) -> dict:
    js = json.loads(stdout)
    assert js["sessions_scored"] == 1 and js["scored_images"] == 4, js  # the valid images are scored all the same
    return js


def test_a_symlink_loop_is_skipped_and_said_and_the_night_goes_on(base, inbox):
    (inbox / "loop.dcm").symlink_to("loop.dcm")  # resolving it fails with ELOOP
    res = _nightly(inbox, base[1])
    assert res.exit_code == 0, res.stderr
    _scored_all(res.stdout)
    (w,) = _warnings(res.stderr)
    assert "loop.dcm" in w and "loop" in w.split("loop.dcm", 1)[1]


def test_a_file_name_that_is_not_utf8_does_not_lose_the_night(base, inbox):
    odd = os.fsencode(inbox) + b"/night-\xff\xfe.dcm"  # Latin-1 bytes, not UTF-8
    shutil.copyfile(os.fsencode(next(inbox.rglob("*.dcm"))), odd)
    res = _nightly(inbox, base[1])
    assert res.exit_code == 0, res.stderr
    _scored_all(res.stdout)
    (w,) = _warnings(res.stderr)
    assert "night-\\xff\\xfe.dcm" in w and "UTF-8" in w
    assert os.path.exists(odd)  # left where it is, for a person to rename


def test_a_regular_file_named_quarantine_stops_the_run_before_any_work(base, inbox):
    (inbox / "quarantine").write_text("not a folder\n")
    (inbox / "notes.txt").write_text("not an image: would be quarantined\n")
    res = _nightly(inbox, base[1])
    assert res.exit_code == 2
    _one_error(res.stderr, str(inbox / "quarantine"))
    assert not (inbox.parent / "nightly.sqlite").exists()  # nothing done, not even the database


def _unwritable_folder(tmp_path) -> Path:
    """A folder this process cannot create files in: one without write permission, or (as root, whom permissions
    do not stop) sysfs, which holds no regular files. Skips when neither refuses."""
    ro = tmp_path / "read-only"
    ro.mkdir()
    ro.chmod(0o500)
    for folder in (ro, Path("/sys")):
        try:
            (folder / "probe").touch()
        except OSError:
            return folder
        (folder / "probe").unlink()
    pytest.skip("no unwritable folder on this machine")


def test_an_unwritable_quarantine_folder_stops_the_run_before_any_work(base, inbox, tmp_path):
    q = _unwritable_folder(tmp_path)
    try:
        res = _nightly(inbox, base[1], "--quarantine", q)
    finally:
        (tmp_path / "read-only").chmod(0o700)
    assert res.exit_code == 2
    err = _one_error(res.stderr, "--quarantine")
    assert str(q) in err
    assert not (inbox.parent / "nightly.sqlite").exists()


def test_a_named_pipe_in_the_inbox_is_skipped_without_being_opened(base, inbox):
    os.mkfifo(inbox / "pipe.dcm")  # opening it for reading would wait for a writer for ever
    # a subprocess so that a hang fails the test instead of stopping the suite; the check is on the behaviour
    res = _limen(_nightly_args(inbox, base[1]), timeout=600)
    assert res.returncode == 0, res.stderr
    _scored_all(res.stdout)
    (w,) = _warnings(res.stderr)
    assert "pipe.dcm" in w and "named pipe" in w


def test_dangling_links_and_unreadable_files_are_said_once(base, inbox, monkeypatch):
    _said_once(base, inbox, monkeypatch, None)


def test_said_once_on_postgresql_too(base, inbox, monkeypatch, postgres_url):
    _said_once(base, inbox, monkeypatch, postgres_url)


def _said_once(base, inbox, monkeypatch, db):
    secret = inbox / "secret.dcm"
    shutil.copyfile(next(inbox.rglob("*.dcm")), secret)
    (inbox / "gone.dcm").symlink_to(inbox / "moved-away.dcm")
    secret.chmod(0)
    try:
        secret.open("rb").close()
        root = True  # permissions do not stop root: refuse the read as the kernel would refuse another user
    except PermissionError:
        root = False
    if root:
        real_open = Path.open

        def refusing_open(self, *a, **k):
            if self == secret:
                raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(self))
            return real_open(self, *a, **k)

        monkeypatch.setattr(Path, "open", refusing_open)
    try:
        first = _nightly(inbox, base[1], db=db)
        second = _nightly(inbox, base[1], db=db)
    finally:
        secret.chmod(0o600)
    assert first.exit_code == 0, first.stderr
    _scored_all(first.stdout)
    warned = _warnings(first.stderr)
    assert len(warned) == 2, first.stderr
    assert any("gone.dcm" in w and "moved-away.dcm" in w and "does not exist" in w for w in warned), warned
    assert any("secret.dcm" in w and "Permission denied" in w for w in warned), warned
    assert second.exit_code == 0 and _warnings(second.stderr) == [], second.stderr  # said once, not every night
    js = json.loads(second.stdout)
    assert js["skipped"] == [] and js["skipped_said_before"] == 2
    assert secret.exists() and (inbox / "gone.dcm").is_symlink()  # left in place: they may be fixed


# --------------------------------------------------------------------------- B. configuration values, dates
@pytest.mark.parametrize(
    "key, extra, detector_extra",
    [
        ("human_factor", "", "human_factor = nan"),
        ("expected.kvp", "", "[detectors.expected]\nkvp = nan"),
        ("expected.kvp_tolerance", "", "[detectors.expected]\nkvp_tolerance = nan"),
        ("ewma_lambda", "[alerts]\newma_lambda = nan", ""),
        ("control_sigma", "[alerts]\ncontrol_sigma = nan", ""),
        ("timeout_s", '[smtp]\nhost = "mail.example.org"\nrecipients = ["qc@example.org"]\ntimeout_s = nan', ""),
        ("worse_fraction", "[alerts]\nworse_fraction = -nan", ""),
        ("exposure_uas", "", "[detectors.expected]\nexposure_uas = [0, inf]"),
    ],
)
def test_nan_and_inf_in_the_nightly_configuration_are_refused(tmp_path, key, extra, detector_extra):
    # TOML 1.0 (toml.io, "Float"): nan and inf are valid floats, so the reader must refuse them itself
    cfg = write_config(tmp_path / "cfg", extra=extra, detector_extra=detector_extra)
    (tmp_path / "inbox").mkdir()
    res = _run(_nightly_args(tmp_path / "inbox", cfg))
    assert res.exit_code == 2, res.output
    err = _one_error(res.stderr, "nightly.toml")
    assert key in err


@pytest.mark.parametrize(
    "option, value", [("--from", "2026-13-45"), ("--from", "2026-02-30"), ("--to", "2026-1-5"), ("--to", "tomorrow")]
)
def test_baseline_set_refuses_impossible_dates_as_dates(tmp_path, option, value):
    db = tmp_path / "q.sqlite"
    res = _run(["baseline", "set", "--db", db, "--detector", "HSX-SE-0417", option, value])
    assert res.exit_code == 2
    err = _one_error(res.stderr, option)
    assert "not a date" in err and "YYYY-MM-DD" in err
    assert not db.exists()  # refused before the database is opened


# --------------------------------------------------------------------------- C. users
@pytest.mark.parametrize("command", [["add", "reader02", "--role", "reader"], ["password", "reader01"]])
def test_users_without_a_terminal_give_one_line_and_exit_2(tmp_path, command):
    inst = tmp_path / "inst"
    res = _limen(["users", *command, "--instance", inst], timeout=300)  # no controlling terminal, stdin empty
    assert res.returncode == 2, res.stderr
    _one_error(res.stderr, "--password-stdin")
    assert "GetPassWarning" not in res.stderr and res.stdout == ""


def test_users_password_stdin_reads_one_line(tmp_path):
    from webapp_helpers import csrf_from

    from webapp import create_app

    inst = tmp_path / "inst"
    res = _run(["users", "add", "reader01", "--role", "reader", "--password-stdin", "--instance", inst],
               input="correct horse 42\nsecond line ignored\n")  # fmt: skip
    assert res.exit_code == 0, res.output
    assert "correct horse" not in res.output
    res = _run(["users", "password", "reader01", "--password-stdin", "--instance", inst], input="another secret 7\n")
    assert res.exit_code == 0, res.output
    client = create_app({"INSTANCE_PATH": str(inst)}).test_client()
    tok = csrf_from(client.get("/login").text)
    form = {"username": "reader01", "password": "another secret 7", "csrf_token": tok}
    assert client.post("/login", data=form).status_code == 302
    for args, stdin, names in (
        (["password", "reader01", "--password-stdin"], "", "--password-stdin"),  # nothing on standard input
        (["password", "reader01", "--password-stdin"], "short\n", "password"),  # the length rule still holds
        (["password", "reader01", "--password-stdin", "--generate"], "x\n", "--generate or --password-stdin"),
    ):
        res = _run(["users", *args, "--instance", inst], input=stdin)
        assert res.exit_code == 2
        _one_error(res.stderr, names)


@pytest.mark.parametrize(
    "name, says",
    [
        ("Reader01", "is taken"),  # case only (this one was already refused)
        ("reader0l", "looks like the account 'reader01'"),  # 1 → l
        ("READERO1", "looks like the account 'reader01'"),  # 0 → O, and case
        ("reader0I", "looks like the account 'reader01'"),  # capital I → l
        ("rеader01", "U+0435 CYRILLIC SMALL LETTER IE"),  # Cyrillic е among Latin letters: the character is named
        ("reаder01", "U+0430 CYRILLIC SMALL LETTER A"),
        ("rnary", "looks like the account 'mary'"),  # rn → m
    ],
)
def test_look_alike_account_names_are_refused(tmp_path, name, says):
    inst = tmp_path / "inst"
    for existing in ("reader01", "mary"):
        assert _run(["users", "add", existing, "--role", "reader", "--generate", "--instance", inst]).exit_code == 0
    res = _run(["users", "add", name, "--role", "reader", "--generate", "--instance", inst])
    assert res.exit_code == 2
    err = _one_error(res.stderr, "user name")
    assert says in err


def test_look_alike_key_follows_the_uts39_confusables():
    from webapp.accounts import look_alike_key

    # Unicode Technical Standard #39, confusables.txt (Unicode 16.0): 0030 → 004F, 0031 → 006C, 0049 → 006C,
    # 006D → 0072 006E; "cl"/"d" and "vv"/"w" are not listed as confusable (their skeletons differ)
    assert look_alike_key("x0") == look_alike_key("xO") == look_alike_key("xo")
    assert look_alike_key("x1") == look_alike_key("xl") == look_alike_key("xI")
    assert look_alike_key("mary") == look_alike_key("rnary") == look_alike_key("Mary")
    assert look_alike_key("cl") != look_alike_key("d") and look_alike_key("vv") != look_alike_key("w")
    assert look_alike_key("reader01") != look_alike_key("reader02")


def test_look_alike_names_are_refused_on_the_accounts_page_too(tmp_path):
    from webapp_helpers import accounts_app, login

    app = accounts_app(tmp_path, ("coordinator", "reader1"))
    c = app.test_client()
    tok = login(c, "coordinator")
    r = c.post("/coordinator/accounts/", data={"username": "readerl", "role": "reader", "csrf_token": tok})
    assert r.status_code == 400 and "looks like the account" in r.text and "reader1" in r.text


def test_a_very_long_name_is_never_echoed_whole(tmp_path):
    # guards what was already right for `users add`; `password` and `disable` look the name up
    long = "a" * 100_000
    for args in (["add", long, "--role", "reader", "--generate"], ["password", long, "--generate"], ["disable", long]):
        res = _run(["users", *args, "--instance", tmp_path / "inst"])
        assert res.exit_code == 2
        _one_error(res.stderr, "")


# --------------------------------------------------------------------------- D. serve
def test_serve_on_a_port_in_use_gives_one_line(tmp_path):
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen(1)
        port = taken.getsockname()[1]
        res = _limen(["serve", "--host", "127.0.0.1", "--port", port, "--instance", tmp_path / "inst"], timeout=120)
    assert res.returncode == 2, res.stderr
    err = _one_error(res.stderr, "--port")
    assert str(port) in err and "in use" in err
    assert not (tmp_path / "inst").exists()  # refused before the app (instance folder, database) is made


@pytest.mark.parametrize(
    "host",
    [
        "999.1.1.1",  # no such IPv4 address
        "no-such-host.invalid",  # RFC 6761 sec. 6.4: .invalid never resolves
        "192.0.2.7",  # RFC 5737 TEST-NET-1: documentation only, never an address of this machine
    ],
)
def test_serve_on_an_impossible_host_gives_one_line(tmp_path, host):
    res = _limen(["serve", "--host", host, "--port", "0", "--instance", tmp_path / "inst"], timeout=120)
    assert res.returncode == 2, res.stderr
    err = _one_error(res.stderr, "--host")
    assert host in err
    assert not (tmp_path / "inst").exists()
