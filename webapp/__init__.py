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

DEFAULTS = {
    "MAX_CONTENT_LENGTH": 512 * 1024 * 1024,  # one upload request (several images)
    "MAX_IMAGE_BYTES": 128 * 1024 * 1024,  # one image file
    "LOGIN_RATE_LIMIT": "10 per minute",  # failed logins per (address, user name)
    "ANALYSIS_N_BOOT": 400,
    "IMPORT_ROOT": None,  # server folder coordinators may import scored folders from
    "SESSION_COOKIE_HTTPONLY": True,
    "SESSION_COOKIE_SAMESITE": "Lax",
    "SESSION_COOKIE_SECURE": False,  # set True behind HTTPS (limen serve --secure-cookies)
    "REMEMBER_COOKIE_HTTPONLY": True,
    "REMEMBER_COOKIE_SAMESITE": "Lax",
    "WTF_CSRF_TIME_LIMIT": None,  # token valid for the login session
    "SESSION_PROTECTION": "strong",
}


def _secret_key(instance: Path) -> str:
    key = os.environ.get(ENV_SECRET_KEY)
    if key:
        return key
    path = instance / "secret_key"
    if not path.exists():
        path.write_text(secrets.token_hex(32), encoding="ascii")
        path.chmod(0o600)
    return path.read_text(encoding="ascii").strip()


def create_app(config: dict | None = None) -> Flask:
    """Build the web app.

    Parameters
    ----------
    config : dict, optional
        Flask settings plus ``DATABASE_URL`` (SQLAlchemy URL), ``INSTANCE_PATH`` (instance folder),
        ``STORE_DIR`` (content store, default ``<instance>/store``), ``LOGIN_RATE_LIMIT``,
        ``MAX_IMAGE_BYTES``, ``ANALYSIS_N_BOOT``, ``IMPORT_ROOT``.
    """
    config = dict(config or {})
    kwargs = {"instance_relative_config": False}
    if config.get("INSTANCE_PATH"):
        kwargs["instance_path"] = str(Path(config["INSTANCE_PATH"]).resolve())
    app = Flask(__name__, **kwargs)
    instance = Path(app.instance_path)
    instance.mkdir(parents=True, exist_ok=True)
    app.config.update(DEFAULTS)
    app.config.update(config)
    if not app.config.get("SECRET_KEY"):
        app.config["SECRET_KEY"] = _secret_key(instance)
    url = app.config.get("DATABASE_URL") or os.environ.get(ENV_DATABASE_URL) or f"sqlite:///{instance / 'limen.db'}"
    app.config["DATABASE_URL"] = url
    store = Path(app.config.get("STORE_DIR") or instance / "store")
    store.mkdir(parents=True, exist_ok=True)
    app.config["STORE_DIR"] = str(store)

    from webapp import models
    from webapp.security import init_security

    engine = models.make_engine(url)
    models.create_schema(engine)
    session_factory = models.make_session_factory(engine)
    app.extensions["limen_engine"] = engine
    app.extensions["limen_db"] = session_factory

    @app.teardown_appcontext
    def _remove_session(_exc=None):
        session_factory.remove()

    from webapp import analysis, auth, coordinator, reading

    app.register_blueprint(auth.bp)
    app.register_blueprint(coordinator.bp)
    app.register_blueprint(reading.bp)
    app.register_blueprint(analysis.bp)
    init_security(app)
    return app
