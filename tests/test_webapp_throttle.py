"""Sign-in throttling: failures slow a guesser down per account and per address, never lock a reader out.

The rules (webapp.throttle) follow the OWASP guidance cited in docs/references.md: throttle the pair of
account and client rather than the account ("Blocking Brute Force Attacks"), and keep browsers that have
signed in before apart with a device cookie ("Slow Down Online Guessing Attacks with Device Cookies").
The throttle's clock is replaced by a test clock, so no test waits.
"""

from __future__ import annotations

import datetime as _dt

import pytest
from webapp_helpers import PASSWORDS, accounts_app, csrf_from

USERS = ("coordinator", "reader1", "reader2", "reader3")


class Clock:
    def __init__(self):
        self.t = _dt.datetime(2026, 12, 1, 9, 0, 0)

    def __call__(self):
        return self.t

    def advance(self, seconds: float) -> None:
        self.t += _dt.timedelta(seconds=seconds)


@pytest.fixture
def clock(monkeypatch):
    c = Clock()
    monkeypatch.setattr("webapp.throttle.now", c)
    return c


class Browser:
    """A browser at a client address, with its own cookies."""

    def __init__(self, app, address, headers=None):
        self.c = app.test_client()
        self.c.environ_base["REMOTE_ADDR"] = address
        self.headers = headers or {}
        self.token = csrf_from(self.c.get("/login", headers=self.headers).text)

    def sign_in(self, name, password=None):
        password = PASSWORDS.get(name, "any-password") if password is None else password
        return self.c.post(
            "/login", data={"username": name, "password": password, "csrf_token": self.token}, headers=self.headers
        )

    def sign_out(self):
        tok = csrf_from(self.c.get("/login").text)
        assert self.c.post("/logout", data={"csrf_token": tok}).status_code == 302
        self.token = csrf_from(self.c.get("/login").text)


def _audit(app, action):
    import json

    from webapp.models import AuditEntry, db

    with app.app_context():
        return [json.loads(e.detail) for e in db().query(AuditEntry).filter_by(action=action).order_by(AuditEntry.id)]


def test_a_guesser_is_slowed_but_the_reader_elsewhere_is_not(tmp_path, clock):
    app = accounts_app(tmp_path, USERS, LOGIN_FREE_FAILURES=3, LOGIN_BASE_DELAY_S=2.0, LOGIN_MAX_DELAY_S=60.0)
    guesser = Browser(app, "203.0.113.9")
    codes = [guesser.sign_in("reader1", "wrong-guess").status_code for _ in range(4)]
    assert codes == [401, 401, 401, 401]  # three free failures, the fourth is checked and sets a wait of 2 s
    r = guesser.sign_in("reader1", "wrong-guess")
    assert r.status_code == 429 and r.headers["Retry-After"] == "2" and "wait 2 s" in r.text
    # inside the wait even the right password is not checked
    assert guesser.sign_in("reader1").status_code == 429
    # the reader at another address signs in at once; so does another account from the guesser's address
    assert Browser(app, "198.51.100.20").sign_in("reader1").status_code == 302
    assert Browser(app, "203.0.113.9").sign_in("reader2").status_code == 302
    # the wait doubles with each further failure, up to the cap
    waits = []
    for _ in range(7):
        clock.advance(3600)
        assert guesser.sign_in("reader1", "wrong-guess").status_code == 401
        waits.append(int(guesser.sign_in("reader1", "wrong-guess").headers["Retry-After"]))
    assert waits == [4, 8, 16, 32, 60, 60, 60]
    # after the wait the right password works and clears the pair
    clock.advance(61)
    assert guesser.sign_in("reader1").status_code == 302
    failed = _audit(app, "sign_in_failed")
    throttled = _audit(app, "sign_in_throttled")
    assert len(failed) == 11 and {f["address"] for f in failed} == {"203.0.113.9"}
    assert {f["reason"] for f in failed} == {"wrong password"} and failed[-1]["failures"] == 11
    # a refused attempt is audited once per wait, however often it is repeated
    assert len(throttled) == 1 + 7 and throttled[0]["wait_s"] == 2.0


def test_many_addresses_guessing_one_account_do_not_lock_it(tmp_path, clock):
    app = accounts_app(tmp_path, USERS, LOGIN_ACCOUNT_ALARM=10)
    for k in range(10):  # a guesser with ten addresses, one failure each (within every pair's free failures)
        assert Browser(app, f"192.0.2.{k}").sign_in("reader1", "wrong").status_code == 401
    # the account is under attack: each address now waits after its own first failure …
    new = Browser(app, "192.0.2.100")
    assert new.sign_in("reader1", "wrong").status_code == 401
    assert new.sign_in("reader1", "wrong").status_code == 429
    # … while a correct password from an address that has not failed still works
    assert Browser(app, "198.51.100.7").sign_in("reader1").status_code == 302


