"""The reader study's design (issue 18): practice from its own pool, tiles in a random order, nothing that
differs by detector but pixels, adaptive placement kept in the database, the design gate, and the demo study
read by the built-in simulated readers giving an estimable pooled threshold at every diameter it asks for.

Statistical checks: Pearson's chi-square goodness-of-fit and contingency tests (scipy.stats.chisquare,
scipy.stats.chi2_contingency; Pearson 1900) for the screen position of the disc; M-AFC guess rate 1/M
(Green & Swets 1966) for a reader who cannot see the disc.
"""

from __future__ import annotations

import io
import json
from collections import Counter, defaultdict

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from webapp_helpers import (
    MINI,
    PASSWORDS,
    accounts_app,
    answer,
    darkest_tile,
    demo_app,
    login,
    make_app,
    read_all,
    reader_client,
    simulated_study_files,
    wait_job,
)

PER_TRIAL = {"trial", "region_url", "response_url", "number", "answered", "practice_answered", "practice_number"}


def _export(app, sid) -> pd.DataFrame:
    cc = app.test_client()
    login(cc, "coordinator")
    text = cc.get(f"/coordinator/studies/{sid}/responses.csv").text
    return pd.read_csv(io.StringIO(text), dtype={"reader": str, "image": str, "target": str, "tile_order": str})


def _trial_rows(app, sid):
    from webapp.models import Region, StudyImage, Trial, db

    with app.app_context():
        q = (
            db()
            .query(Trial, Region, StudyImage)
            .join(Region, Region.id == Trial.region_id)
            .join(StudyImage, StudyImage.id == Region.image_id)
            .filter(Trial.study_id == sid)
        )
        return [
            {
                "public_id": t.public_id,
                "reader_id": t.reader_id,
                "practice": t.practice,
                "repeat": t.repeat,
                "region_id": r.id,
                "image_practice": im.practice,
                "detector": im.detector,
                "diameter_mm": r.diameter_mm,
                "contrast": r.contrast,
                "true_site": r.true_site,
                "order": json.loads(t.tile_order),
            }
            for t, r, im in q
        ]


# --------------------------------------------------------------------------- practice pool
def test_practice_comes_from_its_own_images_and_is_never_scored(tmp_path):
    app, sid = demo_app(tmp_path, n_practice=4, repeat_fraction=0.2)
    for name in ("reader1", "reader2", "reader3"):
        c, tok = reader_client(app, sid, name)
        done = read_all(c, sid, tok, chooser=lambda t, d: int(t["trial"], 16) % t["m"])
        assert [t["practice"] for t, _ in done[:4]] == [True] * 4 and not any(t["practice"] for t, _ in done[4:])
    rows = _trial_rows(app, sid)
    practice = [r for r in rows if r["practice"]]
    scored = [r for r in rows if not r["practice"]]
    assert len(practice) == 12 and all(r["image_practice"] for r in practice)
    assert scored and not any(r["image_practice"] for r in scored)
    assert not {r["region_id"] for r in practice} & {r["region_id"] for r in scored}
    # practice shows each diameter's most visible target first (the largest contrast of the practice pool)
    from webapp.models import StudyImage, db

    with app.app_context():
        codes = {im.code for im in db().query(StudyImage).filter_by(study_id=sid, practice=True)}
    df = _export(app, sid)
    assert len(df) == len(scored) and not set(df["image"]) & codes
    cc = app.test_client()
    login(cc, "coordinator")
    model = pd.read_csv(io.StringIO(cc.get(f"/coordinator/studies/{sid}/model.csv").text), dtype={"image": str})
    assert not set(model["image"]) & codes


