"""Study logistics of the web app: creating a study in the browser forms, each reader's sequence, the pixels the
reader sees, export, resume and analysis."""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from webapp_helpers import (
    MINI,
    PASSWORDS,
    accounts_app,
    answer,
    darkest_tile,
    demo_app,
    login,
    make_app,
    pass_display_check,
    read_all,
    reader_client,
    simulated_study_files,
    wait_job,
)

from scorer.phantom import load_layout


def test_each_reader_reads_practice_then_scored_trials_then_repeats(tmp_path):
    """Trials are placed as each reader goes: practice first, then the scored trials (each region at most once),
    then the repeats — second readings of the reader's own scored trials, each with a new tile order."""
    app, sid = demo_app(tmp_path, n_readers=3, n_practice=2, repeat_fraction=0.3)
    from webapp.models import Study, Trial, User, db

    for name in ("reader1", "reader2", "reader3"):
        c, tok = reader_client(app, sid, name)
        read_all(c, sid, tok, chooser=lambda t, d: int(t["trial"], 16) % t["m"])
    with app.app_context():
        plan = json.loads(db().get(Study, sid).plan_json)
        orders = {}
        for u in db().query(User).filter(User.username.like("reader%")).all():
            ts = db().query(Trial).filter(Trial.study_id == sid, Trial.reader_id == u.id).order_by(Trial.seq).all()
            seq = [(t.region_id, t.practice, t.repeat) for t in ts]
            assert len(seq) == 2 + plan["total"] and [t.seq for t in ts] == list(range(len(seq)))
            assert [p for _, p, _ in seq[:2]] == [True, True] and not any(p for _, p, _ in seq[2:])
            main = [r for r, p, rep in seq if not p and rep == 0]
            reps = [r for r, p, rep in seq if rep == 1]
            assert len(main) == plan["n_scored"] == len(set(main))  # each region once
            assert len(reps) == plan["n_repeats"] == round(0.3 * plan["n_scored"]) and set(reps) <= set(main)
            assert seq[-len(reps) :] == [(r, False, 1) for r in reps]  # repeats come after the first readings
            orders[u.username] = [r for r, _, _ in seq]
    assert len({tuple(o) for o in orders.values()}) == 3  # each reader their own sequence


