"""Reader pages: the display check, the reading screen and its small JSON/binary API.

What a reader's browser receives about a trial: an opaque trial id, whether it is practice, its position
in the sequence, the number of tiles and their size, the study's own window/level (the same for every trial),
and the tiles' linear 16-bit pixels in the trial's random screen order (:mod:`webapp.placement`). Never the
image, detector, file, target, contrast, diameter, where the sites lie on the plate or which tile holds the
disc — the true position is sent (as feedback, when the study allows it, and in practice) only in the answer to
the stored response.  Trials of studies opened by an earlier release show one region with every site, as then.
"""

from __future__ import annotations

import json
import math
import secrets

from flask import (
    Blueprint,
    abort,
    current_app,
    jsonify,
    redirect,
    render_template,
    request,
    session,
    url_for,
)
from flask import (
    Response as FlaskResponse,
)
from flask_login import current_user
from sqlalchemy.exc import IntegrityError

from webapp import display_check, pixels, placement, queries
from webapp.models import ReadingSession, Study, Trial, db
from webapp.security import role_required

bp = Blueprint("reading", __name__, url_prefix="/reading")
reader_only = role_required("reader")


def _session_key(study_id: int) -> str:
    return f"reading-session-{study_id}"


def _enrolled(study_id: int, states=("open", "closed")) -> Study:
    """The study, if the signed-in reader is enrolled in it and it has been opened; else 404."""
    st = db().get(Study, study_id)
    if st is None or st.status not in states:
        abort(404)
    if not queries.is_enrolled(db(), study_id, current_user.id):
        abort(404)
    return st


def _own_trial(public_id: str) -> Trial:
    t = queries.trial_by_public_id(db(), public_id)
    if t is None or t.reader_id != current_user.id:
        abort(404)
    return t


def _passed_session(study_id: int) -> ReadingSession | None:
    sid = session.get(_session_key(study_id))
    if not sid:
        return None
    rs = db().get(ReadingSession, sid)
    if rs is None or rs.reader_id != current_user.id or rs.study_id != study_id or not rs.check_passed:
        return None
    return rs


def _counts(study_id: int, study: Study | None = None) -> dict:
    """Trials and answers of the signed-in reader, practice apart (one query).  In a study placed as the reader
    goes, the totals come from its plan (the trials are made one at a time)."""
    out = queries.trial_counts(db(), study_id, current_user.id)
    st = study if study is not None else db().get(Study, study_id)
    totals = placement.reader_totals(st) if st is not None else None
    if totals is not None:
        out["practice_total"], out["total"] = totals
    return out


@bp.route("/")
@reader_only
def home():
    rows = queries.readers_studies(db(), current_user.id)
    studies = [{"study": st, **_counts(st.id, st)} for st in rows]
    return render_template("reading/home.html", studies=studies)


# --------------------------------------------------------------------------- display check
def _new_check(rs: ReadingSession) -> None:
    rs.check_site = secrets.randbelow(len(display_check.CHECK_SITES))
    rs.check_seed = secrets.randbelow(2**31)


@bp.route("/studies/<int:study_id>/check")
@reader_only
def check(study_id):
    st = _enrolled(study_id, ("open",))
    s = db()
    sid = session.get(_session_key(study_id))
    rs = s.get(ReadingSession, sid) if sid else None
    if rs is None or rs.reader_id != current_user.id or rs.study_id != study_id:
        number = queries.next_sitting_number(s, study_id, current_user.id)
        rs = ReadingSession(
            study_id=study_id,
            reader_id=current_user.id,
            number=number,
            check_site=0,
            check_seed=0,
            user_agent=(request.user_agent.string or "")[:300],
        )
        _new_check(rs)
        s.add(rs)
        s.commit()
        session[_session_key(study_id)] = rs.id
    return render_template(
        "reading/check.html", study=st, rs=rs, size=display_check.CHECK_SIZE, sites=display_check.CHECK_SITES
    )


