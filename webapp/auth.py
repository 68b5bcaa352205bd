"""Sign-in, sign-out and the start page (coordinators to their studies, readers to their reading list)."""

from __future__ import annotations

from urllib.parse import urlsplit

from flask import Blueprint, flash, redirect, render_template, request, session, url_for
from flask_login import current_user, login_required, login_user, logout_user
from sqlalchemy import func, select

from webapp.models import User
from webapp.security import db, public, verify_password

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


@bp.route("/login", methods=["GET", "POST"])
@public
def login():
    if request.method == "POST":
        name = (request.form.get("username") or "").strip()
        password = request.form.get("password") or ""
        user = db().execute(select(User).where(func.lower(User.username) == name.lower())).scalars().first()
        ok = verify_password(user.password_hash if user else _dummy_hash(), password) and user is not None
        if ok and user.active:
            session.clear()
            login_user(user)
            return redirect(_safe_next(request.args.get("next")) or url_for("auth.index"))
        flash("Unknown user name or wrong password.", "error")
        return render_template("login.html"), 401
    return render_template("login.html")


@bp.route("/logout", methods=["POST"])
@login_required
def logout():
    logout_user()
    session.clear()
    flash("Signed out.", "info")
    return redirect(url_for("auth.index"))


logout.limen_roles = ("coordinator", "reader")
