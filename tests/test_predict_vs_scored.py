"""The contrast-detail curve predicted from MTF and NNPS agrees with the one scored from phantom images."""

import pandas as pd
import pytest
from helpers import MINI, simulate_set

from scorer.detector import detector_model, measure_detector, predict_from_detector, simulate
from scorer.images import Image
from scorer.observer import ObserverConfig, SystemBlur, dprime_thresholds, score_image
from scorer.phantom import load_layout, register


@pytest.mark.parametrize("panel", ["direct", "indirect"])
def test_predicted_threshold_matches_image_scored_dprime_threshold(panel):
    # ICRU Report 54 (1996): the NPW d′ of a known disc follows from MTF, NNPS and the disc's Fourier
    # transform; scored from images by the d′ method it must agree (issue floor: within 15 % per diameter)
    model = detector_model(panel)
    lay = load_layout(MINI)
    dose = 100.0
    flats = [
        Image(s.kerma_ugy(), s.spacing_mm)
        for s in (simulate(model, "flat", dose, seed=50 + i, small=True) for i in range(4))
    ]
    edges = [
        Image(s.kerma_ugy(), s.spacing_mm)
        for s in (
            simulate(model, "edge", dose, seed=60 + i, small=True, edge_angle_deg=a) for i, a in enumerate((2.5, 92.5))
        )
    ]
    det = measure_detector(flats, edges, kerma_ugy=dose, q_per_mm2_ugy=model.q_per_mm2_ugy).to_dict()
    # each diameter's criterion follows its cells (3-AFC triangles, 5-AFC pentagons on the mini plate)
    m_of = {d: lay.targets_with_diameter(d)[0].m_alternatives for d in lay.diameters_mm}
    predicted = {
        p.diameter_mm: p.threshold_contrast
        for p in predict_from_detector(det, lay.diameters_mm, observers=("npw",), m_alternatives=m_of)
    }
    # the physicist's workflow: score the plate with templates shaped by the measured MTF. 32 images: with 16 the
    # d′ CI is about ±13 %, and at 1.0 mm the scored value sits ~8 % above the prediction (the local-background
    # loss of Limen's observer; measured on this plate over seeds 7–9: +2 to +18 % with 16 images, +8/+13 % with 32)
    blur = SystemBlur(frequency_per_mm=tuple(det["mtf"]["frequency_per_mm"]), mtf=tuple(det["mtf"]["value"]))
    frames = []
    for i, (img, _, _) in enumerate(simulate_set(model, lay, dose, 32, seed=7)):
        frames.append(score_image(img, lay, register(img, lay), ObserverConfig("npw", blur=blur), image_id=f"i{i}"))
    scored = dprime_thresholds(pd.concat(frames, ignore_index=True), n_boot=0)
    for p in scored.points:
        assert p.threshold_contrast == pytest.approx(predicted[p.diameter_mm], rel=0.15), p.diameter_mm
