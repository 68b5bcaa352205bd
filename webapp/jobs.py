"""Background jobs: the long operations (opening a study, an analysis, a planning run) run outside the request.

The app owns one :class:`JobRunner` (``app.extensions["limen_jobs"]``): a bounded thread pool. Every job is a
row of the ``jobs`` table (:class:`webapp.models.Job`), so every server thread and a page reload see the same
state. A job's work runs in its own app context and database session and is committed together with the job's
"done" state (all or nothing); a failure stores a one-line message and rolls the work back.

Progress is written by short separate transactions. On SQLite a progress write waits at most
:data:`PROGRESS_WAIT_MS` for the database's single write lock and is skipped when the job itself holds it (its
final writes): progress is advisory, the end state is not.

While a job is queued or running its server refreshes ``heartbeat_at`` every ``JOB_HEARTBEAT_S`` seconds. A
queued or running job whose heartbeat is older than ``JOB_STALE_S`` was left by a server that stopped: it is
marked failed at start-up, when its page is viewed, and before a new job is started.
"""

from __future__ import annotations

import datetime as _dt
import logging
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

from sqlalchemy import select, update
from sqlalchemy.exc import IntegrityError, OperationalError

from scorer.errors import LimenError

log = logging.getLogger(__name__)

PROGRESS_WAIT_MS = 250  # a progress write never holds a job up longer than this
STOPPED_SERVER = "the server stopped before this job finished; start the operation again"


@dataclass
class JobResult:
    """What a job's work gives back: a reference to its result, a one-line summary, or a JSON document."""

    ref: str | None = None
    message: str = "done"
    json: str | None = None


#: work(session, job, progress) → JobResult; progress(text, fraction=None) with fraction in [0, 1]
Work = Callable[..., JobResult]


def one_line(exc: BaseException) -> str:
    """The error as one line: a :class:`LimenError`'s own message, else the exception's type and first line."""
    text = str(exc).strip()
    if not isinstance(exc, LimenError):
        text = f"{type(exc).__name__}: {text}" if text else type(exc).__name__
    line = text.splitlines()[0] if text else "failed"
    return line[:497] + "…" if len(line) > 498 else line


def _now() -> _dt.datetime:
    from webapp.models import utcnow

    return utcnow()


def fail_stale_jobs(session, stale_s: float, live_ids=()) -> int:
    """Mark failed the queued or running jobs whose heartbeat stopped more than ``stale_s`` seconds ago
    (their server was killed), except ``live_ids``; commit; return how many."""
    from webapp.models import Job

    now = _now()
    cutoff = now - _dt.timedelta(seconds=stale_s)
    q = (
        update(Job)
        .where(Job.state.in_(("queued", "running")))
        .where((Job.heartbeat_at.is_(None)) | (Job.heartbeat_at < cutoff))
    )
    if live_ids:
        q = q.where(Job.id.not_in(list(live_ids)))
    n = session.execute(
        q.values(state="failed", error=STOPPED_SERVER, active_key=None, finished_at=now).execution_options(
            synchronize_session=False
        )
    ).rowcount
    session.commit()
    return int(n or 0)