# --------------------------------------------------------------------------- the true site's screen position
@pytest.fixture(scope="module")
def read_study(tmp_path_factory):
    """Three readers read a study of 2 + 2 scored mini-plate images to the end through the API (10 trials per cell),
    each choosing the darkest tile on the bytes received."""
    app, sid = demo_app(tmp_path_factory.mktemp("tiles"), n_practice=2)
    seen = {}
    for name in ("reader1", "reader2", "reader3"):
        c, tok = reader_client(app, sid, name)
        while True:
            r = c.get(f"/reading/api/studies/{sid}/next")
            t = r.json
            if t["done"]:
                break
            reg = c.get(t["region_url"])
            seen[t["trial"]] = (t, dict(reg.headers), len(reg.data))
            choice = darkest_tile(t, reg.data)
            a = answer(c, tok, t, choice)
            assert a.status_code == 200, a.json
            seen[t["trial"]] += (a.json,)
    return app, sid, seen


def test_the_true_site_is_spread_over_the_screen_positions_independent_of_the_plate(read_study):
    app, sid, seen = read_study
    df = _export(app, sid)
    assert len(df) >= 200, len(df)
    # the export says what was shown: the tile order, and where the disc and the choice were on screen
    orders = [list(map(int, o.split())) for o in df["tile_order"]]
    assert all(sorted(o) == list(range(m)) for o, m in zip(orders, df["n_alternatives"]))
    assert all(o.index(ts) == tp for o, ts, tp in zip(orders, df["true_site"], df["true_position"]))
    assert all(o.index(cs) == cp for o, cs, cp in zip(orders, df["chosen_site"], df["chosen_position"]))
    for m, g in df.groupby("n_alternatives"):
        counts = np.bincount(g["true_position"], minlength=m)
        p_uniform = stats.chisquare(counts).pvalue  # Pearson 1900: H0 every place equally likely
        # H0 screen place independent of the plate's site: the shift (position − site) mod M is uniform too (were
        # the tiles shown in plate order it would always be 0)
        shift = (g["true_position"] - g["true_site"].astype(int)) % m
        p_indep = stats.chisquare(np.bincount(shift, minlength=m)).pvalue
        print(
            f"M = {m}: {len(g)} trials, true position counts {counts.tolist()}, chi-square p = {p_uniform:.3f}; "
            f"position − site uniform: p = {p_indep:.3f}"
        )
        assert p_uniform > 0.01 and p_indep > 0.01
    # every target's true site is fixed by the plate, yet it is shown at more than one place
    per_target = df.groupby(["target"])["true_position"].nunique()
    assert (per_target > 1).mean() > 0.9
    # the tiles really are in that order: a darkest-tile reader is right on the most visible targets of the
    # diameters of several pixels (a 0.1 mm disc is about one 0.085 mm pixel)
    easy = df[(df["contrast"] == df.groupby("diameter_mm")["contrast"].transform("max")) & (df["diameter_mm"] > 0.2)]
    # if the recorded order were not the screen's, the darkest-tile reader would be at chance (1/M): an exact
    # binomial test (scipy) against chance at the most alternatives shown (adaptive placement offers the plate's
    # highest levels only where a cell needs them, so "easy" is not near-certain on every panel)
    from scipy.stats import binomtest

    k, n = int(easy["correct"].sum()), len(easy)
    assert n >= 20 and binomtest(k, n, 1 / easy["n_alternatives"].min(), alternative="greater").pvalue < 1e-4, (k, n)
    assert df["correct"].mean() > 1 / df["n_alternatives"].min()


def test_nothing_the_reader_receives_differs_by_detector_but_pixels(read_study):
    app, sid, seen = read_study
    rows = {r["public_id"]: r for r in _trial_rows(app, sid)}
    by_det = defaultdict(set)
    headers = defaultdict(set)
    for pid, (t, h, n_bytes, a) in seen.items():
        r = rows[pid]
        kept = {k: v for k, v in t.items() if k not in PER_TRIAL}
        by_det[r["detector"]].add(json.dumps(kept, sort_keys=True))
        hk = {k: h[k] for k in ("Content-Type", "X-Rows", "X-Cols", "X-Tiles")}
        headers[r["detector"]].add(
            (json.dumps(hk, sort_keys=True), n_bytes, json.dumps(a if not t["practice"] else {}))
        )
    assert len(by_det) == 2
    a, b = by_det.values()
    assert a == b, a ^ b  # the same JSON (tiles, size, window/level, M, totals) whichever panel made the image
    ha, hb = headers.values()
    assert ha == hb
    # one window/level for the whole study: every trial starts from the same numbers
    assert len({(t["window"], t["level"]) for t, *_ in seen.values()}) == 1
    # the pages a reader opens name no detector either
    from webapp.models import StudyImage, db

    with app.app_context():
        labels = {im.detector for im in db().query(StudyImage).filter_by(study_id=sid)}
    c, tok = reader_client(app, sid, "reader1")
    for url in ("/reading/", f"/reading/studies/{sid}", f"/reading/studies/{sid}/check"):
        page = c.get(url, follow_redirects=True).text
        assert not any(lab in page for lab in labels) and "direct" not in page and "indirect" not in page


