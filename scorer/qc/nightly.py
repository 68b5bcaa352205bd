"""The nightly run: scan the inbox, claim complete sessions, score them (serially, on a pool or Dask),
write each in one transaction, quarantine what cannot be scored, raise and e-mail alerts.

:func:`run_nightly` is the whole job as one call; ``limen nightly`` is a thin command over it.
"""

from __future__ import annotations

import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from scorer.errors import LimenError
from scorer.qc.claims import DEFAULT_LEASE_S
from scorer.qc.config import NightlyConfig, default_config
from scorer.qc.engine import default_db_url, display_url
from scorer.qc.faults import fault_point
from scorer.qc.inbox import InboxImage, Skipped, check_inbox, examine, quarantine_file, scan_entries
from scorer.qc.scale import SessionJob, make_runner
from scorer.qc.store import Store, open_store
from scorer.workflow.inputs import image_content_hash


@dataclass
class NightlyResult:
    """What one run did (``to_json`` is the ``--json`` output)."""

    scored_images: int = 0
    sessions_scored: list[dict] = field(default_factory=list)
    waiting: list[dict] = field(default_factory=list)
    quarantined: list[dict] = field(default_factory=list)
    alerts: list[dict] = field(default_factory=list)
    duplicates: list[dict] = field(default_factory=list)
    arriving: list[str] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)
    #: inbox entries left in place (named pipes, dangling links, link loops, unreadable files, names that are not
    #: UTF-8), said on the first run that meets each in that state; ``skipped_before`` counts those said earlier
    skipped: list[dict] = field(default_factory=list)
    skipped_before: int = 0
    #: sessions formed from new files on a detector, day and settings that already have a session (a re-export,
    #: a second run of the same morning, or images simulated again): scored, and said
    repeated: list[dict] = field(default_factory=list)
    #: alerts of earlier-scored sessions withdrawn or reworded by this run's re-evaluation (scorer/qc/alerting.py)
    withdrawn: list[dict] = field(default_factory=list)
    updated: list[dict] = field(default_factory=list)
    baseline_changes: list[dict] = field(default_factory=list)
    #: missing-QC alerts raised by this run (scorer/qc/missing.py)
    missing: list[dict] = field(default_factory=list)
    #: alerts of any kind no finished run has reported yet (this run's, and an earlier killed run's)
    pending: list[dict] = field(default_factory=list)
    earlier: list[dict] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    accepted: int = 0  # new images accepted by the scan
    tag_flags: dict = field(default_factory=dict)  # detector -> setting flags of new images (for tag warnings)
    emailed: int = 0
    runner: str = "serial"
    db: str = ""
    timings: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        return {
            "scored_images": self.scored_images,
            "sessions_scored": len(self.sessions_scored),
            "sessions_waiting": len(self.waiting),
            "quarantined": self.quarantined,
            "alerts": self.alerts,
            "sessions": self.sessions_scored,
            "waiting": self.waiting,
            "duplicates": self.duplicates,
            "arriving": self.arriving,
            "errors": self.errors,
            "skipped": self.skipped,
            "skipped_said_before": self.skipped_before,
            "repeated_sessions": self.repeated,
            "withdrawn_alerts": self.withdrawn,
            "updated_alerts": self.updated,
            "baseline_changes": self.baseline_changes,
            "missing_qc": self.missing,
            "unreported_from_earlier_runs": self.earlier,
            "warnings": self.warnings,
            "emailed_alerts": self.emailed,
            "runner": self.runner,
            "database": self.db,
            "timings_s": self.timings,
        }


class _Timer:
    def __init__(self) -> None:
        self.t = {}

    def add(self, key, dt) -> None:
        self.t[key] = self.t.get(key, 0.0) + dt


