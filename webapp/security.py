"""Sessions, roles, CSRF, request body limits, security headers, audit log and error pages.

* Passwords: werkzeug's salted scrypt hashes (``generate_password_hash``).
* Sessions: Flask-Login; cookies HttpOnly and SameSite=Lax (Secure behind HTTPS).  The session names the
  account and its session generation (:mod:`webapp.accounts`): the user loader refuses a session of an older
  generation, so sign-out, a new password, disabling and "sign out everywhere" end sessions on the server.
* CSRF: Flask-WTF's ``CSRFProtect`` on every POST (forms carry a hidden token, the viewer's fetch calls
  send it in the ``X-CSRFToken`` header).
* Sign-in attempts: throttled per name, client and address (:mod:`webapp.throttle`).
* Request bodies: refused (413) from their declared length before anything reads them; at most
  ``MAX_FORM_BYTES`` except on upload routes for a coordinator (``MAX_CONTENT_LENGTH``); a chunked body is cut
  off at the same limit; each uploaded file is spooled with ``MAX_IMAGE_BYTES`` applied while it arrives (a file
  over it is dropped and refused by name when read, so a batch keeps its other files).
* Every route declares its role with :func:`role_required`; a reader reaching another reader's trial
  or a study they are not enrolled in gets 404, a reader on a coordinator page 403.
* Headers: ``X-Content-Type-Options: nosniff``, ``X-Frame-Options: DENY`` and a Content-Security-Policy with
  no inline script (``script-src 'self'``) on every response.
"""

from __future__ import annotations

import functools
import io
import json
import tempfile

from flask import Request, abort, current_app, g, jsonify, render_template, request
from flask_login import LoginManager, current_user
from flask_wtf.csrf import CSRFError, CSRFProtect
from werkzeug.exceptions import RequestEntityTooLarge
from werkzeug.security import check_password_hash, generate_password_hash

from scorer.errors import LimenError
from webapp.models import db  # scorer/commands/users.py still imports it from here

CSP = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; "
    "object-src 'none'; base-uri 'none'; form-action 'self'; frame-src 'self'; frame-ancestors 'none'"
)
# the stored analysis report (scorer.reports) carries its own inline <style> and SVG: no script at all
REPORT_CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; frame-ancestors 'self'"

csrf = CSRFProtect()


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

        wrapped.limen_roles = roles  # type: ignore[attr-defined]  # a marker the route tests read
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


def upload(view):
    """Mark a view as taking uploads: its requests may reach ``MAX_CONTENT_LENGTH`` (for its own roles only)."""
    view.limen_upload = True
    return view


def _size(n: int) -> str:
    return f"{n / (1024 * 1024):g} MB" if n >= 1024 * 1024 else f"{n / 1024:g} kB"


class _CappedSpool(tempfile.SpooledTemporaryFile):
    """Where the form parser writes one uploaded file: in memory up to 500 kB, then a temporary file.

    The moment the file passes the per-file limit, what it held is dropped and the rest of it is not kept
    (nothing more than the limit is ever held); reading it then raises a one-line LimenError naming the file,
    so a batch upload refuses that file and keeps the others (the request as a whole stays under
    ``MAX_CONTENT_LENGTH``)."""

    def __init__(self, limit: int, label: str):
        super().__init__(max_size=500 * 1024)
        self._limit, self._label, self._n = limit, label, 0
        self.too_large = False

    def write(self, data):
        self._n += len(data)
        if self.too_large:
            return len(data)
        if self._n > self._limit:
            self.too_large = True
            super().seek(0)
            super().truncate()
            return len(data)
        return super().write(data)

    def read(self, *args):
        if self.too_large:
            raise LimenError(f"file is larger than the limit of {_size(self._limit)}", self._label)
        return super().read(*args)


