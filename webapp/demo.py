"""The demo study of ``limen serve --demo`` (and the tests' and the load bench's studies).

Invented scenario: the breast-imaging unit of the "Harbourside Women's Health Centre (invented)" compares
its direct-conversion panel HSX-SE-0417 (room MAM2) with the indirect panel HSX-CS-2291 (room MAM3).
Images are simulated by :func:`scorer.detector.simulate` (``small=True``), scored by the model observer when
the study opens, and read by invented reader accounts.

The demo is designed to be estimable (issue 18): five readers, four scored images and one practice image per
panel, the four diameters 0.15, 0.25, 0.5 and 1.0 mm, Psi placement and a wanted 95 % CI of ±0.5 (ln) on each
pooled threshold; the design gate (:mod:`webapp.design`) plans the trials per reader per cell when it opens and
asks the model observer (NPWE) on the study's own images whether the readers can reach threshold within the
plate's contrasts: at 0.1 mm it warns for both panels (expected human thresholds 26–29 %, intervals reaching
past the plate's 37.1 %).  The panels are the mammography pair, for which NPWE predicts a tie at 0.15 mm; on
the demo's four images the model observer ranks the indirect panel ahead there by chance, and the simulated
readers follow it (DEVELOPERS.md).
:func:`read_as_simulated_readers` lets the built-in simulated readers read it to the end.
"""

from __future__ import annotations

import datetime as _dt
import json
import secrets
import tempfile
from pathlib import Path
from typing import cast

import numpy as np
from sqlalchemy import select

DEMO_DOSE_UGY = 100.0
DETECTORS = {"direct": "HSX-SE-0417 (direct, MAM2)", "indirect": "HSX-CS-2291 (indirect, MAM3)"}


def ensure_user(session, username: str, role: str, password: str | None = None) -> str:
    """Create (or reset the password of, ending its sessions) an account; return the password."""
    from webapp.accounts import find_user
    from webapp.models import User
    from webapp.security import hash_password

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


DEMO_DIAMETERS_MM = (0.15, 0.25, 0.5, 1.0)


def create_demo_study(
    app,
    *,
    name: str = "Demo reader study, Harbourside (invented)",
    n_readers: int = 5,
    images_per_detector: int = 4,
    practice_images_per_detector: int = 1,
    trials_per_reader: int | None = 600,
    n_practice: int = 4,
    repeat_fraction: float = 0.1,
    layout_path: str | None = None,
    diameters_mm=DEMO_DIAMETERS_MM,
    half_width_ln: float = 0.5,
    placement: str = "psi",
    seed: int = 2026,
    passwords: dict | None = None,
    reader_prefix: str = "reader",
    show_feedback: bool = False,
    open_study: bool = True,
) -> dict:
    """Create accounts and a reader study on simulated images; return {"study_id", "credentials"}.

    ``trials_per_reader`` is the most scored trials a reader may be asked (None: no limit); ``diameters_mm``
    None asks for every diameter of the layout.  Practice images (``practice_images_per_detector``, made only
    when practice trials are asked for) are never scored."""
    from scorer.detector import detector_model, simulate
    from scorer.images import save_conversion
    from scorer.workflow import load_layout, write_simulated
    from webapp import opening
    from webapp.content_store import store_bytes
    from webapp.models import Enrolment, Study, StudyImage, User, db

    passwords = dict(passwords or {})
    with app.app_context():
        s = db()
        creds = {"coordinator": ensure_user(s, "coordinator", "coordinator", passwords.get("coordinator"))}
        readers = [f"{reader_prefix}{i + 1}" for i in range(n_readers)]
        for r in readers:
            creds[r] = ensure_user(s, r, "reader", passwords.get(r))
        layout = load_layout(layout_path) if layout_path else load_layout()
        coord = s.execute(select(User).where(User.username == "coordinator")).scalars().one()
        if diameters_mm is not None:
            have = set(layout.diameters_mm)
            diameters_mm = [d for d in diameters_mm if d in have] or None
        study = Study(
            name=name,
            created_by=coord.id,
            layout_file=str(layout.source_path),
            layout_name=layout.name,
            m_alternatives=max(t.m_alternatives for t in layout.targets),
            trials_per_reader=int(trials_per_reader) if trials_per_reader else 100000,
            placement=placement,
            diameters_json=json.dumps([float(d) for d in diameters_mm]) if diameters_mm else None,
            half_width_ln=float(half_width_ln),
            seed=seed,
            repeat_fraction=repeat_fraction,
            n_practice=n_practice,
            show_feedback=show_feedback,
            observer="npwe",
        )
        s.add(study)
        s.flush()
        store = Path(app.config["STORE_DIR"])
        n_pr = int(practice_images_per_detector) if n_practice else 0
        with tempfile.TemporaryDirectory() as tmp:
            seeds = np.random.SeedSequence(seed).spawn(2 * (images_per_detector + n_pr))
            k = 0
            for det, label in DETECTORS.items():
                model = detector_model(det)
                conv = store / "conversions" / f"demo-{det}.toml"
                conv.parent.mkdir(parents=True, exist_ok=True)
                save_conversion(model.conversion_function(), conv)  # whole or absent (a running server may read it)
                for i in range(images_per_detector + n_pr):
                    practice = i >= images_per_detector
                    sim = simulate(
                        model, "phantom", DEMO_DOSE_UGY, np.random.default_rng(seeds[k]), small=True, layout=layout
                    )
                    k += 1
                    acquired = _dt.datetime(2026, 11, 30, 7, 30) + _dt.timedelta(minutes=2 * i)
                    stem = f"{det}-practice-{i - images_per_detector + 1:02d}" if practice else f"{det}-{i + 1:02d}"
                    path = write_simulated(sim, Path(tmp), stem, acquired)
                    with open(path, "rb") as fh:
                        digest, stored = store_bytes(fh, ".dcm", store, 1 << 30, path.name)
                    s.add(
                        StudyImage(
                            study_id=study.id,
                            sha256=digest,
                            stored_name=stored.name,
                            code=f"img-{digest[:10]}",
                            detector=label,
                            conversion_file=str(conv),
                            label=path.name,
                            practice=practice,
                        )
                    )
        for r in readers:
            uid = s.execute(select(User.id).where(User.username == r)).scalar_one()
            s.add(Enrolment(study_id=study.id, user_id=uid))
        s.flush()
        s.refresh(study)
        if open_study:
            opening.open_study(s, study, store)
            study.status = "open"
            from webapp.models import utcnow

            study.opened_at = utcnow()
        s.commit()
        return {"study_id": study.id, "credentials": creds}


