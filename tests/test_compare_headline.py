"""``limen compare-detectors`` with dose series: the headline in JSON, CSV, HTML and on the terminal, its
option, the panel types beside the labels, the DQE > 1 flag and the cautions on the page.

The dose series are power laws written here (a known kerma ratio), not simulated images, so the expected
numbers follow from the definition (C_T = a·K^(−β); Rose 1948) without any scoring noise.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from scorer.cli import main
from scorer.detector.dose import fit_power_law

KERMAS = [25.0, 50.0, 100.0, 180.0]
#: the true kerma ratio B/A per diameter: B needs 1.6× for small details, 0.8× for large ones
TRUTH = {0.1: 1.6, 0.15: 1.6, 0.25: 1.6, 0.35: 1.2, 0.5: 0.8, 1.0: 0.8, 2.0: 0.8}


def _detector(kind: str, dqe_scale: float = 1.0, manufacturer: str = "Limen simulation") -> dict:
    f = np.linspace(0.0, 6.0, 25)
    mtf = np.abs(np.sinc(0.085 * f)) * (1.0 if kind == "direct" else 1 / (1 + (2 * np.pi * 0.05 * f) ** 2))
    nnps = np.full(f.size, 2e-6)
    return {
        "mtf": {"frequency_per_mm": f.tolist(), "value": mtf.tolist()},
        "nnps": {"frequency_per_mm": f.tolist(), "value_mm2": nnps.tolist()},
        "dqe": {"frequency_per_mm": f.tolist(), "value": (dqe_scale * 0.6 * mtf**2).tolist()},
        "kerma_ugy": 100.0,
        "q_per_mm2_ugy": 5000.0,
        "pixel_spacing_mm": [0.085, 0.085],
        "nyquist_per_mm": 0.5 / 0.085,
        "panel": {
            "type": kind,
            "detector_type": "DIRECT" if kind == "direct" else "SCINTILLATOR",
            "detector_id": f"TEST-{kind}",
            "manufacturer": manufacturer,
        },
    }


def _series(ratio_for: dict[float, float], se: float = 0.04) -> dict:
    fits = []
    for d, r in ratio_for.items():
        a = 0.02 / d * r**0.5  # a_B = a_A·R^β with β = 0.5: B needs R× A's kerma at every kerma
        k = np.asarray(KERMAS)
        fits.append(fit_power_law(k, a * k**-0.5, np.full(k.size, se), diameter_mm=d).to_dict())
    return {
        "observer": "npw",
        "method": "dprime",
        "fits": fits,
        "groups": [{"kerma_ugy": k, "n_images": 4, "n_simulated": 4, "thresholds": []} for k in KERMAS],
        "settings": {},
    }


@pytest.fixture()
def files(tmp_path):
    paths = {}
    for name, obj in {
        "a.json": _detector("direct"),
        "b.json": _detector("indirect", dqe_scale=1.0),
        "b_hot.json": _detector("indirect", dqe_scale=2.5),
        "dose_a.json": _series({d: 1.0 for d in TRUTH}),
        "dose_b.json": _series(TRUTH),
    }.items():
        (tmp_path / name).write_text(json.dumps(obj), encoding="utf-8")
        paths[name] = tmp_path / name
    return paths


def _run(*args):
    return CliRunner().invoke(main, ["compare-detectors", *[str(a) for a in args]])


def test_headline_in_json_csv_html_and_terminal(files, tmp_path):
    out = tmp_path / "cmp"
    r = _run(
        files["a.json"], files["b.json"], "--label-a", "HSX-A", "--label-b", "HSX-B",
        "--dose-a", files["dose_a.json"], "--dose-b", files["dose_b.json"], "--out", out,
    )  # fmt: skip
    assert r.exit_code == 0, r.output
    res = json.loads((out / "comparison.json").read_text(encoding="utf-8"))
    # panels named by type beside their IDs (DICOM Detector Type DIRECT / SCINTILLATOR)
    assert res["labels"] == ["HSX-A (direct)", "HSX-B (indirect)"]
    head = res["headline"]
    small, large = head["classes"]
    # the pooled ratios are the truth (noise-free power laws; random effects with τ² = 0)
    assert small["ratio"] == pytest.approx(1.6, rel=1e-6) and large["ratio"] == pytest.approx(0.8, rel=1e-6)
    assert small["diameters_mm"] == [0.1, 0.15, 0.25] and large["diameters_mm"] == [0.5, 1.0, 2.0]
    assert small["i2"] == 0.0 and small["q"] == pytest.approx(0.0, abs=1e-12)
    assert "0.35 mm" in " ".join(head["notes"])  # in no class: said so
    assert head["sentences"][0].startswith("For details ≤ 0.25 mm HSX-B (indirect) needs 1.6× (95 % CI")
    assert head["sentences"][1].startswith("For details ≥ 0.5 mm HSX-A (direct) needs 1.2× (95 % CI")
    # Holm across the 7 diameters (Holm 1979): adjusted ≥ raw, and the smallest raw p times 7
    rows = head["per_diameter"]
    p = np.array([r_["p_value"] for r_ in rows])
    assert min(r_["p_holm"] for r_ in rows) == pytest.approx(min(1.0, p.min() * len(p)))
    # 1.6 × 180 µGy lies beyond B's 25–180 µGy: the small class at the top kerma is flagged in JSON and CSV
    top = small["other_kermas"][1]
    assert top["kerma_ugy"] == 180.0 and top["extrapolated"]
    csv = (out / "headline.csv").read_text(encoding="utf-8").splitlines()
    assert "extrapolated" in csv[0].split(",")
    assert any(line.startswith("class,≤ 0.25 mm,,180.0,") and line.split(",")[11] == "True" for line in csv)
    page = (out / "comparison.html").read_text(encoding="utf-8")
    assert page.index("The answer") < page.index("Summary")
    assert "EXTRAPOLATED" in page and "I²" in page and "Holm" in page
    # cautions: the physicist's, not for clinical diagnosis, the dose choice, and simulated inputs said so
    for text in ("qualified medical", "Not for clinical diagnosis", "choosing a clinical dose", "Simulated data."):
        assert text in page, text
    assert "Headline (equal image quality" in r.output and head["sentences"][0] in r.output


def test_detail_classes_option(files, tmp_path):
    r = _run(
        files["a.json"], files["b.json"], "--dose-a", files["dose_a.json"], "--dose-b", files["dose_b.json"],
        "--detail-classes", "0-0.15,0.2-0.4,1-", "--json",
    )  # fmt: skip
    assert r.exit_code == 0, r.output
    classes = json.loads(r.stdout)["headline"]["classes"]
    assert [c["name"] for c in classes] == ["≤ 0.15 mm", "0.2–0.4 mm", "≥ 1 mm"]
    assert classes[1]["diameters_mm"] == [0.25, 0.35] and classes[1]["i2"] > 0.5  # 1.6 and 1.2 disagree
    assert classes[1]["tau2"] > 0


@pytest.mark.parametrize(
    "extra, message",
    [
        (["--detail-classes", "0.5-0.1"], "--detail-classes"),
        (["--detail-classes", "tiny"], "--detail-classes"),
    ],
)
def test_bad_detail_classes_is_a_one_line_error(files, extra, message):
    r = _run(
        files["a.json"], files["b.json"], "--dose-a", files["dose_a.json"], "--dose-b", files["dose_b.json"], *extra
    )
    assert r.exit_code == 2
    assert message in r.output and "Traceback" not in r.output


def test_detail_classes_need_dose_series(files):
    r = _run(files["a.json"], files["b.json"], "--detail-classes", "0-0.25")
    assert r.exit_code == 2 and "--dose-a" in r.output


def test_dqe_above_one_is_flagged(files, tmp_path):
    # a DQE above 1 is not physical (an ideal counter has DQE = 1; IEC 62220-1): table and plot say so
    out = tmp_path / "hot"
    r = _run(files["a.json"], files["b_hot.json"], "--out", out)
    assert r.exit_code == 0, r.output
    res = json.loads((out / "comparison.json").read_text(encoding="utf-8"))
    dqe_rows = [t for t in res["table"] if t["quantity"].startswith("DQE at 0.5")]
    assert "DQE above 1" in dqe_rows[0]["basis"]
    page = (out / "comparison.html").read_text(encoding="utf-8")
    assert "DQE &gt; 1" in page or "DQE > 1" in page
    # without dose series there is no dose caution, but the other cautions stay
    assert "Not for clinical diagnosis" in page and "choosing a clinical dose" not in page


def test_real_images_get_no_simulated_banner(tmp_path):
    for name, obj in {
        "a.json": _detector("direct", manufacturer="Real Co"),
        "b.json": _detector("indirect", manufacturer="Real Co"),
    }.items():
        (tmp_path / name).write_text(json.dumps(obj), encoding="utf-8")
    r = _run(tmp_path / "a.json", tmp_path / "b.json", "--out", tmp_path / "o")
    assert r.exit_code == 0, r.output
    assert "Simulated data." not in (tmp_path / "o" / "comparison.html").read_text(encoding="utf-8")
