"""Physics-based simulator of direct- and indirect-conversion flat-panel images.

The simulator makes realistic raw (FOR PROCESSING) images of a contrast-detail
phantom, of flat fields and of slanted edges, for the demo and the tests.  The
chain, for each pixel, is:

1. **Quanta.**  Expected number of X-ray quanta absorbed in the pixel,
   ``λ = q · K · Δx·Δy · η · T``, with q the photon fluence per air kerma of the
   beam (mm⁻² µGy⁻¹), K the air kerma at the detector (µGy), η the quantum detection
   efficiency of the converter and T the object's transmission averaged over the
   pixel (discs and edges are rendered with sub-pixel coverage, so the pixel
   aperture's sinc MTF and aliasing are present in the signal).  The count is
   Poisson distributed: ``N ~ Poisson(λ)``.
2. **Conversion gain with excess noise.**  Each absorbed quantum gives a
   random number of secondaries (electron–hole pairs in selenium, light photons in
   CsI) whose relative variance 1/A_S − 1 is set by the Swank factor A_S; summed
   over N quanta this adds a zero-mean Gaussian term of variance N·(1/A_S − 1)
   (in units of quanta).
3. **Spread.**  Direct conversion (amorphous selenium): the bias field drifts the
   charge straight onto the pixel electrode, so there is no spread and the
   effective fill factor is ~100 %; the presampling MTF is the aperture sinc
   |sin(πaf)/(πaf)|.  Indirect conversion (CsI + a-Si:H photodiodes): light spreads
   in the scintillator before it is detected.  The spread is modelled by an
   exponential line-spread function of length L, i.e. the radially symmetric
   transfer function ``T_light(f) = 1 / (1 + (2πLf)²)``, applied in the Fourier
   domain to signal *and* noise alike (so the indirect NPS falls with frequency).
   The spread may depend on depth (:mod:`scorer.detector.panel_model`): a fraction w
   of the quanta spread with a shorter length; each depth's share of the quanta is
   drawn (binomial thinning) and spread on its own, so the noise power passes as
   Σ w·T² while the signal passes as Σ w·T (Lubberts effect).
   The photodiode fill factor (< 1) is the fraction of light collected; it scales
   the gain, which raises the relative weight of the electronic noise.
   The mean signal is spread in the continuous domain before it is integrated over
   the pixels (discs on a local 8× finer grid, edges through the analytic edge
   response), so it carries the true presampling MTF and its aliasing.  The noise
   (Poisson and Swank fluctuations) is spread on the pixel grid; simplification
   (documented): noise above the Nyquist frequency is not spread before it aliases,
   which changes the NPS near Nyquist by a few per cent at most for L ≈ 0.4 pixel.
4. **Read-out.**  ``PV = offset + g · f_fill · G(x) · S + e``, with g the ADU per detected
   quantum, e ~ N(0, σ_e²) the additive electronic noise, rounded and clipped to
   the panel's bit depth (14 bits).  G(x) = 1 + σ_G·z(x) is an optional fixed pattern
   (``gain_nonuniformity`` σ_G, default 0 = off): the residual pixel-to-pixel gain
   variation left after flat-field correction, the same in every image of the panel
   (drawn from ``pattern_seed``), which adds structure noise of variance σ_G²·K²
   (in air-kerma units) to every image.

The stored values are linear in air kerma; :attr:`SimulatedImage.conversion` is
the exact linear conversion function ``PV = offset + gain · K``.

Default panel: a 24 × 30 cm mammography field with 85 µm pixels
(2816 × 3520 pixels); the presets and the published values they rest on are in
:mod:`scorer.detector.presets`; ``small=True`` crops the field to what the phantom needs
(or 512 × 512 for flat fields and edges) with the same physics.

References
----------
.. [1] Rose, A. "The sensitivity performance of the human eye on an absolute scale",
       J. Opt. Soc. Am. 38 (1948) — Poisson quanta, SNR ∝ √fluence.
.. [2] Swank, R. K. "Absorption and noise in x-ray phosphors", J. Appl. Phys. 44 (1973).
.. [3] IEC 62220-1-2 — beam qualities and the photon fluence per air kerma q.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import fft as sfft

from scorer.detector.panel_model import DetectorModel
from scorer.detector.presets import PRESETS, detector_model, detector_model_from_dict  # noqa: F401 (re-exported)
from scorer.errors import LimenError
from scorer.images.conversion import ConversionFunction
from scorer.phantom.disc import SUPERSAMPLE, disc_coverage_patch
from scorer.phantom.geometry import PhantomTransform
from scorer.phantom.layout import Layout

SMALL_FIELD_PX = 512
SMALL_MARGIN_MM = 6.0


@dataclass
class SimulatedImage:
    pixels: np.ndarray  # uint16 raw values
    spacing_mm: tuple[float, float]
    conversion: ConversionFunction
    model: DetectorModel
    kind: str
    dose_ugy: float
    truth: dict[str, Any] = field(default_factory=dict)

    def kerma_ugy(self) -> np.ndarray:
        """Pixels linearised to air kerma (µGy)."""
        return self.conversion.to_kerma_ugy(self.pixels)


# --------------------------------------------------------------------------- rendering
#: light spread in pixels: one length, or (weight, length) terms
Spread = float | Sequence[tuple[float, float]] | None


def _spread_terms(spread_px: Spread) -> list[tuple[float, float]]:
    """``spread_px`` as (weight, L in pixels) pairs: a float L is [(1, L)]; zero-length terms dropped."""
    if spread_px is None:
        return []
    if isinstance(spread_px, (int, float, np.integer, np.floating)):  # a scalar (np.isscalar, typed)
        return [(1.0, float(spread_px))] if float(spread_px) > 0 else []
    terms = [(float(w), float(length)) for w, length in spread_px if w > 0]
    return terms if any(length > 0 for _, length in terms) else []


def render_discs(
    transmission: NDArray[np.float64],
    centers_rc: ArrayLike,
    radii_px: ArrayLike,
    contrasts: ArrayLike,
    spread_px: Spread = 0.0,
    spread_supersample: int = 8,
) -> None:
    """Multiply ``transmission`` in place by 1 − C·coverage for each disc.

    With ``spread_px`` > 0 (the exponential LSF length L in pixels, or a list of (weight, L) for a
    depth-dependent spread) the disc is first spread by T(f) = Σ w/(1 + (2πLf)²) in the continuous
    domain — on a local grid ``spread_supersample`` times finer than the pixels — and then integrated over
    each pixel, so the signal carries the true presampling MTF (aperture × spread) with its aliasing, not a
    spread applied after sampling.
    """
    terms = _spread_terms(spread_px)
    longest = max((length for _, length in terms), default=0.0)
    for rc, rad, c in zip(np.atleast_2d(centers_rc), np.atleast_1d(radii_px), np.atleast_1d(contrasts)):
        if not terms:
            patch = disc_coverage_patch(rc, float(rad), transmission.shape)
            if patch is not None:
                rs, cs, cov = patch
                transmission[rs, cs] *= 1.0 - c * cov
            continue
        margin = int(np.ceil(12.0 * longest)) + 2
        r0 = int(np.floor(rc[0] - rad)) - margin
        c0 = int(np.floor(rc[1] - rad)) - margin
        n = int(np.ceil(2 * rad)) + 2 * margin + 2
        S = int(spread_supersample)
        sub = (np.arange(n * S) + 0.5) / S - 0.5
        inside = ((r0 + sub[:, None] - rc[0]) ** 2 + (c0 + sub[None, :] - rc[1]) ** 2) <= rad * rad
        f = np.hypot(sfft.fftfreq(n * S, d=1.0 / S)[:, None], sfft.rfftfreq(n * S, d=1.0 / S)[None, :])
        transfer = sum(w / (1.0 + (2 * np.pi * length * f) ** 2) for w, length in terms)
        spread = sfft.irfft2(sfft.rfft2(inside.astype(np.float64)) * transfer, s=inside.shape)
        cov = spread.reshape(n, S, n, S).mean(axis=(1, 3))
        rs0, cs0 = max(r0, 0), max(c0, 0)
        rs1, cs1 = min(r0 + n, transmission.shape[0]), min(c0 + n, transmission.shape[1])
        if rs0 < rs1 and cs0 < cs1:
            transmission[rs0:rs1, cs0:cs1] *= 1.0 - c * cov[rs0 - r0 : rs1 - r0, cs0 - c0 : cs1 - c0]


def render_edge(
    shape: tuple[int, int],
    angle_deg: float,
    edge_transmission: float = 0.02,
    center_rc: tuple[float, float] | None = None,
    spread_px: Spread = 0.0,
) -> np.ndarray:
    """Transmission of a straight opaque-ish edge through ``center_rc``.

    ``angle_deg`` is the edge's angle from the column axis (vertical); 0–45° gives a
    near-vertical edge (shadow on the right), 45–135° a near-horizontal edge (shadow
    below).  Pixels near the edge get their coverage integrated on a 1/SUPERSAMPLE grid;
    with ``spread_px`` = L > 0 the edge is first spread by the exponential LSF
    (1/2L)·exp(−|u|/L), whose edge response is ½·exp(u/L) for u < 0 and 1 − ½·exp(−u/L)
    for u ≥ 0 (for a list of (weight, L), the weighted sum of those responses).
    """
    rows, cols = shape
    if center_rc is None:
        center_rc = ((rows - 1) / 2.0, (cols - 1) / 2.0)
    t = np.deg2rad(angle_deg)
    # unit normal pointing into the shadow: for a vertical edge (0°) it points to +col
    n_col, n_row = np.cos(t), -np.sin(t)
    r = np.arange(rows)[:, None] - center_rc[0]
    c = np.arange(cols)[None, :] - center_rc[1]
    dist = c * n_col + r * n_row  # signed distance (pixels) of each pixel centre
    cov = (dist > 0).astype(np.float64)
    terms = _spread_terms(spread_px)
    longest = max((length for _, length in terms), default=0.0)
    band = np.abs(dist) < 0.75 * (abs(n_col) + abs(n_row)) + 14.0 * longest
    ri, ci = np.nonzero(band)
    s = SUPERSAMPLE
    sub = (np.arange(s) + 0.5) / s - 0.5
    dr = np.repeat(sub, s)
    dc = np.tile(sub, s)
    d_sub = dist[ri, ci][:, None] + dc[None, :] * n_col + dr[None, :] * n_row
    if terms:
        resp = np.zeros_like(d_sub)
        for w, length in terms:
            if length > 0:
                e = np.exp(-np.abs(d_sub) / length)
                resp += w * np.where(d_sub >= 0, 1.0 - 0.5 * e, 0.5 * e)
            else:
                resp += w * (d_sub > 0)
        cov[ri, ci] = resp.mean(axis=1)
    else:
        cov[ri, ci] = (d_sub > 0).mean(axis=1)
    transmission: NDArray[np.float64] = 1.0 - (1.0 - edge_transmission) * cov
    return transmission


def _light_spread(image: np.ndarray, length_mm: float, pitch_mm: float) -> np.ndarray:
    """Spread an image on the pixel grid by T(f) = 1/(1 + (2πLf)²) (nothing for L = 0)."""
    if length_mm <= 0:
        return image
    rows, cols = image.shape
    f = np.hypot(sfft.fftfreq(rows, d=pitch_mm)[:, None], sfft.rfftfreq(cols, d=pitch_mm)[None, :])
    spec = sfft.rfft2(image, workers=-1)
    spec *= (1.0 / (1.0 + (2 * np.pi * length_mm * f) ** 2)).astype(np.float32)
    spread: NDArray[np.float64] = sfft.irfft2(spec, s=image.shape, workers=-1)
    return spread


def spread_px(model: DetectorModel) -> list[tuple[float, float]]:
    """The model's light spread as (weight, L in pixels) pairs, for the signal renderers."""
    return [(w, length / model.pixel_pitch_mm) for w, length in model.spread_components()]


