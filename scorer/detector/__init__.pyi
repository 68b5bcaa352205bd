"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import comparison as comparison
from . import dose as dose
from . import headline as headline
from . import measure as measure
from . import mtf as mtf
from . import nnps as nnps
from . import noise as noise
from . import panel_model as panel_model
from . import predict as predict
from . import presets as presets
from . import simulator as simulator
from .comparison import (
    check_detector_json as check_detector_json,
)
from .comparison import (
    check_dose_json as check_dose_json,
)
from .comparison import (
    compare as compare,
)
from .comparison import (
    scored_thresholds as scored_thresholds,
)
from .dose import (
    compare_series as compare_series,
)
from .dose import (
    dose_series as dose_series,
)
from .dose import (
    fit_power_law as fit_power_law,
)
from .dose import (
    kerma_ratio as kerma_ratio,
)
from .dose_groups import (
    background_kerma_ugy as background_kerma_ugy,
)
from .dose_groups import (
    group_by_kerma as group_by_kerma,
)
from .measure import (
    DetectorMetrics as DetectorMetrics,
)
from .measure import (
    compute_dqe as compute_dqe,
)
from .measure import (
    fit_conversion as fit_conversion,
)
from .measure import (
    measure_detector as measure_detector,
)
from .measure import measure_noise_series as measure_noise_series
from .mtf import MTFResult as MTFResult
from .mtf import mean_mtf as mean_mtf
from .mtf import measure_mtf as measure_mtf
from .nnps import NNPSResult as NNPSResult
from .nnps import measure_nnps as measure_nnps
from .noise import fit_components as fit_components
from .noise import group_flats as group_flats
from .panel_model import DetectorModel as DetectorModel
from .predict import (
    PredictedThreshold as PredictedThreshold,
)
from .predict import (
    predict_from_detector as predict_from_detector,
)
from .predict import (
    predict_thresholds as predict_thresholds,
)
from .presets import (
    PRESETS as PRESETS,
)
from .presets import (
    SPECS as SPECS,
)
from .presets import (
    detector_model as detector_model,
)
from .presets import (
    detector_model_from_dict as detector_model_from_dict,
)
from .simulator import (
    Pose as Pose,
)
from .simulator import (
    SimulatedImage as SimulatedImage,
)
from .simulator import (
    dicom_tags as dicom_tags,
)
from .simulator import (
    simulate as simulate,
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