def test_reader_pixels_are_the_linear_image_in_air_kerma(tmp_path):
    """The region the browser receives is the image linearised by the panel's conversion function, as 16-bit
    values on one study-wide scale: the open plate reads the simulated 100 µGy (simulator input; the plate's
    background transmits fully), and the crop equals scorer's own load_image to within one 16-bit step."""
    app, sid = demo_app(tmp_path)
    from scorer.images import load_conversion, load_image
    from webapp.models import Region, Study, StudyImage, Trial, db

    c, tok = reader_client(app, sid)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    data = np.frombuffer(c.get(t["region_url"]).data, "<u2").reshape(t["tiles"], t["rows"], t["cols"])
    assert data.dtype == np.uint16 and t["rows"] == t["cols"] and t["rows"] % 2 == 1
    with app.app_context():
        st = db().get(Study, sid)
        tr = db().query(Trial).filter(Trial.public_id == t["trial"]).one()
        reg = db().get(Region, tr.region_id)
        im = db().get(StudyImage, reg.image_id)
        scale = st.ugy_per_unit
        ref = load_image(
            Path(app.config["STORE_DIR"]) / im.stored_name, conversion=load_conversion(im.conversion_file)
        ).pixels
        boxes, order = json.loads(reg.tiles_json), json.loads(tr.tile_order)
    kerma = data * scale
    assert np.median(kerma) == pytest.approx(100.0, rel=0.02)
    n = t["rows"]
    for k, site in enumerate(order):  # screen position k shows the tile of site order[k], centred on the site
        r0, c0 = boxes[site]
        crop = ref[r0 : r0 + n, c0 : c0 + n]
        assert np.max(np.abs(kerma[k] - crop)) <= 0.5 * scale + 1e-9
        assert np.allclose([r0 + n // 2, c0 + n // 2], np.round(np.asarray(reg.sites[site]) + [reg.row0, reg.col0]))
    # a 16-bit step is far finer than the quantum noise, so W/L in the browser loses nothing to rounding
    assert scale < 0.01 * np.std(crop)


def test_export_is_what_limen_analyse_reads(tmp_path):
    app, sid = demo_app(tmp_path)
    from scorer.cli import main
    from scorer.study import validate_trials
    from scorer.study.trials import OPTIONAL_COLUMNS, TRIAL_COLUMNS

    sent = {}
    for name in ("reader1", "reader2", "reader3"):
        c = app.test_client()
        tok = login(c, name)
        pass_display_check(c, sid, tok)
        done = read_all(c, sid, tok, chooser=lambda t, d: int(t["trial"], 16) % t["m"])
        sent[name] = [s for t, s in done if not t["practice"]]
    cc = app.test_client()
    login(cc, "coordinator")
    r = cc.get(f"/coordinator/studies/{sid}/responses.csv")
    assert r.status_code == 200 and r.mimetype == "text/csv" and "attachment" in r.headers["Content-Disposition"]
    df = pd.read_csv(io.StringIO(r.text), dtype={"reader": str, "image": str, "target": str})
    extra = ["window", "level", "timestamp", "seq", "tile_order", "chosen_position", "true_position"]
    assert list(df.columns) == TRIAL_COLUMNS + OPTIONAL_COLUMNS + extra
    for name, positions in sent.items():
        assert df[df["reader"] == name]["chosen_position"].tolist() == positions  # exactly the responses given
    assert (df["correct"] == (df["chosen_site"] == df["true_site"])).all()
    # each trial's M is its target's number of candidate sites on the mini plate (3-site or 5-site cells)
    m_of = {t.id: t.m_alternatives for t in load_layout(MINI).targets}
    assert set(df["repeat"]) == {0, 1} and (df["n_alternatives"] == df["target"].map(m_of)).all()
    assert pd.to_datetime(df["timestamp"]).notna().all()
    validate_trials(df)
    csv = tmp_path / "responses.csv"
    csv.write_text(r.text)
    model = tmp_path / "model.csv"
    model.write_text(cc.get(f"/coordinator/studies/{sid}/model.csv").text)
    res = CliRunner().invoke(main, ["analyse", str(csv), "--model", str(model), "--n-boot", "20", "--json"])
    assert res.exit_code == 0, res.output


def test_leave_and_resume(tmp_path):
    app, sid = demo_app(tmp_path, n_practice=1, repeat_fraction=0)
    c, tok = reader_client(app, sid)
    first = read_all(c, sid, tok, limit=3)
    c.post("/logout", data={"csrf_token": tok})
    assert c.get(f"/reading/api/studies/{sid}/next").status_code == 401
    c2 = app.test_client()  # another day, another browser
    tok2 = login(c2, "reader1")
    assert c2.get(f"/reading/studies/{sid}").status_code == 302  # display check again first
    pass_display_check(c2, sid, tok2)
    nxt = c2.get(f"/reading/api/studies/{sid}/next").json
    assert nxt["answered"] == 2 and nxt["number"] == 3 and not nxt["practice"]
    rest = read_all(c2, sid, tok2)
    ids = [t["trial"] for t, _ in first + rest]
    assert len(ids) == len(set(ids)) == 1 + nxt["total"]
    cc = app.test_client()
    login(cc, "coordinator")
    df = pd.read_csv(io.StringIO(cc.get(f"/coordinator/studies/{sid}/responses.csv").text))
    assert df["session"].tolist() == [1, 1] + [2] * (nxt["total"] - 2)
    assert "passed" in cc.get(f"/coordinator/studies/{sid}").text


def test_a_closed_study_takes_no_more_responses(tmp_path):
    app, sid = demo_app(tmp_path)
    c, tok = reader_client(app, sid)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    cc = app.test_client()
    ctok = login(cc, "coordinator")
    assert cc.post(f"/coordinator/studies/{sid}/close", data={"csrf_token": ctok}).status_code == 302
    assert answer(c, tok, t).status_code == 409
    assert c.get(f"/reading/api/studies/{sid}/next").json["closed"] is True
    assert "closed" in c.get(f"/reading/studies/{sid}").text


def test_feedback_after_the_response_when_the_coordinator_allows_it(tmp_path):
    app, sid = demo_app(tmp_path, show_feedback=True, n_practice=0)
    c, tok = reader_client(app, sid)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    fb = answer(c, tok, t, site=1).json["feedback"]
    assert fb["correct"] == (fb["true_position"] == 1)


def test_display_check_needs_the_right_site_and_records_the_screen(tmp_path):
    app, sid = demo_app(tmp_path)
    from webapp.models import ReadingSession, db

    c = app.test_client()
    tok = login(c, "reader1")
    c.get(f"/reading/studies/{sid}/check")
    with app.app_context():
        right = db().query(ReadingSession).one().check_site
    r = c.post(
        f"/reading/api/studies/{sid}/check",
        json={"site": (right + 1) % 4, "viewing_distance_mm": 600},
        headers={"X-CSRFToken": tok},
    )
    assert r.json["passed"] is False
    assert c.get(f"/reading/studies/{sid}").status_code == 302  # still no reading
    assert (
        c.post(
            f"/reading/api/studies/{sid}/check",
            json={"site": 0, "viewing_distance_mm": 5},
            headers={"X-CSRFToken": tok},
        ).status_code
        == 400
    )
    # a body that is JSON but not an object, or a site that is not a number, is refused (a JSON array was a 500)
    for body in ([right], 7, {"site": [right], "viewing_distance_mm": 600}, {"site": None, "viewing_distance_mm": 600}):
        r = c.post(f"/reading/api/studies/{sid}/check", json=body, headers={"X-CSRFToken": tok})
        assert r.status_code == 400 and r.json["error"] == "site must be a whole number", body
    pass_display_check(c, sid, tok)
    with app.app_context():
        rs = db().query(ReadingSession).one()
        assert rs.check_passed and rs.check_attempts == 2 and rs.viewing_distance_mm == 550
        assert rs.screen_width == 1920 and rs.device_pixel_ratio == 1
    # the pattern: a disc 3 of 255 grey levels above a dark field at one of the four sites
    from webapp.display_check import CHECK_SITES, display_check_pattern

    px = np.frombuffer(display_check_pattern(2, 7), "<u2").reshape(192, 192) / 257
    levels = [px[r, c] for r, c in CHECK_SITES]
    assert levels[2] - levels[0] == pytest.approx(3) and levels[0] == levels[1] == levels[3] < 40


def test_coordinator_builds_a_study_through_the_forms(tmp_path):
    app = accounts_app(tmp_path, ("coordinator", "reader1", "reader2", "reader3"))
    from webapp.models import Region, Study, User, db

    with app.app_context():
        rids = [str(u.id) for u in db().query(User).filter(User.username.like("reader%"))]
    c = app.test_client()
    tok = login(c, "coordinator")
    layout_bytes = MINI.read_bytes()
    r = c.post(
        "/coordinator/studies/new",
        data={
            "csrf_token": tok,
            "name": "Room 2 vs room 3",
            "layout_file": (io.BytesIO(layout_bytes), "mini.toml"),
            "trials_per_reader": "100",
            "half_width_ln": "2",
            "seed": "5",
            "repeat_percent": "25",
            "n_practice": "0",
            "observer": "npw",
            "readers": rids,
        },
        content_type="multipart/form-data",
    )
    assert r.status_code == 302, r.text
    sid = int(r.headers["Location"].split("/")[-1])
    files = simulated_study_files(tmp_path, n=2)  # 2 images per panel: 12 regions per cell, >= the 10 trials needed
    for det, (paths, conv) in files.items():
        r = c.post(
            f"/coordinator/studies/{sid}/images",
            data={
                "csrf_token": tok,
                "detector": f"panel {det}",
                "conversion_file": (io.BytesIO(conv.read_bytes()), "c.toml"),
                "images": [(io.BytesIO(p.read_bytes()), p.name) for p in paths],
            },
            content_type="multipart/form-data",
        )
        assert r.status_code == 302, r.text
    job = wait_job(c, c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok}))
    assert job["state"] == "done" and job["progress_fraction"] == 1.0, job
    assert job["result_url"] == f"/coordinator/studies/{sid}"
    with app.app_context():
        st = db().get(Study, sid)
        assert st.status == "open" and st.observer == "npw" and len(st.images) == 4
        assert db().query(Region).filter_by(study_id=sid).count() == 4 * 18
        assert db().query(Region).filter_by(study_id=sid, tiles_json=None).count() == 0
        model = pd.read_csv(io.StringIO(st.model_trials_csv))
        assert len(model) == 72 and set(model["reader"]) == {"npw"}
        assert set(model["detector"]) == {"panel direct", "panel indirect"}
        total = json.loads(st.plan_json)["total"]
    page = c.get(f"/coordinator/studies/{sid}").text
    assert "reader1" in page and f"0 / {total}" in page
    # the reader can now read it
    rc = app.test_client()
    rtok = login(rc, "reader1")
    pass_display_check(rc, sid, rtok)
    assert len(read_all(rc, sid, rtok)) == total


