"""``limen serve``: the reader-study web app under waitress."""

from __future__ import annotations

import os
import sys
from typing import TYPE_CHECKING, Any

import click

if TYPE_CHECKING:
    from flask import Flask
    from waitress.server import BaseWSGIServer, MultiSocketServer


def build_config(
    db_url: str | None,
    instance: str | None,
    import_root: str | None = None,
    secure_cookies: bool = False,
    trusted_proxies: int = 0,
) -> dict[str, Any]:
    config: dict[str, Any] = {}
    if trusted_proxies:
        config["TRUSTED_PROXIES"] = int(trusted_proxies)
    if db_url:
        config["DATABASE_URL"] = db_url
    if instance:
        config["INSTANCE_PATH"] = instance
    if import_root:
        config["IMPORT_ROOT"] = import_root
    if secure_cookies:
        config.update(SESSION_COOKIE_SECURE=True, REMEMBER_COOKIE_SECURE=True)
    return config


def make_server(app: Flask, **kwargs: Any) -> MultiSocketServer | BaseWSGIServer:
    """A waitress server for ``app``.  Waitress receives a whole request body before the app sees it, so its own
    limit is set to the app's largest (``MAX_CONTENT_LENGTH``): a longer declared body is refused with 413 from
    its headers, without reading it, and a chunked one is cut off there."""
    from waitress.server import create_server

    return create_server(app, max_request_body_size=int(app.config["MAX_CONTENT_LENGTH"]) + 1, ident="limen", **kwargs)


def check_listen_address(host: str, port: int) -> None:
    """Refuse, in one line naming the option, an address the server cannot listen on: a host name that does not
    resolve, an address not of this machine, a port in use or not allowed.  Checked by binding (as waitress
    binds: SO_REUSEADDR on POSIX) and closing again, before the app, its database or the demo are made."""
    import errno
    import socket

    from scorer.errors import LimenError

    shown = host if len(host) <= 80 else host[:80] + "…"
    try:
        infos = socket.getaddrinfo(host, port, socket.AF_UNSPEC, socket.SOCK_STREAM, 0, socket.AI_PASSIVE)
    except (OSError, UnicodeError) as exc:
        reason = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
        what = f"{shown!r} is not an address or host name this machine can resolve ({reason})"
        raise LimenError(what, "--host") from None
    for family, kind, proto, _name, addr in infos:
        with socket.socket(family, kind, proto) as sock:
            if os.name == "posix":
                sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            try:
                sock.bind(addr)
            except OSError as exc:
                if exc.errno == errno.EADDRINUSE:
                    raise LimenError(
                        f"{port} is already in use on {addr[0]} (another server running? choose another port)",
                        "--port",
                    ) from None
                if exc.errno == errno.EADDRNOTAVAIL:
                    raise LimenError(f"{shown!r} is not an address of this machine", "--host") from None
                if exc.errno == errno.EACCES:
                    what = f"{port}: not allowed to listen on this port (permission denied)"
                    raise LimenError(what, "--port") from None
                raise LimenError(f"cannot listen on {shown} port {port} ({exc.strerror or exc})", "--host") from None


@click.command("serve")
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on.")
@click.option(
    "--port",
    type=click.IntRange(0, 65535),
    default=8000,
    show_default=True,
    help="TCP port to listen on (0: any free port).",
)
@click.option(
    "--db",
    "db_url",
    default=None,
    help="SQLAlchemy database URL (default: $LIMEN_DATABASE_URL, else SQLite in the instance folder).",
)
@click.option(
    "--instance",
    type=click.Path(file_okay=False),
    default=None,
    help="Instance folder: database, secret key, image store (default: $LIMEN_INSTANCE, else "
    "reader-studies in the user's data folder, e.g. ~/.local/share/limen/reader-studies).",
)
@click.option("--threads", type=click.IntRange(1, 64), default=8, show_default=True, help="Server threads.")
@click.option(
    "--connection-limit",
    type=click.IntRange(10, 10000),
    default=500,
    show_default=True,
    help="Open connections at most (each reader's browser keeps several alive).",
)
@click.option("--demo", is_flag=True, help="Create a demo study on simulated images with invented readers first.")
@click.option(
    "--import-root",
    type=click.Path(file_okay=False, exists=True),
    default=None,
    help="Server folder whose `limen score --out` folders coordinators may import.",
)
@click.option("--secure-cookies", is_flag=True, help="Send cookies over HTTPS only (behind a TLS proxy).")
@click.option(
    "--trusted-proxies",
    type=click.IntRange(0, 5),
    default=0,
    show_default=True,
    help="Reverse proxies in front of the server whose X-Forwarded-For/-Proto headers are believed "
    "(1 for one nginx or Apache in front; 0: the socket's peer is the client).",
)
def serve(
    host: str,
    port: int,
    db_url: str | None,
    instance: str | None,
    threads: int,
    connection_limit: int,
    demo: bool,
    import_root: str | None,
    secure_cookies: bool,
    trusted_proxies: int,
) -> None:
    """Run the reader-study web app (coordinators set up studies, readers read in their browser).

    Results support, and never replace, a qualified medical physicist's judgement.
    """
    from scorer.extras import require

    require("web")
    from webapp import create_app

    check_listen_address(host, port)
    app = create_app(build_config(db_url, instance, import_root, secure_cookies, trusted_proxies))
    click.echo(f"instance: {app.instance_path}", err=True)
    click.echo(f"database: {app.config['DATABASE_URL'].split('@')[-1]}", err=True)
    if demo:
        from webapp.demo import create_demo_study

        click.echo("creating the demo study (simulating and scoring images)…", err=True)
        out = create_demo_study(app)
        click.echo("demo accounts (passwords shown once):")
        for name, pw in out["credentials"].items():
            click.echo(f"  {name:<12} {pw}")
    try:
        server = make_server(app, host=host, port=port, threads=threads, connection_limit=connection_limit)
    except (OSError, ValueError) as exc:  # taken meanwhile (the demo takes a while), or refused by waitress
        from scorer.errors import LimenError

        reason = getattr(exc, "strerror", None) or exc
        raise LimenError(f"cannot listen on {host} port {port} ({reason})", "--port") from None
    # one host and port: a single TcpWSGIServer, which sets effective_host/_port (types-waitress leaves them out)
    where = f"{server.effective_host}:{server.effective_port}"  # type: ignore[union-attr]
    click.echo(f"Limen reader studies on http://{where}/ (Ctrl-C to stop)")

    if demo:
        click.echo("sign in as 'coordinator' to follow the study, or as reader1 to read.")
    sys.stdout.flush()
    try:
        server.run()
    except KeyboardInterrupt:  # pragma: no cover
        pass
