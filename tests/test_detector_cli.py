"""``limen detector`` and ``limen compare-detectors`` end to end on small simulated DICOM files."""

import datetime as dt
import json

import numpy as np
import pytest
from click.testing import CliRunner

from scorer.cli import main
from scorer.detector import detector_model, simulate
from scorer.images import save_conversion, write_dicom
from scorer.observer import criterion_for, dprime_for_pc
from scorer.workflow import load_layout, write_simulated

T0 = dt.datetime(2026, 11, 30, 8, 0, 0)


def run(*args):
    res = CliRunner().invoke(main, [str(a) for a in args])
    return res


@pytest.fixture(scope="module")
def panels(tmp_path_factory):
    """Per panel: 3 flats at 100 µGy, one flat each at 25 and 150 µGy, a vertical and a horizontal edge."""
    root = tmp_path_factory.mktemp("panels")
    out = {}
    for name in ("direct", "indirect"):
        m = detector_model(name)
        d = root / name
        flats = [write_simulated(simulate(m, "flat", 100.0, seed=i, small=True), d, f"flat{i}", T0) for i in range(3)]
        k25 = write_simulated(simulate(m, "flat", 25.0, seed=10, small=True), d, "k25", T0)
        k150 = write_simulated(simulate(m, "flat", 150.0, seed=11, small=True), d, "k150", T0)
        ev = write_simulated(simulate(m, "edge", 100.0, seed=20, small=True, edge_angle_deg=2.5), d, "ev", T0)
        eh = write_simulated(simulate(m, "edge", 100.0, seed=21, small=True, edge_angle_deg=92.5), d, "eh", T0)
        conv = d / "conversion.toml"
        save_conversion(m.conversion_function(), conv)
        csv = d / "kermas.csv"
        csv.write_text(f"path,kerma_ugy\n{k25.name},25\n{flats[0].name},100\n{k150.name},150\n", encoding="utf-8")
        out[name] = dict(model=m, flats=flats, ev=ev, eh=eh, conv=conv, csv=csv, dir=d)
    return out


@pytest.fixture(scope="module")
def measured(panels, tmp_path_factory):
    """detector.json of both panels, written by `limen detector --out`."""
    root = tmp_path_factory.mktemp("measured")
    out = {}
    for name, p in panels.items():
        res = run(
            "detector",
            "--flat",
            *p["flats"],
            "--edge",
            p["ev"],
            p["eh"],
            "--conversion",
            p["conv"],
            "--kerma-ugy",
            100,
            "--q",
            p["model"].q_per_mm2_ugy,
            "--diameters",
            "0.1,0.25,0.5,1",
            "--out",
            root / name,
        )
        assert res.exit_code == 0, res.output
        out[name] = root / name
    return out


def test_detector_json_keys_and_values(panels):
    p = panels["direct"]
    res = run(
        "detector",
        "--flat",
        *p["flats"],
        "--edge",
        p["ev"],
        p["eh"],
        "--conversion",
        p["conv"],
        "--kerma-ugy",
        100,
        "--q",
        p["model"].q_per_mm2_ugy,
        "--json",
    )
    assert res.exit_code == 0, res.output
    d = json.loads(res.stdout)
    assert set(d["mtf"]) >= {"frequency_per_mm", "value"}
    assert set(d["nnps"]) >= {"frequency_per_mm", "value_mm2"}
    assert set(d["dqe"]) >= {"frequency_per_mm", "value"}
    assert d["conversion"]["kind"] == "linear"
    assert set(d["edge_angle_deg"]) == {"x", "y"}
    assert abs(d["edge_angle_deg"]["x"]) == pytest.approx(2.5, abs=0.1)
    # direct panel, 100 % fill factor: MTF at Nyquist = 2/π (square aperture; docs/references.md)
    nyq = d["nyquist_per_mm"]
    assert np.interp(nyq, d["mtf"]["frequency_per_mm"], d["mtf"]["value"]) == pytest.approx(2 / np.pi, abs=0.03)
    assert d["nnps"]["n_rois"] == 27
    # MTF reported up to 1.1 × Nyquist
    assert max(d["mtf"]["frequency_per_mm"]) == pytest.approx(1.1 * nyq, rel=0.02)