# --------------------------------------------------------------------------- adaptive placement
def test_adaptive_states_are_stored_and_survive_a_restart(tmp_path):
    app, sid = demo_app(tmp_path, n_practice=0, repeat_fraction=0)
    from webapp.models import AdaptiveCell, Response, Trial, User, db

    c, tok = reader_client(app, sid)
    read_all(c, sid, tok, chooser=darkest_tile, limit=12)
    waiting = c.get(f"/reading/api/studies/{sid}/next").json
    # a restart: a new app on the same instance folder and database
    app.extensions["limen_engine"].dispose()
    app2 = make_app(tmp_path)
    c2, tok2 = reader_client(app2, sid)
    again = c2.get(f"/reading/api/studies/{sid}/next").json
    assert again["trial"] == waiting["trial"] and again["number"] == 13  # the same trial waits, nothing lost
    read_all(c2, sid, tok2, chooser=darkest_tile)
    with app2.app_context():
        s = db()
        uid = s.query(User).filter_by(username="reader1").one().id
        from webapp.models import Study

        plan = {
            (x["detector"], x["diameter_mm"]): x["n_trials"] for x in json.loads(s.get(Study, sid).plan_json)["cells"]
        }
        cells = s.query(AdaptiveCell).filter_by(study_id=sid, reader_id=uid).all()
        assert len(cells) == len(plan) == 6
        responses = s.query(Response, Trial).join(Trial).filter(Trial.study_id == sid, Trial.reader_id == uid).all()
        for cell in cells:
            st = json.loads(cell.state_json)
            mine = [
                (t.region.contrast, r.correct)
                for r, t in responses
                if t.region.image.detector == cell.detector and t.region.diameter_mm == cell.diameter_mm
            ]
            # the stored state is exactly the counts of the reader's answers in that cell, one per response
            n = Counter(cn for cn, _ in mine)
            y = Counter(cn for cn, ok in mine if ok)
            assert st["n_by_level"] == [n[lv] for lv in st["levels"]]
            assert st["correct_by_level"] == [y[lv] for lv in st["levels"]]
            assert cell.n_trials == len(mine) == plan[(cell.detector, cell.diameter_mm)]


def test_a_response_sent_twice_teaches_the_state_once(tmp_path):
    app, sid = demo_app(tmp_path, n_practice=0)
    from webapp.models import AdaptiveCell, db

    c, tok = reader_client(app, sid)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    assert answer(c, tok, t, 1).status_code == 200
    second = answer(c, tok, t, 2)
    assert second.status_code == 409 and second.json["duplicate"]
    with app.app_context():
        assert sum(x.n_trials for x in db().query(AdaptiveCell).all()) == 1


def test_constant_stimuli_show_each_level_equally_often(tmp_path):
    app, sid = demo_app(tmp_path, placement="constant", n_practice=0, repeat_fraction=0)
    c, tok = reader_client(app, sid)
    read_all(c, sid, tok)
    df = _export(app, sid)
    for _, g in df.groupby(["detector", "diameter_mm"]):
        counts = g["contrast"].value_counts()
        per = counts.tolist() + [0] * (6 - len(counts))  # the mini plate has 6 contrasts per diameter
        assert max(per) - min(per) <= 1, counts


