"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import comparison as comparison
from . import dose as dose
from . import noise as noise
from . import measure as measure
from . import mtf as mtf
from . import nnps as nnps
from . import predict as predict
from . import simulator as simulator
from . import panel_model as panel_model
from . import presets as presets
from . import headline as headline

from .mtf import MTFResult as MTFResult, measure_mtf as measure_mtf, mean_mtf as mean_mtf
from .nnps import NNPSResult as NNPSResult, measure_nnps as measure_nnps
from .measure import (
    DetectorMetrics as DetectorMetrics,
    measure_detector as measure_detector,
    fit_conversion as fit_conversion,
    compute_dqe as compute_dqe,
)
from .predict import (
    PredictedThreshold as PredictedThreshold,
    predict_thresholds as predict_thresholds,
    predict_from_detector as predict_from_detector,
)
from .panel_model import DetectorModel as DetectorModel
from .presets import (
    PRESETS as PRESETS,
    SPECS as SPECS,
    detector_model as detector_model,
    detector_model_from_dict as detector_model_from_dict,
)
from .simulator import (
    Pose as Pose,
    SimulatedImage as SimulatedImage,
    simulate as simulate,
    dicom_tags as dicom_tags,
)
from .dose import (
    dose_series as dose_series,
    background_kerma_ugy as background_kerma_ugy,
    group_by_kerma as group_by_kerma,
    fit_power_law as fit_power_law,
    kerma_ratio as kerma_ratio,
    compare_series as compare_series,
)
from .noise import fit_components as fit_components, group_flats as group_flats
from .measure import measure_noise_series as measure_noise_series
from .comparison import (
    compare as compare,
    check_detector_json as check_detector_json,
    check_dose_json as check_dose_json,
    scored_thresholds as scored_thresholds,
)

__all__ = [
    "comparison",
    "dose",
    "noise",
    "dose_series",
    "background_kerma_ugy",
    "group_by_kerma",
    "fit_power_law",
    "kerma_ratio",
    "compare_series",
    "fit_components",
    "group_flats",
    "measure_noise_series",
    "measure",
    "mtf",
    "nnps",
    "predict",
    "simulator",
    "panel_model",
    "presets",
    "headline",
    "PRESETS",
    "SPECS",
    "MTFResult",
    "measure_mtf",
    "mean_mtf",
    "NNPSResult",
    "measure_nnps",
    "DetectorMetrics",
    "measure_detector",
    "fit_conversion",
    "compute_dqe",
    "PredictedThreshold",
    "predict_thresholds",
    "predict_from_detector",
    "DetectorModel",
    "Pose",
    "SimulatedImage",
    "detector_model",
    "detector_model_from_dict",
    "simulate",
    "dicom_tags",
    "compare",
    "check_detector_json",
    "check_dose_json",
    "scored_thresholds",
]
