"""Which trial a reader sees next, and what a stored response changes: the web app's side of adaptive placement.

A study opened by this release builds no schedule in advance.  When a reader asks for the next trial and has
none waiting, one is made (:func:`next_trial`):

1. first the practice trials, from the practice images only (never scored): the most visible targets of each
   diameter asked for, easiest first;
2. then the scored trials: the cell (detector × diameter) comes from :func:`scorer.study.next_cell` (balanced,
   in a random order, so neither the detector nor the diameter of the next trial can be foreseen), the contrast
   from the reader's adaptive state for that cell (:func:`scorer.study.next_level`: Psi by default, QUEST or
   constant stimuli as the study says) among the levels that still have a region this reader has not seen, the
   region at random among those;
3. last the repeats (intra-reader agreement): a seeded random subset of the reader's own scored trials, each
   shown again with a new tile order.

Every trial gets its own random tile order (screen position → site), so the true site's place on screen is
uniform over the M places and independent of the plate.  The random draws are seeded by (study seed, reader,
position in the sequence): a study can be replayed.  The adaptive states live in ``adaptive_cells`` (JSON,
:mod:`scorer.study.adaptive`) and change in the same transaction as the response they learn from
(:func:`record_response`), guarded by their trial count, so a restarted server resumes them and a response
stored once changes them once.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
from sqlalchemy import func, select, update
from sqlalchemy.exc import IntegrityError

from scorer.errors import LimenError
from webapp.models import AdaptiveCell, Region, Response, Study, StudyImage, Trial


def _rng(study: Study, *key: int) -> np.random.Generator:
    return np.random.default_rng([int(study.seed), *map(int, key)])


def _first_open(s, study_id: int, reader_id: int) -> Trial | None:
    return (
        s.execute(
            select(Trial)
            .outerjoin(Response, Response.trial_id == Trial.id)
            .where(Trial.study_id == study_id, Trial.reader_id == reader_id, Response.id.is_(None))
            .order_by(Trial.seq)
            .limit(1)
        )
        .scalars()
        .first()
    )


def next_trial(s, study: Study, reader_id: int) -> Trial | None:
    """The reader's next unanswered trial, made now if none is waiting; None when the reader has finished.

    Two requests at once (two tabs) may both try to make trial n: the unique (study, reader, seq) lets one in,
    the other rolls back and finds it."""
    for _ in range(8):
        t = _first_open(s, study.id, reader_id)
        if t is not None or not study.placement:
            return t
        try:
            made = _extend(s, study, reader_id)
            if not made:
                s.commit()
                return None
            s.commit()
        except IntegrityError:
            s.rollback()
    raise LimenError("the next trial could not be placed (too many requests at once); try again")


def _new_trial(study, reader_id, seq, region, m, rng, *, practice=False, repeat=0) -> Trial:
    from secrets import token_hex

    return Trial(
        public_id=token_hex(12),
        study_id=study.id,
        reader_id=reader_id,
        seq=seq,
        region_id=region.id,
        practice=practice,
        repeat=repeat,
        tile_order=json.dumps([int(i) for i in rng.permutation(m)]),
    )


def _extend(s, study: Study, reader_id: int) -> bool:
    """Add the reader's next trial(s); False when there is nothing left to add."""
    last = s.scalar(select(func.max(Trial.seq)).where(Trial.study_id == study.id, Trial.reader_id == reader_id))
    if last is None and int(study.n_practice or 0) > 0:
        s.add_all(_practice_trials(s, study, reader_id))
        s.flush()
        return True
    seq = 0 if last is None else int(last) + 1
    states, want, rows = cell_states(s, study, reader_id)
    rng = _rng(study, 4, reader_id, seq)
    from scorer.study.adaptive import next_cell, next_level

    while True:
        key = next_cell(states, rng, want)
        if key is None:
            return _add_repeats(s, study, reader_id, seq)
        detector, diameter = key
        unseen = _unseen_regions(s, study, reader_id, detector, diameter)
        if unseen:
            break
        want[key] = states[key].n_trials  # every region of the cell shown: the cell is finished
    level = next_level(states[key], rng, allowed=sorted(unseen))
    pool = sorted(unseen[min(unseen, key=lambda c: abs(c - level))], key=lambda r: r.id)
    region = pool[int(rng.integers(len(pool)))]
    s.add(_new_trial(study, reader_id, seq, region, len(region.sites), rng))
    s.flush()
    return True