def test_a_trial_of_an_earlier_release_is_still_shown_as_one_region(tmp_path):
    """Studies opened before tiles keep their schedule: a trial without a tile order shows the whole region with
    its sites and takes a site, as then."""
    app, sid = demo_app(tmp_path, n_practice=0)
    from webapp.models import Study, Trial, db

    c, tok = reader_client(app, sid)
    t = c.get(f"/reading/api/studies/{sid}/next").json
    with app.app_context():
        tr = db().query(Trial).filter_by(public_id=t["trial"]).one()
        tr.tile_order = None
        db().get(Study, sid).placement = None
        n = db().get(Study, sid).region_rows
        db().commit()
    old = c.get(f"/reading/api/studies/{sid}/next").json
    assert "tiles" not in old and len(old["sites"]) == old["m"] and old["rows"] == n
    assert len(c.get(old["region_url"]).data) == 2 * n * n
    r = answer(c, tok, old, 1)
    assert r.status_code == 200


# --------------------------------------------------------------------------- the design gate


def test_the_app_refuses_to_open_a_design_that_cannot_reach_its_interval_and_says_what_to_change(tmp_path):
    app = accounts_app(tmp_path, ("coordinator", "reader1", "reader2", "reader3"))
    from webapp.models import Study, User, db

    with app.app_context():
        ids = {u.username: u.id for u in db().query(User).all()}
    c = app.test_client()
    tok = login(c, "coordinator")
    r = c.post(
        "/coordinator/studies/new",
        data={
            "csrf_token": tok,
            "name": "too ambitious",
            "layout_file": (io.BytesIO(MINI.read_bytes()), "mini.toml"),
            "diameters": "0.25, 1",
            "half_width_ln": "0.3",
            "placement": "psi",
            "n_practice": "2",
            "readers": [str(ids["reader1"])],
        },
        content_type="multipart/form-data",
    )
    assert r.status_code == 302, r.text
    sid = int(r.headers["Location"].split("/")[-1])
    with app.app_context():
        st = db().get(Study, sid)
        assert json.loads(st.diameters_json) == [0.25, 1.0] and st.half_width_ln == 0.3 and st.placement == "psi"
    files = simulated_study_files(tmp_path, n=3)  # per panel: two to score, one for practice

    def upload(det, paths, practice=False):
        data = {
            "csrf_token": tok,
            "detector": f"panel {det}",
            "conversion_file": (io.BytesIO(files[det][1].read_bytes()), "c.toml"),
            "images": [(io.BytesIO(p.read_bytes()), p.name) for p in paths],
        }
        if practice:
            data["practice"] = "on"
        assert (
            c.post(f"/coordinator/studies/{sid}/images", data=data, content_type="multipart/form-data").status_code
            == 302
        )

    for det in files:
        upload(det, files[det][0][:1])

    def refused(text):
        r = c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok})
        assert r.status_code == 400 and text in r.text, (text, r.status_code, r.text[-1500:])

    refused("at least 3 readers and 1 are enrolled: enrol more readers")
    r = c.post(
        f"/coordinator/studies/{sid}/readers",
        data={"csrf_token": tok, "readers": [str(ids[f"reader{i}"]) for i in (1, 2, 3)]},
    )
    refused("practice trials need a practice pool that is never scored")
    upload("direct", files["direct"][0][2:], practice=True)
    refused("cannot give a 95 % CI of ±0.3 (ln")
    r = c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok})
    assert "Change: add readers or images, widen the interval" in r.text
    with app.app_context():
        st = db().get(Study, sid)
        st.half_width_ln, st.trials_per_reader = 2.0, 3
        db().commit()
    # one image per panel: 6 regions per cell, fewer than the 10 trials an estimable threshold needs
    refused("at least 10 trials per reader in each cell at 0.25 mm (at most 6 trials per reader")
    for det in files:
        upload(det, files[det][0][1:2])
    refused("more than the 3 allowed")
    with app.app_context():
        db().get(Study, sid).trials_per_reader = 600
        db().commit()
    job = wait_job(c, c.post(f"/coordinator/studies/{sid}/open", data={"csrf_token": tok}))
    assert job["state"] == "done", job
    page = c.get(f"/coordinator/studies/{sid}").text
    assert 'id="plan"' in page and "trials per reader at 0.25 mm" in page
    with app.app_context():
        plan = json.loads(db().get(Study, sid).plan_json)
        assert [r["diameter_mm"] for r in plan["diameters"]] == [0.25, 1.0] and plan["n_readers"] == 3
        assert all(r["n_trials"] >= 10 and r["regions_per_level"] == 2 for r in plan["diameters"])


