"""What the app records about a signed-in user's requests beyond the answers: trials handed out, refused requests.

* **Trials shown.** When ``reading.next_trial`` hands a trial to its reader, the first time is kept
  (``trials_shown``): progress tells a reader who stopped mid-trial (shown, unanswered for longer than the stated
  time) from one who never came back.  One insert per trial (a repeat of the same trial — a reload, a retry — is
  skipped in memory and by the primary key), after the reader's answer has gone out.
* **Refused requests.** A signed-in user's request the app refuses (400 bad input or an expired form, 403 wrong
  role, 404 a study or trial not theirs, 405, 409 a closed study, 413, 428 no display check, 429) is audited as
  ``refused`` with the page, the status and the one-line reason; the view's unfinished changes are rolled back
  first.  A second answer to a trial already stored (409 with ``duplicate``) is not a refusal — it is how a retry
  learns its answer arrived.  The same refusal (user, page, status) is written at most once a minute
  (``REFUSAL_AUDIT_EVERY_S``), the next entry counting the ones left out, so a looping page cannot flood the log.

Both hooks swallow database errors (logged): a reader's page never fails because a record could not be written.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import OrderedDict

from flask import current_app, request
from flask_login import current_user
from sqlalchemy.exc import SQLAlchemyError

REFUSED_STATUSES = frozenset({400, 403, 404, 405, 409, 413, 428, 429})
REFUSAL_AUDIT_EVERY_S = 60.0
_log = logging.getLogger("limen")


class _Recent:
    """A bounded map of recently seen keys (per process), so repeats skip the database."""

    def __init__(self, size: int = 20000):
        self._size, self._lock = size, threading.Lock()
        self._d: OrderedDict[object, object] = OrderedDict()

    def get(self, key):
        with self._lock:
            return self._d.get(key)

    def put(self, key, value) -> None:
        with self._lock:
            self._d[key] = value
            self._d.move_to_end(key)
            while len(self._d) > self._size:
                self._d.popitem(last=False)


def record_shown(session, public_id: str, study_id: int, reader_id: int) -> None:
    """Keep the first time the trial was handed out (an existing row is left as it is)."""
    from sqlalchemy import select

    from webapp.models import TrialShown

    if session.execute(select(TrialShown.trial_public_id).where(TrialShown.trial_public_id == public_id)).first():
        return
    session.add(TrialShown(trial_public_id=public_id, study_id=study_id, reader_id=reader_id))
    try:
        session.commit()
    except SQLAlchemyError:  # the same trial recorded at the same moment by another request
        session.rollback()


def _reason(resp) -> str:
    from flask import g

    if g.get("refusal_reason"):
        return str(g.refusal_reason)[:200]
    if resp.is_json:
        data = resp.get_json(silent=True)
        if isinstance(data, dict) and data.get("error"):
            return str(data["error"])[:200]
    return resp.status


def init_activity(app) -> None:
    """Register the two after-request hooks."""
    shown, refusals = _Recent(), _Recent()

    @app.after_request
    def _record(resp):
        if request.endpoint == "static" or not current_user or not current_user.is_authenticated:
            return resp
        try:
            if request.endpoint == "reading.next_trial" and resp.status_code == 200:
                _trial_shown(resp, shown)
            elif resp.status_code in REFUSED_STATUSES:
                _refused(resp, refusals)
        except SQLAlchemyError:
            _log.exception("could not record the request's activity")
            current_app.extensions["limen_db"]().rollback()
        return resp


def _trial_shown(resp, shown: _Recent) -> None:
    data = resp.get_json(silent=True) or {}
    public_id = data.get("trial")
    if not public_id or shown.get(public_id):
        return
    record_shown(
        current_app.extensions["limen_db"](),
        str(public_id),
        int((request.view_args or {})["study_id"]),
        int(current_user.id),
    )
    shown.put(public_id, True)


def _refused(resp, refusals: _Recent) -> None:
    from webapp.models import AuditEntry

    if resp.status_code == 409 and (resp.get_json(silent=True) or {}).get("duplicate"):
        return
    key = (int(current_user.id), request.endpoint, resp.status_code)
    now = time.monotonic()
    last = refusals.get(key)
    if last is not None and now - last[0] < REFUSAL_AUDIT_EVERY_S:
        refusals.put(key, (last[0], last[1] + 1))
        return
    refusals.put(key, (now, 0))
    s = current_app.extensions["limen_db"]()
    s.rollback()  # nothing the refused view left half-done is committed with the entry
    detail = {
        "method": request.method,
        "path": request.path[:200],
        "status": resp.status_code,
        "reason": _reason(resp),
    }
    if last is not None and last[1]:
        detail["repeats_not_logged"] = last[1]
    import json

    study_id = (request.view_args or {}).get("study_id")
    s.add(
        AuditEntry(
            user_id=int(current_user.id),
            action="refused",
            study_id=int(study_id) if study_id is not None else None,
            detail=json.dumps(detail, sort_keys=True),
        )
    )
    s.commit()