def test_flat_and_edge_accept_several_files_after_one_flag_or_repeated(panels):
    p = panels["direct"]
    a = run("detector", "--flat", *p["flats"], "--conversion", p["conv"], "--json")
    b = run("detector", *sum([["--flat", f] for f in p["flats"]], []), "--conversion", p["conv"], "--json")
    assert a.exit_code == 0 and b.exit_code == 0, a.output + b.output
    assert json.loads(a.stdout)["nnps"]["n_images"] == 3
    assert json.loads(a.stdout)["nnps"]["value_mm2"] == json.loads(b.stdout)["nnps"]["value_mm2"]
    assert json.loads(a.stdout)["dqe"] is None and json.loads(a.stdout)["mtf"] is None


def test_fit_conversion_from_csv(panels):
    p = panels["indirect"]
    res = run("detector", "--fit-conversion", p["csv"], "--edge", p["ev"], "--json")
    assert res.exit_code == 0, res.output
    c = json.loads(res.stdout)["conversion"]
    assert c["kind"] == "linear" and not c["nonlinear"]
    assert c["gain"] == pytest.approx(p["model"].gain_adu_per_ugy, rel=0.01)
    assert c["offset"] == pytest.approx(p["model"].offset_adu, abs=5)


def test_fit_conversion_of_a_falling_panel(panels, tmp_path):
    # DICOM PS3.3 C.8.11.3: sign -1 = higher stored values mean less X-ray beam intensity.  Scoring refuses such
    # images without a conversion function and names --fit-conversion as the way out, so the fit must read them:
    # stored as 2^BitsStored − 1 − PV, the fitted linear response is the original one mirrored (gain −g,
    # offset 2^BitsStored − 1 − o), and the edge linearised with it gives the original panel's MTF.
    import pydicom

    p = panels["indirect"]
    for f in p["dir"].glob("*.dcm"):
        ds = pydicom.dcmread(f)
        top = (1 << int(ds.BitsStored)) - 1
        ds.PixelData = (top - ds.pixel_array.astype(np.int64)).astype("<u2").tobytes()
        ds.PixelIntensityRelationshipSign = -1
        ds.save_as(tmp_path / f.name, enforce_file_format=True)
    csv = tmp_path / "kermas.csv"
    csv.write_text(p["csv"].read_text(encoding="utf-8"), encoding="utf-8")
    refused = run("detector", "--flat", tmp_path / p["flats"][0].name, "--json")
    assert refused.exit_code == 2 and "(0028,1041) is -1" in refused.output
    fell = run("detector", "--fit-conversion", csv, "--edge", tmp_path / p["ev"].name, "--json")
    assert fell.exit_code == 0, fell.output
    rose = run("detector", "--fit-conversion", p["csv"], "--edge", p["ev"], "--json")
    a, b = json.loads(rose.stdout), json.loads(fell.stdout)
    assert b["conversion"]["gain"] == pytest.approx(-a["conversion"]["gain"], rel=1e-9)
    assert b["conversion"]["offset"] == pytest.approx(top - a["conversion"]["offset"], rel=1e-9)
    np.testing.assert_allclose(b["mtf"]["value"], a["mtf"]["value"], rtol=1e-6, atol=1e-9)


def test_out_writes_json_csv_html(measured):
    d = measured["direct"]
    data = json.loads((d / "detector.json").read_text())
    assert data["predicted"] and {r["observer"] for r in data["predicted"]} == {"npw", "npwe"}
    header = (d / "detector.csv").read_text().splitlines()[0].split(",")
    assert header[:3] == ["frequency_per_mm", "mtf_x", "mtf_y"] and "dqe" in header
    page = (d / "detector.html").read_text()
    assert "qualified medical" in page and page.count("<svg") >= 5  # MTF, NNPS 1-D, NNPS 2-D, DQE, thresholds
    assert np.load(d / "nnps_2d.npy").shape == (256, 256)


