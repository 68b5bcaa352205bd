"""Sessions, roles, CSRF, login rate limit, security headers, audit log and error pages.

* Passwords: werkzeug's salted scrypt hashes (``generate_password_hash``).
* Sessions: Flask-Login; cookies HttpOnly and SameSite=Lax (Secure behind HTTPS).
* CSRF: Flask-WTF's ``CSRFProtect`` on every POST (forms carry a hidden token, the viewer's fetch calls
  send it in the ``X-CSRFToken`` header).
* Login attempts: Flask-Limiter, counting failed logins per (client address, user name).
* Every route declares its role with :func:`role_required`; a reader reaching another reader's trial
  or a study they are not enrolled in gets 404, a reader on a coordinator page 403.
* Headers: ``X-Content-Type-Options: nosniff``, ``X-Frame-Options: DENY`` and a Content-Security-Policy with
  no inline script (``script-src 'self'``) on every response.
"""

from __future__ import annotations

import functools
import json

from flask import abort, current_app, g, jsonify, render_template, request
from flask_limiter import Limiter
from flask_limiter.util import get_remote_address
from flask_login import LoginManager, current_user
from flask_wtf.csrf import CSRFError, CSRFProtect
from werkzeug.security import check_password_hash, generate_password_hash

from scorer.errors import LimenError

CSP = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; "
    "object-src 'none'; base-uri 'none'; form-action 'self'; frame-src 'self'; frame-ancestors 'none'"
)
# the stored analysis report (scorer.reports) carries its own inline <style> and SVG: no script at all
REPORT_CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; frame-ancestors 'self'"

csrf = CSRFProtect()


def db():
    """The request's database session."""
    return current_app.extensions["limen_db"]


def study_or_404(study_id: int):
    """The study with this id, or a 404 page."""
    from webapp.models import Study

    study = db().get(Study, study_id)
    if study is None:
        abort(404)
    return study


def hash_password(password: str) -> str:
    return generate_password_hash(password)


def verify_password(stored_hash: str, password: str) -> bool:
    return check_password_hash(stored_hash, password)


def wants_json() -> bool:
    return "/api/" in request.path or request.path.endswith(".json") or request.is_json


def role_required(*roles):
    """Allow the view to users of ``roles`` only: anonymous → login (401 for API calls), other roles → 403."""

    def deco(view):
        @functools.wraps(view)
        def wrapped(*args, **kwargs):
            if not current_user.is_authenticated:
                return current_app.extensions["limen_login"].unauthorized()
            if current_user.role not in roles:
                abort(403)
            return view(*args, **kwargs)

        wrapped.limen_roles = roles
        return wrapped

    return deco


def public(view):
    """Mark a view as reachable without logging in (the route-matrix test reads the mark)."""
    view.limen_roles = ("anonymous",)
    return view


def audit(action: str, study_id: int | None = None, *, by: int | None = None, **detail) -> None:
    """Record a coordinator action (committed with the caller's transaction); ``by`` names the user when there
    is no signed-in request (a background job acts for the coordinator who started it)."""
    from webapp.models import AuditEntry

    uid = by if by is not None else current_user.id if current_user and current_user.is_authenticated else None
    db().add(
        AuditEntry(
            user_id=uid, action=action, study_id=study_id, detail=json.dumps(detail, default=str, sort_keys=True)
        )
    )


def _login_key() -> str:
    return f"{get_remote_address()}|{(request.form.get('username') or '').strip().lower()}"


def init_security(app) -> None:
    from webapp.models import User

    csrf.init_app(app)

    login = LoginManager()
    login.login_view = "auth.login"
    login.login_message = "Please sign in."
    login.session_protection = app.config.get("SESSION_PROTECTION", "strong")
    login.init_app(app)
    app.extensions["limen_login"] = login

    @login.user_loader
    def _load(uid):
        try:
            user = db().get(User, int(uid))
        except (TypeError, ValueError):
            return None
        return user if user is not None and user.active else None

    @login.unauthorized_handler
    def _unauthorized():
        if wants_json() or request.method != "GET":
            return jsonify(error="sign in first"), 401
        from flask import redirect, url_for

        return redirect(url_for("auth.login", next=request.full_path if request.query_string else request.path))

    # one limiter per app, so apps built side by side (tests) keep separate counts
    limiter = Limiter(
        key_func=get_remote_address, app=app, storage_uri="memory://", enabled=app.config.get("RATELIMIT_ENABLED", True)
    )
    app.extensions["limen_limiter"] = limiter
    view = app.view_functions["auth.login"]
    limited = limiter.limit(
        lambda: app.config["LOGIN_RATE_LIMIT"],
        key_func=_login_key,
        methods=["POST"],
        deduct_when=lambda response: response.status_code != 302,
    )(view)
    limited.limen_roles = getattr(view, "limen_roles", ("anonymous",))
    app.view_functions["auth.login"] = limited

    @app.after_request
    def _headers(resp):
        resp.headers["X-Content-Type-Options"] = "nosniff"
        resp.headers["Content-Security-Policy"] = g.get("csp", CSP)
        resp.headers["X-Frame-Options"] = "SAMEORIGIN" if g.get("csp") == REPORT_CSP else "DENY"
        resp.headers["Referrer-Policy"] = "no-referrer"
        resp.headers.setdefault("Cache-Control", "no-store")
        return resp

    def _page(code, title, message):
        if wants_json():
            return jsonify(error=message), code
        return render_template("error.html", title=title, message=message), code

    @app.errorhandler(CSRFError)
    def _csrf(exc):
        return _page(
            400,
            "Request refused",
            "The form had no valid security token (it may have expired, "
            "or it was sent from another site). Go back, reload the page and try again.",
        )

    @app.errorhandler(LimenError)
    def _limen(exc):
        return _page(400, "Cannot use this input", str(exc))

    @app.errorhandler(403)
    def _forbidden(exc):
        return _page(403, "Not allowed", "Your account's role does not give access to this page.")

    @app.errorhandler(404)
    def _missing(exc):
        return _page(404, "Not found", "There is nothing here for your account.")

    @app.errorhandler(413)
    def _too_large(exc):
        limit = app.config["MAX_CONTENT_LENGTH"] // (1024 * 1024)
        return _page(413, "Upload too large", f"An upload may hold at most {limit} MB in total.")

    @app.errorhandler(429)
    def _too_many(exc):
        return _page(429, "Too many attempts", "Too many failed sign-ins; wait a minute and try again.")

    @app.context_processor
    def _globals():
        from scorer.reports import CAUTION

        return {"CAUTION": CAUTION}