# --------------------------------------------------------------------------- done when
def test_the_demo_study_read_by_the_simulated_readers_is_estimable_at_every_diameter(tmp_path):
    """`limen serve --demo`'s study, read to the end by the built-in simulated readers (scorer.study.reader_model,
    through the same placement code as the reading API), gives an estimable pooled threshold with a finite CI at
    every diameter and detector it asks for."""
    from scorer.observer.mafc import criterion_for, dprime_for_pc
    from webapp import study_analysis
    from webapp.demo import DEMO_DIAMETERS_MM, DETECTORS, create_demo_study, read_as_simulated_readers
    from webapp.models import Study, db

    app = make_app(tmp_path)
    sid = create_demo_study(app, passwords=PASSWORDS | {f"reader{i}": f"pw-reader-{i}" for i in range(4, 6)})[
        "study_id"
    ]
    drawn = read_as_simulated_readers(app, sid, seed=5)
    assert len(drawn) == 5
    rows = _trial_rows(app, sid)
    assert not any(r["image_practice"] for r in rows if not r["practice"])  # no practice region ever scored
    with app.app_context():
        st = db().get(Study, sid)
        plan = json.loads(st.plan_json)
        run = study_analysis.run_analysis(db(), st, n_boot=200, seed=1)
        a = json.loads(run.analysis_json)
    n_scored = len([r for r in rows if not r["practice"]])
    assert n_scored == 5 * plan["total"], (n_scored, plan["total"])
    pooled = [c for c in a["curves"] if c["reader"] == "pooled"]
    cells = {(c["detector"], c["diameter_mm"]) for c in pooled}
    assert {d for _, d in cells} == set(DEMO_DIAMETERS_MM) and len(cells) == 2 * len(DEMO_DIAMETERS_MM)
    for c in pooled:
        assert c["estimable"], json.dumps(c)
        assert 0 < c["ci_low"] < c["threshold_contrast"] < c["ci_high"] < 1, c
        assert c["ci_high"] / c["ci_low"] < 10
        print(
            f"{c['detector'][:11]} {c['diameter_mm']:>5g} mm: {100 * c['threshold_contrast']:.3g} % "
            f"({100 * c['ci_low']:.3g}–{100 * c['ci_high']:.3g} %), {c['n_trials']} trials"
        )
    # the readers' factor over the model observer: the generator's median is 1.6 (ReaderPopulation)
    hm = a["human_model_factor"]
    print(f"human/model factor {hm['factor']:.3g} ({hm['ci_low']:.3g}–{hm['ci_high']:.3g})")
    assert hm["ci_low"] < 1.6 < hm["ci_high"]
    # The readers rank the two panels as the model observer does on the same images.  The model's threshold per
    # panel × diameter is d′_T over its d′ per unit contrast on the stored responses: the mean signal-site minus
    # non-signal response per unit contrast over the non-signal sites' SD (a linear observer's d′; Green & Swets
    # 1966).  The simulated readers' thresholds are each reader's factor times that (scorer/study/reader_model.py),
    # the factor the same on both panels, so the panels' reader ratio over the model's ratio must be 1 within the
    # pooled CIs: |ln| ≤ 2.5 combined SEs (2.5: a two-sided 5 % test Bonferroni-split over the four diameters).
    # A swapped panel label, or readers fed the other panel's calibration, moves it to the model's ratio squared.
    with app.app_context():
        resp = pd.read_csv(io.StringIO(db().get(Study, sid).model_responses_csv), dtype={"image": str})
    model_t = {}
    for (det, d), g in resp.groupby(["detector", "diameter_mm"]):
        m = int(g["m_alternatives"].iloc[0])
        g = g.sort_values(["image", "target", "site"])
        r = g["response"].to_numpy().reshape(-1, m)
        sig = g["is_signal"].to_numpy(bool).reshape(-1, m)
        c = g["contrast"].to_numpy()[::m]
        noise = r[~sig].reshape(-1, m - 1)
        diff = r[sig] - noise.mean(axis=1)
        sd = np.sqrt(((noise - noise.mean(axis=1, keepdims=True)) ** 2).sum() / (noise.size - len(noise)))
        model_t[(det, float(d))] = dprime_for_pc(criterion_for(m), m) * sd / (diff @ c / (c @ c))
    by_cell = {(c["detector"], float(c["diameter_mm"])): c for c in pooled}
    direct, indirect = DETECTORS["direct"], DETECTORS["indirect"]
    for d in DEMO_DIAMETERS_MM:
        pd_, pi_ = by_cell[(direct, d)], by_cell[(indirect, d)]
        readers_ln = np.log(pd_["threshold_contrast"] / pi_["threshold_contrast"])
        model_ln = np.log(model_t[(direct, d)] / model_t[(indirect, d)])
        # each pooled CI is exp(ln C ± t_{R−1}·SE) (scorer/study/pooled_gee.py): its SE back from its ends
        se = np.hypot(
            *(np.log(p["ci_high"] / p["ci_low"]) / (2 * stats.t.ppf(0.975, p["n_readers"] - 1)) for p in (pd_, pi_))
        )
        print(
            f"{d:g} mm direct/indirect: readers ×{np.exp(readers_ln):.2f}, model ×{np.exp(model_ln):.2f}, SE {se:.2f}"
        )
        assert abs(readers_ln - model_ln) <= 2.5 * se, (d, readers_ln, model_ln, se)
        if abs(model_ln) > 2.5 * se:  # where the model's ordering is clear, the readers' must be the same
            assert np.sign(readers_ln) == np.sign(model_ln), d