def test_for_presentation_flat_warns(tmp_path, panels):
    m = panels["direct"]["model"]
    s = simulate(m, "flat", 100.0, seed=5, small=True)
    f = write_dicom(tmp_path / "processed.dcm", s.pixels, s.spacing_mm, {"PresentationIntentType": "FOR PRESENTATION"})
    res = run("detector", "--flat", f, "--json")
    assert res.exit_code == 0, res.output
    assert "FOR PRESENTATION" in res.stderr and "NNPS" in res.stderr and "meaningless" in res.stderr
    json.loads(res.stdout)  # stdout stays one JSON object


@pytest.mark.parametrize(
    "args, words",
    [
        ([], "no images"),
        (["--flat", "{flat}", "--edge", "{edge}", "--kerma-ugy", "100"], "--q"),
        (["--flat", "{flat}", "--edge", "{edge}", "--q", "5000"], "--kerma-ugy"),
        (["--flat", "{flat}", "--beam", "RQA5", "--q", "5000", "--kerma-ugy", "1"], "not both"),
        (["--flat", "{flat}", "--beam", "XYZ", "--kerma-ugy", "1"], "unknown beam"),
        (["--flat", "missing.dcm"], "missing.dcm"),
    ],
)
def test_bad_input_exit_2_one_line(panels, args, words):
    p = panels["direct"]
    args = [a.format(flat=p["flats"][0], edge=p["ev"]) for a in args]
    res = run("detector", *args)
    assert res.exit_code == 2, res.output
    lines = [ln for ln in res.stderr.splitlines() if ln.startswith("error:")]
    assert len(lines) == 1 and words in lines[0]
    assert "Traceback" not in res.output


def test_compare_detectors(measured, tmp_path):
    a, b = measured["direct"] / "detector.json", measured["indirect"] / "detector.json"
    scored = tmp_path / "score_a.json"
    scored.write_text(
        json.dumps(
            {
                "observer": "npw",
                "thresholds": [
                    {
                        "diameter_mm": 0.5,
                        "threshold_contrast": 0.006,
                        "ci_low": 0.005,
                        "ci_high": 0.007,
                        "method": "dprime",
                        "n_images": 8,
                    }
                ],
            }
        )
    )
    res = run(
        "compare-detectors", a, b, "--scored-a", scored, "--diameters", "0.1,0.5", "--json", "--out", tmp_path / "cmp"
    )
    assert res.exit_code == 0, res.output
    d = json.loads(res.stdout)
    assert d["labels"] == ["direct", "indirect"]
    q = {r["quantity"]: r for r in d["table"]}
    for key in (
        "MTF at 1 cycles/mm",
        "MTF at 2 cycles/mm",
        "MTF at 5 cycles/mm",
        "MTF at own Nyquist",
        "NNPS at 0.5 cycles/mm (mm²)",
        "DQE at 0.5 cycles/mm",
        "DQE at 2 cycles/mm",
        "predicted NPW threshold contrast at 0.1 mm",
        "scored NPW (d′ method) threshold contrast at 0.5 mm",
    ):
        assert key in q
    # common practice: the direct (a-Se) panel keeps the sharper MTF and higher DQE at the same pitch; the MTF
    # now carries a CI (spread between edge segments), so at 5 cycles/mm the claim rests on non-overlapping CIs
    assert q["MTF at 5 cycles/mm"]["direct"] > q["MTF at 5 cycles/mm"]["indirect"]
    assert q["MTF at 5 cycles/mm"]["better"] == "direct" and "do not overlap" in q["MTF at 5 cycles/mm"]["basis"]
    # the NNPS carries its standard error, so its rows are decided by their 95 % CIs
    assert q["NNPS at 0.5 cycles/mm (mm²)"]["basis"] in ("95 % CIs overlap", "95 % CIs do not overlap")
    assert (tmp_path / "cmp" / "comparison.html").read_text().count("<svg") >= 4


