"""Limen reader-study web app: human readers read phantom images in the browser, blinded.

``create_app(config)`` builds the Flask application: blueprints ``auth``, ``coordinator``, ``reading`` and
``analysis``; SQLAlchemy models in :mod:`webapp.models`; data in a SQLite file in the instance folder unless
``DATABASE_URL`` (or the ``LIMEN_DATABASE_URL`` environment variable) names another SQLAlchemy URL. The app
owns no physics and no statistics: images, layouts, model-observer scores and the study statistics all come
from :mod:`scorer`. ``limen serve`` runs it under waitress.
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path

from flask import Flask

ENV_DATABASE_URL = "LIMEN_DATABASE_URL"
ENV_SECRET_KEY = "LIMEN_SECRET_KEY"
ENV_INSTANCE = "LIMEN_INSTANCE"


def default_instance() -> Path:
    """The instance folder when none is given: ``$LIMEN_INSTANCE``, else ``reader-studies`` in the user's data
    folder (platformdirs: ``~/.local/share/limen`` on Linux, ``%LOCALAPPDATA%\\limen`` on Windows,
    ``~/Library/Application Support/limen`` on macOS) — never inside the installed package or a checkout, where
    an upgrade or a ``git clean`` would take the studies with it."""
    env = os.environ.get(ENV_INSTANCE)
    if env:
        return Path(env)
    import platformdirs

    return platformdirs.user_data_path("limen", appauthor=False) / "reader-studies"


DEFAULTS = {
    "MAX_CONTENT_LENGTH": 512 * 1024 * 1024,  # one upload request (several images), coordinators only
    "MAX_IMAGE_BYTES": 128 * 1024 * 1024,  # one uploaded file
    "MAX_FORM_BYTES": 1024 * 1024,  # any other request body (sign-in, forms, a reader's answers)
    "TRUSTED_PROXIES": 0,  # reverse proxies in front whose X-Forwarded-For/-Proto are believed (werkzeug ProxyFix)
    # sign-in throttle (webapp.throttle): free failures per (name, client), then a wait doubling from the base
    "LOGIN_FREE_FAILURES": 5,
    "LOGIN_BASE_DELAY_S": 1.0,
    "LOGIN_MAX_DELAY_S": 900.0,
    "LOGIN_FAILURE_WINDOW_S": 86400.0,
    "LOGIN_ACCOUNT_ALARM": 20,  # failures on one name from all clients: its address pairs lose the free failures
    "LOGIN_ADDRESS_ALARM": 50,  # failures from one address over all names: ditto for that address
    "ANALYSIS_N_BOOT": 400,
    "STALLED_TRIAL_MINUTES": 10.0,  # a trial shown this long without an answer: its reader "stopped mid-trial"
    "IMPORT_ROOT": None,  # server folder coordinators may import scored folders from
    "JOB_WORKERS": 2,  # background jobs (opening a study, analysis, planning) running at once
    "JOB_HEARTBEAT_S": 10.0,  # a running job's server refreshes its heartbeat this often
    "JOB_STALE_S": 60.0,  # a queued/running job without a heartbeat for this long was left by a stopped server
    "SESSION_COOKIE_HTTPONLY": True,
    "SESSION_COOKIE_SAMESITE": "Lax",
    "SESSION_COOKIE_SECURE": False,  # set True behind HTTPS (limen serve --secure-cookies)
    "REMEMBER_COOKIE_HTTPONLY": True,
    "REMEMBER_COOKIE_SAMESITE": "Lax",
    "WTF_CSRF_TIME_LIMIT": None,  # token valid for the login session
    "SESSION_PROTECTION": "strong",
}


MIN_SECRET_KEY_CHARS = 32  # the generated key has 64 hex digits (256 bits); fewer than 32 means a damaged file


def _secret_key(instance: Path) -> str:
    """The session-signing key: ``LIMEN_SECRET_KEY``, else ``<instance>/secret_key``, generated on first start.

    The file is written whole or not at all (owner-readable only from its first byte), so a server killed while
    creating it leaves no key file and the next start makes a new one.  A key file that is present but empty or
    shorter than :data:`MIN_SECRET_KEY_CHARS` (cut short by an older version, or edited by hand) is refused with a
    one-line error rather than used: an empty key would sign every session with nothing secret, and replacing
    the file silently would log every reader out and could split servers that share it.
    """
    from scorer.errors import LimenError
    from scorer.files import atomic_write_text

    key = os.environ.get(ENV_SECRET_KEY)
    if key:
        return key
    path = instance / "secret_key"
    if not path.exists():
        # written whole under a name of this process, then linked into place: link() fails when the file exists,
        # so of two servers starting at once on a new instance folder, one key wins and both use it
        tmp = instance / f".secret_key.{os.getpid()}.part"
        atomic_write_text(tmp, secrets.token_hex(32), mode=0o600)
        try:
            os.link(tmp, path)
        except FileExistsError:
            pass
        finally:
            tmp.unlink(missing_ok=True)
    try:
        key = path.read_text(encoding="ascii").strip()
    except OSError as exc:
        raise LimenError(f"cannot read the secret key file ({exc.strerror or exc})", path) from None
    except UnicodeDecodeError:
        raise LimenError("secret key file is not ASCII text; delete it to have a new key generated", path) from None
    if len(key) < MIN_SECRET_KEY_CHARS:
        what = "is empty" if not key else f"holds only {len(key)} characters (at least {MIN_SECRET_KEY_CHARS} needed)"
        raise LimenError(
            f"secret key file {what}, perhaps cut short by a crash; delete it to have a new key generated "
            f"(readers will have to sign in again) or set {ENV_SECRET_KEY}",
            path,
        )
    return key


#: a temporary file of the atomic writer older than this was left by a killed process (a live write takes seconds)
STALE_TEMPORARY_S = 3600.0


def _remove_stale_temporaries(store: Path) -> int:
    """Remove the temporaries (``.*.part``, ``.*.part.<ext>``) a killed server left in the content store (never
    read; only disk space)."""
    import time

    now, n = time.time(), 0
    for p in store.rglob(".*.part*"):
        try:
            if now - p.stat().st_mtime > STALE_TEMPORARY_S:
                p.unlink()
                n += 1
        except OSError:
            pass
    return n


def create_app(config: dict | None = None) -> Flask:
    """Build the web app.

    Parameters
    ----------
    config : dict, optional
        Flask settings plus ``DATABASE_URL`` (SQLAlchemy URL), ``INSTANCE_PATH`` (instance folder, default
        :func:`default_instance`),
        ``STORE_DIR`` (content store, default ``<instance>/store``), ``MAX_IMAGE_BYTES``, ``MAX_FORM_BYTES``,
        ``TRUSTED_PROXIES``, the ``LOGIN_*`` throttle settings, ``ANALYSIS_N_BOOT``, ``STALLED_TRIAL_MINUTES``,
        ``IMPORT_ROOT``,
        ``JOB_WORKERS``, ``JOB_HEARTBEAT_S``, ``JOB_STALE_S`` (see ``DEFAULTS``).
    """
    config = dict(config or {})
    instance_path = Path(config.get("INSTANCE_PATH") or default_instance()).expanduser().resolve()
    app = Flask(__name__, instance_path=str(instance_path), instance_relative_config=False)
    instance = Path(app.instance_path)
    instance.mkdir(parents=True, exist_ok=True)
    app.config.update(DEFAULTS)
    app.config.update(config)
    proxies = app.config["TRUSTED_PROXIES"]
    if not isinstance(proxies, int) or isinstance(proxies, bool) or not 0 <= proxies <= 5:
        from scorer.errors import LimenError

        raise LimenError(f"TRUSTED_PROXIES must be a whole number from 0 to 5, got {proxies!r}")
    if proxies:  # the client address and scheme as the trusted proxies saw them; headers of anyone else ignored
        from werkzeug.middleware.proxy_fix import ProxyFix

        app.wsgi_app = ProxyFix(app.wsgi_app, x_for=proxies, x_proto=proxies)  # type: ignore[method-assign]  # Flask's documented way
    if not app.config.get("SECRET_KEY"):
        app.config["SECRET_KEY"] = _secret_key(instance)
    url = app.config.get("DATABASE_URL") or os.environ.get(ENV_DATABASE_URL) or f"sqlite:///{instance / 'limen.db'}"
    app.config["DATABASE_URL"] = url
    store = Path(app.config.get("STORE_DIR") or instance / "store")
    store.mkdir(parents=True, exist_ok=True)
    app.config["STORE_DIR"] = str(store)
    _remove_stale_temporaries(store)

    from webapp import models
    from webapp.security import init_security

    engine = models.make_engine(url)
    models.create_schema(engine)
    session_factory = models.make_session_factory(engine)
    app.extensions["limen_engine"] = engine
    app.extensions["limen_db"] = session_factory

    from webapp.jobs import JobRunner, fail_stale_jobs

    runner = JobRunner(
        app,
        workers=app.config["JOB_WORKERS"],
        heartbeat_s=app.config["JOB_HEARTBEAT_S"],
        stale_s=app.config["JOB_STALE_S"],
    )
    app.extensions["limen_jobs"] = runner
    with session_factory() as s:  # jobs a killed server left queued or running
        fail_stale_jobs(s, runner.stale_s)
    session_factory.remove()

    @app.teardown_appcontext
    def _remove_session(_exc=None):
        session_factory.remove()

    @app.after_request
    def _discard_refused_uploads(resp):
        """A failed request leaves none of the files it stored (a batch refused for its third file)."""
        from flask import g

        new = g.pop("limen_new_files", None)
        if new and resp.status_code >= 400:
            from webapp.content_store import discard_unreferenced

            s = session_factory()
            s.rollback()
            discard_unreferenced(s, new)
        return resp

    from webapp import account_pages, activity, analysis, auth, coordinator, corrections, job_pages, reading

    app.register_blueprint(auth.bp)
    app.register_blueprint(coordinator.bp)
    app.register_blueprint(account_pages.bp)
    app.register_blueprint(corrections.bp)
    app.register_blueprint(reading.bp)
    app.register_blueprint(analysis.bp)
    app.register_blueprint(job_pages.bp)
    init_security(app)
    activity.init_activity(app)
    return app
