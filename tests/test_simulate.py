"""The detector simulator against counting statistics, Parseval and aperture theory."""

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from scorer.cli import main
from scorer.detector.simulator import Pose, detector_model, render_edge, simulate
from scorer.phantom import load_layout

MINI = Path(__file__).parent / "data" / "mini-plate.toml"


def _pure_quantum():
    # gain 1, no excess noise, no electronic noise, no offset: pixel value = absorbed quanta
    return detector_model("direct").with_overrides(
        swank=1.0, electronic_noise_adu=0.0, adu_per_quantum=1.0, offset_adu=0.0, qde=1.0, q_per_mm2_ugy=5000.0
    )


def test_poisson_variance_equals_mean_on_pure_quantum_flat_field():
    # Poisson counting: variance = mean (docs/references.md, "Quantum-limited detection"; Rose 1948)
    sim = simulate(_pure_quantum(), "flat", dose_ugy=40.0, seed=3, small=True)
    px = sim.pixels.astype(float)
    expected_mean = 5000.0 * 40.0 * 0.085**2
    assert px.mean() == pytest.approx(expected_mean, rel=0.002)
    # relative standard error of a variance from n = 262144 samples is sqrt(2/n) = 0.28 %
    assert px.var(ddof=1) / px.mean() == pytest.approx(1.0, abs=0.015)


def _radial_nps(field, pixel_mm):
    """Periodogram-averaged NPS (mm²) of a zero-mean field, binned by radial frequency."""
    roi = 128
    n = field.shape[0] // roi
    acc = np.zeros((roi, roi))
    for i in range(n):
        for j in range(n):
            blk = field[i * roi : (i + 1) * roi, j * roi : (j + 1) * roi]
            blk = blk - blk.mean()
            acc += np.abs(np.fft.fft2(blk)) ** 2
    nps = acc / (n * n) * pixel_mm**2 / (roi * roi)
    f = np.fft.fftfreq(roi, d=pixel_mm)
    fr = np.hypot(f[:, None], f[None, :])
    return nps, fr


def test_direct_panel_noise_is_white_with_nps_sigma2_dxdy():
    # White noise of variance σ² on Δx × Δy pixels: NPS = σ²ΔxΔy at every frequency (Parseval;
    # docs/references.md "Detector measurements").  The direct panel has no spread, so its noise is white.
    m = detector_model("direct")
    sim = simulate(m, "flat", dose_ugy=100.0, seed=5, small=True)
    px = sim.kerma_ugy()
    nps, fr = _radial_nps(px, m.pixel_pitch_mm)
    level = px.var() * m.pixel_pitch_mm**2
    nyq = 0.5 / m.pixel_pitch_mm
    low = nps[(fr > 0.5) & (fr < 0.3 * nyq)].mean()
    high = nps[(fr > 0.7 * nyq) & (fr < nyq)].mean()
    assert low == pytest.approx(level, rel=0.05)
    assert high == pytest.approx(level, rel=0.05)


def test_indirect_panel_noise_falls_with_frequency():
    # Light spread acts on noise as on signal, so the indirect NPS falls with frequency (common practice)
    m = detector_model("indirect")
    px = simulate(m, "flat", dose_ugy=100.0, seed=6, small=True).kerma_ugy()
    nps, fr = _radial_nps(px, m.pixel_pitch_mm)
    nyq = 0.5 / m.pixel_pitch_mm
    low = nps[(fr > 0.3) & (fr < 1.0)].mean()
    high = nps[(fr > 0.8 * nyq) & (fr < nyq)].mean()
    assert high < 0.5 * low


def test_mean_signal_is_proportional_to_dose():
    # A linear panel: mean linearised signal ∝ air kerma (conversion function, IEC 62220-1-2)
    doses = np.array([25.0, 50.0, 100.0, 200.0])
    means = np.array(
        [simulate(detector_model("indirect"), "flat", d, seed=int(d), small=True).kerma_ugy().mean() for d in doses]
    )
    slope = (doses @ means) / (doses @ doses)
    assert slope == pytest.approx(1.0, rel=0.005)
    assert np.max(np.abs(means / doses - slope)) < 0.005


def _presampled_mtf_at(model, freqs, seed=11):
    from scorer.detector import measure_mtf

    sim = simulate(model, "edge", dose_ugy=150.0, seed=seed, small=True, edge_angle_deg=2.5)  # below 14-bit saturation
    res = measure_mtf(sim.kerma_ugy(), sim.spacing_mm)
    return np.interp(freqs, res.frequency_per_mm, res.value)


def test_direct_panel_mtf_at_nyquist_is_aperture_sinc():
    # Square aperture of width a = pitch: MTF(f_N) = sin(π/2)/(π/2) = 2/π (docs/references.md)
    m = detector_model("direct")
    nyq = 0.5 / m.pixel_pitch_mm
    (mtf_nyq,) = _presampled_mtf_at(m, [nyq])
    assert mtf_nyq == pytest.approx(2 / np.pi, abs=0.03)
    assert m.presampling_mtf(nyq) == pytest.approx(2 / np.pi, abs=1e-12)


def test_indirect_mtf_below_direct_above_one_cycle_per_mm():
    # Light spread in the scintillator lowers the MTF (fact of the trade, common practice)
    nyq = 0.5 / 0.085
    f = np.linspace(1.0, nyq, 12)
    direct = _presampled_mtf_at(detector_model("direct"), f)
    indirect = _presampled_mtf_at(detector_model("indirect"), f)
    assert np.all(indirect < direct)
    # and it follows the model's analytic presampling MTF
    assert np.max(np.abs(indirect - detector_model("indirect").presampling_mtf(f))) < 0.04