def plan_cells(study: Study) -> dict[tuple[str, float], int]:
    """{(detector, diameter): trials per reader} of the study's plan."""
    plan = json.loads(study.plan_json) if study.plan_json else {"cells": []}
    return {(c["detector"], float(c["diameter_mm"])): int(c["n_trials"]) for c in plan["cells"]}


def cell_states(s, study: Study, reader_id: int):
    """The reader's adaptive state of every cell (made on first use), the trials wanted per cell, and the rows."""
    from scorer.study.adaptive import new_state, state_from_json

    want = plan_cells(study)
    rows = {
        (c.detector, float(c.diameter_mm)): c
        for c in s.execute(
            select(AdaptiveCell).where(AdaptiveCell.study_id == study.id, AdaptiveCell.reader_id == reader_id)
        ).scalars()
    }
    missing = [k for k in want if k not in rows]
    if missing:
        plan = _plan(study)
        levels = {float(r["diameter_mm"]): (r["levels"], int(r["m_alternatives"])) for r in plan["diameters"]}
        for det, d in missing:
            lv, m = levels[d]
            st = new_state(lv, m, study.placement or "psi")
            row = AdaptiveCell(
                study_id=study.id,
                reader_id=reader_id,
                detector=det,
                diameter_mm=d,
                state_json=json.dumps(st.to_json()),
                n_trials=0,
            )
            s.add(row)
            rows[(det, d)] = row
        s.flush()
    states = {k: state_from_json(json.loads(rows[k].state_json), "adaptive cell") for k in want}
    return states, dict(want), rows


def _seen_region_ids(s, study_id: int, reader_id: int) -> set[int]:
    return set(
        s.execute(select(Trial.region_id).where(Trial.study_id == study_id, Trial.reader_id == reader_id)).scalars()
    )


def _unseen_regions(s, study, reader_id, detector, diameter) -> dict[float, list]:
    """{contrast: regions} of a cell on scored images that the reader has not been shown."""
    seen = _seen_region_ids(s, study.id, reader_id)
    regions = (
        s.execute(
            select(Region)
            .join(StudyImage, StudyImage.id == Region.image_id)
            .where(
                Region.study_id == study.id,
                StudyImage.detector == detector,
                StudyImage.practice.is_(False),
                Region.diameter_mm == diameter,
                Region.tiles_json.is_not(None),
            )
        )
        .scalars()
        .all()
    )
    out: dict[float, list] = {}
    for r in regions:
        if r.id not in seen:
            out.setdefault(float(r.contrast), []).append(r)
    return out


def _practice_trials(s, study: Study, reader_id: int) -> list[Trial]:
    """Practice trials from the practice images only: each diameter's most visible targets, easiest first."""
    regions = (
        s.execute(
            select(Region)
            .join(StudyImage, StudyImage.id == Region.image_id)
            .where(Region.study_id == study.id, StudyImage.practice.is_(True), Region.tiles_json.is_not(None))
        )
        .scalars()
        .all()
    )
    if not regions:
        raise LimenError("the study has no practice images: practice trials cannot be shown")
    by_cell: dict[tuple[float, float], list] = {}
    for r in regions:
        by_cell.setdefault((float(r.diameter_mm), float(r.contrast)), []).append(r)
    diameters = sorted({d for d, _ in by_cell}, reverse=True)
    ranked = {d: sorted((c for dd, c in by_cell if dd == d), reverse=True) for d in diameters}
    order = [(d, ranked[d][k]) for k in range(max(map(len, ranked.values()))) for d in diameters if k < len(ranked[d])]
    rng = _rng(study, 5, reader_id)
    out = []
    for seq in range(int(study.n_practice)):
        pool = sorted(by_cell[order[seq % len(order)]], key=lambda r: r.id)
        region = pool[int(rng.integers(len(pool)))]
        out.append(_new_trial(study, reader_id, seq, region, len(region.sites), rng, practice=True))
    return out