def gain_pattern(model: DetectorModel, shape: tuple[int, int]) -> np.ndarray:
    """The panel's fixed pixel-gain pattern G = 1 + σ_G·z, z ~ N(0, 1) white, drawn from ``pattern_seed``.

    The same ``shape`` always gives the same pattern, so every image of a panel carries it (structure
    noise: variance ∝ K², it does not average out over images).
    """
    rng = np.random.default_rng([int(model.pattern_seed), int(shape[0]), int(shape[1])])
    return 1.0 + model.gain_nonuniformity * rng.standard_normal(shape)


def expose(transmission: np.ndarray, model: DetectorModel, dose_ugy: float, rng: np.random.Generator) -> np.ndarray:
    """Turn an object transmission map into a raw uint16 image (steps 1–4 of the module doc)."""
    if not dose_ugy > 0:
        raise LimenError(f"--dose-ugy must be positive, got {dose_ugy}")
    p2 = model.pixel_pitch_mm**2
    lam = transmission * (model.q_per_mm2_ugy * dose_ugy * p2 * model.qde)
    n = rng.poisson(lam)
    excess = 1.0 / model.swank - 1.0
    g = model.adu_per_quantum * model.fill_factor
    f32 = np.float32
    comps = model.spread_components()
    if comps:
        # the mean (λ) was rendered with the spread already applied before sampling; the quantum
        # and Swank fluctuations are spread on the pixel grid (the Swank term's variance uses the
        # mean count, λ·(1/A_S − 1), instead of the drawn one: a difference of order 1/√λ).  With a
        # depth-dependent spread each depth's share of the quanta is drawn and spread on its own
        # (Lubberts effect: noise power Σ w·T², signal Σ w·T).
        signal = lam.astype(np.float64)
        left, w_left = n, 1.0  # quanta not yet given a depth, and their share of the weights
        for i, (w, length) in enumerate(comps):
            lam_i = lam * w
            # binomial thinning splits the Poisson count into independent Poisson counts per depth
            n_i = left if i == len(comps) - 1 else rng.binomial(left, min(w / w_left, 1.0))
            left, w_left = left - n_i, w_left - w
            fluct = (n_i - lam_i).astype(f32)
            if excess > 0:
                fluct += np.sqrt(lam_i * excess).astype(f32) * rng.standard_normal(n.shape, dtype=f32)
            signal += _light_spread(fluct, length, model.pixel_pitch_mm)
        signal *= g
        if model.gain_nonuniformity > 0:
            signal *= gain_pattern(model, n.shape)
        if model.electronic_noise_adu > 0:
            signal += model.electronic_noise_adu * rng.standard_normal(n.shape, dtype=f32)
    else:  # no spread: both Gaussian terms can be drawn as one
        signal = g * n.astype(np.float64)
        sd = np.sqrt(g * g * excess * lam + model.electronic_noise_adu**2)
        if np.any(sd > 0):
            signal += sd * rng.standard_normal(n.shape, dtype=f32)
        if model.gain_nonuniformity > 0:
            # the Swank term is scaled too (a ≤ 1.5 % error on its small variance at σ_G ≤ 0.1)
            signal *= gain_pattern(model, n.shape)
    signal += model.offset_adu
    np.rint(signal, out=signal)
    np.clip(signal, 0, 2**model.bits - 1, out=signal)
    return signal.astype(np.uint16)


