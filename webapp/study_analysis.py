"""The study's analysis: :func:`scorer.study.analyse_study` on the stored responses, its report, cached by hash."""

from __future__ import annotations

import hashlib

from scorer.errors import LimenError
from webapp.export import model_frame, responses_frame


def run_analysis(session, study, n_boot: int, seed: int = 0, progress=None):
    """Analyse the stored responses with :func:`scorer.study.analyse_study` (model observer included);
    return the :class:`webapp.models.AnalysisRun` (cached by the responses' hash).

    ``progress``, if given, is called as ``progress(text, fraction)`` at each step (fraction None while the
    statistics run: their steps are named, not measured)."""
    from sqlalchemy import select

    from scorer.reports.html import dumps
    from scorer.reports.study import report_html
    from scorer.study import analyse_study, validate_trials
    from webapp.models import AnalysisRun

    say = progress or (lambda text, fraction=None: None)
    say("reading the stored responses", 0.02)
    df = responses_frame(session, study)
    if df.empty:
        raise LimenError("no responses stored yet: nothing to analyse")
    csv_text = df.to_csv(index=False)
    digest = hashlib.sha256(f"{n_boot}|{seed}|".encode() + csv_text.encode()).hexdigest()
    cached = (
        session.execute(
            select(AnalysisRun).where(AnalysisRun.study_id == study.id, AnalysisRun.responses_sha256 == digest)
        )
        .scalars()
        .first()
    )
    if cached is not None:
        return cached
    trials = validate_trials(df, source=f"study {study.id} responses")
    model_raw = model_frame(study)
    model = (
        validate_trials(model_raw, source=f"study {study.id} model-observer trials")
        if model_raw is not None and len(model_raw)
        else None
    )
    say(f"analysing {len(df)} responses ({n_boot} bootstrap resamples)", 0.05)
    a = analyse_study(trials, model, by="detector", n_boot=n_boot, seed=seed, progress=lambda text: say(text))
    say("writing the report", 0.95)
    meta = {
        "study": study.name,
        "layout": study.layout_name,
        "observer": study.observer,
        "responses_sha256": hashlib.sha256(csv_text.encode()).hexdigest(),
        "n_responses": int(len(df)),
        "seed": seed,
        "n_boot": n_boot,
    }
    run = AnalysisRun(
        study_id=study.id,
        responses_sha256=digest,
        n_responses=int(len(df)),
        report_html=report_html(a, meta),
        analysis_json=dumps({**a.to_json(), "meta": meta}),
    )
    session.add(run)
    return run
