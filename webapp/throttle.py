"""Sign-in throttling: failed sign-ins slow the guesser down without locking a reader out.

Every failed sign-in is charged to a *pair*: the typed name's key (:func:`webapp.accounts.name_key`) and the
*client* — the browser's device cookie for that name if it holds one (a browser that has signed in to that
account before), else the client address (``request.remote_addr``; behind a reverse proxy the real address only
when the proxy is configured as trusted, ``TRUSTED_PROXIES``).  The rules:

* A pair may fail ``free_failures`` times; after that each further failure makes the pair wait
  ``base_delay_s · 2^k`` (k = 0, 1, 2, …, at most ``max_delay_s``) before its next attempt is even checked.
  An attempt inside the wait gets 429 with the time left; its password is not checked, so guessing faster gains
  nothing.  Failures older than ``window_s`` are forgotten; a successful sign-in clears its pair.
* Per account: once a name has failed ``account_alarm`` times in the window from all clients together (a
  guesser using many addresses), every *address* pair of that name loses its free failures — each address
  waits after its own first failure.
* Per address: once an address has failed ``address_alarm`` times over all names (one address trying many
  accounts), every pair of that address loses its free failures.

What this guarantees: **a correct password from a client (address or browser) that has not failed itself is
never refused** — neither rule blocks a pair with no failure, so no one can lock a reader out by failing on
their account, and the per-address rule cannot lock out everyone behind a proxy or a hospital's NAT that shares
one address.  Where a guesser and a reader share the address *and* the account (an unconfigured proxy), the
reader's browser is still let through if it has signed in before: its device cookie makes it a client of its
own (OWASP, "Slow Down Online Guessing Attacks with Device Cookies", see docs/references.md).  What a guesser
gets: ``free_failures`` + about log2(max_delay_s/base_delay_s) guesses per pair, then one per ``max_delay_s``.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import secrets
from dataclasses import dataclass

from sqlalchemy import delete, func, select

DEVICE_COOKIE = "limen_device"
DEVICE_COOKIE_DAYS = 180
DEVICE_COOKIE_NAMES = 20  # accounts remembered per browser (a shared reading-room workstation)


@dataclass(frozen=True)
class ThrottlePolicy:
    """How failed sign-ins are throttled (see the module docstring); the app reads it from its config."""

    free_failures: int = 5
    base_delay_s: float = 1.0
    max_delay_s: float = 900.0
    window_s: float = 86400.0
    account_alarm: int = 20
    address_alarm: int = 50

    @classmethod
    def from_config(cls, config) -> "ThrottlePolicy":
        return cls(
            free_failures=int(config["LOGIN_FREE_FAILURES"]),
            base_delay_s=float(config["LOGIN_BASE_DELAY_S"]),
            max_delay_s=float(config["LOGIN_MAX_DELAY_S"]),
            window_s=float(config["LOGIN_FAILURE_WINDOW_S"]),
            account_alarm=int(config["LOGIN_ACCOUNT_ALARM"]),
            address_alarm=int(config["LOGIN_ADDRESS_ALARM"]),
        )

    def delay_s(self, failures: int, free: int) -> float:
        """The wait after a pair's ``failures``-th failure when ``free`` failures cost nothing."""
        if failures <= free:
            return 0.0
        return min(self.max_delay_s, self.base_delay_s * 2.0 ** (failures - free - 1))


@dataclass(frozen=True)
class Verdict:
    """The throttle's answer before a sign-in is checked."""

    wait_s: float  # > 0: refuse without checking the password
    failures: int  # the pair's failures in the window
    free: int  # failures the pair may make before it waits (0 while the account or address is under attack)
    last_failure_at: _dt.datetime | None


def now() -> _dt.datetime:
    """The throttle's clock (naive UTC, as stored); tests replace it."""
    from webapp.models import utcnow

    return utcnow()


def throttle_key(name_key: str) -> str:
    """The name key as stored: a name no account can have (too long, odd characters) by its hash, so the
    table never holds a 100 000-character string."""
    from webapp.accounts import valid_key

    return name_key if valid_key(name_key) else "#" + hashlib.sha256(name_key.encode()).hexdigest()[:40]


def check(session, policy: ThrottlePolicy, key: str, client: str, address: str, at: _dt.datetime) -> Verdict:
    """May the pair (``key``, ``client``) try now?"""
    from webapp.models import SignInFailure as F

    since = at - _dt.timedelta(seconds=policy.window_s)
    n, last = session.execute(
        select(func.count(F.id), func.max(F.at)).where(F.name_key == key, F.client == client, F.at > since)
    ).one()
    free = policy.free_failures
    if not client.startswith("dev:") and n:
        on_name = session.scalar(select(func.count(F.id)).where(F.name_key == key, F.at > since))
        on_address = session.scalar(select(func.count(F.id)).where(F.address == address, F.at > since))
        if on_name >= policy.account_alarm or on_address >= policy.address_alarm:
            free = 0
    wait = 0.0
    if last is not None:
        wait = max(0.0, (last - at).total_seconds() + policy.delay_s(n, free))
    return Verdict(wait_s=wait, failures=int(n), free=free, last_failure_at=last)


def record_failure(session, policy: ThrottlePolicy, key: str, client: str, address: str, at: _dt.datetime) -> None:
    """Count a failed sign-in (and forget failures older than the window); the caller commits."""
    from webapp.models import SignInFailure as F

    session.execute(delete(F).where(F.at <= at - _dt.timedelta(seconds=policy.window_s)))
    session.add(F(at=at, name_key=key, client=client, address=address[:64]))


def clear(session, key: str, client: str) -> None:
    """A successful sign-in: the pair starts afresh (other clients' failures on the account stay)."""
    from webapp.models import SignInFailure as F

    session.execute(delete(F).where(F.name_key == key, F.client == client))


# --------------------------------------------------------------------------- device cookie
def _serializer(secret_key: str):
    from itsdangerous import URLSafeTimedSerializer

    return URLSafeTimedSerializer(secret_key, salt="limen-device-cookie")


def devices(request, secret_key: str) -> dict[str, str]:
    """The browser's device ids by name key, from its signed device cookie ({} if absent, forged or old)."""
    from itsdangerous import BadSignature

    raw = request.cookies.get(DEVICE_COOKIE)
    if not raw:
        return {}
    try:
        data = _serializer(secret_key).loads(raw, max_age=DEVICE_COOKIE_DAYS * 86400)
    except BadSignature:
        return {}
    return {str(k): str(v) for k, v in data.items()} if isinstance(data, dict) else {}


def remember_device(response, request, secret_key: str, key: str, secure: bool) -> None:
    """After a successful sign-in: give this browser a device id for ``key`` (kept if it has one)."""
    known = devices(request, secret_key)
    device = known.pop(key, None) or secrets.token_hex(12)
    known[key] = device  # most recent last; the oldest names drop out
    kept = dict(list(known.items())[-DEVICE_COOKIE_NAMES:])
    response.set_cookie(
        DEVICE_COOKIE,
        _serializer(secret_key).dumps(kept),
        max_age=DEVICE_COOKIE_DAYS * 86400,
        httponly=True,
        samesite="Lax",
        secure=secure,
    )
