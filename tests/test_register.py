"""Registration: known poses from the physics simulator are recovered; bad images are refused."""

import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest

from scorer.detector.simulator import (
    Pose,
    _phantom_field_shape,
    detector_model,
    expose,
    phantom_transform,
    phantom_transmission,
    render_discs,
    simulate,
)
from scorer.errors import LimenError
from scorer.images import Image, ImageMetadata
from scorer.phantom import Placement, RegistrationError, Target, fit_similarity, load_layout, register
from scorer.reports import draw_overlay

MINI = Path(__file__).parent / "data" / "mini-plate.toml"
DOSE_UGY = 25.0  # the lowest demo dose
PIXEL_TOL = 0.5  # issue 3: "within 0.5 px at every fiducial"
# Our own tighter bound on the measured centres: the full-resolution sub-pixel refinement
# reaches ~0.06 px here, whereas the coarse block centroid alone errs by up to ~0.4 px.
REFINED_TOL = 0.2


@pytest.fixture(scope="module")
def mini():
    return load_layout(MINI)


def _image(sim, name="sim.dcm") -> Image:
    return Image(sim.pixels, sim.spacing_mm, ImageMetadata(source_path=name))


def _angle_diff(a, b):
    return abs((a - b + 180.0) % 360.0 - 180.0)