class JobRunner:
    """A bounded thread pool running :class:`webapp.models.Job` rows for one app.

    Parameters
    ----------
    app : Flask
        The app whose context and database the jobs use.
    workers : int
        Jobs run at once (the others wait, state "queued").
    heartbeat_s, stale_s : float
        How often a live job's heartbeat is refreshed, and after how long without one a job counts as left
        by a stopped server.
    """

    def __init__(self, app, workers: int = 2, heartbeat_s: float = 10.0, stale_s: float = 60.0):
        self.app = app
        self.workers = max(1, int(workers))
        self.heartbeat_s = float(heartbeat_s)
        self.stale_s = float(stale_s)
        self._executor: ThreadPoolExecutor | None = None
        self._lock = threading.Lock()
        self._live: set[int] = set()
        self._beat: threading.Thread | None = None
        self._wake = threading.Event()

    # ------------------------------------------------------------------ starting
    def start(self, session, kind: str, key: str, user_id: int, work: Work, study_id: int | None = None, params=None):
        """Queue ``work`` as a new job, unless the operation ``key`` already has a queued or running job:
        then return that one. Returns ``(job, started)``; commits ``session``."""
        import json

        from webapp.models import Job

        with self._lock:
            fail_stale_jobs(session, self.stale_s, sorted(self._live))
            running = session.execute(select(Job).where(Job.active_key == key)).scalars().first()
            if running is not None:
                return running, False
            now = _now()
            job = Job(
                kind=kind,
                study_id=study_id,
                created_by=user_id,
                state="queued",
                active_key=key,
                params_json=json.dumps(params or {}, sort_keys=True),
                created_at=now,
                heartbeat_at=now,
            )
            session.add(job)
            try:
                session.commit()
            except IntegrityError:  # another server started the same operation a moment ago
                session.rollback()
                return session.execute(select(Job).where(Job.active_key == key)).scalars().one(), False
            self._live.add(job.id)
            if self._executor is None:
                self._executor = ThreadPoolExecutor(max_workers=self.workers, thread_name_prefix="limen-job")
            self._executor.submit(self._run, job.id, work)
            self._ensure_heartbeat()
        return job, True

    def is_live(self, job_id: int) -> bool:
        return job_id in self._live

    def live_ids(self) -> list[int]:
        """The jobs this server has queued or running."""
        with self._lock:
            return sorted(self._live)

    # ------------------------------------------------------------------ running
    def _run(self, job_id: int, work: Work) -> None:
        from webapp.models import Job, db

        try:
            with self.app.app_context():
                s = db()

                def row() -> Job:
                    j = s.get(Job, job_id)
                    if j is None:  # deleted under the runner: nothing to record it in (logged below)
                        raise LimenError(f"job {job_id} is no longer in the database")
                    return j

                job = row()
                job.state, job.started_at, job.heartbeat_at = "running", _now(), _now()
                job.progress_text, job.progress_fraction = "starting", 0.0
                s.commit()
                try:
                    result = work(s, job, lambda text, fraction=None: self.progress(job_id, text, fraction))
                    job = row()
                    job.state, job.active_key, job.finished_at = "done", None, _now()
                    job.progress_text, job.progress_fraction = result.message[:300], 1.0
                    job.result_ref, job.result_json = result.ref, result.json
                    s.commit()
                except Exception as exc:  # any failure ends the job with one line; the work is rolled back
                    s.rollback()
                    if not isinstance(exc, LimenError):
                        log.exception("job %s failed", job_id)
                    job = row()
                    job.state, job.active_key, job.finished_at = "failed", None, _now()
                    job.error = one_line(exc)
                    s.commit()
        except Exception:  # the database itself failed: the stale-job sweep will end the row
            log.exception("job %s could not record its end", job_id)
        finally:
            with self._lock:
                self._live.discard(job_id)

    def progress(self, job_id: int, text: str, fraction: float | None = None) -> None:
        """Record a job's progress in a short transaction of its own (skipped if the database stays busy)."""
        from webapp.models import Job

        values = {"progress_text": str(text).splitlines()[0][:300] if text else "", "heartbeat_at": _now()}
        if fraction is not None:
            values["progress_fraction"] = min(max(float(fraction), 0.0), 1.0)
        self._write(update(Job).where(Job.id == job_id, Job.state == "running").values(**values))

    def _write(self, statement) -> bool:
        engine = self.app.extensions["limen_engine"]
        try:
            with engine.connect() as conn:
                sqlite = conn.dialect.name == "sqlite"
                if sqlite:
                    conn.exec_driver_sql(f"PRAGMA busy_timeout={PROGRESS_WAIT_MS}")
                try:
                    conn.execute(statement)
                    conn.commit()
                finally:
                    if sqlite:
                        conn.exec_driver_sql("PRAGMA busy_timeout=30000")
            return True
        except OperationalError:
            return False

    # ------------------------------------------------------------------ heartbeat
    def _ensure_heartbeat(self) -> None:
        if self._beat is None or not self._beat.is_alive():
            self._beat = threading.Thread(target=self._heartbeat, name="limen-job-heartbeat", daemon=True)
            self._beat.start()

    def _heartbeat(self) -> None:
        from webapp.models import Job

        while True:
            with self._lock:
                live = sorted(self._live)
                if not live:
                    self._beat = None
                    return
            self._write(update(Job).where(Job.id.in_(live)).values(heartbeat_at=_now()))
            self._wake.wait(self.heartbeat_s)
