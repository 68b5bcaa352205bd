"""`limen score` end to end on simulated DICOM images of the mini plate."""

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import MINI

from scorer.cli import main
from scorer.images import load_image, write_image
from scorer.phantom import load_layout
from scorer.workflow import score_files


@pytest.fixture(scope="module")
def direct_set(tmp_path_factory):
    out = tmp_path_factory.mktemp("direct")
    res = CliRunner().invoke(
        main,
        [
            "simulate",
            "--detector",
            "direct",
            "--small",
            "--layout",
            str(MINI),
            "--count",
            "6",
            "--seed",
            "11",
            "--rotate",
            "17",
            "--out",
            str(out),
        ],
    )
    assert res.exit_code == 0, res.output
    return out


def _run(args):
    return CliRunner().invoke(main, ["score"] + args)


def test_json_output_has_the_agreed_shape(direct_set):
    files = sorted(str(p) for p in direct_set.glob("*.dcm"))
    res = _run(
        files
        + [
            "--layout",
            str(MINI),
            "--json",
            "--n-boot",
            "200",
            "--conversion",
            str(direct_set / "direct-conversion.toml"),
        ]
    )
    assert res.exit_code == 0, res.output
    js = json.loads(res.stdout)
    assert js["observer"] == "npw"
    assert len(js["images"]) == 6
    reg = js["images"][0]["registration"]
    assert set(reg) >= {"residual_px", "rotation_deg", "flipped", "magnification"}
    assert reg["rotation_deg"] == pytest.approx(17.0, abs=0.2) and reg["flipped"] is False
    th = js["thresholds"]
    assert {t["method"] for t in th} == {"dprime", "count"}
    assert len(th) == 2 * len(load_layout(MINI).diameters_mm)
    for t in th:
        assert set(t) >= {"diameter_mm", "threshold_contrast", "ci_low", "ci_high", "method", "n_images"}
        assert 0 < t["ci_low"] <= t["threshold_contrast"] <= t["ci_high"] < 1  # contrasts as fractions
        assert t["n_images"] == 6
    assert js["verdicts"] == []


def test_out_writes_report_tables_and_overlays(direct_set, tmp_path):
    files = sorted(str(p) for p in direct_set.glob("*.dcm"))[:3]
    res = _run(files + ["--layout", str(MINI), "--n-boot", "100", "--out", str(tmp_path / "r")])
    assert res.exit_code == 0, res.output
    r = tmp_path / "r"
    for name in ("results.json", "responses.csv", "trials.csv", "thresholds.csv", "report.html"):
        assert (r / name).stat().st_size > 0, name
    assert len(list((r / "overlays").glob("*.png"))) == 3
    html = (r / "report.html").read_text()
    assert "never replace" in html and "<svg" in html
    # the page says what was done (the d′ interval is analytic by default) and that the images are simulated
    assert "analytic interval" in html and "bootstrap over images (100 resamples)" in html
    assert "Simulated data:" in html
    import pandas as pd

    resp = pd.read_csv(r / "responses.csv")
    assert len(resp) == 3 * sum(t.m_alternatives for t in load_layout(MINI).targets)
    # the table on the terminal carries the caution too
    assert "never replace" in res.output


def _limits(tmp_path, observer, value):
    p = tmp_path / f"lim-{observer}-{value}.toml"
    p.write_text(
        f'format = "limen-limits/1"\nobserver = "{observer}"\nsource = "test values (invented)"\n'
        f"[[limits]]\ndiameter_mm = 0.1\nacceptable = {value}\n"
        f"[[limits]]\ndiameter_mm = 1.0\nacceptable = {value / 10}\n"
    )
    return p


def test_exit_codes_follow_the_verdicts(direct_set, tmp_path):
    files = sorted(str(p) for p in direct_set.glob("*.dcm"))
    base = files + ["--layout", str(MINI), "--n-boot", "200"]
    assert _run(base + ["--limits", str(_limits(tmp_path, "npw", 0.5))]).exit_code == 0  # generous: pass
    res = _run(base + ["--limits", str(_limits(tmp_path, "npw", 0.002)), "--json"])  # strict: fail
    assert res.exit_code == 1
    assert {v["verdict"] for v in json.loads(res.stdout)["verdicts"]} == {"fail"}
    # human limits with model thresholds need a human/model factor
    res = _run(base + ["--limits", str(_limits(tmp_path, "human", 0.5))])
    assert res.exit_code == 2 and "human-factor" in res.output
    assert _run(base + ["--limits", str(_limits(tmp_path, "human", 0.5)), "--human-factor", "3"]).exit_code == 0
    # a limit inside the CI: INDETERMINATE has its own exit status, 3 (documented in the README)
    th = {
        t["diameter_mm"]: t for t in json.loads(_run(base + ["--json"]).stdout)["thresholds"] if t["method"] == "dprime"
    }
    mid = tmp_path / "mid.toml"
    mid.write_text(
        'format = "limen-limits/1"\nobserver = "npw"\nsource = "test values (invented)"\n'
        f"[[limits]]\ndiameter_mm = 1.0\nacceptable = {th[1.0]['threshold_contrast']}\n"
    )
    res = _run(base + ["--limits", str(mid), "--json"])
    assert json.loads(res.stdout)["overall_verdict"] == "indeterminate" and res.exit_code == 3
    # a human factor without limits has no effect, and says so
    res = _run(base + ["--human-factor", "2"])
    assert res.exit_code == 0 and "has no effect without --limits" in res.output


