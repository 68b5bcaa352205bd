"""Sign-in, sign-out and the start page (coordinators to their studies, readers to their reading list).

Sign-in matches the typed name by its key (:func:`webapp.accounts.name_key`), is throttled per name, client and
address (:mod:`webapp.throttle`) and audited: ``sign_in``, ``sign_in_failed`` (with the reason, for the
coordinator only) and ``sign_in_throttled``.  Sign-out ends every session of the account.
"""

from __future__ import annotations

import math
from urllib.parse import urlsplit

from flask import Blueprint, flash, make_response, redirect, render_template, request, session, url_for
from flask_login import current_user, login_required, login_user, logout_user
from werkzeug.wrappers import Response as WerkzeugResponse

from webapp import throttle
from webapp.accounts import end_sessions, find_user, name_key, shown_name
from webapp.models import db
from webapp.security import audit, public, verify_password

bp = Blueprint("auth", __name__)

# a fixed hash to compare against when the user name is unknown, so timing does not tell which names exist
_DUMMY_HASH = None


def _dummy_hash() -> str:
    global _DUMMY_HASH
    if _DUMMY_HASH is None:
        from webapp.security import hash_password

        _DUMMY_HASH = hash_password("limen-no-such-user")
    return _DUMMY_HASH


def _safe_next(target: str | None) -> str | None:
    if not target:
        return None
    parts = urlsplit(target)
    if parts.scheme or parts.netloc or not target.startswith("/") or target.startswith("//"):
        return None
    return target


@bp.route("/")
@public
def index():
    if not current_user.is_authenticated:
        return redirect(url_for("auth.login"))
    if current_user.role == "coordinator":
        return redirect(url_for("coordinator.dashboard"))
    return redirect(url_for("reading.home"))


def client_address() -> str:
    """The client's address: the socket's peer, or the address a configured trusted proxy reports
    (``TRUSTED_PROXIES``, werkzeug's ProxyFix); never a header an untrusted client sent."""
    return (request.remote_addr or "unknown")[:64]


def _audit_throttled_once(pair: tuple, verdict) -> None:
    """Audit a refused (throttled) attempt once per pair and wait, so hammering cannot flood the log."""
    from flask import current_app

    seen = current_app.extensions.setdefault("limen_throttle_audited", {})
    mark = verdict.last_failure_at
    if seen.get(pair) == mark:
        return
    if len(seen) > 10000:
        seen.clear()
    seen[pair] = mark
    audit(
        "sign_in_throttled",
        username=shown_name(request.form.get("username") or ""),
        address=client_address(),
        client=pair[1].split(":")[0],
        failures=verdict.failures,
        wait_s=round(verdict.wait_s, 1),
    )


@bp.route("/login", methods=["GET", "POST"])
@public
def login():
    if request.method != "POST":
        return render_template("login.html")
    from flask import current_app

    cfg = current_app.config
    typed = request.form.get("username") or ""
    password = request.form.get("password") or ""
    s = db()
    key = name_key(typed)
    tkey = throttle.throttle_key(key)
    address = client_address()
    device = throttle.devices(request, cfg["SECRET_KEY"]).get(key)
    client = f"dev:{device}" if device else f"addr:{address}"
    policy = throttle.ThrottlePolicy.from_config(cfg)
    at = throttle.now()
    verdict = throttle.check(s, policy, tkey, client, address, at)
    if verdict.wait_s > 0:
        _audit_throttled_once((tkey, client), verdict)
        s.commit()
        wait = math.ceil(verdict.wait_s)
        flash(
            f"Too many failed sign-ins for this account from here: wait {wait} s, then try again "
            "(sign-ins from other computers are not affected).",
            "error",
        )
        resp: WerkzeugResponse = make_response(render_template("login.html"), 429)
        resp.headers["Retry-After"] = str(wait)
        return resp
    user = find_user(s, typed)
    ok = verify_password(user.password_hash if user else _dummy_hash(), password) and user is not None
    if ok and user.active:
        throttle.clear(s, tkey, client)
        audit("sign_in", by=user.id, address=address)
        s.commit()
        session.clear()
        login_user(user)
        resp = redirect(_safe_next(request.args.get("next")) or url_for("auth.index"))
        throttle.remember_device(resp, request, cfg["SECRET_KEY"], key, bool(cfg.get("SESSION_COOKIE_SECURE")))
        return resp
    throttle.record_failure(s, policy, tkey, client, address, at)
    audit(
        "sign_in_failed",
        username=shown_name(typed),
        address=address,
        client=client.split(":")[0],
        reason="unknown name" if user is None else "wrong password" if not ok else "account disabled",
        failures=verdict.failures + 1,
    )
    s.commit()
    flash("Unknown user name or wrong password.", "error")
    return render_template("login.html"), 401


@bp.route("/logout", methods=["POST"])
@login_required
def logout():
    """Sign out: this account's sessions end everywhere (a copied cookie included)."""
    end_sessions(current_user)
    db().commit()
    logout_user()
    session.clear()
    flash("Signed out.", "info")
    return redirect(url_for("auth.index"))


logout.limen_roles = ("coordinator", "reader")