def test_analysis_page_shows_readers_against_the_model(tmp_path):
    app, sid = demo_app(tmp_path, n_practice=0, repeat_fraction=0.2)
    for name in ("reader1", "reader2", "reader3"):
        c = app.test_client()
        tok = login(c, name)
        pass_display_check(c, sid, tok)
        read_all(c, sid, tok, chooser=darkest_tile)
    cc = app.test_client()
    tok = login(cc, "coordinator")
    assert "Not analysed yet" in cc.get(f"/analysis/studies/{sid}").text
    assert wait_job(cc, cc.post(f"/analysis/studies/{sid}/run", data={"csrf_token": tok}))["state"] == "done"
    page = cc.get(f"/analysis/studies/{sid}").text
    shown = page.split('id="report"')[1].split("</article>")[0]  # the report, in the app's page and style
    src = page.split('id="report-link"')[0].rsplit('href="', 1)[1].split('"')[0]
    rep = cc.get(src)  # the same report, self-contained, as a file
    assert rep.status_code == 200 and "attachment" in rep.headers["Content-Disposition"]
    assert "script" not in rep.headers["Content-Security-Policy"] and "<script" not in rep.text
    for heading in ("Contrast-detail curves", "Human readers vs model observer", "Reader agreement", "comparison"):
        assert heading in rep.text and heading in shown, heading
    import json

    a = json.loads(cc.get(f"/analysis/studies/{sid}/analysis.json").text)
    assert a["human_model_factor"]["observer"] == "npwe" and sorted(a["readers"]) == ["reader1", "reader2", "reader3"]