# ----------------------------------------------------------------- least-squares similarity
@pytest.mark.parametrize("reflect", [False, True])
def test_fit_similarity_equals_direct_linear_least_squares(reflect):
    # Umeyama, IEEE TPAMI 13 (1991): the closed-form SVD solution is the least-squares
    # similarity.  Checked against the same problem written as a linear system in
    # (a, b, tx, ty) — A = [[a, b], [-b, a]] (proper) or [[-a, b], [b, a]] (mirrored) —
    # and solved by numpy.linalg.lstsq.
    rng = np.random.default_rng(11)
    src = rng.uniform(0, 150, size=(7, 2))
    theta = np.deg2rad(251.0)
    R = np.array([[np.cos(theta), np.sin(theta)], [-np.sin(theta), np.cos(theta)]])
    F = np.diag([-1.0, 1.0]) if reflect else np.eye(2)
    dst = src @ (13.7 * R @ F).T + [812.0, -95.0] + rng.normal(0, 0.3, size=(7, 2))

    A, t = fit_similarity(src, dst, reflect=reflect)

    x, y = src[:, 0], src[:, 1]
    one, zero = np.ones_like(x), np.zeros_like(x)
    sx = -x if reflect else x
    # col = a·sx + b·y + tx ;  row = −b·sx + a·y + ty   (sx = ∓x)
    M = np.vstack([np.column_stack([sx, y, one, zero]), np.column_stack([y, -sx, zero, one])])
    (a, b, tx, ty), *_ = np.linalg.lstsq(M, np.concatenate([dst[:, 0], dst[:, 1]]), rcond=None)
    A_direct = np.array([[a, b], [-b, a]]) @ F
    np.testing.assert_allclose(A, A_direct, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(t, [tx, ty], rtol=1e-9, atol=1e-7)
    # reflect=None picks the right handedness
    A_auto, _ = fit_similarity(src, dst, reflect=None)
    assert np.sign(np.linalg.det(A_auto)) == (-1 if reflect else 1)


# ----------------------------------------------------------------- known poses
POSES = [  # rotation_deg, flipped, magnification, shift_mm — rotations spread over 0–360°
    Pose(0.0, False, 1.0, (0.0, 0.0)),
    Pose(37.0, False, 0.8, (3.0, -2.0)),
    Pose(90.0, True, 1.4, (-4.0, 1.5)),
    Pose(143.0, True, 1.0, (2.5, 2.5)),
    Pose(180.0, False, 1.4, (-1.0, -3.0)),
    Pose(251.0, True, 0.8, (0.7, 0.3)),
    Pose(315.0, False, 1.0, (5.0, 0.0)),
    Pose(0.0, True, 0.8, (-2.2, 4.1)),
    Pose(37.0, True, 1.4, (1.1, 0.0)),
    Pose(90.0, False, 0.8, (0.0, -1.7)),
    Pose(143.0, False, 1.4, (-3.3, 2.0)),
    Pose(251.0, False, 1.17, (2.0, 2.0)),
    Pose(315.0, True, 1.0, (-0.4, -0.6)),
    Pose(359.6, False, 0.93, (0.25, 0.0)),
]


@pytest.mark.parametrize("model", ["direct", "indirect"])
@pytest.mark.parametrize(
    "pose", POSES, ids=lambda p: f"r{p.rotation_deg:g}-{'F' if p.flipped else 'N'}-m{p.magnification:g}"
)
def test_registration_recovers_known_pose(mini, model, pose):
    sim = simulate(
        detector_model(model),
        "phantom",
        DOSE_UGY,
        seed=int(pose.rotation_deg * 10) + 1,
        small=True,
        layout=mini,
        pose=pose,
    )
    pl = register(_image(sim), mini)

    truth = sim.truth["fiducials_px"]  # the simulator's own marker centres (row, col)
    assert set(pl.markers_px) == set(truth)
    xy = np.array([m.xy_mm for m in mini.markers])
    fitted = pl.transform.to_pixel(xy)
    for i, m in enumerate(mini.markers):
        t = np.asarray(truth[m.id])
        assert np.hypot(*(np.asarray(pl.markers_px[m.id]) - t)) < REFINED_TOL, m.id  # measured centre
        assert np.hypot(*(fitted[i] - t)) < PIXEL_TOL, m.id  # fitted transform
    # the whole plate, not only the markers: target sites too, against the simulator's transform
    tf_true = phantom_transform(mini, pose, sim.pixels.shape, sim.spacing_mm[0])
    sites = np.concatenate([t.sites for t in mini.targets])
    assert np.max(np.hypot(*(pl.transform.to_pixel(sites) - tf_true.to_pixel(sites)).T)) < PIXEL_TOL

    assert _angle_diff(pl.rotation_deg, pose.rotation_deg) < 0.2
    assert 0.0 <= pl.rotation_deg < 360.0
    assert pl.flipped == pose.flipped
    assert pl.magnification == pytest.approx(pose.magnification, rel=0.005)
    assert pl.residual_px < 0.5 and pl.max_residual_px >= pl.residual_px
    # JSON-ready summary
    d = json.loads(json.dumps(pl.to_dict()))
    assert d["flipped"] == pose.flipped and set(d["markers_px"]) == set(truth)
    assert np.allclose(d["transform"]["matrix"], pl.transform.A)


def test_full_size_demo_plate_and_linearised_pixels():
    # One full-size (2816 × 3520) image of the bundled demo plate; registration on the raw
    # values and on the values linearised to air kerma must agree.
    demo = load_layout()
    pose = Pose(203.0, True, 1.17, (8.0, -5.0))
    sim = simulate(detector_model("direct"), "phantom", DOSE_UGY, seed=4, layout=demo, pose=pose)
    assert sim.pixels.shape == (2816, 3520)
    raw = register(_image(sim), demo)
    lin = register(Image(sim.kerma_ugy(), sim.spacing_mm), demo)
    for pl in (raw, lin):
        for k, t in sim.truth["fiducials_px"].items():
            assert np.hypot(*(np.asarray(pl.markers_px[k]) - t)) < PIXEL_TOL
        assert _angle_diff(pl.rotation_deg, 203.0) < 0.2 and pl.flipped
        assert pl.magnification == pytest.approx(1.17, rel=0.005)


def test_non_square_pixels_are_handled(mini):
    # Resample columns: an image whose column pitch is 5 % larger than its row pitch.
    pose = Pose(63.0, False, 1.1, (0.0, 0.0))
    sim = simulate(detector_model("direct"), "phantom", 100.0, seed=9, small=True, layout=mini, pose=pose)
    px = sim.pixels.astype(float)
    p = sim.spacing_mm[0]
    new_cols = int(px.shape[1] / 1.05)
    c_new = np.arange(new_cols) * 1.05  # sample positions in old columns
    resampled = np.stack([np.interp(c_new, np.arange(px.shape[1]), row) for row in px])
    img = Image(resampled, (p, 1.05 * p))
    pl = register(img, mini)
    for k, (r, c) in sim.truth["fiducials_px"].items():
        # linear interpolation blurs a little; the point is that the fit stays consistent
        assert np.hypot(pl.markers_px[k][0] - r, pl.markers_px[k][1] - c / 1.05) < 0.5
    assert pl.magnification == pytest.approx(1.1, rel=0.005)
    assert _angle_diff(pl.rotation_deg, 63.0) < 0.2
    assert pl.residual_px < 0.3


def test_marker_sized_distractors_outside_the_plate_do_not_confuse_it(mini):
    # Twelve extra absorbing discs of fiducial and key size scattered around the plate
    # (rulers, lead letters, a second object): only the layout's arrangement may match.
    model = detector_model("direct")
    p = model.pixel_pitch_mm
    shape = (900, 900)
    pose = Pose(211.0, True, 1.05, (1.0, -2.0))
    tf = phantom_transform(mini, pose, shape, p)
    trans = phantom_transmission(mini, tf, shape, p, pose.magnification)
    rng = np.random.default_rng(21)
    plate = tf.to_pixel([[0, 0], [44, 0], [44, 36], [0, 36]])
    centre = plate.mean(axis=0)
    extra = []
    while len(extra) < 12:
        rc = rng.uniform(30, 870, size=2)
        if np.hypot(*(rc - centre)) > 0.5 * np.hypot(44, 36) * 1.05 / p + 40 and all(
            np.hypot(*(rc - e)) > 60 for e in extra
        ):
            extra.append(rc)
    radii = [(2.0 if i % 3 else 3.5) * 1.05 / p / 2 for i in range(12)]
    render_discs(trans, np.array(extra), radii, [0.6] * 12)
    pixels = expose(trans, model, DOSE_UGY, np.random.default_rng(3))
    pl = register(Image(pixels, (p, p)), mini)
    truth = tf.to_pixel([m.xy_mm for m in mini.markers])
    for m, t in zip(mini.markers, truth):
        assert np.hypot(*(np.asarray(pl.markers_px[m.id]) - t)) < REFINED_TOL
    assert pl.flipped and _angle_diff(pl.rotation_deg, 211.0) < 0.2
    assert len(pl.candidates_px) >= 17  # the distractors are reported for the overlay


# ----------------------------------------------------------------- refusals
def test_flat_field_is_refused_with_markers_found(mini):
    sim = simulate(detector_model("direct"), "flat", DOSE_UGY, seed=2, small=True)
    with pytest.raises(RegistrationError) as exc:
        register(_image(sim, "flat.dcm"), mini)
    msg = str(exc.value)
    assert msg.startswith("flat.dcm: ") and "\n" not in msg
    assert "phantom not found" in msg and "0 of 5 markers" in msg
    assert isinstance(exc.value, LimenError) and exc.value.candidates_px == []


def test_phantom_partly_outside_the_field_is_placed_on_the_markers_inside(mini):
    # The right-hand fiducial E falls outside a field too narrow for the shifted plate (issue 20, item 2): the
    # other four markers fix the similarity fit (the key breaks the symmetry), E is reported as not used, and
    # the target sites outside the image are named rather than refusing the image.
    pose = Pose(0.0, False, 1.0, (10.0, 0.0))
    shape = _phantom_field_shape(mini, Pose(), 0.085)
    sim = simulate(detector_model("indirect"), "phantom", DOSE_UGY, seed=5, layout=mini, pose=pose, shape=shape)
    assert not 0 <= sim.truth["fiducials_px"]["E"][1] < shape[1]  # the premise
    pl = register(_image(sim, "cut.dcm"), mini)
    assert pl.markers_not_used == {"E": "cut off by the image edge"} and "E" not in pl.markers_px  # part of it inside
    assert pl.residual_px < 0.5 and any("E" in n and "not used" in n for n in pl.notes())
    d = pl.to_dict()
    assert d["markers_not_used"] == pl.markers_not_used and sorted(d["markers_used"]) == ["N", "S", "W", "key"]
    # every site named as outside really lies outside: its disc crosses the field edge (truth from the simulator)
    for t, k in pl.sites_outside:
        x = pl.transform.to_pixel([next(tg for tg in mini.targets if tg.id == t).sites[k]])[0]
        assert x[1] > shape[1] - 1 - 0.5 * 1.0 / 0.085  # within a disc radius (≤ 1 mm) of the right edge or past it


def test_all_sites_outside_the_field_is_refused(mini):
    # Only the markers inside a field that misses every target site: nothing to score.
    extra = dataclasses.replace(mini, targets=(Target("far", 0.5, 0.05, ((200.0, 12.0), (200.0, 15.0)), 0),))
    sim = simulate(detector_model("direct"), "phantom", DOSE_UGY, seed=6, small=True, layout=mini)
    with pytest.raises(RegistrationError, match="all 2 target sites lie outside the image"):
        register(_image(sim, "far.dcm"), extra)


def test_target_sites_outside_the_field_are_listed(mini):
    # All markers inside, but a target's sites reach past the right edge of the field: listed, not refused.
    extra = Target("edge", 0.5, 0.05, ((50.6, 12.0), (50.6, 15.0)), 0)
    layout = dataclasses.replace(mini, targets=mini.targets + (extra,))
    cols = 660
    shift_x = cols / 2 * 0.085 - (50.5 - mini.width_mm / 2)  # puts phantom x = 50.5 mm on the image's right edge
    sim = simulate(
        detector_model("direct"),
        "phantom",
        DOSE_UGY,
        seed=6,
        layout=layout,
        pose=Pose(0.0, False, 1.0, (shift_x, 0.0)),
        shape=(660, cols),
    )
    pl = register(_image(sim, "edge.dcm"), layout)
    assert pl.sites_outside == [("edge", 0), ("edge", 1)] and not pl.markers_not_used
    # the same image with the plain layout has none
    assert register(_image(sim), mini).sites_outside == []


def test_residual_above_limit_is_refused(mini):
    sim = simulate(
        detector_model("direct"), "phantom", DOSE_UGY, seed=7, small=True, layout=mini, pose=Pose(120.0, False, 1.0)
    )
    with pytest.raises(RegistrationError, match=r"residual 0\.\d\d px RMS .* exceeds the limit of 0\.001 px"):
        register(_image(sim), mini, max_residual_px=0.001)


def test_magnification_outside_range_is_refused(mini):
    sim = simulate(
        detector_model("direct"), "phantom", DOSE_UGY, seed=8, small=True, layout=mini, pose=Pose(30.0, True, 1.4)
    )
    with pytest.raises(RegistrationError, match=r"magnification 1\.40\d lies outside the allowed range 0\.8–1\.2"):
        register(_image(sim), mini, magnification_range=(0.8, 1.2))


def test_image_smaller_than_phantom_is_refused(mini):
    sim = simulate(detector_model("direct"), "flat", DOSE_UGY, seed=1, shape=(200, 600))
    with pytest.raises(RegistrationError, match="smaller than the phantom"):
        register(_image(sim), mini)


# ----------------------------------------------------------------- overlay
def _is_png(path: Path) -> tuple[int, int]:
    from matplotlib.image import imread

    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    return imread(path).shape[:2]


def test_overlay_png_is_written(mini, tmp_path):
    sim = simulate(
        detector_model("indirect"), "phantom", DOSE_UGY, seed=3, small=True, layout=mini, pose=Pose(37.0, True, 1.2)
    )
    img = _image(sim)
    pl = register(img, mini)
    out = draw_overlay(img, mini, pl, tmp_path / "sub" / "overlay.png", title="test")
    h, w = _is_png(out)
    assert h > 100 and w > 100
    # after a failure: blobs only
    flat = _image(simulate(detector_model("direct"), "flat", DOSE_UGY, seed=2, small=True))
    with pytest.raises(RegistrationError) as exc:
        register(flat, mini)
    out2 = draw_overlay(flat, mini, None, tmp_path / "failed.png", exc.value.candidates_px, str(exc.value))
    _is_png(out2)
    assert isinstance(pl, Placement)
