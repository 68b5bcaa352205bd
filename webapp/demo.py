"""The demo study of ``limen serve --demo`` (and the tests' and the load bench's studies).

Invented scenario: the breast-imaging unit of the "Harbourside Women's Health Centre (invented)" compares
its direct-conversion panel HSX-SE-0417 (room MAM2) with the indirect panel HSX-CS-2291 (room MAM3).
Images are simulated by :func:`scorer.detector.simulate` (``small=True``), scored by the model observer when
the study opens, and read by invented reader accounts.
"""

from __future__ import annotations

import datetime as _dt
import secrets
import tempfile
from pathlib import Path

import numpy as np
from sqlalchemy import select

DEMO_DOSE_UGY = 100.0
DETECTORS = {"direct": "HSX-SE-0417 (direct, MAM2)", "indirect": "HSX-CS-2291 (indirect, MAM3)"}


def ensure_user(session, username: str, role: str, password: str | None = None) -> str:
    """Create (or reset the password of, ending its sessions) an account; return the password."""
    from webapp.models import User
    from webapp.security import hash_password

    from webapp.accounts import find_user

    password = password or secrets.token_urlsafe(9)
    user = find_user(session, username)
    if user is None:
        session.add(User(username=username, password_hash=hash_password(password), role=role))
    else:
        from webapp.accounts import end_sessions

        user.password_hash = hash_password(password)
        user.role = role
        user.active = True
        end_sessions(user)  # a new password ends the sessions signed in with the old one
    session.flush()
    return password


def create_demo_study(
    app,
    *,
    name: str = "Demo reader study, Harbourside (invented)",
    n_readers: int = 3,
    images_per_detector: int = 2,
    trials_per_reader: int = 40,
    n_practice: int = 3,
    repeat_fraction: float = 0.1,
    layout_path: str | None = None,
    seed: int = 2026,
    passwords: dict | None = None,
    reader_prefix: str = "reader",
    show_feedback: bool = False,
    open_study: bool = True,
) -> dict:
    """Create accounts and a reader study on simulated images; return {"study_id", "credentials"}."""
    from scorer.detector import detector_model, simulate
    from scorer.images import save_conversion
    from scorer.workflow import load_layout, write_simulated
    from webapp import services
    from webapp.models import Enrolment, Study, StudyImage, User
    from webapp.security import db

    passwords = dict(passwords or {})
    with app.app_context():
        s = db()
        creds = {"coordinator": ensure_user(s, "coordinator", "coordinator", passwords.get("coordinator"))}
        readers = [f"{reader_prefix}{i + 1}" for i in range(n_readers)]
        for r in readers:
            creds[r] = ensure_user(s, r, "reader", passwords.get(r))
        layout = load_layout(layout_path) if layout_path else load_layout()
        coord = s.execute(select(User).where(User.username == "coordinator")).scalars().one()
        study = Study(
            name=name,
            created_by=coord.id,
            layout_file=str(layout.source_path),
            layout_name=layout.name,
            m_alternatives=max(t.m_alternatives for t in layout.targets),
            trials_per_reader=trials_per_reader,
            seed=seed,
            repeat_fraction=repeat_fraction,
            n_practice=n_practice,
            show_feedback=show_feedback,
            observer="npwe",
        )
        s.add(study)
        s.flush()
        store = Path(app.config["STORE_DIR"])
        with tempfile.TemporaryDirectory() as tmp:
            seeds = np.random.SeedSequence(seed).spawn(2 * images_per_detector)
            k = 0
            for det, label in DETECTORS.items():
                model = detector_model(det)
                conv = store / "conversions" / f"demo-{det}.toml"
                conv.parent.mkdir(parents=True, exist_ok=True)
                save_conversion(model.conversion_function(), conv)  # whole or absent (a running server may read it)
                for i in range(images_per_detector):
                    sim = simulate(
                        model, "phantom", DEMO_DOSE_UGY, np.random.default_rng(seeds[k]), small=True, layout=layout
                    )
                    k += 1
                    acquired = _dt.datetime(2026, 11, 30, 7, 30) + _dt.timedelta(minutes=2 * i)
                    path = write_simulated(sim, Path(tmp), f"{det}-{i + 1:02d}", acquired)
                    with open(path, "rb") as fh:
                        digest, stored = services.store_bytes(fh, ".dcm", store, 1 << 30, path.name)
                    s.add(
                        StudyImage(
                            study_id=study.id,
                            sha256=digest,
                            stored_name=stored.name,
                            code=f"img-{digest[:10]}",
                            detector=label,
                            conversion_file=str(conv),
                            label=path.name,
                        )
                    )
        for r in readers:
            uid = s.execute(select(User.id).where(User.username == r)).scalar_one()
            s.add(Enrolment(study_id=study.id, user_id=uid))
        s.flush()
        s.refresh(study)
        if open_study:
            services.open_study(s, study, store)
            study.status = "open"
            from webapp.models import utcnow

            study.opened_at = utcnow()
        s.commit()
        return {"study_id": study.id, "credentials": creds}
