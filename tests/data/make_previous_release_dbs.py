"""Build the two databases of the previous release kept in tests/data (read by tests/test_db_migrations.py).

They are written by the previous release's own code (its SQLAlchemy models and schema functions), so their
tables are exactly what that release created.  Run from a checkout of that release (git commit 0c02b7c, the
last before Alembic), e.g.::

    git archive 0c02b7c | tar -x -C /tmp/limen-previous
    PYTHONPATH=/tmp/limen-previous python tests/data/make_previous_release_dbs.py tests/data

The rows are invented (demo-style names), a few in every table, with the special cases an upgrade could lose:
NULLs, text with quotes and non-ASCII characters, booleans both ways, times with microseconds.
"""

from __future__ import annotations

import datetime as dt
import sqlite3
import sys
from pathlib import Path

T0 = dt.datetime(2026, 11, 3, 21, 15, 7, 123456)


def _single_file(path: Path) -> None:
    """Checkpoint the WAL into the main file and leave it in rollback-journal mode (one file to keep)."""
    con = sqlite3.connect(path)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    con.execute("PRAGMA journal_mode=DELETE")
    con.execute("VACUUM")
    con.close()


def nightly(path: Path) -> None:
    from sqlalchemy.orm import Session

    from scorer.qc import open_store
    from scorer.qc.tables import (
        AlertRow,
        BaselineRow,
        FileRow,
        ImageRow,
        QuarantineRow,
        ResponseRow,
        SessionRow,
        ThresholdRow,
    )

    store = open_store(f"sqlite:///{path}")
    with Session(store.engine) as s, s.begin():
        sessions = []
        for k, (det, day, verdict) in enumerate(
            [("Room 3 – Brightwater", "2026-11-01", "PASS"), ("Room 3 – Brightwater", "2026-11-02", None)]
        ):
            row = SessionRow(
                detector=det,
                session_date=day,
                group_key=f"{det}|{day}|28kV",
                state="scored" if verdict else "claimed",
                claim_token=None if verdict else "tok-7f3a",
                claim_host=None if verdict else "qc-host",
                claim_pid=None if verdict else 4242,
                claim_expires=None if verdict else T0 + dt.timedelta(hours=1),
                claimed_at=T0 + dt.timedelta(days=k),
                scored_at=T0 + dt.timedelta(days=k, seconds=40) if verdict else None,
                n_images=2,
                observer="npwe" if verdict else None,
                verdict_method="dprime" if verdict else None,
                overall_verdict=verdict,
                kvp=28.0,
                anode="W",
                filter="Rh",
                flags="[]" if verdict else '["kVp 31 (expected 28 ± 0.5)"]',
                settings='{"observer": "npwe"}',
                warnings="[]",
                scoring_s=12.5 if verdict else None,
            )
            s.add(row)
            s.flush()
            sessions.append(row)
        images = []
        for k in range(4):
            im = ImageRow(
                sha256=f"{k:x}" * 64,
                path=f"/srv/inbox/night{k // 2}/img-{k}.dcm",
                detector=sessions[k // 2].detector,
                group_key=sessions[k // 2].group_key,
                session_date=sessions[k // 2].session_date,
                acquired=f"2026-11-0{1 + k // 2}T07:0{k}:00",
                detector_id="BW-FP-0042",
                device_serial="SN 19-0042",
                station_name="BW-ROOM3",
                kvp=28.0,
                exposure_uas=None if k == 3 else 12000.0 + k,
                anode="W",
                filter="Rh",
                flags="[]",
                first_seen=T0,
                session_id=sessions[k // 2].id,
                registration='{"rms_mm": 0.04}' if k < 2 else None,
                blur_sigma_px=0.6 if k < 2 else None,
                n_correct=30 + k if k < 2 else None,
                n_trials=40 if k < 2 else None,
            )
            s.add(im)
            s.flush()
            images.append(im)
        for d, c in [(0.1, 0.21), (0.25, 0.052), (1.0, 0.011)]:
            s.add(
                ThresholdRow(
                    session_id=sessions[0].id,
                    method="dprime",
                    observer="npwe",
                    diameter_mm=d,
                    threshold_contrast=c,
                    ci_low=c * 0.9,
                    ci_high=c * 1.1 if d < 1 else None,
                    n_images=2,
                    m_alternatives=4,
                    criterion_pc=0.625,
                    note="" if d < 1 else 'extrapolated "beyond" the plate\'s contrasts',
                    compared_contrast=c,
                    acceptable=0.3 if d < 1 else None,
                    verdict="PASS" if d < 1 else None,
                )
            )
        for k in range(4):
            s.add(
                ResponseRow(
                    session_id=sessions[0].id,
                    image_id=images[k % 2].id,
                    target=f"d{k}",
                    diameter_mm=0.25,
                    contrast=0.05,
                    site=k,
                    is_signal=k == 0,
                    response=1.5 - k,
                    row_px=100.25 + k,
                    col_px=200.5,
                )
            )
        s.add(
            BaselineRow(
                detector=sessions[0].detector,
                method="dprime",
                diameter_mm=0.25,
                mean_log10=-1.28,
                sigma_log10=0.03,
                sd_between_log10=None,
                se_within_log10=0.02,
                n_sessions=1,
                session_ids=f"[{sessions[0].id}]",
                last_session_date="2026-11-01",
                last_session_id=sessions[0].id,
                source="explicit",
                created_at=T0,
            )
        )
        s.add(
            AlertRow(
                session_id=sessions[0].id,
                detector=sessions[0].detector,
                session_date="2026-11-01",
                method="dprime",
                diameter_mm=0.25,
                rule="ewma",
                direction="worse",
                value=0.052,
                reference=None,
                message="0.25 mm: threshold contrast 5.2 % above the EWMA limit",
                created_at=T0,
                emailed_at=None,
            )
        )
        s.add(
            QuarantineRow(
                sha256=None,
                original_path="/srv/inbox/night0/notes.txt",
                moved_to="/srv/inbox/quarantine/notes.txt",
                reason="not an image: ünknown format",
                at=T0,
            )
        )
        s.add(
            FileRow(path="/srv/inbox/night0/img-0.dcm", size=8_400_000, mtime_ns="1762204507123456789", sha256="0" * 64)
        )
    store.close()
    _single_file(path)


def webapp(path: Path, instance: Path) -> None:
    from webapp import create_app
    from webapp.models import (
        AnalysisRun,
        AuditEntry,
        Enrolment,
        Job,
        ReadingSession,
        Region,
        Response,
        SignInFailure,
        Study,
        StudyImage,
        Trial,
        TrialShown,
        User,
        db,
    )

    app = create_app({"INSTANCE_PATH": str(instance), "DATABASE_URL": f"sqlite:///{path}", "SECRET_KEY": "x" * 40})
    with app.app_context():
        s = db()
        coord = User(username="coordinator", password_hash="pbkdf2:sha256$not-a-real-hash", role="coordinator")
        reader = User(username="Reader-Åsa", password_hash="pbkdf2:sha256$x", role="reader", session_generation=3)
        idle = User(username="reader02", password_hash="pbkdf2:sha256$y", role="reader", active=False)
        s.add_all([coord, reader, idle])
        s.flush()
        study = Study(
            name='Brightwater "direct vs indirect" 2026',
            status="open",
            created_by=coord.id,
            created_at=T0,
            layout_file="/srv/layouts/plate.toml",
            layout_name="Cairn demo plate",
            m_alternatives=4,
            trials_per_reader=8,
            seed=7,
            repeat_fraction=0.25,
            n_practice=1,
            show_feedback=True,
            observer="npwe",
            viewing_distance_mm=500.0,
            magnification=1,
            region_rows=64,
            region_cols=64,
            ugy_per_unit=0.01,
            model_trials_csv="target,site\nd0,1\n",
            opened_at=T0,
        )
        s.add(study)
        s.flush()
        img = StudyImage(
            study_id=study.id,
            sha256="a" * 64,
            stored_name="a" * 64 + ".dcm",
            code="img-aaaaaaaa",
            detector="BW-FP-0042",
            conversion_file=None,
            pixel_spacing_mm=0.1,
            label="plate_01.dcm",
            rows=512,
            cols=512,
            registration_json='{"rms_mm": 0.05}',
        )
        s.add(img)
        s.flush()
        region = Region(
            study_id=study.id,
            image_id=img.id,
            target="d0",
            diameter_mm=0.25,
            contrast=0.05,
            true_site=2,
            row0=10,
            col0=20,
            sites_json="[[16, 16], [16, 48], [48, 16], [48, 48]]",
        )
        s.add(region)
        s.flush()
        s.add(Enrolment(study_id=study.id, user_id=reader.id))
        sitting = ReadingSession(
            study_id=study.id,
            reader_id=reader.id,
            number=1,
            started_at=T0,
            check_site=1,
            check_seed=99,
            check_attempts=1,
            check_passed=True,
            screen_width=2560,
            screen_height=1440,
            device_pixel_ratio=1.25,
            browser_zoom=None,
            viewing_distance_mm=600.0,
            user_agent="Mozilla/5.0 (X11; Linux x86_64)",
        )
        s.add(sitting)
        s.flush()
        trials = [
            Trial(
                public_id=f"t{k:031d}",
                study_id=study.id,
                reader_id=reader.id,
                seq=k,
                region_id=region.id,
                practice=k == 0,
                repeat=int(k == 2),
            )
            for k in range(3)
        ]
        s.add_all(trials)
        s.flush()
        for k, t in enumerate(trials[:2]):
            s.add(
                Response(
                    trial_id=t.id,
                    chosen_site=2 - k,
                    correct=k == 0,
                    response_ms=1500 + k,
                    window=4000.0,
                    level=2000.5,
                    zoom=2,
                    inverted=k == 1,
                    session_id=sitting.id,
                    created_at=T0,
                )
            )
        s.add(TrialShown(trial_public_id=trials[2].public_id, study_id=study.id, reader_id=reader.id, first_at=T0))
        s.add(AuditEntry(at=T0, user_id=coord.id, action="open_study", study_id=study.id, detail='{"n": 1}'))
        s.add(AuditEntry(at=T0, user_id=None, action="refused", study_id=None, detail="{}"))
        s.add(
            AnalysisRun(
                study_id=study.id,
                created_at=T0,
                responses_sha256="b" * 64,
                n_responses=2,
                report_html="<p>pooled threshold 5.0 %</p>",
                analysis_json='{"pooled": 0.05}',
            )
        )
        s.add(SignInFailure(at=T0, name_key="reader-åsa", client="addr:192.0.2.7", address="192.0.2.7"))
        s.add(
            Job(
                kind="analysis",
                study_id=study.id,
                created_by=coord.id,
                state="done",
                active_key=None,
                params_json="{}",
                progress_text="done",
                progress_fraction=1.0,
                result_ref="analysis_run:1",
                created_at=T0,
                started_at=T0,
                finished_at=T0,
                heartbeat_at=T0,
            )
        )
        s.commit()
        db().remove()
    app.extensions["limen_engine"].dispose()
    _single_file(path)


if __name__ == "__main__":
    import tempfile

    out = Path(sys.argv[1] if len(sys.argv) > 1 else ".").resolve()
    for name in ("previous-nightly.sqlite", "previous-webapp.sqlite"):
        (out / name).unlink(missing_ok=True)
    nightly(out / "previous-nightly.sqlite")
    with tempfile.TemporaryDirectory() as tmp:
        webapp(out / "previous-webapp.sqlite", Path(tmp))
    print("written", *sorted(p.name for p in out.glob("previous-*.sqlite")))