# --------------------------------------------------------------------------- scenes
@dataclass(frozen=True)
class Pose:
    """Where and how the phantom lies on the detector."""

    rotation_deg: float = 0.0
    flipped: bool = False
    magnification: float = 1.0
    shift_mm: tuple[float, float] = (0.0, 0.0)  # phantom centre from field centre (x right, y down)


def _phantom_field_shape(layout: Layout, pose: Pose, pixel_mm: float) -> tuple[int, int]:
    w, h = layout.width_mm, layout.height_mm
    corners = np.array([[-w / 2, -h / 2], [w / 2, -h / 2], [w / 2, h / 2], [-w / 2, h / 2]])
    t = np.deg2rad(pose.rotation_deg)
    rot = np.array([[np.cos(t), np.sin(t)], [-np.sin(t), np.cos(t)]])
    ext = np.abs(corners @ rot.T).max(axis=0) * pose.magnification
    size_mm = 2 * (ext + np.abs(pose.shift_mm)) + 2 * SMALL_MARGIN_MM
    cols, rows = np.ceil(size_mm / pixel_mm).astype(int)
    return int(rows), int(cols)


def phantom_transform(layout: Layout, pose: Pose, shape: tuple[int, int], pixel_mm: float) -> PhantomTransform:
    center = ((shape[0] - 1) / 2.0 + pose.shift_mm[1] / pixel_mm, (shape[1] - 1) / 2.0 + pose.shift_mm[0] / pixel_mm)
    return PhantomTransform.from_params(
        rotation_deg=pose.rotation_deg,
        flipped=pose.flipped,
        magnification=pose.magnification,
        phantom_center_mm=layout.center_mm,
        center_px=center,
        pixel_mm=pixel_mm,
    )