def run_nightly(
    inbox,
    config: NightlyConfig | None = None,
    db_url: str | None = None,
    store: Store | None = None,
    quarantine_dir=None,
    workers: int = 1,
    dask=None,
    settle_s: float = 0.0,
    lease_s: float = DEFAULT_LEASE_S,
    progress: bool = False,
    report: str | None = None,
) -> NightlyResult:
    """Score every complete, unscored session in ``inbox`` once; see the module docstring.

    Parameters
    ----------
    inbox : folder scanned recursively.
    config : from :func:`scorer.qc.config.load_config` (None: :func:`default_config`).
    db_url : SQLAlchemy URL (default: SQLite file ``limen-nightly.sqlite`` beside the inbox).
    store : an open :class:`Store` (instead of ``db_url``).
    quarantine_dir : where unusable files go (default ``<inbox>/quarantine``, skipped by the scan).
    workers : local processes scoring sessions in parallel.
    dask : a Dask scheduler address (``tcp://host:8786``) or cluster object: score there instead.
    settle_s : files modified less than this many seconds ago are left for the next run (still arriving).
    lease_s : a claim not renewed for this long is taken over by another run.
    report : path of the trend report the caller will write (named in the alert e-mail).
    """
    from scorer.qc.tables import utcnow

    t_start = time.perf_counter()
    run_started = utcnow()
    inbox, qdir = check_inbox(inbox, quarantine_dir)
    # absolute paths: a Dask worker started in another folder reads the same files
    inbox, qdir = Path(inbox).expanduser().resolve(), Path(qdir).expanduser().resolve()
    config = config or default_config()
    own_store = store is None
    store = store or open_store(db_url or default_db_url(inbox.resolve().parent))
    result = NightlyResult(db=display_url(store.url))
    tm = _Timer()
    try:
        # the runner starts first: a process pool's workers start and import while the inbox is scanned, and
        # an unreachable Dask scheduler is reported before any work is done
        with make_runner(workers, dask) as runner:
            result.runner = runner.name
            hash_threads = max(1, min(int(workers or 1), os.cpu_count() or 1)) if dask is None else 1
            _scan(inbox, qdir, config, store, settle_s, result, tm, progress, hash_threads)
            fault_point("scanned")
            _score(config, store, qdir, runner, lease_s, result, tm, progress)
        t = time.perf_counter()
        for key, imgs in sorted(store.free_groups().items()):
            det = config.by_name(imgs[0]["detector"])
            result.waiting.append(
                {
                    "detector": imgs[0]["detector"],
                    "session_date": imgs[0]["session_date"],
                    "group": key,
                    "images": len(imgs),
                    "needed": det.min_images,
                }
            )
        result.missing = store.find_missing(config, config.alerts, result.accepted, result.quarantined)
        result.warnings += _tag_warnings(result.tag_flags)
        result.pending = store.unreported()
        result.earlier = [a for a in result.pending if a["created_at"] < run_started]
        tm.add("db_s", time.perf_counter() - t)
        if config.smtp is not None:
            _email(config, store, result, report, run_started)
    finally:
        if own_store:
            store.close()
    tm.add("wall_s", time.perf_counter() - t_start)
    result.timings = {k: round(v, 4) for k, v in tm.t.items()}
    return result


# --------------------------------------------------------------------------- scan
def _scan(inbox, qdir, config, store, settle_s, result, tm, progress, hash_threads: int = 1) -> None:
    from tqdm import tqdm

    t = time.perf_counter()
    files, skipped = scan_entries(inbox, exclude=[qdir])
    cache = store.file_cache()
    tm.add("db_s", time.perf_counter() - t)
    now = time.time()
    hashed, remember, to_hash = [], [], []
    t = time.perf_counter()
    for f, st in files:
        if settle_s and now - st.st_mtime < settle_s:
            result.arriving.append(str(f))
            continue
        c = cache.get(str(f))
        if c and not c[2].startswith("!") and c[0] == st.st_size and c[1] == str(st.st_mtime_ns):
            hashed.append((f, c[2]))
            continue
        to_hash.append((f, st))
    # new files are hashed on as many threads as the run has workers (hashlib releases the GIL on large reads)
    for (f, st), (sha, error) in zip(to_hash, _hash_all([f for f, _ in to_hash], hash_threads)):
        if sha is None:
            if error is not None and os.path.lexists(f):  # there, but cannot be read (permissions, I/O error)
                reason = f"{error}: skipped until it can be read"
                skipped.append(Skipped(str(f), "unreadable", reason, st.st_size, str(st.st_mtime_ns)))
            continue  # else vanished between listing and reading
        hashed.append((f, sha))
        remember.append((str(f), st.st_size, str(st.st_mtime_ns), sha))
    _say_skipped(skipped, cache, remember, result)
    tm.add("hash_s", time.perf_counter() - t)
    t = time.perf_counter()
    known = store.known_images(h for _, h in hashed)
    bad = store.quarantined(h for _, h in hashed)
    tm.add("db_s", time.perf_counter() - t)
    new: list[InboxImage] = []
    seen: dict[str, str] = {}
    todo = []
    for f, sha in hashed:
        if sha in known:
            if known[sha] != str(f) and Path(known[sha]).exists():
                result.duplicates.append({"path": str(f), "same_as": known[sha]})
            continue
        if sha in seen:
            result.duplicates.append({"path": str(f), "same_as": seen[sha]})
            continue
        seen[sha] = str(f)
        todo.append((f, sha))
    t = time.perf_counter()
    bar = tqdm(todo, desc="reading new files", unit="file", file=sys.stderr, disable=not progress or len(todo) < 2)
    for f, sha in bar:
        if sha in bad:
            _quarantine(store, qdir, str(f), sha, f"same content as a file quarantined before: {bad[sha]}", result)
            continue
        item = examine(f, sha, config)
        if isinstance(item, InboxImage):
            new.append(item)
        else:
            _quarantine(store, qdir, item.path, item.sha256, item.reason, result)
    bar.close()
    tm.add("read_s", time.perf_counter() - t)
    t = time.perf_counter()
    store.add_images(new)
    store.remember_files(remember)
    result.accepted = len(new)
    for im in new:
        if im.flags:
            result.tag_flags.setdefault(im.detector, []).extend(im.flags)
    tm.add("db_s", time.perf_counter() - t)