def test_bad_inputs_give_one_line_and_exit_2(direct_set, tmp_path):
    flat = tmp_path / "flat"
    assert CliRunner().invoke(main, ["simulate", "--kind", "flat", "--small", "--out", str(flat)]).exit_code == 0
    cases = [
        ([str(tmp_path / "missing.dcm")], "missing.dcm"),
        ([str(next(flat.glob("*.dcm"))), "--layout", str(MINI), "--out", str(tmp_path / "o")], "phantom not found"),
        ([str(next(direct_set.glob("*.dcm"))), "--layout", str(tmp_path / "nolayout.toml")], "nolayout.toml"),
    ]
    npy = tmp_path / "a.npy"
    np.save(npy, np.ones((50, 50)))
    cases.append(([str(npy), "--layout", str(MINI)], "--pixel-spacing"))  # the error names the option
    for args, needle in cases:
        res = _run(args)
        assert res.exit_code == 2, res.output
        err = [ln for ln in res.output.splitlines() if ln.startswith("error:")]
        assert len(err) == 1 and needle in err[0], res.output
        assert "Traceback" not in res.output
    # the failed registration left a diagnostic overlay
    assert list((tmp_path / "o" / "overlays").glob("*FAILED.png"))


@pytest.mark.parametrize("transform", ["rot90", "mirror"])
def test_thresholds_unchanged_by_rotating_or_mirroring_every_image(direct_set, tmp_path, transform):
    # a rotation by 90° or a mirror image moves pixels without changing noise or signal, so the
    # thresholds must not change (common practice: orientation independence of automated scoring)
    lay = load_layout(MINI)
    conv = direct_set / "direct-conversion.toml"
    files = sorted(direct_set.glob("*.dcm"))
    moved = []
    for f in files:
        img = load_image(f)
        px = np.rot90(img.pixels) if transform == "rot90" else img.pixels[:, ::-1]
        moved.append(write_image(tmp_path / f"{f.stem}.npy", np.ascontiguousarray(px)))
    from scorer.images import load_conversion

    c = load_conversion(conv)
    a = score_files(files, lay, methods=["dprime"], conversion=c, n_boot=0)
    b = score_files(moved, lay, methods=["dprime"], conversion=c, n_boot=0, pixel_spacing_mm=0.085)
    for pa, pb in zip(a.curves["dprime"].points, b.curves["dprime"].points):
        assert pb.threshold_contrast == pytest.approx(pa.threshold_contrast, rel=0.10)
    assert b.images[0].placement.flipped == (transform == "mirror")