def test_one_address_trying_many_accounts_is_slowed_without_locking_out_its_neighbours(tmp_path, clock):
    """Behind a proxy (or a hospital's NAT) every reader shares the address: a guesser there must not lock
    them out."""
    app = accounts_app(tmp_path, USERS, LOGIN_ADDRESS_ALARM=6)
    proxy = "10.0.0.1"
    regular = Browser(app, proxy)
    assert regular.sign_in("reader1").status_code == 302  # reader1 has signed in from this browser before
    regular.sign_out()
    sprayer = Browser(app, proxy)
    for name in ("reader1", "reader2", "nobody"):
        for _ in range(2):
            assert sprayer.sign_in(name, "Winter2026!").status_code == 401
    # the address is noisy: a further failure on any account now costs a wait at once …
    assert sprayer.sign_in("reader3", "Winter2026!").status_code == 401
    assert sprayer.sign_in("reader3", "Winter2026!").status_code == 429
    # … but readers behind the same address get in: those whose accounts were not tried from here …
    assert Browser(app, proxy).sign_in("coordinator").status_code == 302
    # … and those whose browsers have signed in before, even when the sprayer tried their account
    assert regular.sign_in("reader1").status_code == 302
    # (a new browser for a tried account waits the short time the sprayer's failures set)
    assert Browser(app, proxy).sign_in("reader2").status_code == 429


def test_a_browser_that_signed_in_before_is_not_locked_out_by_a_guesser_at_its_address(tmp_path, clock):
    app = accounts_app(tmp_path, USERS, LOGIN_FREE_FAILURES=2)
    proxy = "10.0.0.1"
    reader = Browser(app, proxy)
    assert reader.sign_in("reader1").status_code == 302  # the browser gets a device cookie for reader1
    reader.sign_out()
    guesser = Browser(app, proxy)
    for _ in range(3):
        guesser.sign_in("reader1", "wrong")
    assert guesser.sign_in("reader1").status_code == 429  # the shared address is throttled for reader1 …
    assert reader.sign_in("reader1").status_code == 302  # … the reader's own browser is not
    # a forged device cookie is no way round the throttle
    forged = Browser(app, proxy)
    forged.c.set_cookie("limen_device", "eyJyZWFkZXIxIjoiMDAwIn0.forged.sig")
    assert forged.sign_in("reader1").status_code == 429


def test_unknown_and_disabled_accounts_fail_the_same_way_and_are_audited(tmp_path, clock):
    app = accounts_app(tmp_path, USERS)
    from webapp.models import User, db

    with app.app_context():
        db().query(User).filter_by(username="reader2").one().active = False
        db().commit()
    b = Browser(app, "198.51.100.1")
    r1, r2 = b.sign_in("nobody"), b.sign_in("reader2")
    assert r1.status_code == r2.status_code == 401 and "Unknown user name or wrong password" in r2.text
    reasons = [(f["username"], f["reason"]) for f in _audit(app, "sign_in_failed")]
    assert reasons == [("nobody", "unknown name"), ("reader2", "account disabled")]
    assert _audit(app, "sign_in") == []


def test_client_addresses_come_from_a_trusted_proxy_only(tmp_path, clock):
    """werkzeug's ProxyFix with the configured number of proxies; without it X-Forwarded-For is ignored, so a
    guesser cannot dodge the throttle by sending a new one with every attempt."""
    app = accounts_app(tmp_path, USERS, LOGIN_FREE_FAILURES=1)
    for k in range(3):
        Browser(app, "10.0.0.1", {"X-Forwarded-For": f"192.0.2.{k}"}).sign_in("reader1", "wrong")
    assert {f["address"] for f in _audit(app, "sign_in_failed")} == {"10.0.0.1"}
    assert Browser(app, "10.0.0.1", {"X-Forwarded-For": "192.0.2.77"}).sign_in("reader1").status_code == 429

    app2 = accounts_app(tmp_path / "behind-proxy", USERS, LOGIN_FREE_FAILURES=1, TRUSTED_PROXIES=1)
    for k in range(3):  # the proxy appends the real client; a value the client sent itself comes before it
        Browser(app2, "10.0.0.1", {"X-Forwarded-For": f"6.6.6.6, 192.0.2.{k}"}).sign_in("reader1", "wrong")
    assert [f["address"] for f in _audit(app2, "sign_in_failed")] == ["192.0.2.0", "192.0.2.1", "192.0.2.2"]
    assert Browser(app2, "10.0.0.1", {"X-Forwarded-For": "192.0.2.77"}).sign_in("reader1").status_code == 302
    assert _audit(app2, "sign_in")[0]["address"] == "192.0.2.77"


def test_the_trusted_proxy_setting_is_checked(tmp_path):
    from click.testing import CliRunner

    from scorer.cli import main
    from scorer.errors import LimenError

    with pytest.raises(LimenError, match="TRUSTED_PROXIES"):
        accounts_app(tmp_path, (), TRUSTED_PROXIES="1")
    r = CliRunner().invoke(main, ["serve", "--trusted-proxies", "9", "--instance", str(tmp_path / "i")])
    assert r.exit_code == 2


def test_throttle_rows_older_than_the_window_are_forgotten(tmp_path, clock):
    app = accounts_app(tmp_path, USERS, LOGIN_FREE_FAILURES=1, LOGIN_FAILURE_WINDOW_S=600.0)
    b = Browser(app, "198.51.100.3")
    b.sign_in("reader1", "wrong")
    b.sign_in("reader1", "wrong")
    assert b.sign_in("reader1").status_code == 429
    clock.advance(601)
    b.sign_in("reader2", "wrong")  # any failure prunes the table
    from webapp.models import SignInFailure, db

    with app.app_context():
        assert [f.name_key for f in db().query(SignInFailure)] == ["reader2"]
    assert b.sign_in("reader1").status_code == 302
