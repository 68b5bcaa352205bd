"""Scoring sessions in parallel: serially, on a local process pool, or on an existing Dask cluster.

:func:`score_session` is the unit of work: it takes a picklable :class:`SessionJob` (paths, the
detector's layout, conversion, blur, limits, seed) and returns a :class:`SessionOutcome`; it
never touches the database, so the coordinating process alone writes.  The seed is fixed per
configuration, so a session gives the same numbers whichever runner scored it.

A Dask scheduler's workers read the image paths themselves: the inbox must be on storage
they all mount under the same path (and Limen must be installed on them).
"""

from __future__ import annotations

import os
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field

import pandas as pd

from scorer.errors import LimenError


@dataclass
class SessionJob:
    session_id: int
    token: str
    detector: str
    session_date: str
    group_key: str
    paths: list[str]
    shas: list[str]
    layout: object
    observer: str = "npw"
    methods: tuple[str, ...] = ("dprime", "count")
    conversion: object = None
    blur: object = None
    limits: object = None
    human_factor: float | None = None
    n_boot: int = 1000
    seed: int = 0


@dataclass
class SessionOutcome:
    session_id: int
    token: str
    ok: bool
    failed_sha: str | None = None
    failed_path: str | None = None
    reason: str | None = None
    thresholds: list[dict] = field(default_factory=list)
    verdicts: list[dict] | None = None
    images: list[dict] = field(default_factory=list)
    responses: pd.DataFrame | None = None
    overall_verdict: str | None = None
    verdict_method: str | None = None
    observer: str | None = None
    settings: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    scoring_s: float = 0.0


def score_session(job: SessionJob) -> SessionOutcome:
    """Score one session's images with ``scorer.workflow.score_files``; a bad image ends it with its reason.

    A file that fails (unreadable, changed since the scan, phantom not found) is named in
    ``failed_path``/``reason`` so the coordinator can quarantine it and re-form the session.
    """
    from scorer.detector.comparison import SIMULATOR
    from scorer.workflow.scoring import score_files

    t0 = time.perf_counter()
    out = SessionOutcome(job.session_id, job.token, ok=False)
    by_path = dict(zip(job.paths, job.shas))
    current = {"path": None}

    def on_image(i, path, image, placement):
        current["path"] = None
        if image.metadata.content_sha256 != by_path[str(path)]:
            raise LimenError("file changed since it was scanned (content hash differs)", path)

    def on_failure(path, image, exc) -> None:
        current["path"] = str(path)

    try:
        res = score_files(
            job.paths,
            job.layout,
            observer=job.observer,
            methods=list(job.methods),
            conversion=job.conversion,
            blur=job.blur,
            n_boot=job.n_boot,
            seed=job.seed,
            limits=job.limits,
            human_factor=job.human_factor,
            on_image=on_image,
            on_failure=on_failure,
        )
    except LimenError as exc:
        path = getattr(exc, "path", None) or current["path"]
        if path not in by_path:  # the error names no single image: report it against the session
            raise
        out.failed_path, out.failed_sha = path, by_path[path]
        msg = str(exc)
        out.reason = msg[len(path) + 2 :] if msg.startswith(f"{path}: ") else msg
        if exc.__class__.__name__ == "RegistrationError":
            out.reason = f"phantom not found: {out.reason}"
        out.scoring_s = time.perf_counter() - t0
        return out
    image_sha = {s.image_id: by_path[s.path] for s in res.images}
    out.ok = True
    out.thresholds = [p.to_dict() for c in res.curves.values() for p in c.points]
    out.verdicts = None if res.verdicts is None else [v.to_dict() for v in res.verdicts]
    out.images = [
        {
            "sha256": by_path[s.path],
            "registration": s.placement.to_dict(),
            "blur_sigma_px": s.blur_sigma_px,
            "n_correct": s.n_correct,
            "n_trials": s.n_trials,
        }
        for s in res.images
    ]
    kept = res.responses[res.responses["response"].notna()]  # sites excluded for defects have no response
    resp = kept[
        ["image", "target", "diameter_mm", "contrast", "site", "is_signal", "response", "row_px", "col_px"]
    ].copy()
    resp["image"] = resp["image"].map(image_sha)
    out.responses = resp
    out.overall_verdict = res.overall_verdict
    out.verdict_method = res.verdict_method
    out.observer = res.observer
    out.settings = dict(
        res.settings,
        human_factor=job.human_factor,
        limits=None if job.limits is None else job.limits.path,
        layout=job.layout.source_path,
        # provenance: how many images Limen's simulator made (their DICOM Manufacturer), for the reports' banner
        simulated_images=sum(1 for s in res.images if (s.metadata or {}).get("manufacturer") == SIMULATOR),
    )
    out.warnings = list(dict.fromkeys(res.warnings))
    out.scoring_s = time.perf_counter() - t0
    return out


# --------------------------------------------------------------------------- runners
class SerialRunner:
    """Scores in this process, one session after another."""

    name = "serial"

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> bool:
        return False

    def run(self, jobs):
        for job in jobs:
            yield job, _guarded(job)


