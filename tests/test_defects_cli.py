"""`limen score` and `limen detector` on images with defects and grid lines (the tests' own generator,
tests/realism_images.py): what the user sees — warnings on stderr, the responses' columns, results.json,
the report and its overlays, the defect map, the notch in the provenance."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import realism_images as ri
from click.testing import CliRunner
from helpers import MINI

from scorer.cli import main
from scorer.phantom import load_layout


@pytest.fixture(scope="module")
def scene():
    return ri.scene(load_layout(MINI))


def _write(folder, imgs):
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for im in imgs:
        p = folder / im.metadata.source_path
        np.save(p, im.pixels.astype(np.float32))
        paths.append(str(p))
    return paths


def _score(args):
    return CliRunner().invoke(main, ["score", "--layout", str(MINI), "--pixel-spacing", "0.1", "--n-boot", "50"] + args)


def test_defects_and_grid_lines_are_reported_everywhere(scene, tmp_path):
    t_index = 7

    def feature(sc, g, rng, i):
        g = ri.hot_cluster(t_index, signal=False)(sc, g, rng, i)
        return ri.grid_lines(0.02, 3.5)(sc, g, rng, i)

    files = _write(tmp_path / "img", ri.images(scene, 4, 5, feature))
    out = tmp_path / "out"
    res = _score(files + ["--out", str(out), "--notch"])
    assert res.exit_code == 0, res.output
    t = scene.layout.targets[t_index]
    site = (t.signal_site + 1) % t.m_alternatives
    # one warning line per image on stderr, naming the site and the defect; one for the periodic pattern
    err = [ln for ln in res.stderr.splitlines() if ln.startswith("warning:")]
    per_image = [ln for ln in err if "excluded for defects" in ln]
    assert len(per_image) == 4 and all(f"{t.id} site {site}: hot cluster (9 px)" in ln for ln in per_image)
    assert any("periodic pattern" in ln and "3.5 cycles/mm" in ln and "notch" in ln for ln in err)
    # responses.csv: the excluded column names the reason, the trial's other sites say the trial is out
    resp = pd.read_csv(out / "responses.csv", keep_default_na=False)
    trial = resp[resp["target"] == t.id]
    assert (trial.loc[trial["site"] == site, "excluded"].str.contains("hot cluster")).all()
    assert (trial.loc[trial["site"] != site, "excluded"].str.startswith("trial left out")).all()
    assert (resp.loc[resp["target"] != t.id, "excluded"] == "").all()
    # results.json: exclusions, the pattern, the contrast scale, the notch in the provenance
    js = json.loads((out / "results.json").read_text())
    assert {(e["target"], e["site"]) for e in js["excluded_sites"]} == {(t.id, site)}
    assert abs(js["patterns"]["periodic"][0]["frequency_per_mm"] - 3.5) < 0.08
    assert js["contrast_scale"].startswith("nominal contrast")
    notch = js["provenance"]["image_processing"]["notch"]
    assert notch and len(notch["images"]) == 4
    thr = pd.read_csv(out / "thresholds.csv")
    assert thr.loc[thr["diameter_mm"] == t.diameter_mm, "n_excluded"].eq(4).all()
    # the report: sections, the spectrum plot, a defects overlay per image
    html = (out / "report.html").read_text()
    for text in ("Defects and excluded sites", "Periodic and fixed patterns", "Contrast scale", "hot cluster"):
        assert text in html
    assert len(list((out / "overlays").glob("*-defects.png"))) == 4


def test_defect_map_from_flats_excludes_sites_in_score(scene, tmp_path):
    col = int(scene.site_px(2, signal=False)[1])
    rng = np.random.default_rng(0)
    flats = []
    for _ in range(3):
        f = ri.BACKGROUND + ri.SIGMA * rng.standard_normal(scene.shape)
        f[:, col] = 0.3 * ri.BACKGROUND  # a column of low gain, corrected in the phantom images below
        flats.append(f)
    flat_dir = tmp_path / "flats"
    flat_dir.mkdir()
    flat_files = []
    for i, f in enumerate(flats):
        np.save(flat_dir / f"flat{i}.npy", f.astype(np.float32))
        flat_files.append(str(flat_dir / f"flat{i}.npy"))
    det = tmp_path / "det"
    r = CliRunner().invoke(main, ["detector", "--flat", *flat_files, "--pixel-spacing", "0.1", "--out", str(det)])
    assert r.exit_code == 0, r.output
    dm = json.loads((det / "detector.json").read_text())["defect_map"]
    assert [d["name"] for d in dm["lines"]] == [f"dark column {col} (-70 % of the background) (defect map)"]
    files = _write(tmp_path / "img", ri.images(scene, 3, 9))
    res = _score(files + ["--defect-map", str(det / "detector.json"), "--json", "--method", "dprime"])
    assert res.exit_code == 0, res.output
    js = json.loads(res.stdout)
    reasons = {e["reason"] for e in js["excluded_sites"]}
    masked = [m for im in js["images"] for m in im["checks"]["masked_sites"]]
    assert reasons or masked
    assert all("(defect map)" in r for r in reasons | {m["reason"] for m in masked})
    assert js["settings"]["defect_check"]["defect_map"].endswith("detector.json")


def test_defect_map_errors_are_one_line(scene, tmp_path):
    files = _write(tmp_path / "img", ri.images(scene, 2, 3))
    no_map = tmp_path / "nomap.json"
    no_map.write_text(json.dumps({"mtf": None, "nnps": None}))
    res = _score(files + ["--defect-map", str(no_map)])
    assert res.exit_code == 2
    assert res.stderr.strip().splitlines()[-1].startswith("error: ") and "holds no defect map" in res.stderr
    wrong = tmp_path / "wrong.json"
    wrong.write_text(json.dumps({"defect_map": {"shape": [10, 10], "lines": [], "pixels": []}}))
    res = _score(files + ["--defect-map", str(wrong)])
    assert res.exit_code == 2 and "the defect map is 10 × 10 pixels" in res.stderr
    assert "Traceback" not in res.stderr