def test_compare_detectors_predicts_with_the_scored_criterion(measured, tmp_path):
    # predicted and scored thresholds use the same definition: a fixed d′_T for every M (its Pc is Pc_M(d′_T),
    # 0.5316 at 5-AFC, 0.5884 at 4-AFC; Green & Swets 1966), so the predicted threshold does not depend on M
    a, b = measured["direct"] / "detector.json", measured["indirect"] / "detector.json"
    scored = tmp_path / "score_a.json"
    scored.write_text(
        json.dumps(
            {
                "observer": "npw",
                "thresholds": [
                    {
                        "diameter_mm": 1.0,
                        "threshold_contrast": 0.003,
                        "ci_low": 0.0025,
                        "ci_high": 0.0035,
                        "method": "dprime",
                        "n_images": 8,
                        "m_alternatives": 5,
                    }
                ],
            }
        )
    )
    res = run("compare-detectors", a, b, "--scored-a", scored, "--json")
    assert res.exit_code == 0, res.output
    d = json.loads(res.stdout)
    assert d["m_alternatives"] == {"1": 5}
    forced = json.loads(run("compare-detectors", a, b, "--scored-a", scored, "--alternatives", "4", "--json").stdout)
    p5 = next(t for t in d["thresholds"] if t["source"] == "predicted NPW" and t["detector"] == "direct")
    p4 = next(t for t in forced["thresholds"] if t["source"] == "predicted NPW" and t["detector"] == "direct")
    assert p5["threshold_contrast"] / p4["threshold_contrast"] == pytest.approx(1.0, rel=1e-9)
    assert dprime_for_pc(criterion_for(5), 5) == pytest.approx(dprime_for_pc(criterion_for(4), 4), rel=1e-9)


def test_compare_detectors_bad_json(tmp_path, measured):
    bad = tmp_path / "bad.json"
    bad.write_text("{not json")
    res = run("compare-detectors", measured["direct"] / "detector.json", bad)
    assert res.exit_code == 2 and "bad.json" in res.stderr and "not valid JSON" in res.stderr


def _scored(tmp_path, name, rows):
    p = tmp_path / name
    p.write_text(
        json.dumps(
            {
                "observer": "npw",
                "thresholds": [
                    {
                        "diameter_mm": d,
                        "threshold_contrast": t,
                        "ci_low": lo,
                        "ci_high": hi,
                        "method": m,
                        "n_images": 8,
                        "m_alternatives": 3,
                    }
                    for d, t, lo, hi, m in rows
                ],
            }
        )
    )
    return p


def test_compare_detectors_keeps_the_two_scoring_methods_apart_and_claims_only_beyond_the_ci(measured, tmp_path):
    # found in use: "scored NPW" appeared twice per diameter (d′ and count) and the table took whichever came
    # first; and a 3 % tolerance, not the CIs, decided "better"
    a, b = measured["direct"] / "detector.json", measured["indirect"] / "detector.json"
    sa = _scored(
        tmp_path,
        "a.json",
        [
            (0.5, 0.0050, 0.0045, 0.0055, "dprime"),
            (1.0, 0.0030, 0.0027, 0.0033, "dprime"),
            (0.5, 0.0040, 0.0020, 0.0060, "count"),
            (1.0, 0.0031, 0.0020, 0.0045, "count"),
        ],
    )
    sb = _scored(
        tmp_path,
        "b.json",
        [
            (0.5, 0.0070, 0.0063, 0.0077, "dprime"),
            (1.0, 0.0031, 0.0028, 0.0034, "dprime"),
            (0.5, 0.0060, 0.0040, 0.0090, "count"),
            (1.0, 0.0036, 0.0025, 0.0050, "count"),
        ],
    )
    d = json.loads(run("compare-detectors", a, b, "--scored-a", sa, "--scored-b", sb, "--json").stdout)
    q = {r["quantity"]: r for r in d["table"]}
    assert d["scored_method"] == "dprime"
    assert q["scored NPW (d′ method) threshold contrast at 0.5 mm"]["better"] == "direct"  # CIs apart
    assert q["scored NPW (d′ method) threshold contrast at 1 mm"]["better"] == "no clear difference"  # overlap
    assert not any("count method" in k for k in q)
    sources = {t["source"] for t in d["thresholds"]}
    assert {"scored NPW (d′ method)", "scored NPW (count method)"} <= sources
    c = json.loads(
        run("compare-detectors", a, b, "--scored-a", sa, "--scored-b", sb, "--scored-method", "count", "--json").stdout
    )
    qc = {r["quantity"]: r for r in c["table"]}
    assert qc["scored NPW (count method) threshold contrast at 0.5 mm"]["better"] == "no clear difference"
    assert not any("d′ method" in k for k in qc)