@bp.route("/api/studies/<int:study_id>/check/pattern")
@reader_only
def check_pattern(study_id):
    _enrolled(study_id, ("open",))
    sid = session.get(_session_key(study_id))
    rs = db().get(ReadingSession, sid) if sid else None
    if rs is None or rs.reader_id != current_user.id:
        return jsonify(error="open the display check page first"), 409
    body = display_check.display_check_pattern(rs.check_site, rs.check_seed)
    return FlaskResponse(
        body,
        mimetype="application/octet-stream",
        headers={"X-Rows": str(display_check.CHECK_SIZE), "X-Cols": str(display_check.CHECK_SIZE)},
    )


def _whole(value: object) -> int:
    """``int(value)`` for a JSON number or string; TypeError or ValueError for anything else (as ``int`` raises)."""
    if not isinstance(value, (int, float, str)):
        raise TypeError(f"not a number: {type(value).__name__}")
    return int(value)


def _float(data, key, lo, hi):
    try:
        v = float(data.get(key))
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) and lo <= v <= hi else None


@bp.route("/api/studies/<int:study_id>/check", methods=["POST"])
@reader_only
def check_answer(study_id):
    _enrolled(study_id, ("open",))
    s = db()
    sid = session.get(_session_key(study_id))
    rs = s.get(ReadingSession, sid) if sid else None
    if rs is None or rs.reader_id != current_user.id:
        return jsonify(error="start the display check from its page"), 400
    data = request.get_json(silent=True)
    if not isinstance(data, dict):  # a JSON array or number was a 500 (no .get) before: now "site must be …"
        data = {}
    try:
        site = _whole(data.get("site"))
    except (TypeError, ValueError):
        return jsonify(error="site must be a whole number"), 400
    distance = _float(data, "viewing_distance_mm", 100, 2000)
    if distance is None:
        return jsonify(error="viewing distance must lie between 100 and 2000 mm"), 400
    rs.screen_width = int(_float(data, "screen_width", 1, 100000) or 0) or None
    rs.screen_height = int(_float(data, "screen_height", 1, 100000) or 0) or None
    rs.device_pixel_ratio = _float(data, "device_pixel_ratio", 0.1, 16)
    rs.browser_zoom = _float(data, "browser_zoom", 0.1, 16)
    rs.viewing_distance_mm = distance
    rs.check_attempts += 1
    passed = site == rs.check_site
    if passed:
        rs.check_passed = True
    else:
        _new_check(rs)
    s.commit()
    return jsonify(
        passed=passed, attempts=rs.check_attempts, next=url_for("reading.read", study_id=study_id) if passed else None
    )


# --------------------------------------------------------------------------- reading
@bp.route("/studies/<int:study_id>")
@reader_only
def read(study_id):
    st = _enrolled(study_id)
    if st.status == "closed":
        return render_template("reading/closed.html", study=st, **_counts(st.id, st))
    if _passed_session(study_id) is None:
        return redirect(url_for("reading.check", study_id=study_id))
    return render_template("reading/read.html", study=st)


@bp.route("/api/studies/<int:study_id>/next")
@reader_only
def next_trial(study_id):
    st = _enrolled(study_id)
    if st.status != "open":
        return jsonify(done=True, closed=True, **_counts(st.id, st))
    if st.placement and _passed_session(study_id) is None:
        return jsonify(error="pass the display check first"), 428  # trials are placed only for a checked sitting
    t = placement.next_trial(db(), st, current_user.id)
    counts = _counts(st.id, st)
    if t is None:
        return jsonify(done=True, closed=False, **counts)
    reg = t.region
    out = dict(
        done=False,
        trial=t.public_id,
        practice=bool(t.practice),
        number=counts["answered"] + (0 if t.practice else 1),
        practice_number=counts["practice_answered"] + 1 if t.practice else None,
        magnification=st.magnification,
        region_url=url_for("reading.region", public_id=t.public_id),
        response_url=url_for("reading.respond", public_id=t.public_id),
        **counts,
    )
    order = t.order
    if order is None:  # a trial of a study opened by an earlier release: one region with every site
        out.update(rows=st.region_rows, cols=st.region_cols, sites=reg.sites, m=len(reg.sites))
    else:  # M tiles in the trial's own order, each centred on its site; the study's window/level
        out.update(
            tiles=len(order),
            m=len(order),
            rows=reg.tile_px,
            cols=reg.tile_px,
            window=st.default_window,
            level=st.default_level,
        )
    return jsonify(out)