class LimenRequest(Request):
    def _get_file_stream(self, total_content_length, content_type, filename=None, content_length=None):
        from webapp.content_store import safe_label

        return _CappedSpool(current_app.config["MAX_IMAGE_BYTES"], safe_label(filename))


def _limit_body() -> None:
    """Set this request's body limit from its route and user, and refuse a larger declared length at once."""
    chunked = "chunked" in request.headers.get("Transfer-Encoding", "").lower()
    if not chunked and not request.content_length:  # no body (every GET): no need to look at the user
        request.max_content_length = current_app.config["MAX_FORM_BYTES"]
        return
    view = current_app.view_functions.get(request.endpoint or "")
    big = (
        getattr(view, "limen_upload", False)
        and current_user.is_authenticated
        and current_user.role in getattr(view, "limen_roles", ())
    )
    limit = current_app.config["MAX_CONTENT_LENGTH"] if big else current_app.config["MAX_FORM_BYTES"]
    message = f"This request is larger than the {_size(limit)} this page accepts."
    request.max_content_length = limit
    if request.content_length is not None and request.content_length > limit:
        raise RequestEntityTooLarge(message)
    if request.content_length is None and chunked:
        # werkzeug cuts a streamed body off at the limit and hands on what came so far; refuse it instead
        request.environ["wsgi.input"] = _BodyCap(request.environ["wsgi.input"], limit, message)
        request.max_content_length = limit + 1


class _BodyCap(io.RawIOBase):
    """A chunked request body that raises 413 once more than ``limit`` bytes have arrived."""

    def __init__(self, stream, limit: int, message: str):
        self._stream, self._limit, self._message, self._n = stream, limit, message, 0

    def readable(self):
        return True

    def readinto(self, buf):
        data = self._stream.read(len(buf))
        self._n += len(data)
        if self._n > self._limit:
            raise RequestEntityTooLarge(self._message)
        buf[: len(data)] = data
        return len(data)


def init_security(app) -> None:
    from webapp.accounts import parse_session_id
    from webapp.models import User

    app.request_class = LimenRequest
    app.before_request(_limit_body)  # before CSRFProtect's hook, the first to read the body
    csrf.init_app(app)

    login = LoginManager()
    login.login_view = "auth.login"
    login.login_message = "Please sign in."
    login.session_protection = app.config.get("SESSION_PROTECTION", "strong")
    login.init_app(app)
    app.extensions["limen_login"] = login

    @login.user_loader
    def _load(raw):
        ids = parse_session_id(raw)
        if ids is None:
            return None
        user = db().get(User, ids[0])
        if user is None or not user.active or int(user.session_generation or 0) != ids[1]:
            return None  # disabled, or the session was ended (sign-out, new password, sign out everywhere)
        return user

    @login.unauthorized_handler
    def _unauthorized():
        if wants_json() or request.method != "GET":
            return jsonify(error="sign in first"), 401
        from flask import redirect, url_for

        return redirect(url_for("auth.login", next=request.full_path if request.query_string else request.path))

    @app.after_request
    def _headers(resp):
        resp.headers["X-Content-Type-Options"] = "nosniff"
        resp.headers["Content-Security-Policy"] = g.get("csp", CSP)
        resp.headers["X-Frame-Options"] = "SAMEORIGIN" if g.get("csp") == REPORT_CSP else "DENY"
        resp.headers["Referrer-Policy"] = "no-referrer"
        resp.headers.setdefault("Cache-Control", "no-store")
        return resp

    def _page(code, title, message):
        g.refusal_reason = message  # for the audit of refused requests (webapp.activity)
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
        said = exc.description if isinstance(exc, RequestEntityTooLarge) else None
        if not said or said == RequestEntityTooLarge.description:
            said = f"This request is larger than the {_size(request.max_content_length or 0)} this page accepts."
        return _page(413, "Too large", said)

    @app.context_processor
    def _globals():
        from scorer.reports import CAUTION

        return {"CAUTION": CAUTION}
