"""The claim protocol of the nightly database: claim a session, find stale claims, take over, renew, release.

A session is claimed in one transaction: a session row is inserted with a random claim token,
and its images are bound to it by compare-and-set (``UPDATE … WHERE session_id IS NULL``); unless
every image was still free the transaction is rolled back.  A claim whose holder died (same
host, process gone) or whose lease has run out is taken over by the next run, again by
compare-and-set on the token.  See :mod:`scorer.qc.store` for the whole story.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import uuid

from sqlalchemy import delete, select, update

from scorer.qc.tables import ImageRow, QuarantineRow, SessionRow, image_dict, utcnow

DEFAULT_LEASE_S = 1800.0


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class ClaimTaken(Exception):
    """A claim lost to another run (rolls its transaction back)."""


class ClaimOps:
    """Store operations of the claim protocol; each method is one transaction (mixed into :class:`Store`)."""

    def claim(self, group_key: str, images: list[dict], lease_s: float = DEFAULT_LEASE_S):
        """Claim a new session of ``images``; returns (session_id, token), or None when any was taken."""
        try:
            return self._claim(group_key, images, lease_s)
        except ClaimTaken:
            return None

    def _claim(self, group_key, images, lease_s):
        token = uuid.uuid4().hex
        first = images[0]
        now = utcnow()
        with self.transaction() as s:
            row = SessionRow(
                detector=first["detector"],
                session_date=first["session_date"],
                group_key=group_key,
                state="claimed",
                claim_token=token,
                claim_host=self.host,
                claim_pid=self.pid,
                claim_expires=now + _dt.timedelta(seconds=lease_s),
                claimed_at=now,
                n_images=len(images),
                kvp=first["kvp"],
                anode=first["anode"],
                filter=first["filter"],
                flags=json.dumps(sorted({f for im in images for f in im["flags"]})),
            )
            s.add(row)
            s.flush()
            res = s.execute(
                update(ImageRow)
                .where(ImageRow.id.in_([im["id"] for im in images]), ImageRow.session_id.is_(None))
                .values(session_id=row.id)
            )
            if res.rowcount != len(images):
                raise ClaimTaken()  # another run bound one of them first: roll the whole claim back
            return row.id, token

    def stale_claims(self) -> list[tuple[int, str]]:
        """(session_id, token) of claims whose holder is gone: lease run out, or same host and process dead."""
        now = utcnow()
        with self.transaction() as s:
            rows = s.execute(
                select(
                    SessionRow.id,
                    SessionRow.claim_token,
                    SessionRow.claim_host,
                    SessionRow.claim_pid,
                    SessionRow.claim_expires,
                ).where(SessionRow.state == "claimed")
            ).all()
        out = []
        for sid, token, host, pid, expires in rows:
            mine = host == self.host and pid == self.pid
            dead = host == self.host and pid is not None and not _pid_alive(pid)
            if not mine and (dead or (expires is not None and expires < now)):
                out.append((sid, token))
        return out

    def take_over(self, session_id: int, old_token: str, lease_s: float = DEFAULT_LEASE_S) -> str | None:
        """Take over a stale claim (compare-and-set on its token); the new token, or None if another run did."""
        token = uuid.uuid4().hex
        with self.transaction() as s:
            res = s.execute(
                update(SessionRow)
                .where(SessionRow.id == session_id, SessionRow.state == "claimed", SessionRow.claim_token == old_token)
                .values(
                    claim_token=token,
                    claim_host=self.host,
                    claim_pid=self.pid,
                    claim_expires=utcnow() + _dt.timedelta(seconds=lease_s),
                )
            )
            return token if res.rowcount == 1 else None

    def renew(self, claims: dict, lease_s: float = DEFAULT_LEASE_S) -> None:
        """Extend the leases of this run's claims (session_id → token)."""
        if not claims:
            return
        with self.transaction() as s:
            for sid, token in claims.items():
                s.execute(
                    update(SessionRow)
                    .where(SessionRow.id == sid, SessionRow.claim_token == token)
                    .values(claim_expires=utcnow() + _dt.timedelta(seconds=lease_s))
                )

    def session_images(self, session_id: int) -> list[dict]:
        with self.transaction() as s:
            return [
                image_dict(r)
                for r in s.scalars(select(ImageRow).where(ImageRow.session_id == session_id).order_by(ImageRow.id))
            ]

    def release(
        self,
        session_id: int,
        token: str,
        drop_sha: str | None = None,
        drop_path: str | None = None,
        reason: str | None = None,
    ) -> bool:
        """Give a claimed session up: its images become free again.

        With ``drop_sha`` that image leaves the database and its quarantine is recorded (reason)
        in the same transaction, so the next scan quarantines the file even if this run dies first.
        """
        with self.transaction() as s:
            row = s.get(SessionRow, session_id, with_for_update=not self.is_sqlite)
            if row is None or row.state != "claimed" or row.claim_token != token:
                return False
            s.execute(update(ImageRow).where(ImageRow.session_id == session_id).values(session_id=None))
            if drop_sha:
                s.execute(delete(ImageRow).where(ImageRow.sha256 == drop_sha))
                s.add(
                    QuarantineRow(
                        sha256=drop_sha, original_path=str(drop_path), moved_to=None, reason=reason or "", at=utcnow()
                    )
                )
            s.delete(row)
            return True