@bp.route("/api/trials/<public_id>/region")
@reader_only
def region(public_id):
    row = queries.trial_pixels_source(db(), public_id)
    if row is None or row.reader_id != current_user.id or row.status != "open":
        abort(404)
    store = current_app.config["STORE_DIR"]
    if row.tile_order:
        order = json.loads(row.tile_order)
        body = pixels.tiles_bytes(store, row.sha256, row.study_id, json.loads(row.tiles_json), order, row.tile_px)
        headers = {"X-Rows": str(row.tile_px), "X-Cols": str(row.tile_px), "X-Tiles": str(len(order))}
    else:
        body = pixels.region_bytes(
            store, row.sha256, row.study_id, row.row0, row.col0, row.region_rows, row.region_cols
        )
        headers = {"X-Rows": str(row.region_rows), "X-Cols": str(row.region_cols)}
    return FlaskResponse(body, mimetype="application/octet-stream", headers=headers)


@bp.route("/api/trials/<public_id>/response", methods=["POST"])
@reader_only
def respond(public_id):
    t = _own_trial(public_id)
    s = db()
    st = s.get(Study, t.study_id)
    if st is None:  # cannot happen while trials.study_id is a foreign key; a 404 rather than a 500 if it did
        abort(404)
    if st.status != "open":
        return jsonify(error="the study is closed"), 409
    rs = _passed_session(st.id)
    if rs is None:
        return jsonify(error="pass the display check first"), 428
    data = request.get_json(silent=True)
    if not isinstance(data, dict):
        return jsonify(error="send the response as JSON"), 400
    order = t.order
    m = len(order) if order else len(t.region.sites)
    key = "chosen_position" if order else "chosen_site"
    try:
        choice = _whole(data.get(key))
        ms = _whole(data.get("response_ms"))
        zoom = _whole(data.get("zoom", 1))
    except (TypeError, ValueError):
        return jsonify(error=f"{key}, response_ms and zoom must be whole numbers"), 400
    window, level = _float(data, "window", 1e-9, 1e6), _float(data, "level", -1e6, 1e6)
    if not 0 <= choice < m:
        return jsonify(error=f"{key} must lie in 0…{m - 1}"), 400
    if not 0 <= ms <= 6 * 3600 * 1000 or window is None or level is None or not 1 <= zoom <= 64:
        return jsonify(error="response_ms, window, level or zoom out of range"), 400
    if t.response is not None:
        return jsonify(error="this trial is already answered", duplicate=True), 409
    site = order[choice] if order else choice
    try:
        resp = placement.record_response(
            s,
            t,
            st,
            site,
            response_ms=ms,
            window=window,
            level=level,
            zoom=zoom,
            inverted=bool(data.get("inverted", False)),
            session_id=rs.id,
        )
    except IntegrityError:  # the same trial answered at the same moment from another tab
        s.rollback()
        return jsonify(error="this trial is already answered", duplicate=True), 409
    except placement.StaleState:
        return jsonify(error="the server was busy; the answer was not stored, send it again", retry=True), 503
    out: dict[str, object] = {"stored": True}
    if t.practice or st.show_feedback:
        # only now, with the response stored, may the truth leave the server
        true_site = int(t.region.true_site)
        if order:
            out["feedback"] = {"correct": bool(resp.correct), "true_position": order.index(true_site)}
        else:
            out["feedback"] = {"correct": bool(resp.correct), "true_site": true_site}
    return jsonify(out)