def read_as_simulated_readers(app, study_id: int, *, seed: int = 0, population=None, readers=None):
    """The built-in simulated readers read an open study to the end; return the readers drawn (their factor F:
    each one's true threshold is F × the model observer's).

    Each enrolled reader (or each one named in ``readers``) becomes an invented reader of
    :mod:`scorer.study.reader_model` (:func:`~scorer.study.reader_model.draw_readers`): in every trial they see the
    model observer's responses at the target's sites on that image (stored when the study opened), the signal
    lowered to their efficiency and fresh internal noise added (:func:`~scorer.study.reader_model.simulated_choice`).
    The trials come from :func:`webapp.placement.next_trial` and the answers go through
    :func:`webapp.placement.record_response` — the code the reading API runs — so the adaptive placement, the
    tile orders and the exactly-once storage are the study's own.  For the demo, tests and benches only: these
    are not people.
    """
    import io

    import pandas as pd

    from scorer.study.reader_model import ReaderPopulation, draw_readers, response_calibration, simulated_choice
    from webapp import placement
    from webapp.models import Enrolment, Study, StudyImage, User, db

    rng = np.random.default_rng(seed)
    with app.app_context():
        s = db()
        st = s.get(Study, study_id)
        if st is None or st.status != "open" or not st.model_responses_csv:
            raise ValueError(f"study {study_id} is not open, or was opened without the model's responses")
        resp = pd.read_csv(io.StringIO(st.model_responses_csv), dtype={"image": str, "target": str, "detector": str})
        resp = resp.sort_values(["image", "target", "site"])
        practice = {im.code for im in st.images if im.practice}
        by_trial, calib = {}, {}
        for key, g in resp.groupby(["detector", "diameter_mm"]):
            det, diam = cast(tuple[str, float], key)
            m = int(g["m_alternatives"].iloc[0])
            scored = g[~g["image"].isin(practice)]
            r = scored["response"].to_numpy().reshape(-1, m)
            sig = scored["is_signal"].to_numpy(bool).reshape(-1, m)
            calib[(det, float(diam))] = response_calibration(r, sig, scored["contrast"].to_numpy()[::m])
        for (img, tid), g in resp.groupby(["image", "target"]):
            by_trial[(img, tid)] = (g["response"].to_numpy(), g["is_signal"].to_numpy(bool))
        names = sorted(
            s.execute(
                select(User.username).join(Enrolment, Enrolment.user_id == User.id).where(Enrolment.study_id == st.id)
            ).scalars()
        )
        names = [n for n in names if readers is None or n in readers]
        drawn = draw_readers(rng, len(names), population or ReaderPopulation()).assign(reader=names)
        images = s.execute(select(StudyImage).where(StudyImage.study_id == st.id)).scalars()
        codes = {im.id: (im.code, im.detector) for im in images}
        for who in drawn.itertuples(index=False):
            uid = s.execute(select(User.id).where(User.username == who.reader)).scalar_one()
            while (t := placement.next_trial(s, st, uid)) is not None:
                reg = t.region
                code, det = codes[reg.image_id]
                r_trial, sig_trial = by_trial[(code, reg.target)]
                gain, sigma_ext = calib[(det, float(reg.diameter_mm))]
                site = simulated_choice(r_trial, sig_trial, reg.contrast, gain, sigma_ext, who, rng)
                placement.record_response(
                    s,
                    t,
                    st,
                    site,
                    response_ms=int(round(rng.lognormal(np.log(2500), 0.4))),
                    window=float(st.default_window or 1.0),
                    level=float(st.default_level or 0.0),
                    zoom=1,
                    inverted=False,
                )
        return drawn