def _guarded(job: SessionJob):
    try:
        return score_session(job)
    except LimenError as exc:
        return SessionOutcome(job.session_id, job.token, ok=False, reason=str(exc))


_THREAD_ENV = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def _watch_parent(parent_pid: int, every_s: float = 0.5) -> None:
    """Pool worker set-up: one thread for OpenCV (N workers use N cores, not N × cores), exit as soon
    as the coordinating process is gone (killed, even by SIGKILL) instead of waiting for work forever
    with its files open, and load the scoring code before the first job arrives."""
    import threading

    try:
        import cv2

        cv2.setNumThreads(1)
    except ImportError:  # pragma: no cover - opencv is a dependency
        pass

    def watch() -> None:
        while True:
            if os.getppid() != parent_pid:
                os._exit(1)
            time.sleep(every_s)

    threading.Thread(target=watch, daemon=True, name="limen-parent-watch").start()
    import scorer.workflow.scoring  # noqa: F401  (numpy, scipy, OpenCV, scikit-image load now, not in the first job)


def _started() -> int:
    """A no-op job: submitting one per worker starts the workers (and their imports) at once."""
    return os.getpid()


class PoolRunner:
    """A local process pool of ``workers`` processes (spawned: no database handle is inherited)."""

    def __init__(self, workers: int) -> None:
        self.workers = int(workers)
        self.name = f"process pool ({self.workers} workers)"

    def __enter__(self):
        import multiprocessing as mp

        # spawned workers read these before numpy loads: one BLAS/OpenMP thread each
        self._env = {k: os.environ.get(k) for k in _THREAD_ENV}
        os.environ.update({k: "1" for k in _THREAD_ENV})
        self.pool = ProcessPoolExecutor(
            max_workers=self.workers,
            mp_context=mp.get_context("spawn"),
            initializer=_watch_parent,
            initargs=(os.getpid(),),
        )
        # workers start on demand: one no-op each starts them all now, so they import while the inbox is scanned
        for _ in range(self.workers):
            self.pool.submit(_started)
        return self

    def __exit__(self, *exc) -> bool:
        self.pool.shutdown(wait=True, cancel_futures=True)
        for k, v in self._env.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
        return False

    def run(self, jobs):
        futures = {self.pool.submit(_guarded, job): job for job in jobs}
        for fut in as_completed(futures):
            yield futures[fut], fut.result()


DASK_CONNECT_TIMEOUT_S = 20.0


def _connect_within(client_class, address: str, timeout_s: float):
    """``Client(address)`` with a bound on the whole start-up.  Client's own ``timeout`` covers opening the
    connection, but a port where something else listens and never answers (a wrong port number) left the
    start-up waiting for ever; the nightly would hang instead of failing.  The attempt runs in a daemon thread
    given twice the connect timeout; one still waiting then is abandoned with :class:`TimeoutError`."""
    import threading

    box = {}

    def connect() -> None:
        try:
            box["client"] = client_class(address, timeout=f"{timeout_s:g}s")
        except BaseException as exc:  # handed to the caller's thread below
            box["error"] = exc

    t = threading.Thread(target=connect, daemon=True, name="limen-dask-connect")
    t.start()
    t.join(2 * timeout_s)
    if t.is_alive():
        raise TimeoutError(f"no answer from a Dask scheduler within {2 * timeout_s:g} s; is this its address and port?")
    if "error" in box:
        raise box["error"]
    return box["client"]


class DaskRunner:
    """Sends sessions to an existing Dask distributed scheduler (``dask scheduler`` / ``dask worker``)."""

    def __init__(self, address) -> None:
        self.address = address
        self.name = f"Dask scheduler {address}"

    def __enter__(self):
        try:
            from distributed import Client
        except ImportError:  # the [nightly] extra is not installed
            from scorer.extras import require

            require("nightly", "--dask")
            raise
        try:
            if isinstance(self.address, str):
                self.client = _connect_within(Client, self.address, DASK_CONNECT_TIMEOUT_S)
            else:  # a LocalCluster or other cluster object (tests, scripts)
                self.client = Client(self.address)
        except (OSError, TimeoutError) as exc:
            raise LimenError(
                f"cannot reach the Dask scheduler ({' '.join(str(exc).split())[:200]})", f"--dask {self.address}"
            ) from None
        except ValueError as exc:  # distributed's address parser: no port, unknown scheme
            raise LimenError(
                f"not a Dask scheduler address, expected tcp://HOST:PORT ({' '.join(str(exc).split())[:200]})",
                f"--dask {self.address}",
            ) from None
        return self

    def __exit__(self, *exc) -> bool:
        self.client.close()
        return False

    def run(self, jobs):
        from distributed import as_completed as dask_completed

        jobs = list(jobs)
        futures = {
            self.client.submit(_guarded, job, pure=False, key=f"limen-session-{job.session_id}-{job.token}"): job
            for job in jobs
        }
        for fut in dask_completed(list(futures)):
            yield futures[fut], fut.result()


def make_runner(workers: int = 1, dask=None):
    if dask is not None:
        return DaskRunner(dask)
    if workers and workers > 1:
        return PoolRunner(workers)
    return SerialRunner()
