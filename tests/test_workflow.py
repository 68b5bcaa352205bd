"""scorer.workflow: the file-reading entry points give what the pure functions give on the same data.

These are checks of the cut between reading and computing (no physics): the numbers themselves are checked
against published formulas in tests/test_observer_truth.py, test_detector.py and test_dose_series.py.
"""

import datetime as dt
import json

import numpy as np
import pytest
from helpers import MINI

from scorer.detector import detector_model, measure_detector, simulate
from scorer.errors import LimenError
from scorer.observer import score_images
from scorer.workflow import (
    ImageFiles,
    load_conversion,
    load_detector_json,
    load_image,
    load_layout,
    load_limits,
    load_mtf,
    measure_detector_files,
    score_files,
    write_simulated,
)
from scorer.workflow.scoring import NO_CONVERSION_NOTE

T0 = dt.datetime(2026, 11, 30, 8, 0)


@pytest.fixture(scope="module")
def plate(tmp_path_factory):
    """Three simulated DICOM images of the mini plate and the panel's conversion function."""
    out = tmp_path_factory.mktemp("plate")
    model, layout = detector_model("direct"), load_layout(MINI)
    paths = [
        write_simulated(simulate(model, "phantom", 100.0, seed=40 + i, small=True, layout=layout), out, f"p{i}", T0)
        for i in range(3)
    ]
    conv = out / "conversion.toml"
    from scorer.images import save_conversion

    save_conversion(model.conversion_function(), conv)
    return {"paths": [str(p) for p in paths], "layout": layout, "conversion": load_conversion(conv)}


def test_score_files_equals_score_images_on_the_loaded_images(plate):
    kw = dict(methods=["dprime", "count"], n_boot=30, seed=3)
    conv = plate["conversion"]
    by_files = score_files(plate["paths"], plate["layout"], conversion=conv, **kw)
    images = [load_image(p, conversion=conv) for p in plate["paths"]]
    by_images = score_images(images, plate["layout"], names=plate["paths"], conversion=conv, **kw)
    assert json.dumps(by_files.to_json(), default=str) == json.dumps(by_images.to_json(), default=str)
    assert by_files.responses.equals(by_images.responses)


def test_without_conversion_the_note_comes_first(plate):
    res = score_files(plate["paths"][:1], plate["layout"], methods=["dprime"], n_boot=0)
    assert res.warnings[0] == NO_CONVERSION_NOTE
    pure = score_images([load_image(plate["paths"][0])], plate["layout"], methods=["dprime"], n_boot=0)
    assert NO_CONVERSION_NOTE not in pure.warnings  # the pure function says nothing about how images were read


def test_score_images_refuses_paths_and_names_the_workflow(plate):
    with pytest.raises(TypeError, match="scorer.workflow.score_files"):
        score_images(plate["paths"], plate["layout"], methods=["dprime"], n_boot=0)


def test_image_files_read_each_file_when_reached(tmp_path, plate):
    missing = tmp_path / "not-there.dcm"
    files = ImageFiles([plate["paths"][0], missing], conversion=plate["conversion"])  # nothing is read yet
    assert len(files) == 2
    assert files[0].pixels.shape  # the first reads fine
    with pytest.raises(LimenError, match="not-there.dcm"):
        files[1]
    with pytest.raises(LimenError, match="given twice"):
        ImageFiles([plate["paths"][0], plate["paths"][0]])


def test_one_bad_file_stops_scoring_at_that_file(tmp_path, plate):
    bad = tmp_path / "cut.dcm"
    bad.write_bytes(open(plate["paths"][1], "rb").read()[:2000])  # truncated after the header
    seen = []
    with pytest.raises(LimenError, match="cut.dcm"):
        score_files(
            [plate["paths"][0], bad, plate["paths"][2]],
            plate["layout"],
            conversion=plate["conversion"],
            methods=["dprime"],
            n_boot=0,
            on_image=lambda i, path, image, placement: seen.append(path),
        )
    assert seen == [plate["paths"][0]]  # the first image was scored before the bad one was read


def test_limits_and_mtf_files_name_themselves_in_errors(tmp_path):
    bad = tmp_path / "limits.toml"
    bad.write_text('format = "limen-limits/1"\nobserver = "npw"\nsource = "x"\n', encoding="utf-8")
    with pytest.raises(LimenError, match=r"limits\.toml: no \[\[limits\]\] entries"):
        load_limits(bad)
    det = tmp_path / "detector.json"
    det.write_text('{"mtf": {"frequency_per_mm": [0, 1], "value": [1, 0.9]}}', encoding="utf-8")
    with pytest.raises(LimenError, match="detector.json: MTF needs at least three frequencies"):
        load_mtf(det)


def test_measure_detector_files_equals_measure_detector(tmp_path):
    model = detector_model("direct")
    flats = [
        write_simulated(simulate(model, "flat", 100.0, seed=i, small=True), tmp_path, f"f{i}", T0) for i in range(2)
    ]
    edge = write_simulated(simulate(model, "edge", 100.0, seed=9, small=True), tmp_path, "e", T0)
    warned = []
    got = measure_detector_files(flats, [edge], kerma_ugy=100.0, q_per_mm2_ugy=5000.0, warn=warned.append)
    want = measure_detector([load_image(p) for p in flats], [load_image(edge)], kerma_ugy=100.0, q_per_mm2_ugy=5000.0)
    np.testing.assert_array_equal(got.metrics.dqe.value, want.dqe.value)
    assert got.notes and got.notes[0] in warned  # no conversion function: said once, and recorded
    out = tmp_path / "detector.json"
    out.write_text(json.dumps(got.metrics.to_dict(), default=str), encoding="utf-8")
    assert load_detector_json(out)["mtf"]["value"] == pytest.approx(list(want.mtf.value), nan_ok=True)


def test_a_beam_without_its_q_is_refused_by_the_pure_measurement():
    model = detector_model("direct")
    from scorer.images import Image

    flat = Image(simulate(model, "flat", 100.0, seed=1, small=True).kerma_ugy(), (0.085, 0.085))
    with pytest.raises(LimenError, match="q_for_beam"):
        measure_detector([flat], kerma_ugy=100.0, beam="RQA5")
