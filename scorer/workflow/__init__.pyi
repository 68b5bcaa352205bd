"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import detector as detector
from . import dose as dose
from . import headers as headers
from . import inputs as inputs
from . import results as results
from . import scoring as scoring
from . import simulated as simulated
from . import trials as trials
from .detector import (
    DetectorMeasurement as DetectorMeasurement,
)
from .detector import (
    beam_qualities as beam_qualities,
)
from .detector import (
    load_images as load_images,
)
from .detector import (
    measure_detector_files as measure_detector_files,
)
from .detector import (
    q_for_beam as q_for_beam,
)
from .dose import (
    file_background_kerma_ugy as file_background_kerma_ugy,
)
from .dose import (
    file_panel as file_panel,
)
from .dose import (
    score_dose_series as score_dose_series,
)
from .dose import (
    series_groups as series_groups,
)
from .headers import read_acquisition_extras as read_acquisition_extras
from .headers import read_image_metadata as read_image_metadata
from .inputs import (
    EXAMPLE_LIMITS as EXAMPLE_LIMITS,
)
from .inputs import (
    LimenWarning as LimenWarning,
)
from .inputs import (
    human_factor_from_analysis as human_factor_from_analysis,
)
from .inputs import (
    image_content_hash as image_content_hash,
)
from .inputs import (
    load_conversion as load_conversion,
)
from .inputs import (
    load_defect_map as load_defect_map,
)
from .inputs import (
    load_image as load_image,
)
from .inputs import (
    load_layout as load_layout,
)
from .inputs import (
    load_limits as load_limits,
)
from .inputs import (
    load_mtf as load_mtf,
)
from .inputs import (
    read_kerma_csv as read_kerma_csv,
)
from .inputs import (
    resolve_human_factor as resolve_human_factor,
)
from .results import (
    load_detector_json as load_detector_json,
)
from .results import (
    load_dose_json as load_dose_json,
)
from .results import (
    load_scored_json as load_scored_json,
)
from .scoring import ImageFiles as ImageFiles
from .scoring import score_files as score_files
from .simulated import load_detector_model as load_detector_model
from .simulated import write_simulated as write_simulated
from .trials import load_model_table as load_model_table
from .trials import load_trials as load_trials

__all__ = [
    "detector",
    "dose",
    "headers",
    "inputs",
    "results",
    "scoring",
    "simulated",
    "trials",
    "EXAMPLE_LIMITS",
    "LimenWarning",
    "human_factor_from_analysis",
    "image_content_hash",
    "load_conversion",
    "load_defect_map",
    "load_image",
    "load_layout",
    "load_limits",
    "load_mtf",
    "read_kerma_csv",
    "resolve_human_factor",
    "ImageFiles",
    "score_files",
    "score_dose_series",
    "series_groups",
    "file_panel",
    "file_background_kerma_ugy",
    "DetectorMeasurement",
    "measure_detector_files",
    "load_images",
    "beam_qualities",
    "q_for_beam",
    "load_detector_json",
    "load_dose_json",
    "load_scored_json",
    "load_detector_model",
    "write_simulated",
    "read_image_metadata",
    "read_acquisition_extras",
    "load_trials",
    "load_model_table",
]
