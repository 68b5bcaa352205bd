"""The simulator's preset panels and the published typical values they are built from.

Four invented panels: a direct (amorphous selenium) and an indirect (CsI:Tl + a-Si:H photodiodes)
mammography panel for a ~28 kV W/Rh beam, and a direct and an indirect general-radiography panel for the
RQA5 beam quality (IEC 61267; ~70 kV, 21 mm Al added).  Each preset is built from a :class:`PanelSpec`:
the quantities a physicist measures — DQE(0), the light-spread part of the MTF, the electronic-noise
kerma — each with where its value comes from (a published source, or "from memory" where none was at
hand).  The simulator's microscopic parameters (η, A_S, L, w, σ_e) follow from them; the tests measure
the presets with Limen's own MTF, NNPS, DQE and noise-component code and check the result against these
values (``tests/test_presets.py``).

Published values used (docs/references.md, "Simulated panels"):

* CsI mammography panel, 100 µm pixels: presampling MTF 0.73, 0.42 and 0.28 at 2, 4 and 5 cycles/mm;
  DQE near zero frequency ≈ 0.55 at 32.8 mR (≈ 287 µGy) falling to ≈ 0.40 at 1.3 mR (≈ 11 µGy)
  (Vedantham et al., Med. Phys. 27 (2000) 558).  Divided by the 100 µm aperture sinc, the MTF gives the
  light spread's transfer 0.78, 0.55, 0.44, which a two-depth spread (30 % of quanta with L = 12 µm,
  70 % with L = 52 µm) reproduces within 0.02; a single exponential cannot (0.47 at 4 cycles/mm).  The fall
  of DQE(0) gives the zero-frequency electronic-noise kerma K₀: 0.40 = 0.55/(1 + K₀/11.4 µGy) → K₀ ≈ 4.3 µGy.
* Structured CsI on a 75 µm prototype array reaches DQE ≈ 0.77 at 26 kVp ("Evaluation of novel direct- and
  indirect-detection AMFPIs for mammography", Antonuk's group): the indirect mammography panel's DQE(0) = 0.66
  sits between that and the 0.55 above; lower system gain makes electronic noise matter more (Jee et al.,
  Med. Phys. 30 (2003) 1874).
* a-Se mammography panel, 85 µm pixels: DQE at Nyquist ≈ 40 % of DQE(0) (Zhao et al., Med. Phys. 30
  (2003) 254) — what the aperture alone gives (sinc² = 0.405 at Nyquist); their K-fluorescence and
  charge-trapping blur (−15 % MTF at Nyquist) is not modelled.
* At RQA5 the direct panel's MTF is close to the ideal aperture function and its NPS flat, and its DQE is
  below the CsI panels' because selenium absorbs less (Samei & Flynn, Med. Phys. 30 (2003) 608).
* Everything else — DQE(0) of the a-Se panels, the RQA5 panels' pixel pitch and MTF, the electronic-noise
  kermas other than the one above, fill factors — from memory of typical values, marked so below.

The electronic-noise kerma is stated at zero frequency (K₀: DQE(0) at kerma K is DQE(0)/(1 + K₀/K)).  What
``limen detector --noise-series`` measures is the pixel-variance crossover K_e = K₀/ρ (ρ: the fraction of
quantum-noise variance the light spread leaves per pixel; 1 for a direct panel).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import PurePath
from typing import Any

from scorer.detector.panel_model import DetectorModel, validate_model
from scorer.errors import LimenError

MAMMO_Q = 5000.0  # photons mm⁻² µGy⁻¹, ~28 kV W/Rh mammography beam (from memory)
RQA5_Q = 29653.0  # photons mm⁻² µGy⁻¹, RQA5 (IEC 62220-1-1, from memory; scorer/data/beam_qualities.csv)
INSTITUTION = "Harbourside Women's Health Centre (invented)"
GENERAL_INSTITUTION = "Harbourside General Hospital (invented)"


@dataclass(frozen=True)
class Stated:
    """A value and where it comes from: a source in docs/references.md, or "from memory"."""

    value: float
    source: str


@dataclass(frozen=True)
class PanelSpec:
    """The measurable properties a preset is built to have."""

    dqe_zero: Stated  # quantum-limited DQE at zero frequency
    electronic_kerma_zero_ugy: Stated  # K₀: DQE(0) halves at this air kerma
    light_transfer: dict[float, float] | None = None  # published light-spread transfer at these frequencies
    light_transfer_source: str = ""

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def _build(base: DetectorModel, spec: PanelSpec, swank: float) -> DetectorModel:
    """η from DQE(0) = η·A_S for the given Swank factor, and the read-out noise giving K₀."""
    model = base.with_overrides(qde=spec.dqe_zero.value / swank, swank=swank)
    validate_model(model)
    k_pixel = spec.electronic_kerma_zero_ugy.value / model.spread_variance_fraction()
    return model.with_electronic_noise_kerma(k_pixel)


SPECS: dict[str, PanelSpec] = {
    "direct": PanelSpec(
        dqe_zero=Stated(0.62, "from memory: typical of 200 µm a-Se mammography panels at 28 kV"),
        electronic_kerma_zero_ugy=Stated(1.0, "from memory: a-Se mammography panels"),
    ),
    "indirect": PanelSpec(
        dqe_zero=Stated(0.66, "between 0.55 (Vedantham et al. 2000) and 0.77 (AMFPI evaluation, Antonuk's group)"),
        electronic_kerma_zero_ugy=Stated(4.3, "Vedantham et al. 2000: DQE(0) 0.55 → 0.40 from 287 to 11.4 µGy"),
        light_transfer={2.0: 0.78, 4.0: 0.555, 5.0: 0.44},
        light_transfer_source="Vedantham et al. 2000: MTF 0.73, 0.42, 0.28 at 2, 4, 5 /mm over the 100 µm sinc",
    ),
    "direct-rad": PanelSpec(
        dqe_zero=Stated(0.44, "from memory; below CsI at RQA5 (Samei & Flynn 2003)"),
        electronic_kerma_zero_ugy=Stated(0.5, "from memory: a-Se general-radiography panels"),
    ),
    "indirect-rad": PanelSpec(
        dqe_zero=Stated(0.64, "from memory: ~600 µm CsI at RQA5 (Samei & Flynn 2003: CsI above a-Se)"),
        electronic_kerma_zero_ugy=Stated(0.2, "from memory: CsI general-radiography panels"),
        light_transfer={1.0: 0.64, 2.0: 0.38, 3.0: 0.25},
        light_transfer_source="from memory: MTF ≈ 0.62, 0.33, 0.18 at 1, 2, 3 /mm over the 143 µm sinc",
    ),
}

PRESETS: dict[str, DetectorModel] = {
    # 85 µm a-Se: no light spread, charge drifts onto the electrode (fill factor ~1, common practice)
    "direct": _build(
        DetectorModel(
            name="direct",
            conversion="direct",
            detector_type="DIRECT",
            q_per_mm2_ugy=MAMMO_Q,
            fill_factor=1.0,
            adu_per_quantum=2.4,
            beam="W/Rh 28 kV",
            detector_id="HSX-SE-0417",
            station_name="HARBOURSIDE-MAM2",
            institution=INSTITUTION,
        ),
        SPECS["direct"],
        swank=0.73,  # K-fluorescence escape and charge collection (from memory)
    ),
    # 85 µm CsI:Tl on a-Si:H photodiodes; two-depth light spread fitted to the published MTF
    "indirect": _build(
        DetectorModel(
            name="indirect",
            conversion="indirect",
            detector_type="SCINTILLATOR",
            q_per_mm2_ugy=MAMMO_Q,
            fill_factor=0.65,  # photodiode fill factor (from memory)
            light_spread_mm=0.052,
            light_spread_near_mm=0.012,
            near_fraction=0.3,
            adu_per_quantum=3.2,
            beam="W/Rh 28 kV",
            detector_id="HSX-CS-2291",
            station_name="HARBOURSIDE-MAM3",
            institution=INSTITUTION,
        ),
        SPECS["indirect"],
        swank=0.78,  # from memory
    ),
    # general radiography, RQA5: ~500 µm a-Se, 139 µm pixels (from memory)
    "direct-rad": _build(
        DetectorModel(
            name="direct-rad",
            conversion="direct",
            detector_type="DIRECT",
            pixel_pitch_mm=0.139,
            rows=3072,
            cols=3072,
            q_per_mm2_ugy=RQA5_Q,
            fill_factor=1.0,
            adu_per_quantum=1.3,  # 14 bits reached near 40 µGy
            kvp=70.0,
            modality="DX",
            beam="RQA5",
            detector_id="HGX-SE-0731",
            station_name="HARBOURSIDE-DR1",
            institution=GENERAL_INSTITUTION,
        ),
        SPECS["direct-rad"],
        swank=0.80,  # Se K-fluorescence escape (from memory)
    ),
    # general radiography, RQA5: ~600 µm CsI:Tl, 143 µm pixels (from memory)
    "indirect-rad": _build(
        DetectorModel(
            name="indirect-rad",
            conversion="indirect",
            detector_type="SCINTILLATOR",
            pixel_pitch_mm=0.143,
            rows=3000,
            cols=3000,
            q_per_mm2_ugy=RQA5_Q,
            fill_factor=0.70,  # from memory
            light_spread_mm=0.158,
            light_spread_near_mm=0.040,
            near_fraction=0.3,
            adu_per_quantum=1.23,  # 14 bits reached near 40 µGy
            kvp=70.0,
            modality="DX",
            beam="RQA5",
            detector_id="HGX-CS-1186",
            station_name="HARBOURSIDE-DR2",
            institution=GENERAL_INSTITUTION,
        ),
        SPECS["indirect-rad"],
        swank=0.82,  # Cs/I K-fluorescence escape above 36 keV (from memory)
    ),
}


def detector_model(name: str) -> DetectorModel:
    """One of the preset models (:data:`PRESETS`)."""
    try:
        return PRESETS[name]
    except KeyError:
        raise LimenError(
            f"unknown detector model {name!r}; choose one of {', '.join(PRESETS)} or give a model file"
        ) from None


def detector_model_from_dict(data: dict[str, Any], path: str | PurePath) -> DetectorModel:
    """A model file's parsed TOML: ``base`` (a preset name) plus any DetectorModel field to override.

    ``path`` names the file in errors; :func:`scorer.workflow.load_detector_model` reads it.
    """
    path = PurePath(path)
    data = dict(data)
    base = detector_model(str(data.pop("base", "direct")))
    names = {f.name for f in dataclasses.fields(DetectorModel)}
    kw = {}
    for k, v in data.items():
        if k not in names:
            raise LimenError(f"unknown detector-model key {k!r}", path)
        kw[k] = v
    try:
        model = base.with_overrides(**kw)
        validate_model(model)
    except (TypeError, ValueError) as exc:
        raise LimenError(f"bad detector model: {exc}", path) from None
    return model