def _bad_files(tmp, good_dcm):
    """Expected bad inputs of the foundation issue, each paired with a phrase its error must hold."""
    import cv2

    from scorer.images import write_dicom

    out = []
    data = Path(good_dcm).read_bytes()
    trunc = tmp / "truncated.dcm"
    trunc.write_bytes(data[: len(data) // 2])
    out.append((trunc, "truncated"))
    text = tmp / "notes.dcm"
    text.write_text("not an image at all")
    out.append((text, "notes.dcm"))
    rgb = tmp / "colour.png"
    cv2.imwrite(str(rgb), np.zeros((64, 64, 3), np.uint8))
    out.append((rgb, "colour.png"))
    nan = tmp / "nan.npy"
    a = np.ones((700, 700))
    a[3, 4] = np.nan
    np.save(nan, a)
    out.append((nan, "nan.npy"))
    small = tmp / "small.dcm"
    write_dicom(small, np.full((120, 120), 1000, np.uint16), (0.085, 0.085), {"Modality": "MG"})
    out.append((small, "small.dcm"))
    return out


def test_every_bad_image_exits_2_with_one_line(direct_set, tmp_path):
    good = next(direct_set.glob("*.dcm"))
    for path, needle in _bad_files(tmp_path, good):
        res = _run(
            [str(path), "--layout", str(MINI), "--pixel-spacing", "0.085"]
            if path.suffix != ".dcm"
            else [str(path), "--layout", str(MINI)]
        )
        assert res.exit_code == 2, (path, res.output)
        lines = [ln for ln in res.output.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("error: ") and path.name in lines[0], res.output
        assert needle in lines[0], res.output


def test_compressed_dicom_without_its_decoder_exits_2(direct_set, tmp_path, monkeypatch):
    # DICOM PS3.5: JPEG-LS Lossless is transfer syntax 1.2.840.10008.1.2.4.80
    from pydicom.pixels.decoders import JPEGLSLosslessDecoder

    img = load_image(next(direct_set.glob("*.dcm")))
    from scorer.images import write_dicom

    p = write_dicom(
        tmp_path / "jls.dcm",
        img.pixels.astype(np.uint16),
        img.spacing_mm,
        {"Modality": "MG"},
        transfer_syntax="jpeg-ls-lossless",
    )
    monkeypatch.setattr(JPEGLSLosslessDecoder, "_available", {})
    res = _run([str(p), "--layout", str(MINI)])
    assert res.exit_code == 2
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and "jls.dcm" in lines[0] and "1.2.840.10008.1.2.4.80" in lines[0], res.output


def test_count_form_and_dprime_ci_options(direct_set):
    files = sorted(str(p) for p in direct_set.glob("*.dcm"))
    res = _run(
        files
        + ["--layout", str(MINI), "--json", "--n-boot", "100", "--psychometric", "logistic", "--dprime-ci", "bootstrap"]
    )
    assert res.exit_code == 0, res.output
    js = json.loads(res.stdout)
    assert js["settings"]["count_form"] == "logistic" and js["settings"]["dprime_ci"] == "bootstrap"


def test_human_factor_from_an_analysis_file(direct_set, tmp_path):
    # issue 21: a factor applies like for like — the d′-method verdict takes the factor measured for the d′
    # method, and refuses one measured on the count method only (an analysis of the model's decisions)
    files = sorted(str(p) for p in direct_set.glob("*.dcm"))
    lim = _limits(tmp_path, "human", 0.5)

    def analysis(name, entry):
        path = tmp_path / name
        path.write_text(json.dumps({"human_model_factor": {**entry, "by_observer": [entry]}}))
        return path

    both = analysis(
        "both.json",
        {
            "observer": "npwe",
            "method": "count",
            "factor": 1.9,
            "by_method": {
                "count": {"method": "count", "factor": 1.9, "ci_low": 1.7, "ci_high": 2.1},
                "dprime": {"method": "dprime", "factor": 2.2, "ci_low": 2.0, "ci_high": 2.4},
            },
        },
    )
    count_only = analysis("count.json", {"observer": "npwe", "factor": 1.9})  # an analysis written before methods
    args = files + ["--layout", str(MINI), "--n-boot", "100", "--observer", "npwe", "--limits", str(lim)]
    res = _run(args + ["--human-factor-from", str(both), "--json"])
    js = json.loads(res.stdout)
    assert res.exit_code == {"pass": 0, "indeterminate": 3}[js["overall_verdict"]], res.output
    assert js["verdict_method"] == "dprime" and js["human_factor"] == 2.2 and js["human_factor_ci"] == [2.0, 2.4]
    res = _run(args + ["--human-factor-from", str(both), "--method", "count", "--json"])
    assert json.loads(res.stdout)["human_factor"] == 1.9
    res = _run(args + ["--human-factor-from", str(count_only)])
    assert res.exit_code == 2 and "measured on the count method only" in res.output, res.output
    assert len(res.stderr.strip().splitlines()) == 1
    res = _run(args + ["--human-factor-from", str(count_only), "--method", "count", "--json"])
    assert json.loads(res.stdout)["human_factor"] == 1.9
    # a factor measured for another observer must not be used
    res = _run(
        files + ["--layout", str(MINI), "--observer", "npw", "--limits", str(lim), "--human-factor-from", str(both)]
    )
    assert res.exit_code == 2 and "no human/model factor for the NPW observer" in res.output
    # a factor that rests on no usable cell is refused, never exported
    none = analysis(
        "none.json",
        {
            "observer": "npwe",
            "factor": None,
            "by_method": {
                "count": {"factor": None, "note": "no usable cell: all 4 detector × diameter cells have a fit at a "
                          "search bound or not estimable"},
            },
        },
    )  # fmt: skip
    res = _run(args + ["--human-factor-from", str(none), "--method", "count"])
    assert res.exit_code == 2 and "no usable human/model factor" in res.output and "search bound" in res.output


def test_one_image_results_json_is_valid_json(direct_set, tmp_path):
    # one image gives no bootstrap CI (NaN inside): the written JSON must still parse strictly (RFC 8259 has no NaN)
    one = str(next(direct_set.glob("*.dcm")))
    res = _run([one, "--layout", str(MINI), "--dprime-ci", "bootstrap", "--out", str(tmp_path / "boot")])
    assert res.exit_code == 0, res.output
    text = (tmp_path / "boot" / "results.json").read_text()
    js = json.loads(text, parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
    assert all(t["ci_low"] is None for t in js["thresholds"] if t["method"] == "dprime")
    # the default CIs need no resampling: the d′ method's is analytic, the count method's a profile likelihood
    # interval on the targets' binomial counts (Wilks 1938, docs/references.md), so one image has both — the
    # count method's flagged unreliable with fewer than 3 images
    res = _run([one, "--layout", str(MINI), "--out", str(tmp_path / "one")])
    assert res.exit_code == 0, res.output
    js = json.loads((tmp_path / "one" / "results.json").read_text(), parse_constant=lambda c: pytest.fail(c))
    for t in js["thresholds"]:
        assert t["ci_low"] is not None and t["ci_low"] <= t["threshold_contrast"] <= t["ci_high"], t
        if t["method"] == "count":
            assert "unreliable" in t["note"], t


def test_two_images_of_the_demo_plate_give_a_report_not_a_crash(tmp_path):
    # Found by the robustness audit: with two images a count-method CI came out with both ends equal and a
    # hair above the estimate (floating point), and the contrast-detail plot raised "yerr must not contain
    # negative values", leaving no report.html and exit 1. A CI contains its estimate by construction.
    sim = CliRunner().invoke(
        main,
        [
            "simulate",
            "--detector",
            "direct",
            "--kind",
            "phantom",
            "--small",
            "--count",
            "2",
            "--seed",
            "3",
            "--out",
            str(tmp_path / "img"),
        ],
    )
    assert sim.exit_code == 0, sim.output
    files = sorted(str(p) for p in (tmp_path / "img").glob("*.dcm"))
    res = _run(files + ["--n-boot", "50", "--out", str(tmp_path / "r")])
    assert res.exit_code == 0, res.output
    assert (tmp_path / "r" / "report.html").stat().st_size > 0
    for t in json.loads((tmp_path / "r" / "results.json").read_text())["thresholds"]:
        if t["threshold_contrast"] is not None and t["ci_low"] is not None:
            assert t["ci_low"] <= t["threshold_contrast"] <= t["ci_high"], t


def test_a_ci_always_contains_its_estimate():
    from scorer.observer import ThresholdPoint

    est = 0.0123
    p = ThresholdPoint(1.0, est, est * (1 + 1e-15), est * (1 + 1e-15), "count", "npw", 2, 3, 2 / 3)
    assert p.ci_low <= p.threshold_contrast <= p.ci_high
    p = ThresholdPoint(1.0, est, 0.010, 0.011, "count", "npw", 2, 3, 2 / 3)  # estimate above a skewed interval
    assert (p.ci_low, p.ci_high) == (0.010, est)
    nan = ThresholdPoint(1.0, float("nan"), 0.01, 0.02, "count", "npw", 2, 3, 2 / 3)
    assert (nan.ci_low, nan.ci_high) == (0.01, 0.02)  # nothing to enclose


def test_error_bars_never_negative():
    from scorer.reports.html import error_bars

    lo, hi = error_bars(np.array([1.0, 2.0, 3.0]), np.array([1.0 + 1e-12, np.nan, 2.5]), np.array([0.9, 2.5, np.inf]))
    assert np.all(lo >= 0) and np.all(hi >= 0)
    assert lo[2] == pytest.approx(0.5) and hi[0] == 0 and hi[2] == 0


def test_results_record_the_actual_command_also_in_process(direct_set, tmp_path):
    # found in use: every demo results.json said "limen score demo-output" (taken from sys.argv of the demo)
    files = sorted(str(p) for p in direct_set.glob("*.dcm"))[:2]
    out = tmp_path / "r"
    res = _run(files + ["--layout", str(MINI), "--n-boot", "0", "--method", "dprime", "--out", str(out)])
    assert res.exit_code == 0, res.output
    js = json.loads((out / "results.json").read_text())
    assert js["command"].startswith("limen score ") and files[0] in js["command"] and str(out) in js["command"]
    assert js["provenance"]["command"] == js["command"]