def test_edge_rendering_has_exact_area_coverage():
    t = render_edge((64, 64), 0.0, edge_transmission=0.0, center_rc=(31.5, 31.3))
    # vertical edge at column 31.3: pixel 31 spans 30.5..31.5, so 20 % of it lies in the shadow
    assert t[10, 31] == pytest.approx(0.8, abs=0.011)
    assert t[10, 30] == 1.0 and t[10, 32] == 0.0


def test_phantom_pose_places_markers_where_truth_says():
    lay = load_layout(MINI)
    pose = Pose(rotation_deg=37.0, flipped=True, magnification=1.2, shift_mm=(2.0, -1.0))
    sim = simulate(detector_model("direct"), "phantom", 200.0, seed=2, small=True, layout=lay, pose=pose)
    k = sim.kerma_ugy()
    for _mid, (r, c) in sim.truth["fiducials_px"].items():
        assert k[int(round(r)), int(round(c))] < 0.55 * 200.0  # contrast 0.6 marker, well below background


def test_cli_writes_dicom_and_truth_sidecar(tmp_path):
    from scorer.images import load_image

    res = CliRunner().invoke(
        main,
        [
            "simulate",
            "--detector",
            "indirect",
            "--kind",
            "phantom",
            "--small",
            "--layout",
            str(MINI),
            "--rotate",
            "90",
            "--flip",
            "--count",
            "2",
            "--seed",
            "4",
            "--out",
            str(tmp_path),
        ],
    )
    assert res.exit_code == 0, res.output
    files = sorted(tmp_path.glob("*.dcm"))
    assert len(files) == 2
    img = load_image(files[0])
    assert img.metadata.detector_type == "SCINTILLATOR"
    assert img.metadata.presentation_intent == "FOR PROCESSING"
    assert img.metadata.modality == "MG"
    assert img.spacing_mm == (0.085, 0.085)
    side = json.loads(files[0].with_suffix(".json").read_text())
    assert side["pose"]["rotation_deg"] == 90.0 and side["pose"]["flipped"] is True
    assert side["dose_ugy"] == 100.0
    # two images of one set differ (independent noise) but share the pose
    assert not np.array_equal(img.pixels, load_image(files[1]).pixels)


@pytest.mark.parametrize(
    "args,msg",
    [
        (["--dose-ugy", "0"], "--dose-ugy must be positive"),
        (["--layout", "nowhere.toml"], "nowhere.toml: cannot read layout file"),
        (["--magnification", "5"], "--magnification must lie in"),
        (["--rotate", "nan"], "--rotate must be a finite number"),  # found by the robustness audit
        (["--seed", "-1"], "--seed"),
    ],
)
def test_cli_bad_input_one_line_exit_2(tmp_path, args, msg):
    res = CliRunner().invoke(main, ["simulate", "--small", "--out", str(tmp_path)] + args)
    assert res.exit_code == 2
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and msg in lines[0], res.output


def test_detector_model_file_overrides_and_rejects_unknown_keys(tmp_path):
    from scorer.errors import LimenError
    from scorer.workflow import load_detector_model

    good = tmp_path / "panel.toml"
    good.write_text('base = "indirect"\nlight_spread_mm = 0.06\nnear_fraction = 0.0\nelectronic_noise_adu = 2.0\n')
    m = load_detector_model(good)
    assert m.conversion == "indirect" and m.light_spread_mm == 0.06 and m.electronic_noise_adu == 2.0
    # one exponential LSF (no depth-dependent part): T(f) = 1/(1 + (2πLf)²) times the aperture sinc
    f = 3.0
    assert m.presampling_mtf(f) == pytest.approx(np.sinc(0.085 * f) / (1 + (2 * np.pi * 0.06 * f) ** 2))
    bad = tmp_path / "bad.toml"
    bad.write_text('base = "direct"\nsparkle = 1\n')
    with pytest.raises(LimenError, match="bad.toml: unknown detector-model key 'sparkle'"):
        load_detector_model(bad)
    worse = tmp_path / "worse.toml"
    worse.write_text('base = "direct"\nqde = 1.5\n')
    with pytest.raises(LimenError, match="qde must lie in"):
        load_detector_model(worse)


def test_two_edge_orientations_in_one_folder_never_collide(tmp_path):
    # Found in use: the 2.5° and 92.5° edges of `make demo` shared one name, so the second replaced the first
    # and the detector report showed one MTF direction. Edge names carry the angle; a clash is refused.
    run = CliRunner().invoke
    for angle in ("2.5", "92.5"):
        res = run(main, ["simulate", "--kind", "edge", "--small", "--edge-angle-deg", angle, "--out", str(tmp_path)])
        assert res.exit_code == 0, res.output
    assert len(list(tmp_path.glob("*.dcm"))) == 2
    again = run(main, ["simulate", "--kind", "edge", "--small", "--edge-angle-deg", "2.5", "--out", str(tmp_path)])
    lines = [ln for ln in again.output.splitlines() if ln.strip()]
    assert again.exit_code == 2 and len(lines) == 1 and "already exists" in lines[0] and "--overwrite" in lines[0]
    ok = run(
        main,
        ["simulate", "--kind", "edge", "--small", "--edge-angle-deg", "2.5", "--out", str(tmp_path), "--overwrite"],
    )
    assert ok.exit_code == 0, ok.output
    # both orientations measured: the detector reports an MTF along x and along y (IEC 62220-1: both directions)
    det = run(main, ["detector", "--edge", *map(str, sorted(tmp_path.glob("*.dcm"))), "--json"])
    assert det.exit_code == 0, det.output
    by_dir = json.loads(det.stdout)["mtf"]["by_direction"]
    assert set(by_dir) == {"x", "y"}