def test_simulated_readers_as_good_as_the_model_choose_what_the_model_chose_on_each_image(tmp_path):
    """The built-in simulated readers (webapp.demo.read_as_simulated_readers) are fed each trial's own image and
    panel: a reader with the model observer's efficiency, no internal noise and no lapses (human/model factor
    exactly 1, between-reader CV 0) must choose, in every scored trial, the site the model observer chose on that
    image × target (M-AFC decision rule: the largest response; Green & Swets 1966).  A swapped panel label, a
    wrong image's responses or a region mapped to the wrong target makes some choices differ."""
    from scorer.study.reader_model import ReaderPopulation
    from webapp import export
    from webapp.demo import DETECTORS, read_as_simulated_readers
    from webapp.models import Study, db

    app, sid = demo_app(tmp_path, n_practice=0, repeat_fraction=0.0)
    drawn = read_as_simulated_readers(app, sid, seed=3, population=ReaderPopulation(median_factor=1.0, cv_between=0))
    assert np.allclose(drawn["factor"], 1.0) and np.allclose(drawn["internal_noise"], 0.0)
    with app.app_context():
        st = db().get(Study, sid)
        readers = export.responses_frame(db(), st)
        model = export.model_frame(st)
    key = ["image", "target"]
    both = readers.merge(model[key + ["detector", "chosen_site"]], on=key, suffixes=("", "_model"), how="left")
    assert len(both) == len(readers) > 0 and both["chosen_site_model"].notna().all()
    assert (both["detector"] == both["detector_model"]).all()  # each image keeps its panel
    assert (both["chosen_site"] == both["chosen_site_model"]).all(), both[both.chosen_site != both.chosen_site_model]
    assert set(both["detector"]) == set(DETECTORS.values())