def _add_repeats(s, study: Study, reader_id: int, seq: int) -> bool:
    """Once every cell is finished: the repeats (made once), or False when they exist or none are wanted."""
    plan = _plan(study)
    if not plan.get("n_repeats"):
        return False
    have = s.scalar(
        select(func.count(Trial.id)).where(Trial.study_id == study.id, Trial.reader_id == reader_id, Trial.repeat > 0)
    )
    if have:
        return False
    firsts = (
        s.execute(
            select(Trial)
            .where(
                Trial.study_id == study.id,
                Trial.reader_id == reader_id,
                Trial.practice.is_(False),
                Trial.repeat == 0,
            )
            .order_by(Trial.seq)
        )
        .scalars()
        .all()
    )
    rng = _rng(study, 6, reader_id)
    n = min(int(plan["n_repeats"]), len(firsts))
    if n == 0:
        return False
    pick = [firsts[i] for i in rng.permutation(len(firsts))[:n]]
    for k, t in enumerate(pick):
        s.add(_new_trial(study, reader_id, seq + k, t.region, len(t.region.sites), rng, repeat=1))
    s.flush()
    return True


def _plan(study: Study) -> dict[str, Any]:
    """The plan the design gate made when the study opened (an adaptive study always has one)."""
    if study.plan_json is None:
        raise LimenError(f"study {study.id} is placed adaptively but has no plan; re-open it")
    plan: dict[str, Any] = json.loads(study.plan_json)
    return plan


def reader_totals(study: Study) -> tuple[int, int] | None:
    """(practice trials, scored trials) every reader of the study reads: from the plan for a study placed
    adaptively (its trials are made as the reader goes), None for one with a fixed schedule."""
    plan = json.loads(study.plan_json) if study.plan_json else None
    if not study.placement or plan is None:
        return None
    return int(study.n_practice or 0), int(plan["total"])


# --------------------------------------------------------------------------- responses
def record_response(s, trial: Trial, study: Study, chosen_site: int, **fields) -> Response:
    """Store the response (once: the unique trial id), and in the same transaction teach the reader's adaptive
    state of the trial's cell (first readings of scored trials only).  Raises IntegrityError for a second
    response to the trial, :class:`StaleState` when the state changed under it (a concurrent answer)."""
    region = trial.region
    correct = int(chosen_site) == int(region.true_site)
    resp = Response(trial_id=trial.id, chosen_site=int(chosen_site), correct=correct, **fields)
    s.add(resp)
    s.flush()  # the unique trial id is checked here: a second response stops before the state is touched
    if study.placement and not trial.practice and int(trial.repeat) == 0:
        _teach(s, study, trial, region, correct)
    s.commit()
    return resp


class StaleState(Exception):
    """The adaptive state changed between reading and writing it (answered elsewhere at the same moment)."""


def _teach(s, study: Study, trial: Trial, region: Region, correct: bool) -> None:
    from scorer.study.adaptive import state_from_json
    from scorer.study.adaptive import update as update_state

    det = s.scalar(select(StudyImage.detector).where(StudyImage.id == region.image_id))
    row = (
        s.execute(
            select(AdaptiveCell).where(
                AdaptiveCell.study_id == study.id,
                AdaptiveCell.reader_id == trial.reader_id,
                AdaptiveCell.detector == det,
                AdaptiveCell.diameter_mm == float(region.diameter_mm),
            )
        )
        .scalars()
        .first()
    )
    if row is None:  # a cell outside the plan (cannot happen for trials this module made)
        return
    old = int(row.n_trials)
    state = update_state(state_from_json(json.loads(row.state_json), "adaptive cell"), region.contrast, correct)
    done = s.execute(
        update(AdaptiveCell)
        .where(AdaptiveCell.id == row.id, AdaptiveCell.n_trials == old)
        .values(state_json=json.dumps(state.to_json()), n_trials=old + 1)
        .execution_options(synchronize_session=False)
    )
    if done.rowcount != 1:
        s.rollback()
        raise StaleState()
    s.expire(row)