def _say_skipped(skipped: list[Skipped], cache: dict, remember: list, result: NightlyResult) -> None:
    """Each skipped entry is said on the first run that meets it with its kind of problem; the file cache keeps a
    marker (``"!" + kind`` in place of the hash) under its path, so the next nights stay quiet until the problem
    is another (a dangling link made a pipe) or the entry is fixed (its hash replaces the marker) and breaks again."""
    for s in skipped:
        c = cache.get(s.key)
        if c is not None and c[2] == s.marker:
            result.skipped_before += 1
            continue
        result.skipped.append({"path": s.key, "reason": s.reason})
        remember.append((s.key, s.size, s.mtime_ns, s.marker))


def _tag_warnings(tag_flags: dict) -> list[str]:
    """A warning per detector whose configuration expects a tag its images do not carry: every session would be
    flagged and no automatic baseline could ever form."""
    out = []
    for det, flags in sorted(tag_flags.items()):
        missing = sorted({f.split(" ")[0] for f in flags if "not recorded" in f})
        if missing:
            out.append(
                f"the configuration expects {', '.join(missing)} for {det}, but its images do not record it: every "
                "session is flagged and no automatic baseline forms — remove the entry from [detectors.expected] "
                "or have the modality send the tag (Anode Target Material 0018,1191; Filter Material 0018,7050; "
                "KVP 0018,0060)"
            )
    return out


def _hash_one(path) -> tuple[str | None, str | None]:
    """(SHA-256, None), or (None, the problem) when the file cannot be read."""
    try:
        return image_content_hash(path), None
    except LimenError as exc:
        text = str(exc)
        prefix = f"{path}: "
        return None, text[len(prefix) :] if text.startswith(prefix) else text


def _hash_all(paths, threads: int) -> list:
    """(SHA-256, None) of each file, or (None, the problem), in order; on ``threads`` threads."""
    if threads <= 1 or len(paths) < 2:
        return [_hash_one(p) for p in paths]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=threads, thread_name_prefix="limen-hash") as ex:
        return list(ex.map(_hash_one, paths))


def _quarantine(store, qdir, path, sha, reason, result) -> None:
    moved = quarantine_file(path, qdir, reason)
    if moved is None:
        return  # another run moved it first
    store.record_quarantine(sha, path, moved, reason)
    result.quarantined.append({"path": str(path), "reason": reason, "moved_to": str(moved)})


# --------------------------------------------------------------------------- claim and score
def _jobs(config, store, lease_s, tm, claims, skip):
    """Claims for this round: stale claims taken over, then new complete sessions."""
    jobs = []
    t = time.perf_counter()
    for sid, old in store.stale_claims():
        token = store.take_over(sid, old, lease_s)
        if token:
            imgs = store.session_images(sid)
            jobs.append(_job(config, sid, token, imgs))
            claims[sid] = token
    for key, imgs in sorted(store.free_groups().items()):
        det = config.by_name(imgs[0]["detector"])
        if len(imgs) < det.min_images or key in skip:
            continue
        got = store.claim(key, imgs, lease_s)
        if got:
            sid, token = got
            jobs.append(_job(config, sid, token, imgs))
            claims[sid] = token
    tm.add("db_s", time.perf_counter() - t)
    return jobs