# --------------------------------------------------------------------------- the gate asks the model observer
def test_model_gate_refuses_above_the_plates_top_contrast_and_warns_when_the_interval_reaches_it():
    """Expected human threshold = factor × model threshold, 95 % interval exp(ln H ± 1.96·√(se² + sd_F²))
    (errors of a product add in quadrature on the log scale, Taylor 1997): 1.6 × 20 % = 32 % below a top contrast
    of 37.1 % with an interval up to 32·e^{1.96·√(0.1² + 0.16²)} = 46.3 % → a warning; refused only when the whole
    interval lies above the top contrast."""
    from webapp.design import model_gate

    refusals, warnings = model_gate({("panel A", 0.1): (0.20, 0.10)}, {0.1: 0.371}, factor=1.6, factor_sd_ln=0.16)
    assert not refusals and len(warnings) == 1
    hi = 32.0 * np.exp(1.959964 * np.hypot(0.1, 0.16))
    assert "0.1 mm, panel A" in warnings[0] and f"{hi:.3g} %" in warnings[0] and "37.1 %" in warnings[0]
    # 1.6 × 25 % = 40 % above 37.1 %, the interval down to 40·e^{−0.37} = 27.6 %: a warning, not a refusal
    refusals, warnings = model_gate({("panel A", 0.1): (0.25, 0.10)}, {0.1: 0.371}, factor=1.6, factor_sd_ln=0.16)
    assert not refusals and len(warnings) == 1 and "expected human threshold 40 %" in warnings[0]
    # 1.6 × 35 % = 56 %, SE 0.05: the interval from 56·e^{−1.96·√(0.05² + 0.16²)} = 40.3 % lies above: refused
    refusals, warnings = model_gate({("panel A", 0.1): (0.35, 0.05)}, {0.1: 0.371}, factor=1.6, factor_sd_ln=0.16)
    lo = 56.0 * np.exp(-1.959964 * np.hypot(0.05, 0.16))
    assert len(refusals) == 1 and f"({lo:.3g}–" in refusals[0] and not warnings
    # well inside the plate: nothing to say
    assert model_gate({("panel A", 1.0): (0.003, 0.1)}, {1.0: 0.0267}) == ([], [])


def test_the_gate_flags_the_demos_0_1_mm_from_the_model_observer_on_the_studys_own_images(tmp_path):
    """The demo's panels at 0.1 mm: the model observer (NPWE, the study's observer) on the study's own images puts
    the readers' expected threshold near the plate's highest contrast there (37.1 %), so the gate refuses or
    warns, naming 0.1 mm and the panel; the demo's own diameters (0.15–1 mm) are not refused."""
    from scorer.errors import LimenError
    from scorer.workflow import load_layout
    from webapp import design
    from webapp.demo import DEMO_DIAMETERS_MM, DETECTORS, create_demo_study
    from webapp.models import Study, db

    app = make_app(tmp_path)
    sid = create_demo_study(
        app, diameters_mm=(0.1, *DEMO_DIAMETERS_MM), open_study=False, passwords=PASSWORDS, n_readers=5
    )["study_id"]
    with app.app_context():
        st = db().get(Study, sid)
        layout = load_layout(st.layout_file)
        try:
            plan = design.check_design(st, layout)
            said = plan["warnings"]
        except LimenError as exc:
            said = [str(exc)]
        for w in said:
            print(w)
        at_01 = [w for w in said if w.startswith("0.1 mm, ") or ": 0.1 mm, " in w or "; 0.1 mm, " in w]
        assert at_01, said
        assert all(any(label in w for label in DETECTORS.values()) for w in at_01)
        assert all("highest contrast there, 37.1 %" in w for w in at_01)
        st.diameters_json = json.dumps(list(DEMO_DIAMETERS_MM))
        plan = design.check_design(st, layout)  # not refused
        assert not any("0.1 mm" in w for w in plan["warnings"]), plan["warnings"]
        cells = {(c["detector"], c["diameter_mm"]) for c in plan["model_check"]["cells"]}
        assert cells == {(det, d) for det in DETECTORS.values() for d in DEMO_DIAMETERS_MM}