def phantom_transmission(
    layout: Layout,
    transform: PhantomTransform,
    shape: tuple[int, int],
    pixel_mm: float,
    magnification: float,
    spread_px: Spread = 0.0,
) -> np.ndarray:
    """Transmission map of the plate — its discs (signal sites only) and markers — as the
    pixels see it (aperture-integrated, and spread first when ``spread_px`` > 0)."""
    trans = np.ones(shape, dtype=np.float64)
    scale = magnification / pixel_mm
    markers = layout.markers
    render_discs(
        trans,
        transform.to_pixel([m.xy_mm for m in markers]),
        [m.diameter_mm / 2 * scale for m in markers],
        [m.contrast for m in markers],
        spread_px,
    )
    sig = [t.signal_xy_mm for t in layout.targets]
    render_discs(
        trans,
        transform.to_pixel(sig),
        [t.diameter_mm / 2 * scale for t in layout.targets],
        [t.contrast for t in layout.targets],
        spread_px,
    )
    return trans


def simulate(
    model: DetectorModel,
    kind: str = "phantom",
    dose_ugy: float = 100.0,
    seed: int | np.random.Generator | None = 0,
    small: bool = False,
    layout: Layout | None = None,
    pose: Pose = Pose(),
    edge_angle_deg: float = 2.5,
    shape: tuple[int, int] | None = None,
) -> SimulatedImage:
    """Simulate one raw image.

    Parameters
    ----------
    model : DetectorModel
    kind : {"phantom", "flat", "edge"}
    dose_ugy : float
        Air kerma at the detector surface (µGy) for the open (unattenuated) field.
    seed : int or numpy.random.Generator
    small : bool
        Crop the field to what the phantom needs (phantom) or to 512 × 512 (flat, edge).
    layout : Layout
        Phantom layout, needed for kind="phantom" (``scorer.workflow.load_layout()`` reads the bundled demo
        plate).
    pose : Pose
        Rotation, flip, magnification and shift of the phantom.
    edge_angle_deg : float
        Edge angle from the column axis (kind="edge").
    shape : (rows, cols), optional
        Explicit field size, overriding both the panel size and ``small``.
    """
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    p = model.pixel_pitch_mm
    truth: dict[str, Any] = {"kind": kind, "dose_ugy": float(dose_ugy), "detector_model": model.to_dict()}
    if kind == "phantom":
        if layout is None:
            raise ValueError("a phantom image needs its layout (scorer.workflow.load_layout() gives the bundled plate)")
        if not 0.5 <= pose.magnification <= 2.0:
            raise LimenError(f"--magnification must lie in 0.5–2.0, got {pose.magnification}")
        if shape is None:
            shape = _phantom_field_shape(layout, pose, p) if small else (model.rows, model.cols)
        tf = phantom_transform(layout, pose, shape, p)
        trans = phantom_transmission(layout, tf, shape, p, pose.magnification, spread_px(model))
        truth.update(
            layout=layout.source_path,
            layout_name=layout.name,
            pose=asdict(pose),
            transform={"matrix": tf.matrix, "offset": tf.offset},
            fiducials_px={m.id: tf.to_pixel(m.xy_mm)[0].tolist() for m in layout.markers},
        )
    elif kind == "flat":
        shape = shape or ((SMALL_FIELD_PX, SMALL_FIELD_PX) if small else (model.rows, model.cols))
        trans = np.ones(shape, dtype=np.float64)
    elif kind == "edge":
        shape = shape or ((SMALL_FIELD_PX, SMALL_FIELD_PX) if small else (model.rows, model.cols))
        trans = render_edge(shape, edge_angle_deg, spread_px=spread_px(model))
        truth["edge_angle_deg"] = float(edge_angle_deg)
    else:
        raise LimenError(f"unknown image kind {kind!r}; choose phantom, flat or edge")
    pixels = expose(trans, model, dose_ugy, rng)
    conv = model.conversion_function()
    truth["conversion"] = conv.to_dict()
    return SimulatedImage(pixels, (p, p), conv, model, kind, float(dose_ugy), truth)


# ------------------------------------------------ DICOM attributes (scorer.workflow.write_simulated writes them)
def dicom_tags(model: DetectorModel, acquired: _dt.datetime, dose_ugy: float) -> dict[str, Any]:
    """DICOM attributes for a simulated raw image (PS3.3 keywords)."""
    return {
        "Modality": model.modality,
        "PresentationIntentType": "FOR PROCESSING",
        "DetectorType": model.detector_type,
        "DetectorID": model.detector_id,
        "DeviceSerialNumber": model.detector_id,
        "StationName": model.station_name,
        "InstitutionName": model.institution,
        "Manufacturer": model.manufacturer,
        "KVP": model.kvp,
        "AcquisitionDateTime": acquired.strftime("%Y%m%d%H%M%S"),
        "BitsStored": model.bits,
        "ImageComments": f"Limen simulation, {model.conversion} conversion, {dose_ugy:g} uGy at detector",
    }