def test_planning_page_estimates_power_from_a_stated_spread_and_refuses_oversized_requests(tmp_path):
    app = accounts_app(tmp_path)
    c = app.test_client()
    tok = login(c, "coordinator")
    assert "Estimate power" in c.get("/analysis/plan").text
    form = {
        "csrf_token": tok,
        "ratio": "2.0",
        "diameter_mm": "0.25",
        "target_power": "50",
        "alpha": "0.05",
        "readers": "4",
        "images": "8",
        "n_sim": "10",
        "seed": "4",
        "source": "stated",
        "median_factor": "1.6",
        "cv_between": "15",
    }
    job = wait_job(c, c.post("/analysis/plan", data=form))
    assert job["state"] == "done", job
    r = c.get(f"/jobs/{job['id']}")
    assert r.status_code == 200, r.text
    assert 'id="power-table"' in r.text and "stated between-reader spread" in r.text
    # the page shows what scorer.study.power_by_simulation computes for the same settings
    from scorer.study import ReaderPopulation, power_by_simulation

    ref = power_by_simulation(
        2.0,
        (4,),
        (8,),
        population=ReaderPopulation(1.6, 0.15),
        diameter_mm=0.25,
        target_power=0.5,
        n_sim=10,
        n_boot=50,
        seed=4,
    )
    assert f"{ref.cells['power'].iloc[0] * 100:.0f} %" in r.text
    r = c.post("/analysis/plan", data={**form, "readers": "4, 6, 8", "images": "8, 16, 32", "n_sim": "100"})
    assert r.status_code == 400 and "more than 400" in r.text
    r = c.post("/analysis/plan", data={**form, "readers": "four"})
    assert r.status_code == 400 and "whole numbers" in r.text