def test_inputs_that_are_not_what_they_claim_are_refused(panels, tmp_path):
    # found in use: a flat given as --edge exited 0 with MTF values up to 52; an edge or a phantom given as
    # --flat was measured as noise (IEC 62220-1: flat fields are free of objects, edges are sharp steps)
    p = panels["direct"]
    phantom = write_simulated(
        simulate(p["model"], "phantom", 100.0, seed=3, small=True, layout=load_layout()), tmp_path, "ph", T0
    )
    cases = [
        (["--edge", p["flats"][0]], "no edge"),
        (["--flat", p["ev"]], "not a flat field"),
        (["--flat", phantom], "not a flat field"),
    ]
    for args, words in cases:
        res = run("detector", *args, "--conversion", p["conv"])
        assert res.exit_code == 2, (args, res.output)
        lines = [ln for ln in res.stderr.splitlines() if ln.startswith("error:")]
        assert len(lines) == 1 and words in lines[0], res.stderr


def test_implausible_mtf_is_flagged():
    # an MTF above 1 at low frequency is impossible (the MTF is normalised to 1 at f = 0; IEC 62220-1):
    # an edge whose two sides are overshooting (ringing, as after edge enhancement) must be flagged
    from scorer.detector import measure_mtf

    n = 256
    yy, xx = np.mgrid[0:n, 0:n].astype(float)
    d = (xx - n / 2) - np.tan(np.radians(2.5)) * (yy - n / 2)
    img = 1000 + 900 * (d > 0) + 500 * np.exp(-np.abs(d) / 3.0) * np.sign(d)  # processed: overshoot both sides
    img += np.random.default_rng(0).normal(0, 3, img.shape)
    res = measure_mtf(img, (0.1, 0.1))
    assert any("implausible MTF" in w for w in res.warnings)


def test_steep_edge_refused_and_measurement_warnings_reach_stderr(panels, tmp_path):
    # IEC 62220-1 (from memory): the edge for the presampling MTF sits about 1.5°–3° off the pixel rows or
    # columns; a 45° edge gives an MTF along the diagonal, which must not be reported as the row/column MTF
    p = panels["direct"]
    steep = write_simulated(
        simulate(p["model"], "edge", 100.0, seed=30, small=True, edge_angle_deg=45.0), tmp_path, "e45", T0
    )
    res = run("detector", "--edge", steep, "--conversion", p["conv"])
    assert res.exit_code == 2, res.output
    lines = [ln for ln in res.stderr.splitlines() if ln.startswith("error:")]
    assert len(lines) == 1 and "more than 10°" in lines[0] and "e45" in lines[0], res.stderr
    # a moderately tilted edge (6°) is measured; one below 1° is measured with a warning printed on stderr,
    # not only kept in the JSON
    ok = write_simulated(
        simulate(p["model"], "edge", 100.0, seed=31, small=True, edge_angle_deg=6.0), tmp_path, "e6", T0
    )
    res = run("detector", "--edge", ok, "--conversion", p["conv"])
    assert res.exit_code == 0, res.output
    flat = write_simulated(
        simulate(p["model"], "edge", 100.0, seed=32, small=True, edge_angle_deg=0.7), tmp_path, "e07", T0
    )
    res = run("detector", "--edge", flat, "--conversion", p["conv"])
    assert res.exit_code == 0, res.output
    assert "warning:" in res.stderr and "below 1°" in res.stderr
