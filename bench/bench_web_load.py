"""Load floor of the reader-study web app: 50 simulated readers reading at once against ``limen serve``
(waitress, SQLite default) on loopback for a bounded time.

Each simulated reader signs in, passes the display check (finds the faint disc in the pattern it receives),
then loops: GET the next trial (JSON), GET its region (linear 16-bit pixels), think, POST the response.
One POST in ten is sent twice at once (a double click), which must store one response. At the end the
database is compared with what the readers were told was stored: a response acknowledged but missing is
lost; two rows for one trial, or rows nobody sent, are duplicated.

Think time per trial follows the reading times of the project's reader model
(:mod:`scorer.study.reader_model`: log-normal, median 2.5 s, σ_log 0.4), scaled by ``--think-scale``; the
default 1.0 is a real study's pace, ``--think-scale 0.2`` a stress test five times faster than any reader.

Floors (issue 12): p95 trial-region latency < 100 ms; lost and duplicated responses = 0.

Run: ``python -m bench.bench_web_load [--readers 50] [--seconds 60]``; writes bench/results/web_load.json.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import re
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

FLOOR_REGION_P95_MS = 100.0
PASSWORD = "bench-reader-pass"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _setup(instance: Path, n_readers: int, trials_per_reader: int) -> int:
    from webapp import create_app
    from webapp.demo import create_demo_study

    app = create_app({"INSTANCE_PATH": str(instance)})
    passwords = {f"reader{i + 1}": PASSWORD for i in range(n_readers)} | {"coordinator": PASSWORD + "-c"}
    out = create_demo_study(
        app,
        n_readers=n_readers,
        images_per_detector=2,
        trials_per_reader=trials_per_reader,
        n_practice=0,
        repeat_fraction=0.1,
        passwords=passwords,
    )
    app.extensions["limen_engine"].dispose()
    return out["study_id"]


def _pct(values, q):
    return float(np.percentile(values, q)) if values else float("nan")


class Reader(threading.Thread):
    def __init__(self, base: str, name: str, study_id: int, stop_at: float, seed: int, think_scale: float = 1.0):
        super().__init__(daemon=True)
        self.think_scale = think_scale
        self.base, self.name, self.sid, self.stop_at = base, name, study_id, stop_at
        self.rng = random.Random(seed)
        self.region_ms, self.post_ms, self.next_ms = [], [], []
        self.acknowledged: set[str] = set()
        self.double_sent = 0
        self.double_both_ok = 0
        self.errors: list[str] = []

    def run(self):
        import requests

        s = requests.Session()
        try:
            page = s.get(f"{self.base}/login", timeout=30).text
            tok = re.search(r'name="csrf_token" value="([^"]+)"', page).group(1)
            r = s.post(
                f"{self.base}/login",
                data={"username": self.name, "password": PASSWORD, "csrf_token": tok},
                timeout=30,
                allow_redirects=False,
            )
            if r.status_code != 302:
                self.errors.append(f"login {r.status_code}")
                return
            page = s.get(f"{self.base}/reading/studies/{self.sid}/check", timeout=30).text
            tok = re.search(r'name="csrf-token" content="([^"]+)"', page).group(1)
            sites = json.loads(re.search(r'data-sites="([^"]+)"', page).group(1).replace("&#34;", '"'))
            px = np.frombuffer(
                s.get(f"{self.base}/reading/api/studies/{self.sid}/check/pattern", timeout=30).content, "<u2"
            ).reshape(192, 192)
            site = int(np.argmax([px[r - 3 : r + 4, c - 3 : c + 4].mean() for r, c in sites]))
            r = s.post(
                f"{self.base}/reading/api/studies/{self.sid}/check",
                headers={"X-CSRFToken": tok},
                json={"site": site, "viewing_distance_mm": 500, "device_pixel_ratio": 1},
                timeout=30,
            )
            if not r.json().get("passed"):
                self.errors.append("display check not passed")
                return
            headers = {"X-CSRFToken": tok}
            while time.time() < self.stop_at:
                t0 = time.perf_counter()
                t = s.get(f"{self.base}/reading/api/studies/{self.sid}/next", timeout=30).json()
                self.next_ms.append(1000 * (time.perf_counter() - t0))
                if t.get("done"):
                    break
                t0 = time.perf_counter()
                r = s.get(self.base + t["region_url"], timeout=30)
                self.region_ms.append(1000 * (time.perf_counter() - t0))
                if r.status_code != 200 or len(r.content) != 2 * t.get("tiles", 1) * t["rows"] * t["cols"]:
                    self.errors.append(f"region {r.status_code}")
                    continue
                time.sleep(self.think_scale * self.rng.lognormvariate(np.log(2.5), 0.4))
                body = {
                    ("chosen_position" if t.get("tiles") else "chosen_site"): self.rng.randrange(t["m"]),
                    "response_ms": 1500,
                    "window": 4000.0,
                    "level": 30000.0,
                    "zoom": 1,
                }
                url = self.base + t["response_url"]
                if self.rng.random() < 0.1:  # a double click: the same response twice at once
                    self.double_sent += 1
                    codes = []
                    twin = threading.Thread(
                        target=lambda codes=codes, url=url, body=body: codes.append(
                            s.post(url, json=body, headers=headers, timeout=30).status_code
                        )
                    )
                    twin.start()
                    t0 = time.perf_counter()
                    code = s.post(url, json=body, headers=headers, timeout=30).status_code
                    self.post_ms.append(1000 * (time.perf_counter() - t0))
                    twin.join()
                    codes.append(code)
                    if codes.count(200) > 1:
                        self.double_both_ok += 1
                    if 200 in codes:
                        self.acknowledged.add(t["trial"])
                    elif codes != [409, 409]:
                        self.errors.append(f"double post {codes}")
                else:
                    t0 = time.perf_counter()
                    r = s.post(url, json=body, headers=headers, timeout=30)
                    self.post_ms.append(1000 * (time.perf_counter() - t0))
                    if r.status_code == 200:
                        self.acknowledged.add(t["trial"])
                    else:
                        self.errors.append(f"post {r.status_code}")
        except Exception as exc:  # noqa: BLE001 - a bench reports, it does not crash
            self.errors.append(repr(exc))


def _reader_group(
    base: str, names: list[str], study_id: int, stop_at: float, seed: int, think_scale: float
) -> list[dict]:
    """Run some readers as threads of one client process (several processes keep the client's own GIL
    out of the measured latencies: real readers sit at separate computers)."""
    readers = [Reader(base, n, study_id, stop_at, seed=seed + i, think_scale=think_scale) for i, n in enumerate(names)]
    for r in readers:
        r.start()
    for r in readers:
        r.join()
    return [
        {
            "name": r.name,
            "region_ms": r.region_ms,
            "post_ms": r.post_ms,
            "next_ms": r.next_ms,
            "acknowledged": sorted(r.acknowledged),
            "double_sent": r.double_sent,
            "double_both_ok": r.double_both_ok,
            "errors": r.errors,
        }
        for r in readers
    ]


def run(
    n_readers: int = 50, seconds: float = 60.0, threads: int = 8, client_processes: int = 5, think_scale: float = 1.0
) -> dict:
    from concurrent.futures import ProcessPoolExecutor

    with tempfile.TemporaryDirectory() as tmp:
        instance = Path(tmp) / "instance"
        t0 = time.perf_counter()
        sid = _setup(instance, n_readers, trials_per_reader=300)
        setup_s = time.perf_counter() - t0
        port = _free_port()
        exe = Path(sys.executable).with_name("limen")
        log = open(Path(tmp) / "serve.log", "w+")  # a file, not a pipe: a full pipe would stall the server
        proc = subprocess.Popen(
            [str(exe), "serve", "--instance", str(instance), "--port", str(port), "--threads", str(threads)],
            stdout=log,
            stderr=subprocess.STDOUT,
            text=True,
            env={**os.environ, "PYTHONUNBUFFERED": "1"},
        )
        try:
            deadline = time.time() + 60
            while f":{port}/" not in (Path(tmp) / "serve.log").read_text():
                if proc.poll() is not None or time.time() > deadline:
                    raise RuntimeError("limen serve did not start: " + (Path(tmp) / "serve.log").read_text())
                time.sleep(0.1)
            base = f"http://127.0.0.1:{port}"
            stop_at = time.time() + seconds
            names = [f"reader{i + 1}" for i in range(n_readers)]
            groups = [names[k::client_processes] for k in range(client_processes)]
            t1 = time.perf_counter()
            with ProcessPoolExecutor(client_processes) as pool:
                futures = [
                    pool.submit(_reader_group, base, g, sid, stop_at, 1000 * k, think_scale)
                    for k, g in enumerate(groups)
                ]
                results = [x for f in futures for x in f.result()]
            wall = time.perf_counter() - t1
            server_log = (Path(tmp) / "serve.log").read_text()
        finally:
            proc.terminate()
            proc.wait(timeout=30)
            log.close()
        # compare with the database
        from sqlalchemy import create_engine, text

        eng = create_engine(f"sqlite:///{instance / 'limen.db'}")
        with eng.connect() as conn:
            rows = conn.execute(
                text(
                    "SELECT t.public_id, u.username FROM responses r JOIN trials t ON r.trial_id = t.id "
                    "JOIN users u ON t.reader_id = u.id"
                )
            ).all()
        eng.dispose()
    stored: dict[str, list[str]] = {}
    for pid, user in rows:
        stored.setdefault(pid, []).append(user)
    acknowledged = {pid: r["name"] for r in results for pid in r["acknowledged"]}
    lost = sum(1 for pid in acknowledged if pid not in stored)
    # two rows for one trial, or both halves of a double click acknowledged as new responses
    duplicated = sum(len(v) - 1 for v in stored.values()) + sum(r["double_both_ok"] for r in results)
    # stored although the client never heard back (its request timed out): not lost, not duplicated
    unacknowledged = sum(1 for pid in stored if pid not in acknowledged)
    region = [x for r in results for x in r["region_ms"]]
    post = [x for r in results for x in r["post_ms"]]
    nxt = [x for r in results for x in r["next_ms"]]
    errors = [e for r in results for e in r["errors"]]
    return {
        "readers": n_readers,
        "seconds": seconds,
        "server_threads": threads,
        "client_processes": client_processes,
        "database": "sqlite",
        "think_time": f"lognormal, median {2.5 * think_scale:g} s, sigma_log 0.4",
        "setup_s": round(setup_s, 1),
        "wall_s": round(wall, 1),
        "responses_stored": len(rows),
        "responses_acknowledged": len(acknowledged),
        "stored_unacknowledged": unacknowledged,
        "double_posts": sum(r["double_sent"] for r in results),
        "responses_per_s": round(len(rows) / wall, 1),
        "region_requests": len(region),
        "region_get_p50_ms": round(_pct(region, 50), 1),
        "region_get_p95_ms": round(_pct(region, 95), 1),
        "response_post_p50_ms": round(_pct(post, 50), 1),
        "response_post_p95_ms": round(_pct(post, 95), 1),
        "next_get_p50_ms": round(_pct(nxt, 50), 1),
        "next_get_p95_ms": round(_pct(nxt, 95), 1),
        "lost_responses": lost,
        "duplicated_responses": duplicated,
        "client_errors": len(errors),
        "first_errors": errors[:5],
        "server_warnings": [ln for ln in server_log.splitlines() if "WARNING" in ln][:5],
        "load_average": os.getloadavg(),
        "cpus": os.cpu_count(),
        "floor_region_p95_ms": FLOOR_REGION_P95_MS,
        "within_floor": bool(_pct(region, 95) < FLOOR_REGION_P95_MS and lost == 0 and duplicated == 0),
    }


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--readers", type=int, default=50)
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--threads", type=int, default=8)
    ap.add_argument(
        "--think-scale",
        type=float,
        default=1.0,
        help="multiply the readers' think time (0.2: a stress test five times faster than readers)",
    )
    args = ap.parse_args(argv if argv is not None else [])
    r = run(args.readers, args.seconds, args.threads, think_scale=args.think_scale)
    suffix = "" if args.think_scale == 1.0 else f"-think{args.think_scale:g}"
    path = Path(__file__).parent / "results" / f"web_load{suffix}.json"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(r, indent=2) + "\n")
    for k, v in r.items():
        if not k.startswith("floor") and k not in ("within_floor",):
            print(f"{k:>24}: {v}")
    print(f"wrote {path}")
    print(f"response_post_p95: {r['response_post_p95_ms']} ms (floor: none)")
    print(f"region_get_p50: {r['region_get_p50_ms']} ms (floor: none)")
    print(f"region_get_p95: {r['region_get_p95_ms']} ms (floor: {FLOOR_REGION_P95_MS:g})")
    print(f"lost_responses: {r['lost_responses']} responses (floor: 0)")
    print(f"duplicated_responses: {r['duplicated_responses']} responses (floor: 0)")
    return r


if __name__ == "__main__":
    main(sys.argv[1:])