def test_import_a_folder_scored_by_limen_score(tmp_path):
    from scorer.cli import main
    from webapp.models import StudyImage, db

    root = tmp_path / "root"
    files = simulated_study_files(root)
    paths, conv = files["direct"]
    res = CliRunner().invoke(
        main,
        [
            "score",
            *map(str, paths),
            "--layout",
            str(MINI),
            "--conversion",
            str(conv),
            "--n-boot",
            "0",
            "--out",
            str(root / "direct" / "score"),
        ],
    )
    assert res.exit_code in (0, 1), res.output
    app = accounts_app(tmp_path, IMPORT_ROOT=str(root))
    c = app.test_client()
    tok = login(c, "coordinator")
    r = c.post(
        "/coordinator/studies/new", data={"csrf_token": tok, "name": "imported", "layout": "cairn-demo-plate.toml"}
    )
    sid = int(r.headers["Location"].split("/")[-1])
    r = c.post(f"/coordinator/studies/{sid}/import", data={"csrf_token": tok, "folder": "../", "detector": "A"})
    assert r.status_code == 400 and "inside the import root" in r.text
    r = c.post(f"/coordinator/studies/{sid}/import", data={"csrf_token": tok, "folder": "direct", "detector": "A"})
    assert r.status_code == 400 and "no results.json" in r.text
    r = c.post(
        f"/coordinator/studies/{sid}/import", data={"csrf_token": tok, "folder": "direct/score", "detector": "panel A"}
    )
    assert r.status_code == 302, r.text
    with app.app_context():
        im = db().query(StudyImage).one()
        from scorer.images import load_conversion

        assert load_conversion(im.conversion_file) == load_conversion(conv)  # the scoring's conversion
        assert im.detector == "panel A" and im.stored_name == f"{im.sha256}.dcm"


def test_an_image_in_two_studies_is_shown_on_each_studys_own_scale(tmp_path):
    """The 16-bit display scale is chosen per study (from the study's brightest image), so the same image in a
    second study with other images must be served on the second study's scale: its pixels times that study's
    µGy per unit reproduce scorer's load_image to within one 16-bit step (a file shared by image hash alone
    was 2.3 % off)."""
    from scorer.images import load_conversion, load_image
    from webapp import opening, pixels
    from webapp.demo import create_demo_study
    from webapp.models import Region, Study, StudyImage, db

    app = make_app(tmp_path)
    kw = dict(
        n_readers=3,
        trials_per_reader=None,
        n_practice=0,
        repeat_fraction=0,
        layout_path=str(MINI),
        diameters_mm=None,
        half_width_ln=2.0,
    )
    a = create_demo_study(app, images_per_detector=2, passwords=PASSWORDS, **kw)["study_id"]
    b = create_demo_study(
        app, images_per_detector=3, passwords=PASSWORDS, reader_prefix="other", open_study=False, seed=7, **kw
    )["study_id"]
    store = Path(app.config["STORE_DIR"])
    with app.app_context():
        sa, sb = db().get(Study, a), db().get(Study, b)
        first = sa.images[0]  # study A's first image is added to study B too, which is then opened
        db().add(
            StudyImage(
                study_id=b,
                sha256=first.sha256,
                stored_name=first.stored_name,
                code=f"img-b-{first.sha256[:8]}",
                detector=first.detector,
                conversion_file=first.conversion_file,
                label=first.label,
            )
        )
        db().flush()
        db().refresh(sb)
        opening.open_study(db(), sb, store)
        sb.status = "open"
        db().commit()
        shared = {i.sha256 for i in sa.images} & {i.sha256 for i in sb.images}
        assert shared and sa.ugy_per_unit != sb.ugy_per_unit
        for st in (sa, sb):
            for im in st.images:
                if im.sha256 not in shared:
                    continue
                reg = db().query(Region).filter(Region.image_id == im.id).first()
                n = st.region_rows
                data = np.frombuffer(pixels.region_bytes(store, im.sha256, st.id, reg.row0, reg.col0, n, n), "<u2")
                ref = load_image(store / im.stored_name, conversion=load_conversion(im.conversion_file)).pixels
                crop = ref[reg.row0 : reg.row0 + n, reg.col0 : reg.col0 + n].ravel()
                assert np.max(np.abs(data * st.ugy_per_unit - crop)) <= 0.5 * st.ugy_per_unit + 1e-9
                assert db().get(StudyImage, im.id).study_id == st.id