def _job(config, sid, token, imgs) -> SessionJob:
    det = config.by_name(imgs[0]["detector"])
    return SessionJob(
        session_id=sid,
        token=token,
        detector=det.name,
        session_date=imgs[0]["session_date"],
        group_key=imgs[0]["group_key"],
        paths=[im["path"] for im in imgs],
        shas=[im["sha256"] for im in imgs],
        layout=det.layout,
        observer=det.observer,
        methods=det.methods,
        conversion=det.conversion,
        blur=det.blur,
        limits=det.limits,
        human_factor=det.human_factor,
        n_boot=det.n_boot,
        seed=det.seed,
    )


def _score(config, store, qdir, runner, lease_s, result, tm, progress) -> None:
    from tqdm import tqdm

    claims: dict[int, str] = {}
    skip: set[str] = set()  # groups that failed as a whole in this run: not retried until the next run
    for _round in range(1000):  # each round re-forms sessions after a quarantined image
        jobs = _jobs(config, store, lease_s, tm, claims, skip)
        if not jobs:
            break
        fault_point("claimed")
        for job in jobs:
            others = store.other_sessions(job.group_key, job.session_id)
            if others:
                result.repeated.append(
                    {
                        "detector": job.detector,
                        "session_date": job.session_date,
                        "group": job.group_key,
                        "session_id": job.session_id,
                        "images": len(job.paths),
                        "earlier_sessions": [o["id"] for o in others],
                        "message": (
                            f"{job.detector} already has {len(others)} session(s) on {job.session_date} with the same "
                            f"settings ({job.group_key.split('|', 2)[-1]}) from other files: these {len(job.paths)} "
                            "image(s) make another one (a re-export or the same images written again?)"
                        ),
                    }
                )
        retry = False
        renewed = time.monotonic()
        bar = tqdm(
            total=sum(len(j.paths) for j in jobs),
            desc="scoring sessions",
            unit="image",
            file=sys.stderr,
            disable=not progress,
        )
        for job, out in runner.run(jobs):
            bar.update(len(job.paths))
            tm.add("scoring_s", out.scoring_s)
            fault_point("scored")
            t = time.perf_counter()
            det = config.by_name(job.detector)
            if out.ok:
                written = store.write_session(out, det, config.alerts)
                claims.pop(job.session_id, None)
                if written is not None:
                    alerts = written.alerts
                    ch = written.changes
                    result.alerts += [dict(a, reevaluated=True) for a in ch.added]
                    result.withdrawn += ch.withdrawn
                    result.updated += ch.updated
                    result.baseline_changes += ch.baseline_changes
                    result.scored_images += len(job.paths)
                    verdict = out.overall_verdict
                    result.sessions_scored.append(
                        {
                            "id": job.session_id,
                            "detector": job.detector,
                            "session_date": job.session_date,
                            "images": len(job.paths),
                            "overall_verdict": verdict,
                            "alerts": len(alerts),
                        }
                    )
                    result.alerts += [a.to_dict() for a in alerts]
                fault_point("committed")
            elif out.failed_sha:
                if store.release(job.session_id, job.token, out.failed_sha, out.failed_path, out.reason):
                    moved = quarantine_file(out.failed_path, qdir, out.reason)
                    if moved is not None:
                        store.record_quarantine(out.failed_sha, out.failed_path, moved, out.reason)
                        result.quarantined.append(
                            {"path": out.failed_path, "reason": out.reason, "moved_to": str(moved)}
                        )
                    retry = True
                claims.pop(job.session_id, None)
            else:
                store.release(job.session_id, job.token)
                claims.pop(job.session_id, None)
                skip.add(job.group_key)
                result.errors.append(f"session of {job.detector} ({len(job.paths)} images) not scored: {out.reason}")
            if time.monotonic() - renewed > lease_s / 3:
                store.renew(claims, lease_s)
                renewed = time.monotonic()
            tm.add("db_s", time.perf_counter() - t)
        bar.close()
        if not retry:
            break


def _email(config, store, result, report=None, run_started=None) -> None:
    """One message for every pending alert of the database, claimed first so overlapping runs never send twice."""
    from scorer.qc.mail import send_alerts

    token, pending = store.claim_for_mail()
    if not pending:
        return
    try:
        send_alerts(config.smtp, pending, config.programme, report, run_started)
    except LimenError as exc:
        store.mail_done(token, sent=False)
        result.errors.append(str(exc))
        return
    store.mail_done(token, sent=True)
    result.emailed = len(pending)
